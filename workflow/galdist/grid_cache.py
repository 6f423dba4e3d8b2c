"""A content-addressed cache of the once-per-configuration grids (K(z) grids, the mu(z)
grid, the extinction coefficients), shared by every run of one output folder.

An entry is ``<output_dir>/.galdist-cache/<kind>-<key>.<ext>``, where ``key`` is the
SHA-256 of everything the result depends on: the config sections the step reads and
the content digests of the files it reads (both passed in by the rule script), the
source of every galdist module (any code change misses: safe rather than clever), and
the versions of the libraries that compute it. A hit copies the entry to the rule's
output without importing those libraries; a miss computes, writes the output, then
stores a copy. Writes are atomic, so a killed job never leaves a partial entry.

Only the standard library is imported here, so a hit costs little more than Python's
start-up. Delete the folder to clear the cache; it is rebuilt as needed.
"""

from __future__ import annotations

import hashlib
import json
import logging
from collections.abc import Callable, Mapping
from functools import lru_cache
from pathlib import Path

from .atomic import copy_file, write_text

CACHE_FOLDER = ".galdist-cache"
#: libraries whose version is part of every key (the ones the grids are computed with)
LIBRARIES = ("numpy", "scipy", "astropy", "speclite", "dust-extinction", "pyyaml")

log = logging.getLogger("galdist")


PACKAGE = Path(__file__).parent


@lru_cache(maxsize=4)
def code_digest(root: Path = PACKAGE) -> str:
    """SHA-256 over every file of the galdist package at ``root``: each module's source
    and each shipped data file (templates, tables, calibrations)."""
    total = hashlib.sha256()
    files = sorted(p for p in root.rglob("*") if p.is_file() and "__pycache__" not in p.parts)
    for path in files:
        total.update(f"{path.relative_to(root).as_posix()}\0".encode())
        total.update(hashlib.sha256(path.read_bytes()).digest())
    return total.hexdigest()


@lru_cache(maxsize=1)
def library_versions() -> dict[str, str | None]:
    """Installed version of each of ``LIBRARIES`` (None: not installed), and Python's."""
    import platform
    from importlib import metadata

    versions = {"python": platform.python_version()}
    for name in LIBRARIES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = None
    return versions


def cache_key(kind: str, inputs: Mapping) -> str:
    """SHA-256 of ``kind``, ``inputs`` (config sections, content digests: JSON-able),
    galdist's code and the libraries' versions."""
    record = {"kind": kind, "inputs": inputs, "code": code_digest(), "libraries": library_versions()}
    text = json.dumps(record, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode()).hexdigest()


def entry_path(output_dir: str | Path, kind: str, inputs: Mapping, ext: str) -> Path:
    """The cache file of ``kind`` for ``inputs`` under ``output_dir``."""
    return Path(output_dir) / CACHE_FOLDER / f"{kind}-{cache_key(kind, inputs)}{ext}"


def cached(output: str | Path, output_dir: str | Path, kind: str, inputs: Mapping,
           build: Callable[[str], None]) -> bool:
    """Write ``output``: from the cache if ``inputs`` were seen before, else with
    ``build(output)`` and then into the cache. True on a hit."""
    output = Path(output)
    entry = entry_path(output_dir, kind, inputs, "".join(output.suffixes))
    if entry.is_file():
        copy_file(entry, output)
        log.info("%s: from the cache, %s", kind, entry)
        return True
    output.parent.mkdir(parents=True, exist_ok=True)
    build(str(output))
    try:
        copy_file(output, entry, clean_stale=False)
        log.info("%s: computed, stored in the cache as %s", kind, entry)
    except OSError as exc:  # the cache only saves time: a full or read-only disk costs a recompute
        log.warning("%s: computed, not cached (%s)", kind, exc)
    return False


def file_digest(path) -> str | None:
    """SHA-256 of the file at ``path``, or None if there is no such file (a library's
    name, like a speclite filter name, rather than a path)."""
    if path is None or not Path(path).is_file():
        return None
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def remembered(cache_dir: str | Path | None, kind: str, inputs: Mapping, compute: Callable[[], object]):
    """``compute()`` (a JSON-able value), or the value it gave before for the same ``inputs``
    (same key as ``cached``), kept in ``cache_dir``. ``cache_dir`` None: always compute.
    For the parse-time checks that would otherwise import speclite and dust_extinction
    at every start of the workflow. Stored only where ``cache_dir`` exists already (the
    grid jobs create it): a start that stops on a bad config writes nothing."""
    if cache_dir is None:
        return compute()
    entry = Path(cache_dir) / f"{kind}-{cache_key(kind, inputs)}.json"
    try:
        return json.loads(entry.read_text(encoding="utf-8"))["value"]
    except (OSError, ValueError, KeyError, TypeError):
        pass  # no entry, or a damaged one: compute again
    value = compute()
    text = json.dumps({"kind": kind, "value": value}, sort_keys=True)
    try:
        if entry.parent.is_dir():
            write_text(entry, text, clean_stale=False)
    except OSError:
        pass  # the cache only saves time
    return json.loads(text)["value"]
