"""Peak memory of the eta likelihoods as the assembly computes and writes them (batch by batch):
``python scripts/bench/likelihoods.py [rows ...]`` prints rows, peak RSS and bytes per row of the
companion file for two methods and mu_best. The peak must not grow with the rows."""
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import psutil
import pyarrow as pa

from galdist import likelihood
from galdist.io import AtomicParquetWriter
from galdist.product import likelihood_schema

BATCH = 131_072  # the assembly's batch (galdist.io.iter_shard)


def run(rows: int, folder: Path) -> tuple[float, float]:
    grid = likelihood.eta_grid()
    proc, peak, done = psutil.Process(), [0], threading.Event()

    def sample():
        while not done.is_set():
            peak[0] = max(peak[0], proc.memory_info().rss)
            time.sleep(0.01)

    threading.Thread(target=sample, daemon=True).start()
    rng = np.random.default_rng(0)
    path, writer = folder / f"lk{rows}.parquet", None
    for a in range(0, rows, BATCH):
        n = min(BATCH, rows - a)
        mu = rng.uniform(33, 37, n)
        mu_z = mu + rng.normal(0, 0.4, n)
        sbf = np.where(rng.uniform(size=n) < 0.3, mu, np.nan)
        ids = pa.array(np.arange(a, a + n).astype(str))
        dists = {"tf": (mu, np.full(n, 0.4)), "sbf": (sbf, np.full(n, 0.1)), "best": (mu, np.full(n, 0.38))}
        for lo, hi, lists, _ in likelihood.likelihood_blocks(dists, mu_z, grid):  # as galdist.product.assemble
            t = pa.table({"galaxy_id": ids[lo:hi]} | {f"{k}_eta_like": v for k, v in lists.items()})
            writer = writer or AtomicParquetWriter(path, likelihood_schema(t.schema, grid))
            writer.write(t.cast(writer.writer.schema))
    writer.__exit__(None, None, None)
    done.set()
    return peak[0] / 2**20, path.stat().st_size / rows


if __name__ == "__main__":
    with tempfile.TemporaryDirectory() as tmp:
        for rows in [int(float(r)) for r in (sys.argv[1:] or ["2.6e5", "1.3e6"])]:
            mb, per_row = run(rows, Path(tmp))
            print(f"{rows:>10d} rows: peak RSS {mb:7.0f} MB, companion file {per_row:6.0f} B/row")
