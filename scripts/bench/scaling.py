"""Scaling model: the wall time of a run of N rows on K nodes of c cores each, predicted
from the measured per-stage costs of a benchmark JSON (``scripts/benchmark.py``).

Assumptions, each a simplification:

1. Every job uses one core (plots' second thread is ignored); a node runs c jobs at once.
2. Per-shard rules (extinction, kcorr, redshift, each method's ``distance``, and
   ``assemble_part`` when the run has it) cost ``s0 + a_r * rows_of_the_shard`` per job.
   ``s0``, the start-up of a job (Python, imports, Snakemake's job script), is the median
   of the smallest run's per-shard and ``mu_grid`` jobs, whose work is negligible;
   ``a_r = (summed seconds - jobs * s0) / N`` of the fit run (never below 0).
3. Whole-catalog rules (ingest, crosscheck_statistics, groups, assemble, and any rule not
   named here) are one job on one core of one node: ``s0 + b_r * N``, ``b_r`` from the fit
   run. Linear in N: a step whose cost grows faster (a sort, a neighbour search) is
   underestimated.
4. Constants, measured in the fit run: the once-per-configuration grids
   (extinction_coefficients, kcorr_grid, mu_grid), plots (drawn from a sample of bounded
   size) and run_report.
5. Order: Snakemake's start-up and DAG; ingest with the grids beside it; the per-shard
   phase; then crosscheck_statistics beside groups, then assemble, plots, run_report, one
   after another. ``assemble_part`` jobs, which follow groups, are counted in the per-shard
   phase (the sum is the same).
6. The per-shard phase lasts the larger of (its job seconds / (K*c)), i.e. jobs packed
   perfectly into the cores, and one shard's chain extinction -> kcorr -> slowest method ->
   assemble_part. On a cluster each wave of K*c jobs waits ``queue_wait_s`` in the queue
   (waves = max(jobs / (K*c) rounded up, steps of the chain)), and so does each step of the
   head and the tail.
7. Snakemake's DAG time is affine in the job count, fitted (least squares) through the dry
   runs of the sizes up to the fit size; if they all have the same job count, proportional
   to it (an upper bound: most of the dry run is start-up).
8. Not modelled: the bandwidth and metadata latency of a shared file system (every job
   reads and writes its shard there; the whole-catalog steps read everything), node
   memory, Snakemake's submission and status-polling rate, retries, and the contention of
   the measuring machine (the benchmark records it as foreign CPU time).
"""

from __future__ import annotations

import math
import sys

from bench.common import METHODS, label

CONSTANT_RULES = ("extinction_coefficients", "kcorr_grid", "mu_grid", "plots", "run_report")
GRID_RULES = ("extinction_coefficients", "kcorr_grid", "mu_grid")  # run beside ingest
PER_SHARD = ("extinction", "kcorr", "redshift", *METHODS, "assemble_part")
TAIL_PARALLEL = ("crosscheck_statistics", "groups")  # both need only the per-shard outputs
TAIL_SERIAL = ("assemble", "plots", "run_report")
CHAIN = (("extinction",), ("kcorr",), METHODS, ("assemble_part",))  # one shard's dependent steps


def _measured(report: dict) -> list[dict]:
    return sorted((r for r in report.get("sizes", []) if r.get("wall_s") is not None and r.get("stages")),
                  key=lambda r: r["rows"])


def fit(report: dict, fit_rows: int | None = None) -> dict:
    """Model parameters from a benchmark report: start-up from its smallest size, per-row
    costs from ``fit_rows`` (default: the largest measured size), the DAG from the dry runs
    of the sizes up to it."""
    sizes = _measured(report)
    if not sizes:
        raise ValueError("the benchmark JSON has no successful size with per-stage figures")
    fit_rows = fit_rows or sizes[-1]["rows"]
    use = [r for r in sizes if r["rows"] <= fit_rows]
    if not use or use[-1]["rows"] != fit_rows:
        have = ", ".join(f"{r['rows']:,}" for r in sizes)
        raise ValueError(f"no measured size of {fit_rows:,} rows in the JSON (have {have})")
    small, big = use[0], use[-1]
    trivial = [st["seconds"] / st["jobs"] for rule, st in small["stages"].items()
               if (rule in PER_SHARD or rule == "mu_grid") and st["jobs"]]
    s0 = sorted(trivial)[len(trivial) // 2] if trivial else 0.0
    n = big["rows"]
    per_shard, whole, const = {}, {}, {}
    for rule, st in big["stages"].items():
        if rule in CONSTANT_RULES:
            const[rule] = st["seconds"]
        elif rule in PER_SHARD:
            per_shard[rule] = max(0.0, st["seconds"] - st["jobs"] * s0) / n
        else:
            whole[rule] = max(0.0, st["seconds"] - s0) / n
    points = [(sum(st["jobs"] for st in r["stages"].values()), r["snakemake"]["noop_s"])
              for r in use if (r.get("snakemake") or {}).get("noop_s") is not None]
    if len({j for j, _ in points}) >= 2:
        mj = sum(j for j, _ in points) / len(points)
        mt = sum(t for _, t in points) / len(points)
        slope = sum((j - mj) * (t - mt) for j, t in points) / sum((j - mj) ** 2 for j, _ in points)
        slope = max(0.0, slope)
        dag = {"kind": "affine in jobs", "s": mt - slope * mj, "s_per_job": slope}
    elif points:
        dag = {"kind": "proportional to jobs (upper bound)", "s": 0.0, "s_per_job": points[-1][1] / points[-1][0]}
    else:
        dag = {"kind": "not measured", "s": 0.0, "s_per_job": 0.0}
    shard_rows = report["settings"]["shard_rows"]
    warnings = []
    if n < shard_rows:
        warnings.append(f"fitted from {n:,} rows, less than one shard of {shard_rows:,}: the per-row costs are "
                        "mostly start-up; fit from a run of at least one full shard")
    if small["rows"] >= shard_rows:
        warnings.append(f"start-up taken from full {shard_rows:,}-row shards: overestimated; add a small size "
                        "(e.g. 1e4) to the benchmark")
    return {"fit_rows": n, "startup_rows": small["rows"], "shard_rows": shard_rows, "warnings": warnings,
            "startup_s": s0, "per_shard_s_per_row": per_shard, "whole_s_per_row": whole, "constant_s": const,
            "dag": dag}


def job_seconds(model: dict, rows: int, shard_rows: int | None = None) -> dict:
    """Predicted summed job seconds of every rule for a catalog of ``rows`` rows."""
    shards = math.ceil(rows / (shard_rows or model["shard_rows"]))
    s0 = model["startup_s"]
    out = {r: shards * s0 + a * rows for r, a in model["per_shard_s_per_row"].items()}
    out |= {r: s0 + b * rows for r, b in model["whole_s_per_row"].items()}
    return out | dict(model["constant_s"])


def predict(model: dict, rows: int, nodes: int = 1, cores_per_node: int = 2, queue_wait_s: float = 0.0,
            shard_rows: int | None = None) -> dict:
    """Predicted wall time (seconds) of a run and its parts (see the module's assumptions)."""
    shard_rows = shard_rows or model["shard_rows"]
    shards = math.ceil(rows / shard_rows)
    slots = nodes * cores_per_node
    secs = job_seconds(model, rows, shard_rows)
    s0 = model["startup_s"]
    per_shard_rules = list(model["per_shard_s_per_row"])
    jobs = shards * len(per_shard_rules) + len(model["whole_s_per_row"]) + len(model["constant_s"])
    dag = model["dag"]["s"] + model["dag"]["s_per_job"] * jobs

    grids = sum(secs.get(r, 0.0) for r in GRID_RULES)
    ingest = secs.get("ingest", 0.0)
    head = max(ingest, grids / (slots - 1)) if slots > 1 else ingest + grids

    one_shard = min(rows, shard_rows)
    steps = [[s0 + model["per_shard_s_per_row"][r] * one_shard for r in group if r in model["per_shard_s_per_row"]]
             for group in CHAIN]
    steps = [max(s) for s in steps if s]
    shard_work = sum(secs[r] for r in per_shard_rules)
    shard_phase = max(shard_work / slots, sum(steps))
    waves = max(math.ceil(shards * len(per_shard_rules) / slots), len(steps)) if per_shard_rules else 0

    tail = {}
    parallel = [secs[r] for r in TAIL_PARALLEL if r in secs]
    if parallel:
        tail["crosscheck_statistics | groups"] = max(parallel) if slots > 1 else sum(parallel)
    others = [r for r in model["whole_s_per_row"] if r != "ingest" and r not in TAIL_PARALLEL + TAIL_SERIAL]
    for r in [*others, *TAIL_SERIAL]:
        if r in secs:
            tail[r] = secs[r]
    queue = queue_wait_s * (1 + waves + len(tail))
    parts = {"Snakemake DAG": dag, "ingest (grids beside it)": head, "per-shard jobs": shard_phase} | tail
    parts["queue waits"] = queue
    dominant = max(parts, key=parts.get)
    if dominant == "per-shard jobs" and per_shard_rules:
        dominant += f" (most: {max(per_shard_rules, key=lambda r: secs[r])})"
    total = sum(parts.values())
    return {"rows": rows, "nodes": nodes, "cores_per_node": cores_per_node, "queue_wait_s": queue_wait_s,
            "shards": shards, "jobs": jobs, "waves": waves, "wall_s": total, "parts_s": parts,
            "dominant": dominant, "dominant_share": max(parts.values()) / total if total > 0 else None,
            "job_seconds": secs}


def checks(report: dict) -> list[dict]:
    """Predicted against measured wall time: fit from each measured size of at least one full
    shard, predict every larger one on this machine (1 node, the benchmark's cores, no queue).
    A smaller run is no fit: its jobs' cost is mostly start-up and steps with a capped
    sample (the Monte Carlo errors' ``mc_max_rows``), not rows."""
    sizes = _measured(report)
    cores = report["settings"]["cores"]
    out = []
    for i, f in enumerate(sizes):
        if f["rows"] < report["settings"]["shard_rows"]:
            continue
        model = fit(report, f["rows"])
        for m in sizes[i + 1:]:
            p = predict(model, m["rows"], 1, cores, 0.0)
            out.append({"fit_rows": f["rows"], "rows": m["rows"], "predicted_s": round(p["wall_s"], 1),
                        "measured_s": m["wall_s"], "ratio": round(p["wall_s"] / m["wall_s"], 2),
                        "predicted_job_s": {r: round(v, 1) for r, v in p["job_seconds"].items()},
                        "measured_job_s": {r: st["seconds"] for r, st in m["stages"].items()}})
    return out


def human(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.1f} min"
    return f"{seconds / 3600:.1f} h"


def model_section(report: dict, predict_rows=(10**8, 10**9), nodes=(1, 10, 100), cores_per_node: int = 2,
                  queue_wait_s: float = 30.0, fit_rows: int | None = None) -> dict:
    """The model's figures for the JSON and the printed report."""
    model = fit(report, fit_rows)
    table = [predict(model, n, k, cores_per_node, queue_wait_s if k > 1 else 0.0)
             for n in predict_rows for k in nodes]
    return {"model": model, "checks": checks(report), "predictions": table,
            "settings": {"predict_rows": list(predict_rows), "nodes": list(nodes), "cores_per_node": cores_per_node,
                         "queue_wait_s": queue_wait_s, "queue_wait_note": "0 on 1 node (run locally)"}}


def print_model(section: dict, stream=None) -> None:
    def p(line=""):
        print(line, file=stream or sys.stdout)
    m = section["model"]
    p("")
    p(f"scaling model (scripts/bench/scaling.py): per-row costs from the {m['fit_rows']:,}-row run, job "
      f"start-up {m['startup_s']:.2f} s (median of the {m['startup_rows']:,}-row run's per-shard and mu_grid "
      f"jobs), DAG {m['dag']['s']:.1f} s + {m['dag']['s_per_job']:.4f} s/job ({m['dag']['kind']}), shards of "
      f"{m['shard_rows']:,} rows")
    for w in m.get("warnings", []):
        p(f"  warning: {w}")
    costs = [f"{r} {1e6 * a:.2f}" for r, a in m["per_shard_s_per_row"].items()]
    p(f"  per-shard, us/row: {', '.join(costs)}")
    p(f"  whole-catalog, us/row: {', '.join(f'{r} {1e6 * b:.2f}' for r, b in m['whole_s_per_row'].items())}")
    p(f"  constant, s: {', '.join(f'{r} {c:.1f}' for r, c in m['constant_s'].items())}")
    if section["checks"]:
        p("  check on this machine (1 node, the benchmark's cores, no queue): fit from -> predict")
        for c in section["checks"]:
            worst = max(c["measured_job_s"], key=lambda r: abs(c["predicted_job_s"].get(r, 0) - c["measured_job_s"][r]))
            p(f"    {label(c['fit_rows']):>5} -> {label(c['rows']):<5} predicted {c['predicted_s']:>8.1f} s, measured "
              f"{c['measured_s']:>8.1f} s (x{c['ratio']:.2f}); largest rule error {worst}: predicted "
              f"{c['predicted_job_s'].get(worst, 0):.1f} s, measured {c['measured_job_s'][worst]:.1f} job s")
    s = section["settings"]
    p(f"  predictions ({s['cores_per_node']} cores per node; 1 node = one machine, no queue; more nodes = SLURM, "
      f"queue wait {s['queue_wait_s']:g} s per wave):")
    p(f"    {'rows':>6} {'nodes':>5} {'shards':>6} {'jobs':>6} {'waves':>5} {'wall':>9}  dominant stage")
    for r in section["predictions"]:
        p(f"    {label(r['rows']):>6} {r['nodes']:>5} {r['shards']:>6} {r['jobs']:>6} {r['waves']:>5} "
          f"{human(r['wall_s']):>9}  {r['dominant']} ({100 * r['dominant_share']:.0f} %)")
