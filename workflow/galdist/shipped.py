"""Data files that ship inside the package, found by name from any working directory.

Config names a shipped calibration or coefficient table by its bare name
(``tf_i_tully_courtois_2012``); anything that looks like a path (a separator or a
suffix) is the user's own file, relative to the working directory.
"""

from __future__ import annotations

from pathlib import Path

DATA_DIR = Path(__file__).resolve().parent / "data"
#: The workflow's top folder (the checkout): Snakefile, config/, scripts/, profiles/.
WORKFLOW_ROOT = Path(__file__).resolve().parents[2]


def names(kind: str) -> list[str]:
    """Bare names of the shipped files of one kind (``calibrations``, ``extinction``)."""
    return sorted(p.stem for p in (DATA_DIR / kind).glob("*.yaml"))


def is_bare_name(spec: str) -> bool:
    return "/" not in spec and "\\" not in spec and not Path(spec).suffix


def find(kind: str, spec: str) -> Path:
    """The file ``spec`` names: a shipped file by bare name, else the user's path as given.

    Raises FileNotFoundError with the shipped names when a bare name is unknown.
    """
    if is_bare_name(spec):
        path = DATA_DIR / kind / f"{spec}.yaml"
        if not path.is_file():
            raise FileNotFoundError(f"no shipped {kind} file named '{spec}' (shipped: {', '.join(names(kind))}; "
                                    "or give a path to your own file)")
        return path
    return Path(spec)
