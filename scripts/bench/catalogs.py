"""Synthetic catalogs of N rows, from the demo generator, written chunk by chunk."""

from __future__ import annotations

import hashlib
import os
import tempfile
import time
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from bench.common import OUT_DIR, REPO, label, say
from galdist import demo

GENERATOR_VERSION = "1"  # bump when the way catalogs are chunked and seeded changes


def _generator_stamp(seed: int, chunk: int) -> dict:
    demo_src = Path(demo.__file__).read_bytes()
    return {"version": GENERATOR_VERSION, "seed": str(seed), "chunk_rows": str(chunk),
            "demo_py_sha256": hashlib.sha256(demo_src).hexdigest()}


def ensure_catalog(n: int, seed: int, chunk: int, regenerate: bool = False,
                   keep_stale: bool = False) -> tuple[Path, dict]:
    """The synthetic catalog of ``n`` rows, written in chunks.

    An existing file is reused when its row count, seed and chunking match and it was
    written by the current galdist/demo.py (or by any version, with ``keep_stale``).
    """
    path = OUT_DIR / f"catalog_{n}.parquet"
    stamp = _generator_stamp(seed, chunk)
    if path.exists() and not regenerate:
        try:
            meta = pq.read_metadata(path)
            kv = {k.decode(): v.decode() for k, v in (meta.metadata or {}).items()
                  if k.startswith(b"galdist.benchmark.")}
            same = (meta.num_rows == n and kv.get("galdist.benchmark.version") == stamp["version"]
                    and kv.get("galdist.benchmark.seed") == stamp["seed"]
                    and kv.get("galdist.benchmark.chunk_rows") == stamp["chunk_rows"])
            stale = kv.get("galdist.benchmark.demo_py_sha256") != stamp["demo_py_sha256"]
            if same and stale and not keep_stale:
                say(f"{path.name} was written by another version of galdist/demo.py: rebuilding "
                    "(--keep-catalogs reuses it)")
            elif same:
                return path, {"path": str(path.relative_to(REPO)), "reused": True, "generate_s": None,
                              "bytes": path.stat().st_size, "columns": meta.num_columns,
                              "demo_py_changed_since": stale}
        except (OSError, pa.ArrowException):
            pass
    OUT_DIR.mkdir(parents=True, exist_ok=True)
    settings = demo.settings_from_config()
    t0 = time.perf_counter()
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=OUT_DIR)
    os.close(fd)
    tmp = Path(tmp_name)
    writer = None
    try:
        done, i = 0, 0
        while done < n:
            m = min(chunk, n - done)
            table = demo.make_catalog(m, seed + i, settings, first_id=1 + done)
            if writer is None:
                schema = table.schema.with_metadata({f"galdist.benchmark.{k}": v for k, v in stamp.items()}
                                                    | {"galdist.benchmark.rows": str(n)})
                writer = pq.ParquetWriter(tmp, schema, compression="zstd")
            writer.write_table(table.cast(writer.schema), row_group_size=chunk)
            done += m
            i += 1
            if n >= 10 * chunk and i % 8 == 0:
                say(f"  catalog {label(n)}: {done:,} rows")
        writer.close()
        writer = None
        os.replace(tmp, path)
    finally:
        if writer is not None:
            writer.close()
        tmp.unlink(missing_ok=True)
    elapsed = time.perf_counter() - t0
    return path, {"path": str(path.relative_to(REPO)), "reused": False, "generate_s": round(elapsed, 2),
                  "bytes": path.stat().st_size, "columns": pq.read_metadata(path).num_columns,
                  "demo_py_changed_since": False}
