#!/usr/bin/env python
"""Benchmark galdist end to end: wall time, I/O floor, per-stage rows/s and peak RSS.

For each catalog size N (default 1e5, 1e6, 1e7) this script

1. writes a synthetic catalog of N rows in canonical columns to
   ``results/benchmark/catalog_<N>.parquet`` (the invented demo survey of
   ``galdist.demo.make_catalog``, streamed chunk by chunk through a pyarrow
   ParquetWriter, never whole in memory; HI inputs are empty for early types,
   SBF inputs for discs, and ~2 % of rows carry a bad value). An existing file
   with the right row count, seed and chunking, written by the current demo.py,
   is reused.
2. runs the full workflow (all stages, both methods, shard_rows 10^6 unless
   ``--shard-rows``) in a subprocess ``python -m snakemake --cores 2 --config
   catalog=... run=bench_<N> shard_rows=...`` from the repository root, after
   deleting ``results/bench_<N>``, and times the wall clock;
3. measures the I/O floor in this process: a bare ``pyarrow.parquet.read_table``
   of the catalog plus a write with the product's settings (zstd, 256 Ki-row
   groups, dictionaries on text and flag columns only, fsync) of a table with the
   product's row count, column count and string/number column kinds, filled with
   the columns just read;
4. parses every Snakemake ``benchmark:`` TSV under ``results/bench_<N>/benchmarks``:
   per rule, jobs, summed and largest seconds, rows/s = N / summed seconds, and
   the largest max_rss (MB).

Each size also records the critical path through the rule graph (slowest job
per rule), a dry run's time (Snakemake's own start-up and DAG), and the CPU time
other processes took meanwhile (this machine is shared: a contended run is
slower, not worse code); ``--repeat`` keeps the fastest of several runs.

After all sizes it reports the scaling exponent d ln(wall)/d ln(N) between the
two largest sizes, the marginal cost per row against 4x the floor's, the
fixed cost (a 10^4-row run within 30 s) and the 1 GB RSS ceiling; after the
largest run it dry-runs a swap of the Tully-Fisher calibration and counts the
jobs per rule, spot-checks interpolated quantities (mu(z), K, A) in the product
against their direct computation, and with ``--profile`` runs chosen rule
scripts once more under cProfile on one shard and prints the top of each
profile (imports separated from work). Results go to
``results/benchmark/benchmark.json`` (profiles and logs beside it) and a
plain-text table is printed; ``results/bench_<N>`` is deleted unless ``--keep``.

    python scripts/benchmark.py                       # 1e5, 1e6, 1e7 rows
    python scripts/benchmark.py --sizes 1e4,1e5,1e6 --profile
    python scripts/benchmark.py --sizes 1e7 --merge   # add a size to an earlier JSON

Speed and memory are measured here, never asserted in tests.
"""

from __future__ import annotations

import argparse
import csv
import datetime as dt
import hashlib
import json
import math
import os
import platform
import pstats
import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "workflow"))

from galdist import demo  # noqa: E402
from galdist import io as gio  # noqa: E402

OUT_DIR = REPO / "results" / "benchmark"
DEFAULT_SHARD_ROWS = 1_000_000  # the schema's default (config/config.yaml sets 1000 for the demo)
GENERATOR_VERSION = "1"  # bump when the way catalogs are chunked and seeded changes
# Rules whose work grows with N (rows/s is meaningful); the others run once per configuration.
ROW_RULES = ("ingest", "extinction", "kcorrect", "redshift", "tully_fisher", "sbf",
             "crosscheck_statistics", "assemble")
PER_SHARD_RULES = ("extinction", "kcorrect", "redshift", "tully_fisher", "sbf")
# In DAG order, ingest last: forcing one job leaves every job downstream of it out of date, so
# profiling in this order never makes Snakemake re-run an upstream job first.
PROFILE_RULES_DEFAULT = (*PER_SHARD_RULES, "crosscheck_statistics", "assemble", "ingest")
# After a swap of the Tully-Fisher calibration only these rules may run (the target).
SWAP_ALLOWED = {"tully_fisher", "crosscheck_statistics", "assemble", "plots", "all"}
SWAP_CALIBRATION = "{calibration: tf_ks_masters_2008, band: Ks}"

TARGETS = {
    "marginal_factor": 4.0,  # (wall(N2) - wall(N1)) <= 4 (floor(N2) - floor(N1))
    "fixed_cost_rows": 10_000,
    "fixed_cost_s": 30.0,
    "max_rss_mb": 1024.0,
    "exponent": 1.05,
    "accuracy_mag": 1e-3,
}


# ----------------------------------------------------------------------------- helpers

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


def dir_size(path: Path) -> int:
    if path.is_file():
        return path.stat().st_size
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file()) if path.exists() else 0


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


# ----------------------------------------------------------------------------- catalogs

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


# ----------------------------------------------------------------------------- snakemake

def config_args(catalog: Path, run: str, shard_rows: int) -> list[str]:
    return ["--config", f"catalog={catalog.relative_to(REPO)}", f"run={run}", f"shard_rows={shard_rows}"]


def snakemake_cmd(cores: int, *extra: str) -> list[str]:
    return [sys.executable, "-m", "snakemake", "--cores", str(cores), *extra]


def run_workflow(catalog: Path, run: str, shard_rows: int, cores: int, log_path: Path) -> dict:
    """Run the whole workflow on a clean run directory; returns wall time and status."""
    run_dir = REPO / "results" / run
    if run_dir.exists():
        shutil.rmtree(run_dir)
    cmd = snakemake_cmd(cores, *config_args(catalog, run, shard_rows), "-q")
    load_before = os.getloadavg()[0]
    with CpuMeter() as meter, open(log_path, "w") as log:
        proc = subprocess.run(cmd, cwd=REPO, stdout=log, stderr=subprocess.STDOUT)
    return {"command": " ".join(cmd[1:]), "returncode": proc.returncode, "wall_s": round(meter.wall, 3),
            "log": str(log_path.relative_to(REPO)), "load_avg_1min_before": round(load_before, 2)} | meter.summary()


def noop_run(catalog: Path, run: str, shard_rows: int, cores: int, log_path: Path) -> dict:
    """A dry run of the finished workflow, which should find nothing to do: Snakemake's own
    start-up, configuration checks and DAG time. If it would run jobs, the code or
    configuration changed under the measurement (another session edited the tree)."""
    cmd = snakemake_cmd(cores, "-n", *config_args(catalog, run, shard_rows))
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, cwd=REPO, capture_output=True, text=True)
    elapsed = time.perf_counter() - t0
    text = proc.stdout + proc.stderr
    log_path.write_text(text)
    jobs = parse_job_stats(text)
    return {"noop_s": round(elapsed, 3) if proc.returncode == 0 and not jobs else None,
            "noop_ran_jobs": jobs or None, "noop_log": str(log_path.relative_to(REPO))}


CODE_GLOBS = ("Snakefile", "workflow/rules/*.smk", "workflow/galdist/*.py", "scripts/rules/*.py",
              "config/*.yaml", "workflow/galdist/data/calibrations/*.yaml", "workflow/schemas/*.yaml")


def code_fingerprint() -> str:
    """Hash of the workflow's code and configuration, to notice edits during a measurement."""
    h = hashlib.sha256()
    for pattern in CODE_GLOBS:
        for f in sorted(REPO.glob(pattern)):
            try:
                h.update(f.name.encode() + b"\0" + f.read_bytes())
            except OSError:
                pass
    return h.hexdigest()[:16]


class CpuMeter:
    """Wall time, CPU time of our child processes, and CPU time the rest of the machine used.

    Other processes on the machine (tests, other runs) compete for the same cores;
    ``foreign_cpu_s`` (machine-wide busy CPU time from /proc/stat minus ours) says
    how much, so a slow figure can be told from a contended one.
    """

    @staticmethod
    def _machine_busy() -> float | None:
        try:
            fields = Path("/proc/stat").read_text().splitlines()[0].split()[1:]
        except OSError:
            return None
        vals = [int(x) for x in fields]
        idle = vals[3] + (vals[4] if len(vals) > 4 else 0)
        guest = sum(vals[8:10]) if len(vals) > 9 else 0  # guest time is already in user/nice
        return (sum(vals) - guest - idle) / os.sysconf("SC_CLK_TCK")

    def __enter__(self):
        self.t0 = time.perf_counter()
        self.busy0 = self._machine_busy()
        self.c0 = os.times()
        return self

    def __exit__(self, *exc):
        self.wall = time.perf_counter() - self.t0
        busy1 = self._machine_busy()
        c1 = os.times()
        self.ours = (c1.children_user - self.c0.children_user) + (c1.children_system - self.c0.children_system)
        self.busy = None if (busy1 is None or self.busy0 is None) else busy1 - self.busy0
        return False

    def summary(self) -> dict:
        foreign = None if self.busy is None else max(0.0, self.busy - self.ours)
        return {"cpu_s_ours": round(self.ours, 2), "cpu_s_machine": None if self.busy is None else round(self.busy, 2),
                "foreign_cpu_s": None if foreign is None else round(foreign, 2),
                "foreign_cpu_fraction_of_capacity": None if foreign is None
                else round(foreign / (self.wall * (os.cpu_count() or 1)), 3)}


def read_benchmarks(bench_dir: Path, n_rows: int) -> dict:
    """Per rule: jobs, summed/largest seconds, rows/s, largest max_rss and summed cpu_time."""
    stages: dict[str, dict] = {}
    for tsv in sorted(bench_dir.rglob("*.tsv")):
        rule = tsv.relative_to(bench_dir).parts[0]
        rule = rule[:-4] if rule.endswith(".tsv") else rule
        with open(tsv, newline="") as fh:
            rows = list(csv.DictReader(fh, delimiter="\t"))
        if not rows:
            continue
        st = stages.setdefault(rule, {"jobs": 0, "seconds": 0.0, "max_job_s": 0.0, "max_rss_mb": 0.0,
                                      "cpu_s": 0.0, "io_out_mb": 0.0})
        st["jobs"] += 1
        secs = float(np.mean([float(r["s"]) for r in rows]))  # mean over repeats, if any
        st["seconds"] += secs
        st["max_job_s"] = max(st["max_job_s"], secs)
        for key, col in (("max_rss_mb", "max_rss"),):
            vals = [float(r[col]) for r in rows if r.get(col) not in (None, "", "-", "NA")]
            if vals:
                st[key] = max(st[key], max(vals))
        for key, col in (("cpu_s", "cpu_time"), ("io_out_mb", "io_out")):
            vals = [float(r[col]) for r in rows if r.get(col) not in (None, "", "-", "NA")]
            if vals:
                st[key] += float(np.mean(vals))
    order = ["ingest", "extinction_coefficients", "kcorrect_grid", "mu_grid", "extinction", "kcorrect",
             "redshift", "tully_fisher", "sbf", "crosscheck_statistics", "assemble", "plots"]
    out = {}
    for rule in sorted(stages, key=lambda r: (order.index(r) if r in order else len(order), r)):
        st = stages[rule]
        st = {k: round(v, 3) if isinstance(v, float) else v for k, v in st.items()}
        st["rows_per_s"] = (round(n_rows / st["seconds"]) if rule in ROW_RULES and st["seconds"] > 0 else None)
        out[rule] = st
    return out


def parse_job_stats(text: str) -> dict:
    """Job counts per rule from Snakemake's 'Job stats' table."""
    counts = {}
    lines = text.splitlines()
    for i, line in enumerate(lines):
        if line.strip().startswith("Job stats"):
            for row in lines[i + 1:]:
                parts = row.split()
                if len(parts) == 2 and parts[1].isdigit():
                    if parts[0] == "total":
                        break
                    counts[parts[0]] = int(parts[1])
                elif counts and not row.strip():
                    break
            break
    return counts


def swap_check(catalog: Path, run: str, shard_rows: int, cores: int, n_shards: int, log_path: Path) -> dict:
    """Dry-run a Tully-Fisher calibration swap and count the jobs Snakemake would run."""
    args = config_args(catalog, run, shard_rows) + [f"tully_fisher={SWAP_CALIBRATION}"]
    cmd = snakemake_cmd(cores, "-n", *args)
    proc = subprocess.run(cmd, cwd=REPO, capture_output=True, text=True)
    log_path.write_text(proc.stdout + proc.stderr)
    counts = parse_job_stats(proc.stdout + "\n" + proc.stderr)
    unexpected = sorted(set(counts) - SWAP_ALLOWED)
    ok = (proc.returncode == 0 and bool(counts) and not unexpected
          and counts.get("tully_fisher", 0) == n_shards)
    return {"command": " ".join(cmd[1:]), "returncode": proc.returncode, "jobs": counts,
            "total_jobs": sum(counts.values()), "expected_rules": sorted(SWAP_ALLOWED),
            "unexpected_rules": unexpected, "tully_fisher_jobs_expected": n_shards, "pass": ok,
            "log": str(log_path.relative_to(REPO))}


def rule_graph(catalog: Path, run: str, shard_rows: int) -> dict[str, list[str]]:
    """rule -> rules it depends on, from ``snakemake --rulegraph`` (dot)."""
    cmd = snakemake_cmd(1, "--rulegraph", *config_args(catalog, run, shard_rows))
    proc = subprocess.run(cmd, cwd=REPO, capture_output=True, text=True)
    if proc.returncode != 0:
        return {}
    names = dict(re.findall(r'^\s*(\d+)\[label = "([^"]+)"', proc.stdout, flags=re.M))
    deps: dict[str, list[str]] = {n: [] for n in names.values()}
    for a, b in re.findall(r"^\s*(\d+) -> (\d+)", proc.stdout, flags=re.M):
        if a in names and b in names:
            deps[names[b]].append(names[a])
    return deps


def critical_path(deps: dict[str, list[str]], stages: dict) -> dict | None:
    """Longest chain of rules, each weighted by its slowest job: the wall time no number of
    cores could beat (Snakemake's own overhead aside)."""
    if not deps:
        return None
    memo: dict[str, tuple[float, list[str]]] = {}

    def longest(rule, seen=()):
        if rule in memo:
            return memo[rule]
        w = stages.get(rule, {}).get("max_job_s", 0.0)
        best = (0.0, [])
        for d in deps.get(rule, []):
            if d not in seen:
                best = max(best, longest(d, seen + (rule,)), key=lambda x: x[0])
        memo[rule] = (best[0] + w, best[1] + [rule])
        return memo[rule]

    total, path = max((longest(r) for r in deps), key=lambda x: x[0])
    return {"seconds": round(total, 2), "path": [r for r in path if r in stages]}


# ----------------------------------------------------------------------------- I/O floor

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


def io_floor_once(catalog: Path, product: Path, product_encoding: bool = True) -> dict:
    """Bare read of the catalog + write of a table shaped like the product, with the
    product's writer settings (zstd, row groups of ``ROW_GROUP_ROWS``, dictionaries on
    text and flag columns only; pyarrow's default dictionaries unless ``product_encoding``),
    fsync included."""
    out_schema = pq.read_schema(product)
    out_rows = pq.read_metadata(product).num_rows
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


# ----------------------------------------------------------------------------- accuracy

def _sample_product(product: Path, columns: list[str], k: int, seed: int) -> dict:
    """About ``k`` random rows of the product, streamed batch by batch."""
    pf = pq.ParquetFile(product)
    n = pf.metadata.num_rows
    p = min(1.0, k / max(n, 1))
    rng = np.random.default_rng(seed)
    parts = {c: [] for c in columns}
    for batch in pf.iter_batches(batch_size=256 * 1024, columns=columns):
        pick = rng.uniform(size=batch.num_rows) < p
        sub = batch.filter(pa.array(pick))
        for c in columns:
            parts[c].append(sub.column(c).to_numpy(zero_copy_only=False))
    return {c: np.concatenate(v) if v else np.zeros(0) for c, v in parts.items()}


def accuracy_check(run_dir: Path, sample_rows: int, k_rows: int, seed: int) -> dict:
    """Interpolated quantities in the product against their direct computation (mag)."""
    from galdist import extinction, filters, kcorrect, redshift

    product = run_dir / "distances.parquet"
    meta = pq.read_schema(product).metadata or {}
    config = json.loads(meta[b"galdist.provenance"])["config"]
    bands = list(config["bands"])
    cols = ["z_helio", "z_cmb", "mu_z", "ebv_used", "kcorr_template"] + [f"K_{b}" for b in bands] + \
           [f"A_{b}" for b in bands]
    s = _sample_product(product, cols, sample_rows, seed)
    out = {"sample_rows": int(s["z_cmb"].size)}

    # (a) mu_z: MuGrid interpolation vs astropy's distmod at z_cmb
    cosmo = redshift.make_cosmology(**config["redshift"]["cosmology"])
    ok = np.isfinite(s["mu_z"]) & np.isfinite(s["z_cmb"]) & (s["z_cmb"] > 0)
    exact = np.asarray(cosmo.distmod(s["z_cmb"][ok]).value, dtype=float)
    d = np.abs(s["mu_z"][ok] - exact)
    out["mu_z"] = {"rows": int(ok.sum()), "max_abs_diff_mag": float(d.max()) if d.size else None,
                   "method": "product mu_z vs astropy distmod(z_cmb)"}

    # (b) K: the product's K (linear in z on the K grid, linear between neighbouring templates)
    #     vs direct synthetic photometry of the same two templates at the galaxy's z, blended alike.
    kcfg = config["kcorrect"]
    grid = kcorrect.KGrid.from_file(run_dir / "grids" / "kcorrect_grid.npz")
    templates = kcorrect.load_templates(kcfg["templates"])
    filt = filters.load_bands(config["bands"])
    nt = len(grid.names)
    okk = np.isfinite(s["kcorr_template"]) & np.isfinite(s["z_helio"])
    idx = np.flatnonzero(okk)[:k_rows]
    z = s["z_helio"][idx]
    tpl = s["kcorr_template"][idx]
    t_lo = np.minimum(np.floor(tpl).astype(int), max(nt - 2, 0))
    a = tpl - t_lo
    t_hi = np.minimum(t_lo + 1, nt - 1)
    kres = {}
    t0 = time.perf_counter()
    for b in bands:
        direct = kcorrect.k_correction(filt[b], templates.wave, templates.flux_lambda, z)  # (nt, m)
        cols_ = np.arange(z.size)
        k_exact = direct[t_lo, cols_] * (1 - a) + direct[t_hi, cols_] * a
        diff = np.abs(s[f"K_{b}"][idx] - k_exact)
        diff = diff[np.isfinite(diff)]
        kres[b] = float(diff.max()) if diff.size else None
    out["K"] = {"rows": int(idx.size), "max_abs_diff_mag": kres,
                "direct_s": round(time.perf_counter() - t0, 2),
                "method": "product K_<band> vs direct synthetic photometry (galdist.kcorrect.k_correction) "
                          "of the two neighbouring templates at z_helio, blended with the product's "
                          "fractional template weight (tests the K(z) grid interpolation, not the "
                          "template-blending model)"}

    # (c) extinction: A_<band> vs R recomputed from the law through the filter curves, times ebv_used
    ecfg = config["extinction"]
    if ecfg["coefficients"] == "law":
        coeffs = extinction.law_coefficients(filt, law=ecfg["law"], r_v=ecfg["r_v"],
                                             source_temperature=ecfg["source_temperature"],
                                             normalisation=ecfg["normalisation"])
    else:
        coeffs = extinction.table_coefficients(ecfg["table"], ecfg["table_keys"])
    r = coeffs.per_true_ebv()
    ares = {}
    for b in bands:
        diff = np.abs(s[f"A_{b}"] - r[b] * s["ebv_used"])
        diff = diff[np.isfinite(diff)]
        ares[b] = float(diff.max()) if diff.size else None
    out["A"] = {"rows": int(np.isfinite(s["ebv_used"]).sum()), "max_abs_diff_mag": ares,
                "method": "product A_<band> vs R recomputed (galdist.extinction) x ebv_used"}
    worst = [out["mu_z"]["max_abs_diff_mag"], *kres.values(), *ares.values()]
    worst = [w for w in worst if w is not None]
    out["max_abs_diff_mag"] = max(worst) if worst else None
    out["pass"] = bool(worst) and max(worst) <= TARGETS["accuracy_mag"]
    return out


# ----------------------------------------------------------------------------- profile

def _profile_target(run_dir: Path, rule: str) -> Path | None:
    if rule == "ingest":
        return run_dir / "shards" / "ingest"
    if rule in ("crosscheck_statistics",):
        return run_dir / "crosscheck_statistics.json"
    if rule == "assemble":
        return run_dir / "distances.parquet"
    hits = sorted((run_dir / "shards" / rule).rglob("part-*.parquet"))
    return hits[0] if hits else None


def profile_rules(rules: list[str], catalog: Path, run: str, shard_rows: int, top: int) -> dict:
    """Run each rule's script once more under cProfile (first shard for per-shard rules).

    Snakemake writes the job's script (its pickled ``snakemake`` object plus the
    rule script) with ``--force <target> --skip-script-cleanup``; that file is then
    run again under ``python -m cProfile``. Both runs rewrite the same output.
    """
    run_dir = REPO / "results" / run
    scripts_dir = REPO / ".snakemake" / "scripts"
    results = {}
    for rule in rules:
        target = _profile_target(run_dir, rule)
        if target is None or not target.exists():
            results[rule] = {"error": "no output to profile"}
            continue
        before = set(scripts_dir.glob("*.py")) if scripts_dir.exists() else set()
        # the target comes first: --config takes a variable number of values
        cmd = snakemake_cmd(1, str(target.relative_to(REPO)), "--force", "--skip-script-cleanup",
                            *config_args(catalog, run, shard_rows))
        proc = subprocess.run(cmd, cwd=REPO, capture_output=True, text=True)
        jobs = parse_job_stats(proc.stdout + proc.stderr)
        after = set(scripts_dir.glob("*.py")) if scripts_dir.exists() else set()
        # other sessions may run Snakemake in this directory: touch only scripts of this run's jobs
        kept = [p for p in sorted(after - before) if _mentions(p, run)]
        mine = [p for p in kept if p.name.endswith(f".{rule}.py")]
        if proc.returncode != 0 or len(mine) != 1:
            results[rule] = {"error": f"snakemake exit {proc.returncode}; {len(mine)} scripts of the rule kept",
                             "jobs": jobs, "stderr_tail": (proc.stdout + proc.stderr)[-2000:]}
            for p in kept:
                p.unlink(missing_ok=True)
            continue
        prof_path = OUT_DIR / f"profile_{run}_{rule}.prof"
        t0 = time.perf_counter()
        prun = subprocess.run([sys.executable, "-m", "cProfile", "-o", str(prof_path), str(mine[-1])],
                              cwd=REPO, capture_output=True, text=True)
        elapsed = time.perf_counter() - t0
        for p in kept:  # the scripts this call kept
            p.unlink(missing_ok=True)
        if prun.returncode != 0:
            results[rule] = {"error": f"profiled run exit {prun.returncode}", "stderr_tail": prun.stderr[-2000:]}
            continue
        results[rule] = {"target": str(target.relative_to(REPO)), "wall_s": round(elapsed, 2),
                         "prof": str(prof_path.relative_to(REPO)),
                         "jobs_in_forced_run": jobs} | summarise_profile(prof_path, top)
    return results


def _mentions(path: Path, run: str) -> bool:
    """Whether a kept Snakemake job script belongs to results/<run>/ (its pickled paths say so)."""
    try:
        return f"results/{run}/".encode() in path.read_bytes()
    except OSError:
        return False


def _fname(key) -> str:
    file, line, func = key
    file = str(file)
    for marker in ("site-packages/", "workflow/", "scripts/", "lib/python3"):
        if marker in file:
            file = file.split(marker, 1)[1]
            break
    return f"{file}:{line}({func})" if line else f"{func}"


def summarise_profile(prof_path: Path, top: int) -> dict:
    """Top functions by cumulative and own time, and own time grouped by package."""
    st = pstats.Stats(str(prof_path))
    total = st.total_tt
    entries = st.stats  # key -> (cc, nc, tt, ct, callers)
    # import time: cProfile counts a recursive function's cumulative time once (outermost call)
    import_s = max((v[3] for (f, _l, fn), v in entries.items() if fn == "_find_and_load"), default=0.0)

    # "work" (not importing): gprof-style, each function's time is split between its callers in
    # proportion to the time each call edge took; the time a caller passes on counts as work in the
    # fraction its own time was work. Module bodies and import machinery pass on none; the rule
    # script's module body passes on all the rest.
    def is_import(key):
        file, _line, func = key
        return (str(file).startswith("<frozen") or func in ("<module>", "_find_and_load", "import_module")
                or func in ("<built-in method builtins.__import__>", "<built-in method _imp.exec_dynamic>",
                            "<built-in method _imp.create_dynamic>"))

    def is_script(key):
        return key[2] == "<module>" and Path(str(key[0])).name.startswith("tmp")

    frac: dict = {k: 0.0 for k in entries}
    order = sorted(entries, key=lambda k: entries[k][3], reverse=True)  # callers mostly before callees
    for _ in range(200):  # fixed point (a few passes; more only for deep call chains out of order)
        change = 0.0
        for key in order:
            _cc, _nc, _tt, ct, callers = entries[key]
            if is_script(key):
                new = 1.0
            elif is_import(key) or ct <= 0:
                new = 0.0
            else:
                w = sum(edge[3] * (1.0 if is_script(c) else frac.get(c, 0.0)) for c, edge in callers.items())
                new = min(1.0, w / ct)
            change = max(change, abs(new - frac[key]))
            frac[key] = new
        if change < 1e-9:
            break
    work_items = [(k, (v[0], v[1], v[2] * frac[k], v[3] * frac[k], None)) for k, v in entries.items()
                  if frac.get(k, 0.0) > 0 and not is_script(k) and "builtins.exec" not in k[2]]
    by_cum = sorted(work_items, key=lambda kv: kv[1][3], reverse=True)[:top]
    by_own = sorted(work_items, key=lambda kv: kv[1][2], reverse=True)[:top]
    groups: dict[str, float] = {"(imports)": import_s}
    for (file, _line, func), (_cc, _nc, tt, _ct, _callers) in work_items:
        f = str(file)
        if "site-packages/" in f:
            g = f.split("site-packages/", 1)[1].split("/", 1)[0]
        elif "/workflow/galdist/" in f:
            g = "galdist." + Path(f).stem
        elif f == "~":
            g = "builtin:" + re.sub(r"[<>]", "", func.split(" of ")[-1].split(".")[0])[:40]
        elif "/lib/python3" in f:
            g = "stdlib"
        else:
            g = Path(f).name or f
        groups[g] = groups.get(g, 0.0) + tt
    return {"total_s": round(total, 3), "import_s": round(import_s, 3),
            "note": "top lists and own_by_group count only time not spent importing (split between "
                    "callers gprof-style); import_s is all time spent importing, snakemake preamble included",
            "top_cumulative": [{"fn": _fname(k), "calls": v[1], "own_s": round(v[2], 3), "cum_s": round(v[3], 3)}
                               for k, v in by_cum],
            "top_own": [{"fn": _fname(k), "calls": v[1], "own_s": round(v[2], 3), "cum_s": round(v[3], 3)}
                        for k, v in by_own],
            "own_by_group": {g: round(t, 3) for g, t in sorted(groups.items(), key=lambda x: -x[1])[:top]}}


# ----------------------------------------------------------------------------- summary

def pairwise(results: list[dict]) -> list[dict]:
    """Scaling exponent and marginal cost between consecutive successful sizes."""
    ok = [r for r in results if r.get("wall_s") is not None and r.get("floor", {}).get("floor_s") is not None]
    ok.sort(key=lambda r: r["rows"])
    out = []
    for a, b in zip(ok, ok[1:]):
        dwall = b["wall_s"] - a["wall_s"]
        dfloor = b["floor"]["floor_s"] - a["floor"]["floor_s"]
        out.append({"from": a["rows"], "to": b["rows"],
                    "exponent": round(math.log(b["wall_s"] / a["wall_s"]) / math.log(b["rows"] / a["rows"]), 3),
                    "marginal_wall_s": round(dwall, 3), "marginal_floor_s": round(dfloor, 3),
                    "marginal_ratio": round(dwall / dfloor, 2) if dfloor > 0 else None,
                    "same_code": a.get("snakemake", {}).get("code_fingerprint")
                    == b.get("snakemake", {}).get("code_fingerprint"),
                    "wall_us_per_row": round(1e6 * dwall / (b["rows"] - a["rows"]), 3),
                    "floor_us_per_row": round(1e6 * dfloor / (b["rows"] - a["rows"]), 3)})
    return out


def checks(results: list[dict], pairs: list[dict]) -> dict:
    out = {}
    if pairs:
        last = pairs[-1]
        out["exponent"] = {"between": [last["from"], last["to"]], "value": last["exponent"],
                           "target": f"<= {TARGETS['exponent']}",
                           "pass": last["exponent"] <= TARGETS["exponent"],
                           "note": None if (last["from"], last["to"]) == (10**6, 10**7)
                           else "the target is defined between 1e6 and 1e7 rows"}
        out["marginal_cost"] = {"between": [last["from"], last["to"]], "wall_s": last["marginal_wall_s"],
                                "floor_s": last["marginal_floor_s"], "ratio": last["marginal_ratio"],
                                "target": f"ratio <= {TARGETS['marginal_factor']}",
                                "pass": last["marginal_ratio"] is not None
                                and last["marginal_ratio"] <= TARGETS["marginal_factor"],
                                "note": None if (last["from"], last["to"]) == (10**6, 10**7)
                                else "the target is defined between 1e6 and 1e7 rows"}
    small = [r for r in results if r["rows"] == TARGETS["fixed_cost_rows"] and r.get("wall_s") is not None]
    if small:
        out["fixed_cost"] = {"rows": TARGETS["fixed_cost_rows"], "wall_s": small[0]["wall_s"],
                             "target": f"<= {TARGETS['fixed_cost_s']} s",
                             "pass": small[0]["wall_s"] <= TARGETS["fixed_cost_s"]}
    rss = [(r["rows"], rule, st["max_rss_mb"]) for r in results for rule, st in r.get("stages", {}).items()]
    if rss:
        worst = max(rss, key=lambda x: x[2])
        out["max_rss"] = {"value_mb": worst[2], "rule": worst[1], "rows": worst[0],
                          "per_size_mb": {str(r["rows"]): max((st["max_rss_mb"] for st in r.get("stages", {}).values()),
                                                              default=None) for r in results},
                          "target": f"<= {TARGETS['max_rss_mb']} MB, independent of N",
                          "pass": worst[2] <= TARGETS["max_rss_mb"]}
    for r in sorted(results, key=lambda r: -r["rows"]):
        if "swap_check" in r:
            out["calibration_swap"] = {"rows": r["rows"], "jobs": r["swap_check"]["jobs"],
                                       "pass": r["swap_check"]["pass"]}
            break
    for r in sorted(results, key=lambda r: -r["rows"]):
        if "accuracy" in r and "error" not in r["accuracy"]:
            out["accuracy"] = {"rows": r["rows"], "max_abs_diff_mag": r["accuracy"]["max_abs_diff_mag"],
                               "target": f"<= {TARGETS['accuracy_mag']} mag", "pass": r["accuracy"]["pass"]}
            break
    return out


def fmt(x, spec="{:.1f}", none="-"):
    return none if x is None else spec.format(x)


def print_report(report: dict, stream=None) -> None:
    results = sorted(report["sizes"], key=lambda r: r["rows"])

    def p(line=""):
        print(line, file=stream or sys.stdout)
    p("")
    p(f"galdist benchmark  ({report['machine']['cpus']} CPUs, cores={report['settings']['cores']}, "
      f"shard_rows={report['settings']['shard_rows']:,}, commit {str(report['machine']['git_commit'])[:10]})")
    p("")
    p(f"{'rows':>10} {'shards':>6} {'jobs':>5} {'wall s':>8} {'floor s':>8} {'(read':>7} {'write)':>7} "
      f"{'wall/floor':>10} {'rows/s':>10} {'job s':>8} {'max RSS MB':>10}")
    for r in results:
        if r.get("wall_s") is None:
            p(f"{r['rows']:>10,} failed: {r.get('error', '?')}")
            continue
        f = r.get("floor", {})
        jobs = sum(st["jobs"] for st in r["stages"].values())
        job_s = sum(st["seconds"] for st in r["stages"].values())
        rss = max((st["max_rss_mb"] for st in r["stages"].values()), default=None)
        mark = "  (code changed during the run!)" if r.get("snakemake", {}).get("code_changed_during_run") else ""
        p(f"{r['rows']:>10,} {r.get('shards', 0):>6} {jobs:>5} {r['wall_s']:>8.1f} {fmt(f.get('floor_s')):>8} "
          f"{fmt(f.get('read_s')):>7} {fmt(f.get('write_s')):>7} {fmt(r.get('ratio_to_floor')):>10} "
          f"{r['rows'] / r['wall_s']:>10,.0f} {job_s:>8.1f} {fmt(rss, '{:.0f}'):>10}{mark}")
    for r in results:
        f = r.get("floor") or {}
        if f.get("write_s_default_encoding") is not None:
            p(f"{'':>10} floor write with pyarrow's default dictionary on every column: "
              f"{f['write_s_default_encoding']:.1f} s (product settings: {f['write_s']:.1f} s)")
    for r in results:
        if not r.get("stages"):
            continue
        p("")
        p(f"per stage, {r['rows']:,} rows (wall {r['wall_s']:.1f} s):")
        p(f"  {'rule':<24} {'jobs':>5} {'sum s':>8} {'max job s':>9} {'cpu s':>8} {'rows/s':>12} {'max RSS MB':>10}")
        for rule, st in r["stages"].items():
            p(f"  {rule:<24} {st['jobs']:>5} {st['seconds']:>8.2f} {st['max_job_s']:>9.2f} {st['cpu_s']:>8.2f} "
              f"{fmt(st['rows_per_s'], '{:,.0f}'):>12} {st['max_rss_mb']:>10.0f}")
    p("")
    p("where the wall time goes:")
    for r in results:
        if r.get("wall_s") is None:
            continue
        sm = r.get("snakemake", {})
        cp = r.get("critical_path") or {}
        p(f"  {r['rows']:>10,}: wall {r['wall_s']:.1f} s; critical path {fmt(cp.get('seconds'))} s "
          f"({' > '.join(cp.get('path', []))}); Snakemake dry run (start-up + DAG) {fmt(sm.get('noop_s'))} s; "
          f"CPU ours {fmt(sm.get('cpu_s_ours'))} s, other processes {fmt(sm.get('foreign_cpu_s'))} s "
          f"({fmt(None if sm.get('foreign_cpu_fraction_of_capacity') is None else 100 * sm['foreign_cpu_fraction_of_capacity'], '{:.0f}')} % of capacity)")
    if report.get("scaling"):
        p("")
        p("scaling between consecutive sizes:")
        for s in report["scaling"]:
            p(f"  {s['from']:>10,} -> {s['to']:>10,}: exponent {s['exponent']:.3f}; marginal wall "
              f"{s['marginal_wall_s']:.1f} s vs floor {s['marginal_floor_s']:.1f} s "
              f"(ratio {fmt(s['marginal_ratio'], '{:.1f}')}; {s['wall_us_per_row']:.2f} vs "
              f"{s['floor_us_per_row']:.2f} us/row)" + ("" if s.get("same_code") else "  [different code versions!]"))
    if report.get("checks"):
        p("")
        p("targets:")
        for name, c in report["checks"].items():
            verdict = "PASS" if c.get("pass") else "FAIL"
            detail = {k: v for k, v in c.items() if k not in ("pass", "per_size_mb")}
            p(f"  {name:<17} {verdict}  {json.dumps(detail, default=str)}")
    for r in results:
        prof = r.get("profile")
        if not prof:
            continue
        p("")
        p(f"profiles ({r['rows']:,} rows; one shard of up to {report['settings']['shard_rows']:,} rows for "
          f"per-shard rules):")
        for rule, pr in prof.items():
            if "error" in pr:
                p(f"  {rule}: {pr['error']}")
                continue
            p(f"  {rule}: {pr['total_s']:.2f} s profiled, of which imports {pr['import_s']:.2f} s ({pr['prof']})")
            groups = ", ".join(f"{g} {t:.2f}" for g, t in list(pr["own_by_group"].items())[:8])
            p(f"    own time by package: {groups}")
            for e in pr["top_cumulative"][:report["settings"]["top"]]:
                p(f"    cum {e['cum_s']:>7.2f}  own {e['own_s']:>7.2f}  {e['calls']:>8}  {e['fn']}")
    p("")


# ----------------------------------------------------------------------------- main

def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter,
                                 epilog="\n".join(__doc__.splitlines()[2:]))
    ap.add_argument("--sizes", type=parse_sizes, default=[10**5, 10**6, 10**7],
                    help="comma-separated catalog sizes, e.g. 1e4,1e5,1e6 (default 1e5,1e6,1e7)")
    ap.add_argument("--shard-rows", type=int, default=DEFAULT_SHARD_ROWS,
                    help=f"rows per shard passed to the workflow (default {DEFAULT_SHARD_ROWS:,}, the schema default)")
    ap.add_argument("--cores", type=int, default=2, help="snakemake --cores (default 2)")
    ap.add_argument("--seed", type=int, default=20260101, help="base seed of the synthetic catalogs")
    ap.add_argument("--chunk-rows", type=int, default=250_000, help="rows generated per chunk (default 250000)")
    ap.add_argument("--repeat", type=int, default=1,
                    help="run the workflow this many times per size and keep the fastest (default 1)")
    ap.add_argument("--floor-repeats", type=int, default=2,
                    help="I/O floor measurements per size; the fastest is kept (default 2)")
    ap.add_argument("--regenerate", action="store_true", help="rebuild catalogs even if a matching file exists")
    ap.add_argument("--keep-catalogs", action="store_true",
                    help="reuse catalogs written by an older galdist/demo.py (default: rebuild them)")
    ap.add_argument("--keep", action="store_true", help="keep results/bench_<N> after the run (default: delete)")
    ap.add_argument("--profile", nargs="?", const=",".join(PROFILE_RULES_DEFAULT), default=None,
                    metavar="RULES",
                    help="profile rule scripts under cProfile after the largest run (optionally a "
                         f"comma-separated list; default {','.join(PROFILE_RULES_DEFAULT)})")
    ap.add_argument("--top", type=int, default=20, help="lines of each profile to print (default 20)")
    ap.add_argument("--no-swap-check", action="store_true", help="skip the calibration-swap dry run")
    ap.add_argument("--no-accuracy", action="store_true", help="skip the interpolation spot-check")
    ap.add_argument("--accuracy-rows", type=int, default=10_000, help="product rows sampled for mu and A (10000)")
    ap.add_argument("--accuracy-k-rows", type=int, default=2_000,
                    help="rows of that sample checked by direct synthetic photometry for K (2000)")
    ap.add_argument("--merge", action="store_true",
                    help="keep other sizes from an existing JSON (same shard_rows and cores) in the report")
    ap.add_argument("--json", default=str(OUT_DIR / "benchmark.json"), help="output JSON path")
    args = ap.parse_args(argv)

    if args.repeat < 1 or args.floor_repeats < 1:
        ap.error("--repeat and --floor-repeats must be >= 1")
    if args.shard_rows < 1000:
        ap.error("--shard-rows must be >= 1000 (the config schema's minimum)")
    profile_list = None
    if args.profile is not None:
        profile_list = [r.strip() for r in args.profile.split(",") if r.strip()]
        bad = [r for r in profile_list if r not in PROFILE_RULES_DEFAULT]
        if bad:
            ap.error(f"--profile: unknown rule(s) {', '.join(bad)}; allowed: {', '.join(PROFILE_RULES_DEFAULT)}")
        profile_list = [r for r in PROFILE_RULES_DEFAULT if r in profile_list]  # DAG order, ingest last

    OUT_DIR.mkdir(parents=True, exist_ok=True)
    json_path = Path(args.json)
    settings = {"cores": args.cores, "shard_rows": args.shard_rows, "seed": args.seed,
                "chunk_rows": args.chunk_rows, "top": args.top}
    previous = []
    if args.merge and json_path.exists():
        old = json.loads(json_path.read_text())
        if (old.get("settings", {}).get("shard_rows") == args.shard_rows
                and old.get("settings", {}).get("cores") == args.cores):
            previous = [r for r in old.get("sizes", []) if r["rows"] not in args.sizes]
        else:
            say("--merge: existing JSON has other shard_rows/cores; not merged")
    report = {"created_utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
              "machine": machine_info(), "settings": settings, "targets": TARGETS, "sizes": list(previous)}

    def save():
        rs = report["sizes"]
        report["scaling"] = pairwise(rs)
        report["checks"] = checks(rs, report["scaling"])
        json_path.parent.mkdir(parents=True, exist_ok=True)
        tmp = json_path.with_suffix(".json.tmp")
        tmp.write_text(json.dumps(report, indent=2, default=str) + "\n")
        os.replace(tmp, json_path)

    largest = max(args.sizes)
    graph: dict[str, list[str]] = {}
    for n in args.sizes:
        entry = {"rows": n, "measured_utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")}
        report["sizes"].append(entry)
        run = f"bench_{n}"
        run_dir = REPO / "results" / run
        say(f"{label(n)} rows: catalog")
        catalog, entry["catalog"] = ensure_catalog(n, args.seed, args.chunk_rows, args.regenerate,
                                                   args.keep_catalogs)
        best = None
        for rep in range(args.repeat):
            say(f"{label(n)} rows: snakemake --cores {args.cores} (run {run})"
                + (f", repeat {rep + 1}/{args.repeat}" if args.repeat > 1 else ""))
            code_before = code_fingerprint()
            res = run_workflow(catalog, run, args.shard_rows, args.cores, OUT_DIR / f"snakemake_{n}.log")
            if res["returncode"] != 0:
                best = res
                break
            res["stages"] = read_benchmarks(run_dir / "benchmarks", n)  # before anything can re-run a job
            res |= noop_run(catalog, run, args.shard_rows, args.cores, OUT_DIR / f"snakemake_noop_{n}.log")
            res["code_fingerprint"] = code_before
            res["code_changed_during_run"] = code_fingerprint() != code_before or bool(res["noop_ran_jobs"])
            if res["code_changed_during_run"]:
                say(f"warning: the workflow's code or configuration changed during the {label(n)} run; "
                    "its figures mix versions (see code_changed_during_run in the JSON)")
            entry.setdefault("all_wall_s", []).append(res["wall_s"])
            if best is None or res["wall_s"] < best["wall_s"]:
                best = res
        stages = best.pop("stages", None)
        entry["snakemake"] = best
        if best["returncode"] != 0:
            entry["wall_s"] = None
            entry["error"] = f"snakemake exit {best['returncode']}; see {best['log']}"
            say(entry["error"])
            save()
            continue
        entry["wall_s"] = best["wall_s"]
        product = run_dir / "distances.parquet"
        entry["shards"] = len(list((run_dir / "shards" / "ingest").glob("part-*.parquet")))
        entry["stages"] = stages  # from the fastest repeat
        if not graph:
            graph.update(rule_graph(catalog, run, args.shard_rows))
        entry["critical_path"] = critical_path(graph, stages)
        entry["product"] = {"rows": pq.read_metadata(product).num_rows, "columns": len(pq.read_schema(product)),
                            "bytes": product.stat().st_size}
        entry["run_dir_bytes"] = dir_size(run_dir)
        say(f"{label(n)} rows: wall {best['wall_s']:.1f} s (fastest of {len(entry['all_wall_s'])}); I/O floor")
        entry["floor"] = io_floor(catalog, product, args.floor_repeats)
        entry["ratio_to_floor"] = round(entry["wall_s"] / entry["floor"]["floor_s"], 2)
        job_s = sum(st["seconds"] for st in entry["stages"].values())
        entry["job_seconds"] = round(job_s, 2)
        entry["wall_minus_job_s_per_core"] = round(entry["wall_s"] - job_s / args.cores, 2)
        save()
        if n == largest:
            if not args.no_swap_check:
                say(f"{label(n)} rows: calibration-swap dry run")
                entry["swap_check"] = swap_check(catalog, run, args.shard_rows, args.cores, entry["shards"],
                                                 OUT_DIR / f"swap_dryrun_{n}.log")
            if not args.no_accuracy:
                say(f"{label(n)} rows: accuracy spot-check")
                try:
                    entry["accuracy"] = accuracy_check(run_dir, args.accuracy_rows, args.accuracy_k_rows, args.seed)
                except Exception as exc:  # noqa: BLE001 - a failed check is reported, not fatal
                    entry["accuracy"] = {"error": f"{type(exc).__name__}: {exc}"}
            if profile_list:
                say(f"{label(n)} rows: profiling {', '.join(profile_list)}")
                entry["profile"] = profile_rules(profile_list, catalog, run, args.shard_rows, args.top)
            save()
        if not args.keep:
            shutil.rmtree(run_dir, ignore_errors=True)
    save()
    print_report(report)
    with open(json_path.with_suffix(".txt"), "w") as fh:
        print_report(report, fh)
    say(f"wrote {json_path} and {json_path.with_suffix('.txt')}")
    failed = [r for r in report["sizes"] if r.get("wall_s") is None]
    return 1 if failed else 0


if __name__ == "__main__":
    raise SystemExit(main())
