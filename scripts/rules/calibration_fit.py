"""Rule script: fit the calibration sample's relation and write the calibration file and
the fit report (galdist.calibrate.run_stage)."""
import numpy as np

from galdist import calibrate
from galdist.logs import logged

with logged(snakemake.log[0], "calibration fit") as log:
    np.seterr(all="ignore")
    files = {k: snakemake.input[k] for k in ("ingest", "extinction", "kcorr")}
    report = calibrate.run_stage(snakemake.config, files, dict(snakemake.output.items()))
    fit, naive = report["selection_aware"], report["naive"]
    log.info("%d galaxies in %d groups; coefficients %s +- %s, scatter %.3f (naive %s, scatter %.3f)",
             report["galaxies_fitted"], report["groups"], np.round(fit["coefficients"], 4),
             np.round(fit["errors"], 4), fit["scatter"], np.round(naive["coefficients"], 4), naive["scatter"])
