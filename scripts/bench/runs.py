"""Workflow runs: the whole workflow, a dry run, a calibration swap, the rule graph,
the jobs' benchmark files, and the CPU time the rest of the machine took meanwhile."""

from __future__ import annotations

import csv
import hashlib
import os
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from bench.common import METHOD_RULE, METHODS, REPO, ROW_RULES, STAGE_ORDER
from bench.disk import DiskSampler

# After a swap of the Tully-Fisher calibration only these rules may run (the target),
# and every distance job is Tully-Fisher's.
SWAP_ALLOWED = {METHOD_RULE, "crosscheck_statistics", "groups", "assemble_part", "assemble", "plots", "run_report",
                "all"}
SWAP_CALIBRATION = "{calibration: tf_ks_masters_2008, band: Ks}"


def config_args(catalog: Path, run: str, shard_rows: int, extra: tuple[str, ...] = ()) -> list[str]:
    """snakemake --config of a benchmark run; ``extra``: the user's KEY=VALUE pairs (--config)."""
    return ["--config", f"catalog={catalog.relative_to(REPO)}", f"run={run}", f"shard_rows={shard_rows}", *extra]


def snakemake_cmd(cores: int, *extra: str) -> list[str]:
    return [sys.executable, "-m", "snakemake", "--cores", str(cores), *extra]


def run_workflow(catalog: Path, run: str, shard_rows: int, cores: int, log_path: Path, extra: tuple[str, ...] = (),
                 disk_interval: float = 1.0, warm_cache: bool = False) -> dict:
    """Run the whole workflow on a clean run directory; returns wall time, status and the
    peak disk use of the run folder sampled every ``disk_interval`` s (0: not sampled).

    The output folder's grid cache (galdist.grid_cache) is emptied first unless
    ``warm_cache``; how many entries it held at the start is recorded either way, so
    a warm figure is never taken for a cold one."""
    run_dir = REPO / "results" / run
    if run_dir.exists():
        shutil.rmtree(run_dir)
    cache_dir = REPO / "results" / ".galdist-cache"
    if not warm_cache:
        shutil.rmtree(cache_dir, ignore_errors=True)
    cached = len(list(cache_dir.glob("*-*.*"))) if cache_dir.is_dir() else 0
    cmd = snakemake_cmd(cores, *config_args(catalog, run, shard_rows, extra), "-q")
    load_before = os.getloadavg()[0]
    with DiskSampler(run_dir, disk_interval) as disk, CpuMeter() as meter, open(log_path, "w") as log:
        proc = subprocess.run(cmd, cwd=REPO, stdout=log, stderr=subprocess.STDOUT)
    return {"command": " ".join(cmd[1:]), "returncode": proc.returncode, "wall_s": round(meter.wall, 3),
            "log": str(log_path.relative_to(REPO)), "load_avg_1min_before": round(load_before, 2),
            "grid_cache": "warm" if cached else "cold", "grid_cache_entries_before": cached,
            "disk_peak": disk.summary()} | meter.summary()


def noop_run(catalog: Path, run: str, shard_rows: int, cores: int, log_path: Path, extra: tuple[str, ...] = ()) -> dict:
    """A dry run of the finished workflow, which should find nothing to do: Snakemake's own
    start-up, configuration checks and DAG time. If it would run jobs, the code or
    configuration changed under the measurement (another session edited the tree)."""
    cmd = snakemake_cmd(cores, "-n", *config_args(catalog, run, shard_rows, extra))
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
    out = {}
    for rule in sorted(stages, key=lambda r: (STAGE_ORDER.index(r) if r in STAGE_ORDER else len(STAGE_ORDER), r)):
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


def swap_check(catalog: Path, run: str, shard_rows: int, cores: int, n_shards: int, log_path: Path,
               extra: tuple[str, ...] = ()) -> dict:
    """Dry-run a Tully-Fisher calibration swap and count the jobs Snakemake would run: one
    distance job per shard, every one of them Tully-Fisher's, and the final steps (statistics,
    groups, assembly, plots, report)."""
    args = config_args(catalog, run, shard_rows, extra) + [f"tully_fisher={SWAP_CALIBRATION}"]
    cmd = snakemake_cmd(cores, "-n", *args)
    proc = subprocess.run(cmd, cwd=REPO, capture_output=True, text=True)
    log_path.write_text(proc.stdout + proc.stderr)
    counts = parse_job_stats(proc.stdout + "\n" + proc.stderr)
    unexpected = sorted(set(counts) - SWAP_ALLOWED)
    # per-shard stage outputs: every one Tully-Fisher's (the groups job's per-galaxy folder and the
    # product's parts follow the distances)
    shards = [line for line in (proc.stdout + proc.stderr).splitlines()
              if "output:" in line and "/shards/" in line and "/shards/groups" not in line
              and "/shards/assembly" not in line]
    ok = (proc.returncode == 0 and bool(counts) and not unexpected and counts.get(METHOD_RULE, 0) == n_shards
          and all("/shards/tully_fisher/" in line for line in shards))
    return {"command": " ".join(cmd[1:]), "returncode": proc.returncode, "jobs": counts,
            "total_jobs": sum(counts.values()), "expected_rules": sorted(SWAP_ALLOWED),
            "unexpected_rules": unexpected, "tully_fisher_jobs_expected": n_shards, "pass": ok,
            "log": str(log_path.relative_to(REPO))}


def rule_graph(catalog: Path, run: str, shard_rows: int, extra: tuple[str, ...] = ()) -> dict[str, list[str]]:
    """rule -> rules it depends on, from ``snakemake --rulegraph`` (dot)."""
    cmd = snakemake_cmd(1, "--rulegraph", *config_args(catalog, run, shard_rows, extra))
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
        weighed = METHODS if rule == METHOD_RULE else (rule,)  # the distance rule: its slowest method
        w = max(stages.get(r, {}).get("max_job_s", 0.0) for r in weighed)
        best = (0.0, [])
        for d in deps.get(rule, []):
            if d not in seen:
                best = max(best, longest(d, seen + (rule,)), key=lambda x: x[0])
        memo[rule] = (best[0] + w, best[1] + [rule])
        return memo[rule]

    total, path = max((longest(r) for r in deps), key=lambda x: x[0])
    return {"seconds": round(total, 2), "path": [r for r in path if r in stages]}
