"""Rule script: E(B-V), A_<band> and their errors for one shard."""
from galdist import extinction, io, stages
from galdist.logs import logged

with logged(snakemake.log[0], f"extinction, shard {snakemake.wildcards.shard}"):
    cfg, bands = snakemake.params.extinction, snakemake.params.bands
    cols, fp = io.read_shard(snakemake.input.shard, ["ra", "dec", "gal_l", "gal_b", "ebv", "ebv_err"])
    coeffs = extinction.ExtinctionCoefficients.from_dict(io.read_json(snakemake.input.coefficients))
    out = stages.extinction_columns(cols, coeffs, cfg, stages.sky_map(cfg))
    io.write_stage_columns(out, snakemake.output[0], fp, stages.output_units("extinction", bands),
                           {"galdist.extinction.source": cfg["source"], "galdist.extinction.path": coeffs.method})
