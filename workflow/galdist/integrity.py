"""What decides that a result is out of date: the content of its inputs, never a
modification time.

``content_digest`` gives the SHA-256 of input files (catalog, calibrations,
templates, maps, tables, filter curves); the workflow passes these digests as rule
parameters, so Snakemake re-runs a stage when a file's content changes, even when
it was copied with an older time stamp. Digests are cached by the file's identity
(path, size, inode, modification and status-change times): a change of content
always changes the status-change time, which no user command can set back.

``ingest_damage`` compares the ingest shards with what ingest recorded, so a
missing, truncated or replaced shard makes ingest run again instead of silently
dropping out of the shard list.
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import pyarrow.parquet as pq

from .catalog import source_files
from .io import FINGERPRINT_KEY, write_json


def _identity(path: Path) -> list:
    st = path.stat()
    return [st.st_size, st.st_ino, st.st_mtime_ns, st.st_ctime_ns]


def _sha256(path: Path, chunk: int = 1 << 22) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            h.update(block)
    return h.hexdigest()


def content_digest(paths, cache_path: str | Path | None = None) -> str:
    """One SHA-256 over the contents of ``paths`` (directories: their visible files).

    ``cache_path``: a JSON file remembering each file's digest by its identity, so an
    unchanged 10 GB catalog is not read again at every start.
    """
    cache = {}
    if cache_path is not None and Path(cache_path).is_file():
        try:
            cache = json.loads(Path(cache_path).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            cache = {}  # a damaged cache only costs a re-read
    total, changed = hashlib.sha256(), False
    for top in paths:
        for f in source_files(top, "parquet" if Path(top).is_dir() else "file"):
            key = os.path.abspath(f)
            ident = _identity(f)
            entry = cache.get(key)
            if not (isinstance(entry, dict) and entry.get("identity") == ident):
                entry = cache[key] = {"identity": ident, "sha256": _sha256(f)}
                changed = True
            total.update(f"{f}\0{entry['sha256']}\0".encode())
    if changed and cache_path is not None:
        write_json(cache, cache_path)
    return total.hexdigest()


def ingest_damage(shard_dir: str | Path, summary_path: str | Path) -> str | None:
    """Why the ingest shards no longer match what ingest recorded, or None if they do
    (or if ingest has not run yet)."""
    shard_dir, summary_path = Path(shard_dir), Path(summary_path)
    if not summary_path.is_file():
        return f"{summary_path} is missing" if shard_dir.is_dir() else None
    try:
        recorded = json.loads(summary_path.read_text(encoding="utf-8"))["shard_files"]
    except (OSError, ValueError, KeyError, TypeError):
        return f"{summary_path} is unreadable or from an older galdist"
    present = {p.name for p in shard_dir.glob("part-*.parquet")} if shard_dir.is_dir() else set()
    for entry in recorded:
        path = shard_dir / entry["name"]
        if entry["name"] not in present:
            return f"shard {path} is missing"
        try:
            meta = pq.read_metadata(path)
        except Exception:  # truncated, zero bytes, not Parquet: pyarrow raises several kinds
            return f"shard {path} is not a readable Parquet file"
        if meta.num_rows != entry["rows"] or (meta.metadata or {}).get(FINGERPRINT_KEY, b"").decode() != \
                entry["fingerprint"]:
            return f"shard {path} is not the one ingest wrote"
    extra = present - {e["name"] for e in recorded}
    if extra:
        return f"{shard_dir} holds shards ingest did not write ({', '.join(sorted(extra)[:3])})"
    return None


def mark_for_rerun(outputs) -> None:
    """Make Snakemake re-run the job of ``outputs`` by back-dating them (and a folder's
    time-stamp file) to 1970: then its inputs are newer. Used only after a content
    check has found the outputs damaged."""
    for out in map(Path, outputs):
        for path in (out, out / ".snakemake_timestamp") if out.is_dir() else (out,):
            if path.exists():
                os.utime(path, (0, 0), follow_symlinks=False)
