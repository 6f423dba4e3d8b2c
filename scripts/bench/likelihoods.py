"""Peak memory of the eta likelihoods, in the two places they are computed:

* ``job``: a method job's likelihood step for one shard (``MethodSpec.likelihood_parts`` into
  ``likelihood.write_part``): the Fundamental Plane's gaussian estimator, whose posterior is
  every row's likelihood (the heaviest case), on invented galaxies around the registry's
  typical one;
* ``assembly``: the assembly's stitching (``likelihood.likelihood_blocks`` with a part read
  forward by ``likelihood.PartReader``, the product for mu_best, the companion file written
  a block at a time), for three methods and mu_best, the FP rows all from a part.

``python scripts/bench/likelihoods.py [rows ...]`` prints, per shard size, the peak RSS of
each step and the bytes per row of the part and companion files. The peak must not grow
with the rows beyond the shard's own columns (the job's inputs and outputs are per row).
"""
import dataclasses
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import psutil
import pyarrow as pa

from galdist import likelihood, methods
from galdist.calibration import load_calibration
from galdist.io import AtomicParquetWriter
from galdist.product import likelihood_schema

BATCH = 131_072  # the assembly's batch (galdist.io.iter_shard)


class Peak:
    """Peak RSS (MB) of this process while the block runs, sampled every 10 ms."""

    def __enter__(self):
        self.proc, self.peak, self.done = psutil.Process(), 0, threading.Event()
        self.start = self.proc.memory_info().rss

        def sample():
            while not self.done.is_set():
                self.peak = max(self.peak, self.proc.memory_info().rss)
                time.sleep(0.01)

        self.thread = threading.Thread(target=sample, daemon=True)
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.done.set()
        self.thread.join()
        self.peak = max(self.peak, self.proc.memory_info().rss)
        self.mb, self.before_mb = self.peak / 2**20, self.start / 2**20
        return False


def fp_shard(rows: int, rng):
    """Invented FP galaxies about the registry's typical one, the job's distances and settings."""
    from galdist.config import DEFAULT_CONFIG, load, validate
    from galdist import flags

    spec = methods.REGISTRY["fp"]
    config = validate(load(DEFAULT_CONFIG))
    config["fp"] |= {"estimator": "gaussian", "mc_draws": 0}
    cal = load_calibration(config["fp"]["calibration"])
    settings = spec.settings_for(config, cal)
    inputs = {name: (flags.new(rows) if inp.kind == "flags" else np.full(rows, float(inp.typical)))
              for name, inp in spec.inputs.items()}
    inputs["fp_sigma"] = 10 ** rng.normal(2.25, 0.08, rows)
    inputs["fp_re_arcsec"] = 10 ** rng.normal(0.7, 0.15, rows)
    inputs["fp_mu_e"] = rng.normal(17.5, 0.5, rows)
    inputs["z_cmb"] = inputs["z_helio"] + 0.0005
    out = spec.distances(inputs, cal, settings, config)
    return spec, config["fp"], inputs, cal, settings, out


def job(rows: int, folder: Path) -> tuple[float, float, float]:
    rng = np.random.default_rng(0)
    spec, section, inputs, cal, settings, out = fp_shard(rows, rng)
    grid = likelihood.eta_grid()
    path = folder / f"part{rows}.parquet"
    with Peak() as peak:
        likelihood.write_part(path, spec.likelihood_parts(section, inputs, cal, settings, out, inputs["mu_z"], [],
                                                          grid), grid, {b"galdist.shard_fingerprint": b"bench"})
    return peak.before_mb, peak.mb, path.stat().st_size / rows


def assembly(rows: int, folder: Path) -> tuple[float, float, float]:
    grid = likelihood.eta_grid()
    rng = np.random.default_rng(1)
    # the FP part: a skewed curve for every row (as the gaussian estimator's posterior is)
    part = folder / f"fp-part{rows}.parquet"

    def curves(a, b):
        centre = rng.normal(0, 0.1, b - a)[:, None]
        x = (grid[None, :] - centre) / 0.1
        dens = np.exp(-0.5 * x ** 2) * (1 + np.tanh(x))
        return dens / np.trapezoid(dens, grid, axis=1)[:, None]

    likelihood.write_part(part, ((np.arange(a, min(rows, a + likelihood.BLOCK_ROWS)),
                                  curves(a, min(rows, a + likelihood.BLOCK_ROWS)), likelihood.POSTERIOR)
                                 for a in range(0, rows, likelihood.BLOCK_ROWS)), grid, {})
    path, writer = folder / f"lk{rows}.parquet", None
    with Peak() as peak:
        reader = likelihood.PartReader(part)
        for a in range(0, rows, BATCH):
            n = min(BATCH, rows - a)
            mu = rng.uniform(33, 37, n)
            mu_z = mu + rng.normal(0, 0.4, n)
            sbf = np.where(rng.uniform(size=n) < 0.3, mu, np.nan)
            ids = pa.array(np.arange(a, a + n).astype(str))
            dists = {"tf": (mu, np.full(n, 0.4)), "sbf": (sbf, np.full(n, 0.1)), "fp": (mu, np.full(n, 0.5)),
                     "best": (mu, np.full(n, 0.38))}
            usable = {"tf": np.ones(n, bool), "sbf": np.isfinite(sbf), "fp": np.ones(n, bool)}
            parts = {"fp": lambda lo, hi, s=a: reader.take(s + lo, s + hi)}
            for lo, hi, lists, _, kinds in likelihood.likelihood_blocks(dists, mu_z, grid, parts=parts,
                                                                        usable=usable):  # as product.assemble
                t = pa.table({"galaxy_id": ids[lo:hi]} | {f"{k}_eta_like": v for k, v in lists.items()}
                             | {f"{k}_eta_like_kind": pa.array(v) for k, v in kinds.items()})
                writer = writer or AtomicParquetWriter(path, likelihood_schema(t.schema, grid))
                writer.write(t.cast(writer.writer.schema))
        writer.__exit__(None, None, None)
    return peak.before_mb, peak.mb, path.stat().st_size / rows


if __name__ == "__main__":
    with tempfile.TemporaryDirectory() as tmp:
        for rows in [int(float(r)) for r in (sys.argv[1:] or ["2.6e5", "1e6"])]:
            before, mb, per_row = job(rows, Path(tmp))
            print(f"{rows:>10d} rows, method job (fp gaussian posterior): peak RSS {mb:6.0f} MB "
                  f"({before:.0f} MB before the step: the shard's columns), part file {per_row:6.0f} B/row")
            before, mb, per_row = assembly(rows, Path(tmp))
            print(f"{rows:>10d} rows, assembly (3 methods + mu_best):   peak RSS {mb:6.0f} MB "
                  f"({before:.0f} MB before), companion file {per_row:6.0f} B/row")
