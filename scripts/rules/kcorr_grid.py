"""Rule script: K(z) and model-colour grids for every band x template, once per configuration
(from the output folder's grid cache when this configuration was computed before)."""
from galdist import grid_cache
from galdist.logs import logged


def build(path):
    from galdist import stages

    grid = stages.kcorr_grid(snakemake.config)
    log.info("templates %s; %d redshifts", ", ".join(grid.names), grid.z.size)
    grid.to_file(path)


with logged(snakemake.log[0], "K-correction grids") as log:
    p = snakemake.params
    grid_cache.cached(snakemake.output[0], snakemake.config["output_dir"], "kcorr_grid",
                      {"kcorr": p.kcorr, "bands": p.bands, "content": p.content}, build)
