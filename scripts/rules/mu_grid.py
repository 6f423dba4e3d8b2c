"""Rule script: the mu(z) interpolation grid of the configured cosmology, once per configuration."""
from galdist import redshift
from galdist.logs import logged

with logged(snakemake.log[0], "mu(z) grid") as log:
    cfg = snakemake.params.redshift
    cosmo = redshift.make_cosmology(**cfg["cosmology"])
    grid = redshift.MuGrid.build(cosmo, z_max=cfg["grid_z_max"], n=cfg["grid_n"])
    log.info("cosmology %s", redshift.describe_cosmology(cosmo))
    grid.save(snakemake.output[0])
