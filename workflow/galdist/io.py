"""Parquet and JSON I/O: atomic writes, units in field metadata, shard fingerprints.

Every file galdist writes goes to a temporary name in the same directory and is
renamed into place, so no reader ever sees half a file. Per-shard stage outputs
are narrow (only the columns a stage adds) and carry the shard's fingerprint, a
hash of its galaxy_id column, which the assemble step checks before joining by
position.
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

FINGERPRINT_KEY = b"galdist.shard_fingerprint"
INTERMEDIATE_COMPRESSION = "snappy"  # fastest to write and read for files read once
PRODUCT_COMPRESSION = "zstd"  # smaller final product, still fast to read


def _atomic_target(path: Path):
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    return Path(tmp)


def _commit(tmp: Path, path: Path) -> None:
    with open(tmp, "rb") as fh:
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def write_parquet(table: pa.Table, path: str | Path, compression: str = INTERMEDIATE_COMPRESSION) -> None:
    """Write ``table`` atomically (temporary file, fsync, rename)."""
    path = Path(path)
    tmp = _atomic_target(path)
    try:
        pq.write_table(table, tmp, compression=compression, row_group_size=256 * 1024)
        _commit(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


class AtomicParquetWriter:
    """Stream record batches into one Parquet file that appears only when complete."""

    def __init__(self, path: str | Path, schema: pa.Schema, compression: str = PRODUCT_COMPRESSION):
        self.path = Path(path)
        self.tmp = _atomic_target(self.path)
        self.writer = pq.ParquetWriter(self.tmp, schema, compression=compression)

    def write(self, table: pa.Table) -> None:
        self.writer.write_table(table, row_group_size=256 * 1024)

    def add_metadata(self, metadata: dict) -> None:
        """Key-value metadata written into the footer when the file closes."""
        self.writer.add_key_value_metadata(metadata)

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        self.writer.close()
        if exc_type is None:
            _commit(self.tmp, self.path)
        self.tmp.unlink(missing_ok=True)
        return False


def write_json(data, path: str | Path) -> None:
    """Write JSON atomically, keys sorted so identical content gives identical bytes."""
    path = Path(path)
    tmp = _atomic_target(path)
    try:
        tmp.write_text(json.dumps(data, indent=2, sort_keys=True, allow_nan=False, default=_json_default) + "\n",
                       encoding="utf-8")
        _commit(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def _json_default(obj):
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return None if not np.isfinite(obj) else float(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(f"not JSON serialisable: {type(obj)}")


class Fingerprint:
    """Incremental hash of a galaxy_id column, fed batch by batch in row order."""

    def __init__(self):
        self._h = hashlib.blake2b(digest_size=16)

    def update(self, galaxy_ids) -> np.ndarray:
        """Add a batch; returns the per-row 64-bit hashes (reused for duplicate checks)."""
        rows = pd.util.hash_array(np.asarray(galaxy_ids, dtype=object))
        self._h.update(rows.tobytes())
        return rows

    def hexdigest(self) -> str:
        return self._h.hexdigest()


def fingerprint(galaxy_ids) -> str:
    """A hash of a shard's galaxy_id column, in order."""
    f = Fingerprint()
    f.update(galaxy_ids)
    return f.hexdigest()


def field(name: str, dtype: pa.DataType, unit: str | None = None) -> pa.Field:
    """A Parquet field with its unit in the field metadata."""
    return pa.field(name, dtype, metadata={b"unit": unit.encode()} if unit else None)


def table_from_columns(columns: dict, units: dict | None = None, metadata: dict | None = None) -> pa.Table:
    """A pyarrow table from a dict of numpy arrays, units as field metadata."""
    units = units or {}
    arrays, fields = [], []
    for name, values in columns.items():
        kind = getattr(values, "dtype", np.dtype(object)).kind
        arr = pa.array(values, type=pa.string()) if kind in "OUS" else pa.array(values)
        arrays.append(arr)
        fields.append(field(name, arr.type, units.get(name)))
    schema = pa.schema(fields, metadata={k.encode() if isinstance(k, str) else k:
                                         v.encode() if isinstance(v, str) else v
                                         for k, v in (metadata or {}).items()})
    return pa.Table.from_arrays(arrays, schema=schema)


def write_stage_columns(columns: dict, path: str | Path, shard_fingerprint: str,
                        units: dict | None = None, extra_metadata: dict | None = None) -> None:
    """Write one stage's narrow output for one shard, stamped with the shard's fingerprint."""
    meta = {FINGERPRINT_KEY: shard_fingerprint.encode()}
    meta.update(extra_metadata or {})
    write_parquet(table_from_columns(columns, units, meta), path)


def read_fingerprint(path: str | Path) -> str:
    meta = pq.read_metadata(path).metadata or {}
    return meta.get(FINGERPRINT_KEY, b"").decode()


def read_columns(path: str | Path, columns: list[str] | None = None) -> dict:
    """Read columns of a Parquet file into a dict of numpy arrays (strings as object)."""
    if columns is not None:
        columns = list(dict.fromkeys(columns))  # a column asked for twice is read once
    table = pq.read_table(path, columns=columns)
    out = {}
    for name in table.column_names:
        col = table.column(name)
        if pa.types.is_string(col.type) or pa.types.is_large_string(col.type):
            out[name] = np.asarray(col.to_pylist(), dtype=object)
        else:
            out[name] = col.to_numpy()
    return out


def sha256_of(path: str | Path, chunk: int = 1 << 22) -> str:
    """SHA-256 of a file, or of every file under a directory (sorted by name)."""
    path = Path(path)
    files = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
    h = hashlib.sha256()
    for f in files:
        with open(f, "rb") as fh:
            while block := fh.read(chunk):
                h.update(block)
    return h.hexdigest()


class StaleInputError(RuntimeError):
    """A stage file does not belong to the shard it is joined with."""


def read_shard(shard_path: str | Path, columns: list[str] | None = None,
               stages: dict[str, str | Path] | None = None,
               stage_columns: dict[str, list[str] | None] | None = None) -> tuple[dict, str]:
    """Columns of one ingest shard plus the narrow files other stages wrote for it.

    Every stage file's fingerprint must equal the shard's; otherwise a
    StaleInputError names the file (the fix is to let Snakemake re-run that stage).
    Returns (columns, fingerprint).
    """
    fp = read_fingerprint(shard_path)
    out = read_columns(shard_path, columns)
    for name, path in (stages or {}).items():
        got = read_fingerprint(path)
        if got != fp:
            raise StaleInputError(f"{path} ({name}) was written for another version of shard "
                                  f"{shard_path}; delete it and re-run")
        out.update(read_columns(path, (stage_columns or {}).get(name)))
    return out, fp
