"""Rule script: R = A/E(B-V) for every configured band, once per configuration."""
from galdist import io, stages
from galdist.logs import logged

with logged(snakemake.log[0], "extinction coefficients") as log:
    coeffs = stages.extinction_coefficients(snakemake.config)
    log.info("%s coefficients: %s", coeffs.method, dict(coeffs))
    io.write_json(coeffs.to_dict(), snakemake.output[0])
