"""Disk use of a run: the sizes at its end, and the peak sampled while it runs.

The product is either one file (``distances.parquet``) or a folder of per-shard parts
(``distances/part-NNNNN.parquet``, a Parquet dataset); likewise the likelihood file.
Both layouts are understood everywhere here.
"""

from __future__ import annotations

import os
import threading
import time
from pathlib import Path

# name of each run-level output in either layout: the single file first, then the folder
PRODUCTS = {"distances": ("distances.parquet", "distances"),
            "eta_likelihoods": ("eta_likelihoods.parquet", "eta_likelihoods")}
OTHER_OUTPUTS = ("groups.parquet", "plot_sample.parquet")


def tree_bytes(path: Path | str) -> int:
    """Bytes of a file, or of every file under a folder (0 if absent).

    os.scandir-based and tolerant: a file or folder that vanishes mid-walk (Snakemake
    removing a temp file, an atomic rename) simply counts as absent."""
    try:
        st = os.stat(path, follow_symlinks=False)
    except OSError:
        return 0
    if not os.path.isdir(path):
        return st.st_size
    total, stack = 0, [os.fspath(path)]
    while stack:
        try:
            with os.scandir(stack.pop()) as it:
                for e in it:
                    try:
                        if e.is_dir(follow_symlinks=False):
                            stack.append(e.path)
                        elif e.is_file(follow_symlinks=False):
                            total += e.stat(follow_symlinks=False).st_size
                    except OSError:
                        pass
        except OSError:
            pass
    return total


def product_path(run_dir: Path, name: str = "distances") -> Path | None:
    """The run's product (or likelihood file) in whichever layout exists, else None."""
    for candidate in PRODUCTS[name]:
        if (run_dir / candidate).exists():
            return run_dir / candidate
    return None


class DiskSampler:
    """Background thread: every ``interval`` s, the bytes of ``<run>/shards`` (the
    intermediates) and of the whole run folder; keeps the peak of each and when it was.

    A sample is a lower bound of the true peak (a file written and removed between two
    samples is missed); ``interval <= 0`` samples nothing (``summary()`` is then None).
    """

    def __init__(self, run_dir: Path, interval: float = 1.0):
        self.run_dir, self.interval = Path(run_dir), interval
        self.samples = 0
        self.peak_shards = self.peak_run = 0
        self.peak_shards_t = self.peak_run_t = None
        self._stop = threading.Event()
        self._thread = None

    def sample(self) -> None:
        t = round(time.perf_counter() - self.t0, 1)
        shards, run = tree_bytes(self.run_dir / "shards"), tree_bytes(self.run_dir)
        self.samples += 1
        if shards > self.peak_shards:
            self.peak_shards, self.peak_shards_t = shards, t
        if run > self.peak_run:
            self.peak_run, self.peak_run_t = run, t

    def _loop(self):
        while not self._stop.wait(self.interval):
            self.sample()

    def __enter__(self):
        self.t0 = time.perf_counter()
        if self.interval > 0:
            self._thread = threading.Thread(target=self._loop, name="disk-sampler", daemon=True)
            self._thread.start()
        return self

    def __exit__(self, *exc):
        if self._thread is not None:
            self._stop.set()
            self._thread.join()
            self.sample()  # the run's end
        return False

    def summary(self) -> dict | None:
        if not self.samples:
            return None
        return {"interval_s": self.interval, "samples": self.samples,
                "peak_shards_bytes": self.peak_shards, "peak_shards_at_s": self.peak_shards_t,
                "peak_run_bytes": self.peak_run, "peak_run_at_s": self.peak_run_t}


def disk_use(run_dir: Path, catalog: Path, rows: int, peak: dict | None = None) -> dict:
    """Bytes per row of every file kind of a finished run: the catalog, each stage's shard
    folder (the intermediates), the product and its companions (either layout); and the
    ratios the disk targets speak of. ``peak``: a DiskSampler summary; the intermediates
    target is judged on its sampled peak, else on the size at the run's end."""
    catalog_bytes = tree_bytes(catalog)
    per_row = {"catalog": catalog_bytes / rows}
    shards = run_dir / "shards"
    stages = sorted(p for p in shards.iterdir() if p.is_dir()) if shards.exists() else []
    per_row |= {f"shards/{p.name}": tree_bytes(p) / rows for p in stages}
    intermediate = sum(per_row[f"shards/{p.name}"] for p in stages)
    outputs = [p for p in (product_path(run_dir, n) for n in PRODUCTS) if p is not None]
    outputs += [run_dir / f for f in OTHER_OUTPUTS if (run_dir / f).exists()]
    outputs.sort(key=lambda p: p.name)
    per_row |= {p.name + ("/" if p.is_dir() else ""): tree_bytes(p) / rows for p in outputs}
    rest = tree_bytes(run_dir) - tree_bytes(shards) - sum(tree_bytes(p) for p in outputs)
    per_row["other (grids, plots, logs, json)"] = rest / rows
    product = product_path(run_dir)
    out = {"bytes_per_row": {k: round(v, 1) for k, v in per_row.items()},
           "product_layout": None if product is None else ("parts" if product.is_dir() else "file"),
           "intermediates_bytes_per_row": round(intermediate, 1),
           "intermediates_over_catalog_end": round(intermediate / per_row["catalog"], 2),
           "product_over_catalog": None if product is None
           else round(tree_bytes(product) / catalog_bytes, 2)}
    if peak:
        out["peak"] = peak | {
            "shards_bytes_per_row": round(peak["peak_shards_bytes"] / rows, 1),
            "run_bytes_per_row": round(peak["peak_run_bytes"] / rows, 1),
            "shards_over_catalog": round(peak["peak_shards_bytes"] / catalog_bytes, 2),
            "run_over_catalog": round(peak["peak_run_bytes"] / catalog_bytes, 2)}
    # the target's figure: the sampled peak when there is one, else the size at the end
    out["intermediates_over_catalog"] = (out["peak"]["shards_over_catalog"] if peak
                                         else out["intermediates_over_catalog_end"])
    out["intermediates_judged_on"] = "sampled peak" if peak else "end of run"
    return out
