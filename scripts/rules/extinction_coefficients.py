"""Rule script: R = A/E(B-V) for every configured band, once per configuration."""
from galdist import extinction, filters, io
from galdist.logs import logged

with logged(snakemake.log[0], "extinction coefficients") as log:
    cfg = snakemake.params.extinction
    if cfg["coefficients"] == "law":
        coeffs = extinction.law_coefficients(
            filters.load_bands(snakemake.params.bands), law=cfg["law"], r_v=cfg["r_v"],
            source_temperature=cfg["source_temperature"], normalisation=cfg["normalisation"])
    else:
        coeffs = extinction.table_coefficients(snakemake.input.table, cfg["table_keys"])
    log.info("%s coefficients: %s", coeffs.method, dict(coeffs))
    io.write_json(coeffs.to_dict(), snakemake.output[0])
