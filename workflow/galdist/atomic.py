"""Atomic file writes with the standard library alone: a temporary file beside the
target, fsync, rename. Kept apart from ``galdist.io`` (which needs numpy and pyarrow) so
a job that only copies a file (``galdist.grid_cache``) starts without them."""

from __future__ import annotations

import contextlib
import glob
import os
import shutil
import tempfile
from pathlib import Path


def _umask() -> int:
    try:  # Linux: read it without changing it (os.umask would, for a moment, for every thread)
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _atomic_target(path: Path, suffix: str = ".tmp"):
    path.parent.mkdir(parents=True, exist_ok=True)
    # one job writes a given output: temporaries a killed earlier attempt left are its own
    for stale in path.parent.glob(f".{glob.escape(path.name)}.*{suffix}"):
        stale.unlink(missing_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=suffix, dir=path.parent)
    # mkstemp creates the file owner-only (0600); the renamed file gets the mode any
    # other new file would have
    os.fchmod(fd, 0o666 & ~_umask())
    os.close(fd)
    return Path(tmp)


def _commit(tmp: Path, path: Path) -> None:
    with open(tmp, "rb") as fh:
        os.fsync(fh.fileno())
    os.replace(tmp, path)


@contextlib.contextmanager
def atomic_path(path: str | Path):
    """A temporary path beside ``path`` to write to; renamed onto ``path`` only on success.

    The temporary name keeps ``path``'s suffix, so writers that choose the format from
    it (numpy.savez, matplotlib savefig) work unchanged::

        with atomic_path(out) as tmp:
            np.savez(tmp, ...)
    """
    path = Path(path)
    tmp = _atomic_target(path, suffix=path.suffix)
    try:
        yield tmp
        _commit(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def _target(dst: Path, clean_stale: bool) -> Path:
    if clean_stale:
        return _atomic_target(dst, suffix=dst.suffix)
    # a folder shared by concurrent jobs (the grid cache): leave other writers' temporaries alone
    dst.parent.mkdir(parents=True, exist_ok=True)
    fd, name = tempfile.mkstemp(prefix=f".{dst.name}.", suffix=".part", dir=dst.parent)
    os.fchmod(fd, 0o666 & ~_umask())
    os.close(fd)
    return Path(name)


def copy_file(src: str | Path, dst: str | Path, clean_stale: bool = True) -> None:
    """Copy ``src`` to ``dst`` atomically. ``clean_stale`` False: in a folder shared by
    concurrent jobs, e.g. the grid cache."""
    dst = Path(dst)
    tmp = _target(dst, clean_stale)
    try:
        shutil.copyfile(src, tmp)
        _commit(tmp, dst)
    finally:
        tmp.unlink(missing_ok=True)


def write_text(dst: str | Path, text: str, clean_stale: bool = True) -> None:
    """Write ``text`` (UTF-8) to ``dst`` atomically; ``clean_stale`` as in ``copy_file``."""
    dst = Path(dst)
    tmp = _target(dst, clean_stale)
    try:
        tmp.write_text(text, encoding="utf-8")
        _commit(tmp, dst)
    finally:
        tmp.unlink(missing_ok=True)
