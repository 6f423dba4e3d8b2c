#!/usr/bin/env python
"""Write the flag table of galdist.flags into README.md between its markers.

    python scripts/sync_flag_table.py          # rewrite README.md
    python scripts/sync_flag_table.py --check  # exit 1 if README.md is out of date
"""
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "workflow"))
from galdist.flags import markdown_table  # noqa: E402

README = Path(__file__).resolve().parent.parent / "README.md"
START, END = "<!-- flags:start -->", "<!-- flags:end -->"


def synced(text: str) -> str:
    head, rest = text.split(START, 1)
    _, tail = rest.split(END, 1)
    return f"{head}{START}\n{markdown_table().strip()}\n{END}{tail}"


if __name__ == "__main__":
    text = README.read_text(encoding="utf-8")
    new = synced(text)
    if "--check" in sys.argv:
        sys.exit(0 if new == text else 1)
    README.write_text(new, encoding="utf-8")
