"""Rule script: stream every shard's stages into distances.parquet and write summary.json."""
from pathlib import Path

from galdist import calibration, conventions, dictionary, io, likelihood, product, redshift
from galdist.methods import REGISTRY
from galdist.logs import logged

with logged(snakemake.log[0], "assemble") as log:
    inp, cfg, min_cz = snakemake.input, snakemake.params.crosscheck, snakemake.params.min_cz
    stages = ["extinction", "kcorr", "redshift", *snakemake.params.methods]
    shards = [{"shard": s} | {st: inp[st][i] for st in stages} | {"groups": Path(inp.group_members) / Path(s).name}
              for i, s in enumerate(inp.shards)]
    like_out = dict(snakemake.output.items()).get("likelihoods")  # None: likelihoods.write is false
    if like_out is None:  # an earlier run's companion file would no longer match the product
        Path(snakemake.output.distances).with_name("eta_likelihoods.parquet").unlink(missing_ok=True)
    # each method job's eta-likelihood part of each shard, stitched by the assembly
    parts = [{m: inp[f"{m}_likelihood"][i] for m in snakemake.params.methods} for i in range(len(shards))] \
        if like_out else None
    grouped, lk = io.read_json(inp.groups), snakemake.params.likelihoods
    stats, ingest_summary = io.read_json(inp.statistics), io.read_json(inp.ingest_summary)
    cals = {m: calibration.load_calibration(p) for m, p in snakemake.params.calibrations.items()}
    for m, cal in cals.items():  # provenance must describe the calibration the distances came from
        io.check_stamps(inp[m], "galdist.calibration.sha256", cal.sha256,
                        f"computed with another version of calibration {cal.path}")
    conventions.mark_h0_independence(stats, {REGISTRY[m].prefix: cal for m, cal in cals.items()})
    info = product.provenance(snakemake.config, cals, ingest_summary, Path(snakemake.scriptdir).parents[1])
    info["zero_point"] = grouped["zero_point"]  # the offsets, and whether mu_best and group_mu carry them
    entries = dictionary.by_name(dictionary.for_run(list(snakemake.config["bands"]), snakemake.params.methods,
                                                    ingest_summary.get("kept_columns", {})))
    counts = product.assemble(shards, snakemake.output.distances, snakemake.output.plot_sample,
                              redshift.MuGrid.load(inp.grid), stats, snakemake.params.methods, info,
                              min_cz=min_cz, clip_sigma=cfg["clip_sigma"],
                              plot_max_points=cfg["plot_max_points"], total_rows=ingest_summary["rows_out"],
                              entries=entries, zero_point=grouped["zero_point"],
                              likelihood_path=like_out, likelihood_parts=parts,
                              eta_grid=likelihood.eta_grid(lk["eta_min"], lk["eta_max"], lk["eta_step"])
                              if like_out else None, copy_inputs=snakemake.params.copy_inputs)
    if counts["rows"] != ingest_summary["rows_in"]:
        raise RuntimeError(f"row count changed: {ingest_summary['rows_in']} in, {counts['rows']} out")
    summary = {"rows_in": ingest_summary["rows_in"], "rows_out": counts["rows"],
               "methods": list(snakemake.params.methods),
               "flag_counts": counts["flag_counts"], "best_method": counts["best_method"],
               "statistics": stats, "groups": grouped["groups"], "zero_point": grouped["zero_point"],
               "eta_likelihoods": {"file": Path(like_out).name, "eta_min": lk["eta_min"],
                                   "eta_max": lk["eta_max"], "eta_step": lk["eta_step"],
                                   "bytes": Path(like_out).stat().st_size,
                                   "kinds": counts["likelihood_kinds"]} if like_out else None,
               "cosmology": info["config"]["redshift"]["cosmology"],
               "calibrations": {m: c["reference"] for m, c in info["calibrations"].items()},
               "inputs": info["inputs"], "git_commit": info["git_commit"], "cautions": info["cautions"]}
    log.info("%d rows written", counts["rows"])
    io.write_json(summary, snakemake.output.summary)
    with io.atomic_path(snakemake.output.columns) as tmp:
        tmp.write_text(dictionary.columns_markdown(counts["entries"], snakemake.config["run"]), encoding="utf-8")
