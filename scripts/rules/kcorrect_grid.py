"""Rule script: K(z) and model-colour grids for every band x template, once per configuration."""
from galdist import columns, filters, kcorrect
from galdist.logs import logged

with logged(snakemake.log[0], "K-correction grids") as log:
    cfg, bands = snakemake.params.kcorrect, snakemake.params.bands
    templates = kcorrect.load_templates(cfg["templates"])
    vega = {b: v["ab_minus_vega"] for b, v in bands.items() if v["system"] == "Vega" and v["ab_minus_vega"] is not None}
    grid = kcorrect.build_grids(templates, filters.load_bands(bands), cfg["colour_pair"], vega,
                                z_min=columns.Z_HELIO_RANGE[0], z_max=cfg["z_max"], dz=cfg["dz"])
    log.info("templates %s; %d redshifts", ", ".join(grid.names), grid.z.size)
    grid.to_file(snakemake.output[0])
