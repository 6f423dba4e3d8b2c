"""Rule script: the mu(z) interpolation grid of the configured cosmology, once per configuration
(from the output folder's grid cache when this configuration was computed before)."""
from galdist import grid_cache
from galdist.logs import logged


def build(path):
    from galdist import stages

    grid = stages.mu_grid(snakemake.params.redshift)
    log.info("cosmology %s", grid.cosmology)
    grid.save(path)


with logged(snakemake.log[0], "mu(z) grid") as log:
    grid_cache.cached(snakemake.output[0], snakemake.config["output_dir"], "mu_grid",
                      {"redshift": snakemake.params.redshift}, build)
