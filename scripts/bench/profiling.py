"""Rule scripts re-run under cProfile on one shard, and the profile's summary."""

from __future__ import annotations

import pstats
import re
import subprocess
import sys
import time
from pathlib import Path

from bench.common import METHOD_RULE, METHODS, OUT_DIR, PER_SHARD_RULES, REPO
from bench.disk import product_path
from bench.runs import config_args, parse_job_stats, snakemake_cmd

# In DAG order, ingest last: forcing one job leaves every job downstream of it out of date, so
# profiling in this order never makes Snakemake re-run an upstream job first.
PROFILE_RULES_DEFAULT = (*PER_SHARD_RULES, "crosscheck_statistics", "assemble_part", "assemble", "ingest")


def _profile_target(run_dir: Path, rule: str) -> Path | None:
    if rule == "ingest":
        return run_dir / "shards" / "ingest"
    if rule in ("crosscheck_statistics",):
        return run_dir / "crosscheck_statistics.json"
    if rule == "assemble_part":  # the first shard's part (its counts file: either product layout)
        return run_dir / "shards" / "assembly" / "counts-00000.json"
    if rule == "assemble":
        return product_path(run_dir) or run_dir / "distances.parquet"  # either layout
    hits = sorted((run_dir / "shards" / rule).rglob("part-*.parquet"))
    return hits[0] if hits else None


def profile_rules(rules: list[str], catalog: Path, run: str, shard_rows: int, top: int,
                  extra: tuple[str, ...] = ()) -> dict:
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
                            *config_args(catalog, run, shard_rows, extra))
        proc = subprocess.run(cmd, cwd=REPO, capture_output=True, text=True)
        jobs = parse_job_stats(proc.stdout + proc.stderr)
        after = set(scripts_dir.glob("*.py")) if scripts_dir.exists() else set()
        # other sessions may run Snakemake in this directory: touch only scripts of this run's jobs
        kept = [p for p in sorted(after - before) if _mentions(p, run)]
        script_rule = METHOD_RULE if rule in METHODS else rule  # a method's jobs are the distance rule's
        mine = [p for p in kept if p.name.endswith(f".{script_rule}.py")]
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
