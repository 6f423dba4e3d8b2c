"""Shared settings and helpers of the benchmark: paths, sizes, targets, rule names.

The rule names follow the workflow: one job per shard for the stages before the
methods, and per method (``galdist.methods.REGISTRY``) one ``distance`` job per shard,
whose benchmark files live under ``benchmarks/<method>/``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import math
import os
import platform
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO / "workflow"))

from galdist.methods import REGISTRY  # noqa: E402

OUT_DIR = REPO / "results" / "benchmark"
DEFAULT_SHARD_ROWS = 1_000_000  # the schema's default (config/config.yaml sets 1000 for the demo)
METHODS = tuple(REGISTRY)  # benchmark entries per method (benchmarks/<method>/...)
METHOD_RULE = "distance"  # the one rule of every method's jobs
# Rules whose work grows with N (rows/s is meaningful); the others run once per configuration.
# ``assemble_part`` (one job per shard) exists where the assembly is split into per-shard parts
# and a final whole-catalog ``assemble``; older runs have ``assemble`` alone.
ROW_RULES = ("ingest", "extinction", "kcorr", "redshift", *METHODS, "crosscheck_statistics", "groups",
             "assemble_part", "assemble")
PER_SHARD_RULES = ("extinction", "kcorr", "redshift", *METHODS)  # the ones --profile can run on one shard
STAGE_ORDER = ["ingest", "extinction_coefficients", "kcorr_grid", "mu_grid", "extinction", "kcorr",
               "redshift", *METHODS, "crosscheck_statistics", "groups", "assemble_part", "assemble", "plots",
               "run_report"]

TARGETS = {
    "marginal_factor": 2.0,  # (wall(N2) - wall(N1)) <= 2 (floor(N2) - floor(N1))
    "fixed_cost_rows": 10_000,
    "fixed_cost_s": 6.0,
    "max_rss_mb": 1024.0,
    "exponent": 1.0,
    "intermediates_over_catalog": 1.5,  # the shards/ folder at its peak during the run (sampled)
    "product_over_catalog": 2.5,  # distances.parquet or distances/ (companions are counted apart)
}


def parse_size(text: str) -> int:
    """'1e6', '250000' or '2.5e5' -> an integer row count (>= 1)."""
    value = float(text)
    if not (math.isfinite(value) and value >= 1 and value == round(value)):
        raise argparse.ArgumentTypeError(f"size {text!r} is not a positive whole number")
    return int(round(value))


def parse_sizes(text: str) -> list[int]:
    sizes = [parse_size(t.strip()) for t in text.split(",") if t.strip()]
    if not sizes:
        raise argparse.ArgumentTypeError("--sizes needs at least one size")
    return sorted(set(sizes))


def label(n: int) -> str:
    """10000 -> '1e4', 250000 -> '2.5e5' (for names and tables)."""
    exp = int(math.floor(math.log10(n)))
    mant = n / 10**exp
    return f"{mant:g}e{exp}"


def say(msg: str) -> None:
    print(f"[benchmark {dt.datetime.now().strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)


def machine_info() -> dict:
    cpu = None
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem = None
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal"):
                mem = round(int(line.split()[1]) / 1024**2, 1)
    except OSError:
        pass
    versions = {}
    for name in ("numpy", "pyarrow", "astropy", "snakemake"):
        try:
            from importlib.metadata import version
            versions[name] = version(name)
        except Exception:  # noqa: BLE001 - informational only
            versions[name] = None
    git = subprocess.run(["git", "-C", str(REPO), "rev-parse", "HEAD"], capture_output=True, text=True)
    dirty = subprocess.run(["git", "-C", str(REPO), "status", "--porcelain", "--untracked-files=no"],
                           capture_output=True, text=True)
    return {"cpus": os.cpu_count(), "cpu_model": cpu, "mem_gb": mem, "python": platform.python_version(),
            "platform": platform.platform(), "versions": versions,
            "git_commit": git.stdout.strip() or None,
            "git_modified_files": [l[3:] for l in dirty.stdout.splitlines()]}
