"""The demo through SLURM: a one-node cluster on localhost, the SLURM executor, the slurm profile.

A real SLURM cluster (Debian's munge, slurmctld and slurmd; tests/slurm/cluster.py) is
started for this module, the demo survey runs through it with the cluster profile
(profiles/slurm) and several jobs at once, and its products must equal those
of a local run of the same configuration in another copy of the workflow. The jobs
must really have gone through SLURM: the controller saw every one of them, ran some
side by side, and gave them the resources the profile asks for.

Needs root and Debian's packages (installed here when missing) and the executor plugin
(installed into a directory under /tmp that only the SLURM run's Snakemake sees: with
the plugin importable, every Snakemake start asks `scontrol` for the cluster's settings
and waits ~10 s where no controller answers). Skipped, with the reason, where either
cannot be had. The daemons started here are stopped by PID, even when a test fails.
Marked ``slurm``: ``python -m pytest -m "not slurm"`` leaves it out.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from datetime import datetime
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from conftest import assert_same_table, copy_workflow, drop_volatile, run_snakemake
from galdist import config as gconfig
from galdist.methods import plot_names, prefixes
from slurm.cluster import (ClusterUnavailable, LocalSlurmCluster, ensure_executor_plugin, ensure_packages)

pytestmark = [pytest.mark.slurm, pytest.mark.slow]

#: the methods of the demo config the cluster runs
DEMO_METHODS = gconfig.validate(gconfig.load(gconfig.DEFAULT_CONFIG))["methods"]

# 600 invented galaxies in shards of 300: two shards, so per-shard jobs run side by side.
DEMO = ("--config", "demo={n_galaxies: 600}", "shard_rows=300")
PROFILE = "profiles/slurm"  # relative to a copy of the workflow (conftest.copy_workflow)
SLURM_TIMEOUT_S = 360  # the plugin can hang when it loses track of jobs: never wait forever
# Fields that differ between two runs by nature (wall-clock time, checkout state).
TIMES: dict[str, float] = {}


# --- the cluster and the plugin ---------------------------------------------------------

@pytest.fixture(scope="module")
def cluster():
    if sys.platform != "linux" or os.geteuid() != 0:
        pytest.skip("the SLURM test cluster needs root on Linux (it starts munged, slurmctld, slurmd)")
    try:
        TIMES["apt_install_s"] = ensure_packages()
    except ClusterUnavailable as exc:
        pytest.skip(str(exc))
    except (RuntimeError, subprocess.TimeoutExpired) as exc:
        pytest.skip(f"Debian's munge/SLURM packages could not be installed: {exc}")
    c = LocalSlurmCluster()
    try:
        TIMES["cluster_start_s"] = c.start()
    except BaseException:
        c.stop()
        raise
    yield c
    c.stop()


@pytest.fixture(scope="module")
def plugin_dir():
    try:
        return ensure_executor_plugin()
    except (RuntimeError, subprocess.TimeoutExpired) as exc:
        pytest.skip(f"snakemake-executor-plugin-slurm could not be installed: {exc}")


def _slurm_snakemake(cluster: LocalSlurmCluster, plugin: Path, workdir: Path, *args: str,
                     timeout: int = SLURM_TIMEOUT_S) -> subprocess.CompletedProcess:
    env = cluster.env()
    env.pop("SNAKEMAKE_PROFILE", None)
    env["PYTHONPATH"] = os.pathsep.join([str(plugin), *filter(None, [env.get("PYTHONPATH")])])
    cmd = ["timeout", "-s", "INT", "-k", "30", str(timeout),
           sys.executable, "-m", "snakemake", "--workflow-profile", PROFILE, *args]
    return subprocess.run(cmd, cwd=workdir, env=env, capture_output=True, text=True, timeout=timeout + 60)


def _diagnostics(result: subprocess.CompletedProcess, workdir: Path, cluster: LocalSlurmCluster) -> str:
    parts = [f"exit {result.returncode}", "--- snakemake stderr", result.stderr[-4000:]]
    for log in sorted((workdir / ".snakemake" / "slurm_logs").rglob("*.log"))[-6:]:
        parts += [f"--- {log.relative_to(workdir)}", log.read_text(errors="replace")[-1500:]]
    parts += ["--- cluster", cluster.logs(1500)]
    return "\n".join(parts)


def _timed(func, *args, **kwargs):
    t0 = time.monotonic()
    result = func(*args, **kwargs)
    return result, time.monotonic() - t0


@pytest.fixture(scope="module")
def runs(tmp_path_factory, cluster, plugin_dir):
    """The same demo, once locally and once through SLURM, each in its own copy.

    The two run at the same time: the SLURM run spends most of its wall time waiting
    (queue, status queries, each job's Snakemake start-up), so the local run fits in.
    """
    local = copy_workflow(tmp_path_factory.mktemp("local"))
    remote = copy_workflow(tmp_path_factory.mktemp("slurm"))
    with ThreadPoolExecutor(max_workers=1) as pool:
        local_future = pool.submit(_timed, run_snakemake, local, *DEMO)
        # Four jobs at once; the first status query 6 s after submitting (the plugin's
        # default of 40 s suits a busy cluster, not a demo).
        result, TIMES["slurm_run_s"] = _timed(_slurm_snakemake, cluster, plugin_dir, remote, *DEMO, "--jobs", "4",
                                              "--slurm-init-seconds-before-status-checks", "6")
        local_result, TIMES["local_run_s"] = local_future.result()
    print("timings (the two runs side by side): " + ", ".join(f"{k} {v:.1f}" for k, v in TIMES.items()))
    assert local_result.returncode == 0, local_result.stderr[-3000:]
    assert result.returncode == 0, _diagnostics(result, remote, cluster)
    return {"local": local / "results" / "demo", "slurm": remote / "results" / "demo",
            "output": result.stdout + result.stderr, "cluster": cluster}


# --- the products are the same ------------------------------------------------------------

def test_slurm_products_equal_local_products(runs):
    local, slurm = runs["local"], runs["slurm"]
    a, b = pq.read_table(local / "distances.parquet"), pq.read_table(slurm / "distances.parquet")
    assert a.num_rows == 600
    assert_same_table(a, b, "distances.parquet")
    prov = [json.loads(pq.read_schema(p / "distances.parquet").metadata[b"galdist.provenance"]) for p in (local, slurm)]
    assert drop_volatile(prov[0]) == drop_volatile(prov[1])
    for name in ("summary.json", "ingest_summary.json", "crosscheck_statistics.json"):
        ja, jb = (json.loads((p / name).read_text()) for p in (local, slurm))
        assert drop_volatile(ja) == drop_volatile(jb), name
    plots = sorted(p.name for p in (slurm / "plots").glob("*.png"))
    assert plots == sorted(p.name for p in (local / "plots").glob("*.png"))
    assert plots == sorted(f"{name}.png" for name in plot_names(prefixes(DEMO_METHODS)))


def test_every_shard_file_equal(runs):
    local, slurm = runs["local"], runs["slurm"]
    files = sorted(p.relative_to(local) for p in (local / "shards").rglob("*.parquet"))
    assert files == sorted(p.relative_to(slurm) for p in (slurm / "shards").rglob("*.parquet"))
    assert len([f for f in files if f.parts[1] == "ingest"]) == 2  # two shards
    for f in files:
        assert_same_table(pq.read_table(local / f), pq.read_table(slurm / f), str(f))


# --- the jobs really went through SLURM ---------------------------------------------------

SUBMITTED = re.compile(r"has been submitted with SLURM jobid (\d+) \(log: .*/slurm_logs/([^/]+)/")


def _submitted(output: str) -> dict[str, str]:
    """SLURM job id -> rule_<name> or group_<name>_<rules>, from Snakemake's log."""
    return {jid: what for jid, what in SUBMITTED.findall(output)}


def test_every_job_was_a_slurm_job(runs):
    submitted = _submitted(runs["output"])
    run_id = re.search(r"SLURM run ID: (\S+)", runs["output"]).group(1)
    jobs = {j["id"]: j for j in runs["cluster"].jobs() if j["name"] == run_id}
    assert set(jobs) == set(submitted), (jobs, submitted)
    assert all(j["state"] == "COMPLETED" for j in jobs.values()), jobs
    kinds = sorted(submitted.values())
    # One job per shard for the shard's chain, one per shard for redshift and for its product
    # part, one for assemble, plots and the run report.
    assert kinds.count("group_shard_distance_extinction_kcorr") == 2, kinds
    assert kinds.count("rule_redshift") == 2, kinds
    assert kinds.count("rule_assemble_part") == 2, kinds
    assert kinds.count("group_product_assemble_plots_run_report") == 1, kinds
    for rule in ("demo_catalog", "ingest", "mu_grid", "extinction_coefficients", "kcorr_grid",
                 "crosscheck_statistics", "groups"):
        assert kinds.count(f"rule_{rule}") == 1, (rule, kinds)


def test_profile_resources_reach_sbatch(runs):
    submitted = _submitted(runs["output"])
    jobs = {j["id"]: j for j in runs["cluster"].jobs()}
    by_kind = {}
    for jid, kind in submitted.items():
        by_kind.setdefault(kind, []).append(jobs[jid])
    # A shard's job runs its jobs one after the other on one core (cores: 1): the memory
    # of the largest, the sum of their wall times (extinction 10 + kcorr 10 + one distance
    # job per method of the demo config, 15 min each).
    minutes = 20 + 15 * len(DEMO_METHODS)
    for job in by_kind["group_shard_distance_extinction_kcorr"]:
        limit = f"{minutes // 60}:{minutes % 60:02d}:00" if minutes >= 60 else f"{minutes}:00"
        assert (job["cpus"], job["min_memory"], job["time_limit"]) == ("1", "2000M", limit), job
    for job in by_kind["rule_redshift"]:
        assert (job["cpus"], job["min_memory"], job["time_limit"]) == ("1", "2000M", "10:00"), job
    for job in by_kind["rule_assemble_part"]:
        assert (job["cpus"], job["min_memory"], job["time_limit"]) == ("1", "2000M", "15:00"), job
    # Whole-catalog rules: fixed memory (bounded by a shard, not by the catalog), a run
    # time that scales with their input's size; a small demo gets the floor.
    (ingest,) = by_kind["rule_ingest"]
    assert (ingest["min_memory"], ingest["time_limit"]) == ("2000M", "15:00"), ingest
    # assemble 15 + plots 15 + report 10 min, the largest memory of the three
    (assemble,) = by_kind["group_product_assemble_plots_run_report"]
    assert (assemble["min_memory"], assemble["time_limit"]) == ("2000M", "40:00"), assemble


def _controller_events(log: str) -> list[tuple[datetime, str, str]]:
    """(time, event, job id) for submissions, starts and ends in the slurmctld log."""
    patterns = {"submit": r"_slurm_rpc_submit_batch_job: JobId=(\d+)", "start": r"(?:sched: Allocate|_start_job: Started) JobId=(\d+)",
                "end": r"_job_complete: JobId=(\d+) done"}
    events = []
    for line in log.splitlines():
        stamp = re.match(r"\[(\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d+)\]", line)
        for kind, pattern in patterns.items():
            m = re.search(pattern, line)
            if stamp and m:
                events.append((datetime.fromisoformat(stamp.group(1)), kind, m.group(1)))
    return sorted(events, key=lambda e: (e[0], e[1] != "end"))  # an end before a start at the same instant


def _most_at_once(events, begin: str, end: str) -> int:
    now = most = 0
    for _, kind, _ in events:
        now += (kind == begin) - (kind == end)
        most = max(most, now)
    return most


def test_several_jobs_at_once(runs):
    events = _controller_events(runs["cluster"].controller_log())
    n = len(_submitted(runs["output"]))
    assert sum(kind == "start" for _, kind, _ in events) == n
    assert sum(kind == "end" for _, kind, _ in events) == n
    assert _most_at_once(events, "submit", "end") >= 3  # in the queue or running together
    assert _most_at_once(events, "start", "end") >= min(2, os.cpu_count() or 1)  # running together


# --- the cluster helper itself ------------------------------------------------------------

def test_cluster_stops_exactly_what_it_started(cluster):
    """A second cluster beside the first: its stop() ends its own three daemons, not the other's."""
    other = LocalSlurmCluster()
    try:
        other.start()
        pids = other.alive()
        assert len(pids) == 3
        assert "is UP" in subprocess.run(["scontrol", "ping"], env=other.env(), capture_output=True,
                                         text=True, timeout=30).stdout
    finally:
        other.stop()
    assert other.alive() == []
    for pid in pids:
        with pytest.raises(ProcessLookupError):
            os.kill(pid, 0)
    assert not other.root.exists()
    assert len(cluster.alive()) == 3  # the module's cluster still runs
