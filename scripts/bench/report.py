"""Scaling between sizes, the targets, and the plain-text report."""

from __future__ import annotations

import json
import math
import sys

from bench.common import TARGETS
from bench.scaling import print_model


def pairwise(results: list[dict]) -> list[dict]:
    """Scaling exponent and marginal cost between consecutive successful sizes (the floor's
    figures None where a size was run without the I/O floor)."""
    ok = [r for r in results if r.get("wall_s") is not None]
    ok.sort(key=lambda r: r["rows"])
    out = []
    for a, b in zip(ok, ok[1:]):
        dwall = b["wall_s"] - a["wall_s"]
        fa, fb = (r.get("floor", {}).get("floor_s") for r in (a, b))
        dfloor = None if fa is None or fb is None else fb - fa
        out.append({"from": a["rows"], "to": b["rows"],
                    "exponent": round(math.log(b["wall_s"] / a["wall_s"]) / math.log(b["rows"] / a["rows"]), 3),
                    "marginal_wall_s": round(dwall, 3), "marginal_floor_s": None if dfloor is None else round(dfloor, 3),
                    "marginal_ratio": round(dwall / dfloor, 2) if dfloor is not None and dfloor > 0 else None,
                    "same_code": a.get("snakemake", {}).get("code_fingerprint")
                    == b.get("snakemake", {}).get("code_fingerprint"),
                    "wall_us_per_row": round(1e6 * dwall / (b["rows"] - a["rows"]), 3),
                    "floor_us_per_row": None if dfloor is None else round(1e6 * dfloor / (b["rows"] - a["rows"]), 3)})
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
    for key in ("intermediates_over_catalog", "product_over_catalog"):
        disk = [r for r in results if (r.get("disk") or {}).get(key) is not None]
        if disk:  # intermediates: their sampled peak during the run, else their size at its end
            worst = max(disk, key=lambda r: r["disk"][key])
            out[key] = {"value": worst["disk"][key], "rows": worst["rows"], "target": f"<= {TARGETS[key]}",
                        "pass": worst["disk"][key] <= TARGETS[key]}
            if key == "intermediates_over_catalog":
                out[key]["judged_on"] = worst["disk"].get("intermediates_judged_on", "end of run")
    for r in sorted(results, key=lambda r: -r["rows"]):
        if "swap_check" in r:
            out["calibration_swap"] = {"rows": r["rows"], "jobs": r["swap_check"]["jobs"],
                                       "pass": r["swap_check"]["pass"]}
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
    p(f"  --config: {' '.join(report['settings'].get('config') or []) or '(none: the configuration defaults)'}")
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
    disk = [r for r in results if r.get("disk")]
    if disk:
        p("")
        p("disk, bytes per row at the run's end (intermediates = the shards/<stage> folders):")
        kinds = list(dict.fromkeys(k for r in disk for k in r["disk"]["bytes_per_row"]))
        p(f"  {'file':<34}" + "".join(f"{r['rows']:>12,}" for r in disk))
        for k in kinds:
            p(f"  {k:<34}" + "".join(f"{fmt(r['disk']['bytes_per_row'].get(k)):>12}" for r in disk))
        for key, text in (("intermediates_over_catalog_end", "intermediates / catalog, end"),
                          ("product_over_catalog", "product / catalog")):
            p(f"  {text:<34}" + "".join(f"{fmt(r['disk'].get(key, r['disk'].get(key.removesuffix('_end'))), '{:.2f}'):>12}"
                                        for r in disk))  # older JSONs: no "_end"
        peaks = [r["disk"].get("peak") or {} for r in disk]
        if any(peaks):
            p(f"peak during the run (sampled every ~{fmt(max(k.get('interval_s', 0) for k in peaks), '{:g}')} s; "
              "a lower bound of the true peak):")
            for key, text in (("shards_bytes_per_row", "shards/, bytes per row"),
                              ("shards_over_catalog", "shards/ / catalog"),
                              ("run_bytes_per_row", "run folder, bytes per row"),
                              ("run_over_catalog", "run folder / catalog"),
                              ("peak_shards_at_s", "shards/ peak at (s into the run)")):
                p(f"  {text:<34}" + "".join(f"{fmt(k.get(key)):>12}" for k in peaks))
    p("")
    p("where the wall time goes:")
    for r in results:
        if r.get("wall_s") is None:
            continue
        sm = r.get("snakemake", {})
        cp = r.get("critical_path") or {}
        if r.get("config", report["settings"].get("config")) != report["settings"].get("config"):
            p(f"  {r['rows']:>10,}: run with --config {' '.join(r.get('config') or []) or '(none)'}")
        p(f"  {r['rows']:>10,}: wall {r['wall_s']:.1f} s ({sm.get('grid_cache', 'no')} grid cache); critical path {fmt(cp.get('seconds'))} s "
          f"({' > '.join(cp.get('path', []))}); Snakemake dry run (start-up + DAG) {fmt(sm.get('noop_s'))} s; "
          f"CPU ours {fmt(sm.get('cpu_s_ours'))} s, other processes {fmt(sm.get('foreign_cpu_s'))} s "
          f"({fmt(None if sm.get('foreign_cpu_fraction_of_capacity') is None else 100 * sm['foreign_cpu_fraction_of_capacity'], '{:.0f}')} % of capacity)")
    if report.get("scaling"):
        p("")
        p("scaling between consecutive sizes:")
        for s in report["scaling"]:
            p(f"  {s['from']:>10,} -> {s['to']:>10,}: exponent {s['exponent']:.3f}; marginal wall "
              f"{s['marginal_wall_s']:.1f} s vs floor {fmt(s['marginal_floor_s'])} s "
              f"(ratio {fmt(s['marginal_ratio'], '{:.1f}')}; {s['wall_us_per_row']:.2f} vs "
              f"{fmt(s['floor_us_per_row'], '{:.2f}')} us/row)"
              + ("" if s.get("same_code") else "  [different code versions!]"))
    if report.get("checks"):
        p("")
        p("targets:")
        for name, c in report["checks"].items():
            verdict = "PASS" if c.get("pass") else "FAIL"
            detail = {k: v for k, v in c.items() if k not in ("pass", "per_size_mb")}
            p(f"  {name:<17} {verdict}  {json.dumps(detail, default=str)}")
    if report.get("model"):
        print_model(report["model"], stream)
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
