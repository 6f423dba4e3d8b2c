"""Rule script: K(z) and model-colour grids for every band x template, once per configuration."""
from galdist import stages
from galdist.logs import logged

with logged(snakemake.log[0], "K-correction grids") as log:
    grid = stages.kcorr_grid(snakemake.config)
    log.info("templates %s; %d redshifts", ", ".join(grid.names), grid.z.size)
    grid.to_file(snakemake.output[0])
