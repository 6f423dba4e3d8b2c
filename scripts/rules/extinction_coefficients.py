"""Rule script: R = A/E(B-V) for every configured band, once per configuration
(from the output folder's grid cache when this configuration was computed before)."""
from galdist import grid_cache
from galdist.logs import logged


def build(path):
    from galdist import io, stages

    coeffs = stages.extinction_coefficients(snakemake.config)
    log.info("%s coefficients: %s", coeffs.method, dict(coeffs))
    io.write_json(coeffs.to_dict(), path)


with logged(snakemake.log[0], "extinction coefficients") as log:
    p = snakemake.params
    grid_cache.cached(snakemake.output[0], snakemake.config["output_dir"], "extinction_coefficients",
                      {"extinction": p.extinction, "bands": p.bands, "content": p.content}, build)
