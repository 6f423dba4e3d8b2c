"""The I/O floor: a bare read of the catalog and a write shaped like the product."""

from __future__ import annotations

import os
import tempfile
import time
from pathlib import Path

import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from bench.common import OUT_DIR
from galdist import io as gio


def io_floor(catalog: Path, product: Path, repeats: int = 2) -> dict:
    """The fastest of ``repeats`` I/O floor measurements (each a fresh read and write)."""
    runs = [io_floor_once(catalog, product) for _ in range(max(1, repeats))]
    best = min(runs, key=lambda r: r["floor_s"])
    # for information: the same write with pyarrow's default, a dictionary tried on every
    # column (what galdist wrote before it restricted dictionaries to text and flags)
    default = io_floor_once(catalog, product, product_encoding=False)
    return best | {"repeats": len(runs), "all_floor_s": [r["floor_s"] for r in runs],
                   "write_s_default_encoding": default["write_s"],
                   "write_bytes_default_encoding": default["write_bytes"]}


def product_shape(product: Path) -> tuple[pa.Schema, int]:
    """Schema and row count of the product, one file or a folder of parts (from the footers)."""
    if Path(product).is_dir():
        dataset = ds.dataset(product, format="parquet")
        return dataset.schema, dataset.count_rows()
    return pq.read_schema(product), pq.read_metadata(product).num_rows


def io_floor_once(catalog: Path, product: Path, product_encoding: bool = True) -> dict:
    """Bare read of the catalog + write of a table shaped like the product, with the
    product's writer settings (zstd, row groups of ``ROW_GROUP_ROWS``, dictionaries on
    text and flag columns only; pyarrow's default dictionaries unless ``product_encoding``),
    fsync included."""
    out_schema, out_rows = product_shape(product)
    t0 = time.perf_counter()
    table = pq.read_table(catalog)
    t_read = time.perf_counter() - t0
    strings = [c for c in table.columns if pa.types.is_string(c.type) or pa.types.is_large_string(c.type)]
    numbers = [c for c in table.columns if not (pa.types.is_string(c.type) or pa.types.is_large_string(c.type))]
    arrays, names = [], []
    for i, f in enumerate(out_schema):
        is_str = pa.types.is_string(f.type) or pa.types.is_large_string(f.type)
        pool = strings if (is_str and strings) else numbers
        arrays.append(pool[i % len(pool)])
        names.append(f.name)
    shaped = pa.Table.from_arrays(arrays, names=names)
    if shaped.num_rows != out_rows:  # never expected: the product has a row per input galaxy
        shaped = shaped.slice(0, out_rows)
    fd, tmp_name = tempfile.mkstemp(prefix=".floor.", suffix=".parquet", dir=OUT_DIR)
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        t1 = time.perf_counter()
        dictionary = gio.dictionary_columns(shaped.schema) if product_encoding else True
        pq.write_table(shaped, tmp, compression=gio.PRODUCT_COMPRESSION, row_group_size=gio.ROW_GROUP_ROWS,
                       use_dictionary=dictionary)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        t_write = time.perf_counter() - t1
        written = tmp.stat().st_size
    finally:
        tmp.unlink(missing_ok=True)
    return {"read_s": round(t_read, 3), "write_s": round(t_write, 3), "floor_s": round(t_read + t_write, 3),
            "read_columns": table.num_columns, "write_columns": len(names), "write_rows": shaped.num_rows,
            "write_bytes": written}
