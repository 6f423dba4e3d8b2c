"""Rule script: the parts' counts into summary.json, their samples into plot_sample.parquet,
COLUMNS.md, and (product_layout file) the parts joined into distances.parquet."""
import shutil
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from galdist import calibration, conventions, dictionary, io, product, report
from galdist.logs import logged
from galdist.methods import REGISTRY

with logged(snakemake.log[0], "assemble") as log:
    inp, out, params = snakemake.input, snakemake.output, snakemake.params
    run_dir, methods, lk = Path(params.run_dir), params.methods, params.likelihoods
    ingest_summary = io.read_json(inp.ingest_summary)
    entries = dictionary.by_name(dictionary.for_run(list(snakemake.config["bands"]), methods,
                                                    ingest_summary.get("kept_columns", {})))
    counts = product.merge_counts([io.read_json(p) for p in inp.counts], entries)
    if counts["rows"] != ingest_summary["rows_in"]:
        raise RuntimeError(f"row count changed: {ingest_summary['rows_in']} in, {counts['rows']} out")
    parts, like_parts = list(inp.parts), list(inp.likelihoods)
    # the other layout's product (an earlier run's), a likelihood file no longer written, and
    # parts of shards this run does not have: none may sit beside the product and disagree with it
    stale = [run_dir / "distances", run_dir / "eta_likelihoods"] if params.layout == "file" else [
        run_dir / "distances.parquet", run_dir / "eta_likelihoods.parquet"]
    if not like_parts:
        stale += [run_dir / "eta_likelihoods.parquet", run_dir / "eta_likelihoods"]
    for path in stale:
        shutil.rmtree(path) if path.is_dir() else path.unlink(missing_ok=True)
    if params.layout == "parts":
        for folder, current in ((run_dir / "distances", parts), (run_dir / "eta_likelihoods", like_parts)):
            keep = {Path(p).name for p in current}
            for old in folder.glob("part-*.parquet") if folder.is_dir() else []:
                if old.name not in keep:
                    old.unlink()
    else:  # one part (a catalog of one shard) is the file already: moved, not rewritten
        product.join_parts(parts, out.distances)
        if like_parts:
            product.join_parts(like_parts, out.likelihoods)
    like_files = [out.likelihoods] if params.layout == "file" and like_parts else like_parts
    info = report.read_provenance(out.distances if params.layout == "file" else parts[0])
    stats = io.read_json(inp.statistics)  # with each method's implied H0 marked (in)dependent of the run's H0
    cals = {m: calibration.load_calibration(p) for m, p in params.calibrations.items()}
    conventions.mark_h0_independence(stats, {REGISTRY[m].prefix: cal for m, cal in cals.items()})
    summary = {"rows_in": ingest_summary["rows_in"], "rows_out": counts["rows"], "methods": list(methods),
               "product": {"layout": params.layout,
                           "path": Path(out.distances).name if params.layout == "file" else "distances/",
                           "parts": len(parts)},
               "flag_counts": counts["flag_counts"], "best_method": counts["best_method"],
               "statistics": stats, **{k: v for k, v in io.read_json(inp.groups).items()
                                                              if k in ("groups", "zero_point")},
               "eta_likelihoods": {"file": "eta_likelihoods.parquet" if params.layout == "file" else "eta_likelihoods/",
                                   "eta_min": lk["eta_min"], "eta_max": lk["eta_max"], "eta_step": lk["eta_step"],
                                   "bytes": sum(Path(p).stat().st_size for p in like_files),
                                   "kinds": counts["likelihood_kinds"]} if like_parts else None,
               "cosmology": info["config"]["redshift"]["cosmology"],
               "calibrations": {m: c["reference"] for m, c in info["calibrations"].items()},
               "inputs": info["inputs"], "git_commit": info["git_commit"], "cautions": info["cautions"]}
    samples = [pq.read_table(p) for p in inp.samples]
    io.write_parquet(pa.concat_tables(samples), out.plot_sample)
    log.info("%d rows in %d parts (%s)", counts["rows"], len(parts), params.layout)
    io.write_json(summary, out.summary)
    with io.atomic_path(out.columns) as tmp:
        tmp.write_text(dictionary.columns_markdown(counts["entries"], snakemake.config["run"]), encoding="utf-8")
