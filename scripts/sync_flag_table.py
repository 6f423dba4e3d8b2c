#!/usr/bin/env python
"""Write the flag table of galdist.flags and the column table of galdist.dictionary into
README.md between their markers.

    python scripts/sync_flag_table.py          # rewrite README.md
    python scripts/sync_flag_table.py --check  # exit 1 if README.md is out of date
"""
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "workflow"))
from galdist.dictionary import readme_section  # noqa: E402
from galdist.flags import markdown_table  # noqa: E402

README = Path(__file__).resolve().parent.parent / "README.md"
SECTIONS = {"flags": markdown_table, "columns": readme_section}


def synced(text: str) -> str:
    for name, make in SECTIONS.items():
        start, end = f"<!-- {name}:start -->", f"<!-- {name}:end -->"
        head, rest = text.split(start, 1)
        _, tail = rest.split(end, 1)
        text = f"{head}{start}\n{make().strip()}\n{end}{tail}"
    return text


if __name__ == "__main__":
    text = README.read_text(encoding="utf-8")
    new = synced(text)
    if "--check" in sys.argv:
        sys.exit(0 if new == text else 1)
    README.write_text(new, encoding="utf-8")
