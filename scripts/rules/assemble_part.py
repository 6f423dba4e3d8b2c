"""Rule script: one shard's stages into its product part (and eta-likelihood part), its counts and plot sample."""
from pathlib import Path

from galdist import calibration, conventions, dictionary, io, likelihood, product, redshift
from galdist.logs import logged
from galdist.methods import REGISTRY

with logged(snakemake.log[0], f"assemble shard {snakemake.wildcards.shard}") as log:
    inp, out, cfg = snakemake.input, snakemake.output, snakemake.params.crosscheck
    methods = snakemake.params.methods
    files = {"shard": inp.shard} | {st: inp[st] for st in ["extinction", "kcorr", "redshift", *methods]} | {
        "groups": Path(inp.group_members) / Path(inp.shard).name}
    like_out = dict(out.items()).get("likelihoods")  # None: likelihoods.write is false
    grouped, lk = io.read_json(inp.groups), snakemake.params.likelihoods
    stats, ingest_summary = io.read_json(inp.statistics), io.read_json(inp.ingest_summary)
    cals = {m: calibration.load_calibration(p) for m, p in snakemake.params.calibrations.items()}
    for m, cal in cals.items():  # provenance must describe the calibration the distances came from
        io.check_stamps([inp[m]], "galdist.calibration.sha256", cal.sha256,
                        f"computed with another version of calibration {cal.path}")
    conventions.mark_h0_independence(stats, {REGISTRY[m].prefix: cal for m, cal in cals.items()})
    info = product.provenance(snakemake.config, cals, ingest_summary, Path(snakemake.scriptdir).parents[1])
    info["zero_point"] = grouped["zero_point"]  # the offsets, and whether mu_best and group_mu carry them
    entries = dictionary.by_name(dictionary.for_run(list(snakemake.config["bands"]), methods,
                                                    ingest_summary.get("kept_columns", {})))
    index = [f["name"] for f in ingest_summary["shard_files"]].index(Path(inp.shard).name)  # seeds the sample
    counts = product.assemble_part(
        files, index, out.part, out.sample, redshift.MuGrid.load(inp.grid), stats, methods, info,
        min_cz=snakemake.params.min_cz, clip_sigma=cfg["clip_sigma"],
        keep_fraction=min(1.0, cfg["plot_max_points"] / max(ingest_summary["rows_out"], 1)),
        text_lengths=ingest_summary.get("text_lengths") or product.longest_texts([inp.shard]),
        entries=entries, zero_point=grouped["zero_point"], likelihood_path=like_out,
        likelihood_parts={m: inp[f"{m}_likelihood"] for m in methods} if like_out else None,
        eta_grid=likelihood.eta_grid(lk["eta_min"], lk["eta_max"], lk["eta_step"]) if like_out else None,
        copy_inputs=snakemake.params.copy_inputs)
    log.info("%d rows written", counts["rows"])
    io.write_json(counts, out.counts)
