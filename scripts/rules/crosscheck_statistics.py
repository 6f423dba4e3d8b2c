"""Rule script: Hubble-flow statistics per method and method-pair offsets, over all shards."""
from galdist import crosscheck, io, redshift
from galdist.logs import logged
from galdist.methods import prefixes

with logged(snakemake.log[0], "cross-check statistics") as log:
    cfg, methods = snakemake.params.crosscheck, snakemake.params.methods
    grid = redshift.MuGrid.load(snakemake.input.grid)
    n_rows, n_shards = 0, len(snakemake.input.redshift)
    # the sample goes to disk shard by shard, so memory does not grow with the catalog
    with io.RecordSpill(snakemake.output[0]) as spill:
        for i, shard in enumerate(snakemake.input.redshift):
            stages = {m: snakemake.input[m][i] for m in methods}
            cols, _ = io.read_shard(shard, ["z_cmb", "z_cmb_err", "mu_z", "mu_z_err", "z_flags"], stages,
                                    {m: [f"{p}_{c}" for c in ("mu", "mu_err", "mu_err_sys", "flags")]
                                     for m, p in zip(methods, prefixes(methods))})
            spill.extend(crosscheck.method_sample(cols, prefixes(methods)))
            n_rows += len(cols["z_cmb"])
            log.info("shard %d/%d sampled (%d rows so far)", i + 1, n_shards, n_rows)
        stats = crosscheck.sample_statistics(spill.nested(), n_rows, grid.h0, min_cz=snakemake.params.min_cz,
                                             clip_sigma=cfg["clip_sigma"], max_iter=cfg["max_iter"],
                                             methods=prefixes(methods))
    log.info("statistics over %d rows: %s", n_rows, stats)
    io.write_json(stats, snakemake.output[0])
