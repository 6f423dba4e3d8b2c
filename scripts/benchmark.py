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
2. runs the full workflow (all stages, every method, shard_rows 10^6 unless
   ``--shard-rows``) in a subprocess ``python -m snakemake --cores 2 --config
   catalog=... run=bench_<N> shard_rows=... [--config KEY=VALUE ...]`` from the
   repository root, after deleting ``results/bench_<N>`` and (unless ``--warm-cache``)
   the grid cache ``results/.galdist-cache``, and times the wall clock (the JSON says
   whether the cache was cold or warm); a thread samples the bytes of the run's
   ``shards/`` folder and of the whole run folder every ``--disk-interval`` s (1 s)
   and keeps the peak of each;
3. measures the I/O floor in this process: a bare ``pyarrow.parquet.read_table``
   of the catalog plus a write with the product's settings (zstd, 256 Ki-row
   groups, dictionaries on text and flag columns only, fsync) of a table with the
   product's row count, column count and string/number column kinds, filled with
   the columns just read (``--no-floor`` or ``--floor-repeats 0`` skips it);
4. parses every Snakemake ``benchmark:`` TSV under ``results/bench_<N>/benchmarks``:
   per rule (per method for the distance rule), jobs, summed and largest seconds,
   rows/s = N / summed seconds, and the largest max_rss (MB).

Each size also records the critical path through the rule graph (slowest job
per rule), a dry run's time (Snakemake's own start-up and DAG), and the CPU time
other processes took meanwhile (this machine is shared: a contended run is
slower, not worse code); ``--repeat`` keeps the fastest of several runs.

After all sizes it reports the scaling exponent d ln(wall)/d ln(N) between the
two largest sizes, the marginal cost per row against 4x the floor's, the
fixed cost (a 10^4-row run within 30 s) and the 1 GB RSS ceiling; after the
largest run it dry-runs a swap of the Tully-Fisher calibration and counts the
jobs per rule, and with ``--profile`` runs chosen rule
scripts once more under cProfile on one shard and prints the top of each
profile (imports separated from work). Results go to
``results/benchmark/benchmark.json`` (profiles and logs beside it) and a
plain-text table is printed; ``results/bench_<N>`` is deleted unless ``--keep``.

The report ends with the scaling model (``scripts/bench/scaling.py``): per-stage costs
fitted from the largest size and the wall time predicted for 1e8 and 1e9 rows on 1, 10
and 100 nodes; its check fits each size of at least a shard and predicts every larger
measured one. ``--model-from F.json`` runs nothing and prints the model of an earlier
JSON (``--fit-rows``, ``--predict``, ``--nodes``, ``--cores-per-node``, ``--queue-wait-s``).

    python scripts/benchmark.py                       # 1e5, 1e6, 1e7 rows
    python scripts/benchmark.py --sizes 1e4,1e5,1e6 --profile
    python scripts/benchmark.py --sizes 1e7 --merge   # add a size to an earlier JSON
    python scripts/benchmark.py --sizes 1e8 --merge --no-floor --no-swap-check --config keep_intermediates=false
    python scripts/benchmark.py --model-from results/benchmark/benchmark.json --nodes 1,10,100 --queue-wait-s 30

The parts live in ``scripts/bench/`` (catalogs, runs, disk, floor, profiling, scaling, report);
this file is the command line and the loop over sizes. The accuracy of the
interpolated quantities (mu(z), K, A) is a test, ``tests/test_accuracy.py``. Speed
and memory are measured here, never asserted in tests.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import shutil
from pathlib import Path

from bench.common import (DEFAULT_SHARD_ROWS, OUT_DIR, PER_SHARD_RULES, REPO, TARGETS, label, machine_info,
                          parse_size, parse_sizes, say)
from bench.catalogs import ensure_catalog
from bench.disk import disk_use, product_path, tree_bytes
from bench.floor import io_floor, product_shape
from bench.scaling import model_section, print_model
from bench.profiling import PROFILE_RULES_DEFAULT, profile_rules
from bench.report import checks, pairwise, print_report
from bench.runs import (code_fingerprint, critical_path, noop_run, read_benchmarks, rule_graph, run_workflow,
                        swap_check)


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
                    help="I/O floor measurements per size; the fastest is kept (default 2; 0 = no floor)")
    ap.add_argument("--no-floor", action="store_const", const=0, dest="floor_repeats",
                    help="skip the I/O floor (same as --floor-repeats 0; e.g. for a 1e8 run)")
    ap.add_argument("--config", nargs="+", action="extend", default=[], metavar="KEY=VALUE",
                    help="passed to every workflow run (snakemake --config), e.g. keep_intermediates=false "
                         "copy_inputs=false product_layout=parts; recorded in the JSON and the report")
    ap.add_argument("--disk-interval", type=float, default=1.0,
                    help="seconds between samples of the run folder's size during a run (default 1; 0 = off)")
    ap.add_argument("--regenerate", action="store_true", help="rebuild catalogs even if a matching file exists")
    ap.add_argument("--keep-catalogs", action="store_true",
                    help="reuse catalogs written by an older galdist/demo.py (default: rebuild them)")
    ap.add_argument("--keep", action="store_true", help="keep results/bench_<N> after the run (default: delete)")
    ap.add_argument("--profile", nargs="?", const=",".join(PROFILE_RULES_DEFAULT), default=None,
                    metavar="RULES",
                    help="profile rule scripts under cProfile after the largest run (optionally a "
                         f"comma-separated list; default {','.join(PROFILE_RULES_DEFAULT)})")
    ap.add_argument("--top", type=int, default=20, help="lines of each profile to print (default 20)")
    ap.add_argument("--warm-cache", action="store_true",
                    help="keep results/.galdist-cache (the grid cache) between runs; default: empty it "
                         "before each run, so the figures are cold ones")
    ap.add_argument("--no-swap-check", action="store_true", help="skip the calibration-swap dry run")
    ap.add_argument("--merge", action="store_true",
                    help="keep other sizes from an existing JSON (same shard_rows and cores) in the report")
    ap.add_argument("--json", default=str(OUT_DIR / "benchmark.json"), help="output JSON path")
    model = ap.add_argument_group("scaling model (scripts/bench/scaling.py)")
    model.add_argument("--model-from", metavar="JSON",
                       help="run nothing: print the scaling model fitted to this benchmark JSON")
    model.add_argument("--fit-rows", type=parse_size, default=None,
                       help="size whose per-row costs the model uses (default: the largest measured)")
    model.add_argument("--predict", type=parse_sizes, default=[10**8, 10**9],
                       help="catalog sizes to predict (default 1e8,1e9)")
    model.add_argument("--nodes", type=lambda t: [int(x) for x in t.split(",") if x.strip()], default=[1, 10, 100],
                       help="node counts to predict (default 1,10,100)")
    model.add_argument("--cores-per-node", type=int, default=2, help="cores (concurrent jobs) per node (default 2)")
    model.add_argument("--queue-wait-s", type=float, default=30.0,
                       help="SLURM queue wait per wave of jobs on more than one node (default 30; 0 on one node)")
    args = ap.parse_args(argv)
    model_args = {"predict_rows": args.predict, "nodes": args.nodes, "cores_per_node": args.cores_per_node,
                  "queue_wait_s": args.queue_wait_s, "fit_rows": args.fit_rows}
    if args.model_from:
        try:
            section = model_section(json.loads(Path(args.model_from).read_text()), **model_args)
        except (OSError, ValueError, KeyError) as exc:
            ap.error(f"--model-from {args.model_from}: {exc}")
        print_model(section)
        return 0

    if args.repeat < 1 or args.floor_repeats < 0:
        ap.error("--repeat must be >= 1 and --floor-repeats >= 0")
    extra = tuple(args.config)
    for item in extra:
        key = item.split("=", 1)[0]
        if "=" not in item or not key:
            ap.error(f"--config {item!r}: expected KEY=VALUE, e.g. keep_intermediates=false")
        if key in ("catalog", "run", "shard_rows"):
            ap.error(f"--config {key}=...: the benchmark sets {key} itself"
                     + (" (use --shard-rows)" if key == "shard_rows" else ""))
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
                "chunk_rows": args.chunk_rows, "top": args.top, "config": list(extra),
                "floor_repeats": args.floor_repeats, "disk_interval_s": args.disk_interval}
    previous = []
    if args.merge and json_path.exists():
        old = json.loads(json_path.read_text())
        if (old.get("settings", {}).get("shard_rows") == args.shard_rows
                and old.get("settings", {}).get("cores") == args.cores):
            previous = [r for r in old.get("sizes", []) if r["rows"] not in args.sizes]
            other = sorted({" ".join(r.get("config", [])) for r in previous} - {" ".join(extra)})
            if other:
                say(f"--merge: kept sizes were run with other --config ({'; '.join(o or '(none)' for o in other)}); "
                    "the report names each size's")
        else:
            say("--merge: existing JSON has other shard_rows/cores; not merged")
    report = {"created_utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
              "machine": machine_info(), "settings": settings, "targets": TARGETS, "sizes": list(previous)}

    def save():
        rs = report["sizes"]
        report["scaling"] = pairwise(rs)
        report["checks"] = checks(rs, report["scaling"])
        try:
            report["model"] = model_section(report, **model_args)
        except (ValueError, KeyError):  # no successful size yet
            report.pop("model", None)
        json_path.parent.mkdir(parents=True, exist_ok=True)
        tmp = json_path.with_suffix(".json.tmp")
        tmp.write_text(json.dumps(report, indent=2, default=str) + "\n")
        os.replace(tmp, json_path)

    largest = max(args.sizes)
    graph: dict[str, list[str]] = {}
    for n in args.sizes:
        entry = {"rows": n, "measured_utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
                 "config": list(extra)}
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
            res = run_workflow(catalog, run, args.shard_rows, args.cores, OUT_DIR / f"snakemake_{n}.log", extra,
                               args.disk_interval, warm_cache=args.warm_cache)
            if res["returncode"] != 0:
                best = res
                break
            res["stages"] = read_benchmarks(run_dir / "benchmarks", n)  # before anything can re-run a job
            res |= noop_run(catalog, run, args.shard_rows, args.cores, OUT_DIR / f"snakemake_noop_{n}.log", extra)
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
        product = product_path(run_dir)  # distances.parquet or distances/ (parts)
        shard_jobs = [stages[r]["jobs"] for r in PER_SHARD_RULES if r in stages]
        entry["shards"] = (max(shard_jobs) if shard_jobs  # the ingest folder may be a temp, gone by now
                           else len(list((run_dir / "shards" / "ingest").glob("part-*.parquet"))))
        entry["stages"] = stages  # from the fastest repeat
        if not graph:
            graph.update(rule_graph(catalog, run, args.shard_rows, extra))
        entry["critical_path"] = critical_path(graph, stages)
        if product is not None:
            schema, product_rows = product_shape(product)
            entry["product"] = {"path": product.name, "rows": product_rows, "columns": len(schema),
                                "bytes": tree_bytes(product)}
        entry["run_dir_bytes"] = tree_bytes(run_dir)
        entry["disk"] = disk_use(run_dir, catalog, n, best.get("disk_peak"))
        say(f"{label(n)} rows: wall {best['wall_s']:.1f} s (fastest of {len(entry['all_wall_s'])})"
            + ("; I/O floor" if args.floor_repeats and product is not None else ""))
        if args.floor_repeats and product is not None:
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
                                                 OUT_DIR / f"swap_dryrun_{n}.log", extra)
            if profile_list:
                say(f"{label(n)} rows: profiling {', '.join(profile_list)}")
                entry["profile"] = profile_rules(profile_list, catalog, run, args.shard_rows, args.top, extra)
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
