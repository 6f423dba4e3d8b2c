"""Parquet and JSON I/O: atomic writes, units in field metadata, shard fingerprints.

Every file galdist writes goes to a temporary name in the same directory and is
renamed into place, so no reader ever sees half a file. Per-shard stage outputs
are narrow (only the columns a stage adds) and carry the shard's fingerprint, a
hash of the shard's whole content, which every reader checks before joining by
position.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import shutil
import zipfile
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .atomic import _atomic_target, _commit, atomic_path  # noqa: F401 (atomic_path: galdist.io's API)
from .errors import CorruptFileError, StaleInputError

FINGERPRINT_KEY = b"galdist.shard_fingerprint"
#: zstd (level 1, pyarrow's default) for the intermediates too: as fast to write as snappy here and
#: 12-22 % smaller per stage file (measured on the benchmark's shards; issue 22's disk budget)
INTERMEDIATE_COMPRESSION = "zstd"
PRODUCT_COMPRESSION = "zstd"  # smaller final product, still fast to read
ROW_GROUP_ROWS = 256 * 1024  # ~2 MB per float column: large enough to compress well, small to stream
#: float columns every file keeps in float64: positions (float32 resolves only ~0.1 arcsec at
#: 360 deg, too coarse to cross-match) and redshifts (the input of every distance). Every
#: other float is stored as float32 (relative precision 6e-8, far below any measurement
#: error) and read back as float64 (``read_columns``, ``iter_shard``): computed in full,
#: stored in half the bytes.
FULL_PRECISION = frozenset({"ra", "dec", "gal_l", "gal_b", "z_helio", "z_cmb"})


def stored_float(name: str) -> pa.DataType:
    """The Arrow type a float column ``name`` is stored as (``FULL_PRECISION``)."""
    return pa.float64() if name in FULL_PRECISION else pa.float32()


def _computed(col) -> np.ndarray:
    """A numeric Arrow column as the numpy array galdist computes with (float32 as float64)."""
    values = col.to_numpy()
    return values.astype(np.float64) if values.dtype == np.float32 else values


def is_arrow_text(dtype: pa.DataType) -> bool:
    """Arrow string or large string."""
    return pa.types.is_string(dtype) or pa.types.is_large_string(dtype)


def dictionary_columns(schema: pa.Schema) -> list[str]:
    """Columns worth Parquet dictionary encoding: text and the integer flag columns.

    Measured values are nearly all distinct, so a dictionary on them is built and then
    thrown away: on a 10^6-row, 83-column product, dictionary encoding on every column
    took 6.0 s and 431 MB, on these only 2.7 s and 369 MB (zstd, this machine).
    """
    return [f.name for f in schema if is_arrow_text(f.type) or pa.types.is_dictionary(f.type)
            or (pa.types.is_integer(f.type) and f.name.endswith("flags"))]


def write_parquet(table: pa.Table, path: str | Path, compression: str = INTERMEDIATE_COMPRESSION) -> None:
    """Write ``table`` atomically (temporary file, fsync, rename)."""
    path = Path(path)
    tmp = _atomic_target(path)
    try:
        pq.write_table(table, tmp, compression=compression, row_group_size=ROW_GROUP_ROWS,
                       use_dictionary=dictionary_columns(table.schema))
        _commit(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


class AtomicParquetWriter:
    """Stream record batches into one Parquet file that appears only when complete."""

    def __init__(self, path: str | Path, schema: pa.Schema, compression: str = PRODUCT_COMPRESSION):
        self.path = Path(path)
        self.tmp = _atomic_target(self.path)
        self.writer = pq.ParquetWriter(self.tmp, schema, compression=compression,
                                       use_dictionary=dictionary_columns(schema))

    def write(self, table: pa.Table) -> None:
        self.writer.write_table(table, row_group_size=ROW_GROUP_ROWS)

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


def dataset_files(path: str | Path) -> list[Path]:
    """The Parquet files of a product: the file itself, or a folder's part-*.parquet in
    order (config product_layout parts); FileNotFoundError naming a folder without parts."""
    path = Path(path)
    if not path.is_dir():
        return [path]
    parts = sorted(path.glob("part-*.parquet"))
    if not parts:
        raise FileNotFoundError(f"{path} holds no part-*.parquet files")
    return parts


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


def read_json(path: str | Path):
    """A JSON file galdist wrote; a damaged one is named, with the fix."""
    try:
        return json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise
    except (OSError, ValueError) as exc:
        raise CorruptFileError(f"{path}: not a readable JSON file ({type(exc).__name__}: {exc}); "
                               "delete it and run the same command again to rebuild it") from exc


@contextlib.contextmanager
def reading_grid(path: str | Path):
    """Wrap the read of a grid file galdist wrote (``.npz``): a damaged one is named, with the fix."""
    try:
        yield
    except FileNotFoundError:
        raise
    except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile) as exc:
        raise CorruptFileError(f"{path}: not a readable grid file ({type(exc).__name__}: {exc}); "
                               "delete it and run the same command again to rebuild it") from exc


def _json_default(obj):
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return None if not np.isfinite(obj) else float(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(f"not JSON serialisable: {type(obj)}")


class Fingerprint:
    """Incremental hash of a shard's content: every column, in row order, fed batch by
    batch (one hash per column, so how the rows were split into batches does not matter).

    A stage file stamped with it can only be joined to the very shard it was computed
    from: the same IDs with one changed redshift give another fingerprint.
    """

    def __init__(self):
        self._cols: dict[str, "hashlib.blake2b"] = {}

    def update(self, table: pa.Table) -> np.ndarray | None:
        """Add a batch; returns the per-row 64-bit hashes of its galaxy_id (reused by
        ingest's duplicate-ID check), or None if it has no galaxy_id."""
        import pandas as pd  # here: only ingest and assembly hash; shard jobs need not import pandas

        ids = None
        for name in table.column_names:
            col = table.column(name)
            if is_arrow_text(col.type):
                data = pd.util.hash_array(np.asarray(col.to_numpy(zero_copy_only=False), dtype=object))
                ids = data if name == "galaxy_id" else ids
            else:
                data = np.ascontiguousarray(col.to_numpy(zero_copy_only=False))
            self._cols.setdefault(name, hashlib.blake2b(name.encode(), digest_size=16)).update(data.tobytes())
        return ids

    def hexdigest(self) -> str:
        h = hashlib.blake2b(digest_size=16)
        for name in sorted(self._cols):
            h.update(self._cols[name].digest())
        return h.hexdigest()


def fingerprint(table: pa.Table) -> str:
    """The content fingerprint of a whole shard table."""
    f = Fingerprint()
    f.update(table)
    return f.hexdigest()


def field(name: str, dtype: pa.DataType, unit: str | None = None) -> pa.Field:
    """A Parquet field with its unit in the field metadata."""
    return pa.field(name, dtype, metadata={b"unit": unit.encode()} if unit else None)


def table_from_columns(columns: dict, units: dict | None = None, metadata: dict | None = None) -> pa.Table:
    """A pyarrow table from a dict of numpy (or pyarrow) arrays, units as field metadata."""
    units = units or {}
    arrays, fields = [], []
    for name, values in columns.items():
        if isinstance(values, pa.Array):
            arr = values
        else:
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
    table = table_from_columns(columns, units, meta)
    schema = pa.schema([f.with_type(stored_float(f.name)) if f.type == pa.float64() else f for f in table.schema],
                       metadata=table.schema.metadata)
    write_parquet(table.cast(schema), path)


@contextlib.contextmanager
def _reading(path):
    try:
        yield
    except FileNotFoundError:
        raise
    except (pa.ArrowException, OSError) as exc:
        raise CorruptFileError(f"{path}: not a readable Parquet file ({type(exc).__name__}: {exc}); "
                               "delete it and re-run to rebuild it") from exc


def read_fingerprint(path: str | Path) -> str:
    with _reading(path):
        meta = pq.read_metadata(path).metadata or {}
    return meta.get(FINGERPRINT_KEY, b"").decode()


def check_stamps(paths, key: str, expected: str, what: str) -> None:
    """Every file in ``paths`` must carry ``expected`` under metadata ``key``;
    otherwise StaleInputError names them all (up to five) and the fix."""
    stale = []
    for path in paths:
        with _reading(path):
            meta = pq.read_metadata(path).metadata or {}
        if meta.get(key.encode(), b"").decode() != expected:
            stale.append(str(path))
    if stale:
        shown = ", ".join(stale[:5]) + (f" and {len(stale) - 5} more" if len(stale) > 5 else "")
        raise StaleInputError(f"{len(stale)} file(s) were {what}: {shown}. Delete them and run the same "
                              "command again: they are rebuilt from the current inputs")


def read_columns(path: str | Path, columns: list[str] | None = None) -> dict:
    """Read columns of a Parquet file into a dict of numpy arrays (strings as object)."""
    if columns is not None:
        columns = list(dict.fromkeys(columns))  # a column asked for twice is read once
    with _reading(path):
        table = pq.read_table(path, columns=columns)
    out = {}
    for name in table.column_names:
        col = table.column(name)
        if is_arrow_text(col.type):
            out[name] = np.asarray(col.to_pylist(), dtype=object)
        else:
            out[name] = _computed(col)
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


def read_shard(shard_path: str | Path, columns: list[str] | None = None,
               stages: dict[str, str | Path] | None = None,
               stage_columns: dict[str, list[str] | None] | None = None) -> tuple[dict, str]:
    """Columns of one ingest shard plus the narrow files other stages wrote for it.

    Every stage file's fingerprint must equal the shard's; otherwise a
    StaleInputError names the file (the fix is to let Snakemake re-run that stage).
    Returns (columns, fingerprint).
    """
    fp = read_fingerprint(shard_path)
    stages = stages or {}
    check_stamps(stages.values(), FINGERPRINT_KEY.decode(), fp, f"computed from another version of shard {shard_path}")
    out = read_columns(shard_path, columns)
    for name, path in stages.items():
        out.update(read_columns(path, (stage_columns or {}).get(name)))
    return out, fp


def iter_rows(path: str | Path, columns: list[str] | None, rows: int):
    """Tables of exactly ``rows`` rows (the last may be shorter) from a Parquet file,
    whatever its row groups, so several files of one shard can be walked in step.

    Reads one row group at a time: memory is about one row group plus one batch
    (``ParquetFile.iter_batches`` buffers several times more, per file).
    """
    with _reading(path):
        pf = pq.ParquetFile(path)
    pending, have = [], 0
    for group in range(pf.num_row_groups):
        with _reading(path):
            table = pf.read_row_group(group, columns=columns)
        pending.append(table)
        have += table.num_rows
        while have >= rows:
            table = pa.concat_tables(pending).combine_chunks()
            yield table.slice(0, rows)
            rest = table.slice(rows)
            pending, have = ([rest], rest.num_rows) if rest.num_rows else ([], 0)
    if have:
        yield pa.concat_tables(pending).combine_chunks()


def iter_shard(shard_path: str | Path, stages: dict[str, str | Path], rows: int = 131_072):
    """The ingest shard and its stage files, walked together in aligned row batches.

    Yields (columns, units) per batch: a dict of every column (numbers as numpy
    arrays, text as pyarrow arrays, never Python objects), and the units from the
    files' field metadata. Fingerprints are checked first, as in
    ``read_shard``.
    """
    fp = read_fingerprint(shard_path)
    paths = {"shard": shard_path, **stages}
    check_stamps(stages.values(), FINGERPRINT_KEY.decode(), fp, f"computed from another version of shard {shard_path}")
    units = {}
    for path in paths.values():
        units.update({f.name: f.metadata[b"unit"].decode() for f in pq.read_schema(path)
                      if f.metadata and b"unit" in f.metadata})
    walkers = [iter_rows(p, None, rows) for p in paths.values()]
    for parts in zip(*walkers):
        cols = {}
        for table in parts:
            for name in table.column_names:
                col = table.column(name)
                cols[name] = col.chunk(0) if is_arrow_text(col.type) else _computed(col)
        yield cols, units



class RecordSpill:
    """Per-key append-only files of numpy records, read back chunk by chunk.

    Lets a job keep a per-row sample of any size at a fixed memory cost: ``append``
    writes records to a file per key in a temporary directory beside ``near``; a
    ``reader`` yields them again in chunks of ``chunk_rows`` as often as it is
    iterated (plain reads: the page cache holds the data, not the process). The
    directory, ``.<name of near>.spill``, is removed when the spill is closed, and a
    left-over one (from a killed job) when the next spill for ``near`` opens::

        with RecordSpill(output_path) as spill:
            for part in parts:
                spill.extend(part)          # {group: {name: records}}
            use(spill.nested())             # {group: {name: re-iterable chunks}}
    """

    def __init__(self, near: str | Path, chunk_rows: int = 1 << 20):
        near = Path(near)
        near.parent.mkdir(parents=True, exist_ok=True)
        self._dir = near.parent / f".{near.name}.spill"
        shutil.rmtree(self._dir, ignore_errors=True)
        self._dir.mkdir()
        self.chunk_rows = int(chunk_rows)
        self._files: dict[str, tuple[Path, np.dtype]] = {}

    def append(self, key: str, records: np.ndarray) -> None:
        """Add records under ``key`` (every append to one key must share a dtype)."""
        records = np.ascontiguousarray(records)
        path, dtype = self._files.setdefault(key, (self._dir / f"{len(self._files)}.bin", records.dtype))
        if dtype != records.dtype:
            raise TypeError(f"spill key {key!r}: dtype {records.dtype} after {dtype}")
        with open(path, "ab") as fh:
            records.tofile(fh)

    def extend(self, nested: dict) -> None:
        """``append`` every leaf of {group: {name: records}} under "group/name"."""
        for group, items in nested.items():
            for name, recs in items.items():
                self.append(f"{group}/{name}", recs)

    def keys(self) -> list[str]:
        return list(self._files)

    def reader(self, key: str) -> "_SpillReader":
        path, dtype = self._files[key]
        return _SpillReader(path, dtype, self.chunk_rows)

    def nested(self) -> dict:
        """{group: {name: reader}} for every key ``extend`` added."""
        out: dict = {}
        for key in self._files:
            group, name = key.split("/", 1)
            out.setdefault(group, {})[name] = self.reader(key)
        return out

    def close(self) -> None:
        shutil.rmtree(self._dir, ignore_errors=True)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False


class _SpillReader:
    """Re-iterable chunks of one spill file."""

    def __init__(self, path: Path, dtype: np.dtype, chunk_rows: int):
        self.path, self.dtype, self.chunk_rows = path, dtype, chunk_rows

    def __len__(self) -> int:
        return self.path.stat().st_size // self.dtype.itemsize

    def __iter__(self):
        with open(self.path, "rb") as fh:
            while True:
                chunk = np.fromfile(fh, dtype=self.dtype, count=self.chunk_rows)
                if chunk.size == 0:
                    return
                yield chunk
