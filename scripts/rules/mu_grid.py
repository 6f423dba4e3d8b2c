"""Rule script: the mu(z) interpolation grid of the configured cosmology, once per configuration."""
from galdist import stages
from galdist.logs import logged

with logged(snakemake.log[0], "mu(z) grid") as log:
    grid = stages.mu_grid(snakemake.params.redshift)
    log.info("cosmology %s", grid.cosmology)
    grid.save(snakemake.output[0])
