"""Rule script: the diagnostic plots of the configured methods, from the product's plotting subsample.

The plots are independent, so the job's threads draw them in that many forked processes
(matplotlib is single-threaded; a plot costs ~0.3-2 s at 10^5 points)."""
import multiprocessing
from concurrent.futures import ProcessPoolExecutor

import pyarrow.parquet as pq

from galdist import calibration, conventions, methods, plots, redshift
from galdist.logs import logged


def draw(item):
    name, path = item
    return name, plots.draw(name, df, path, grid, methods=prefixes, calibrations=cals,
                            min_cz=snakemake.params.min_cz, bands=snakemake.params.bands, sections=sections)


with logged(snakemake.log[0], "plots") as log:
    df = pq.read_table(snakemake.input.sample).to_pandas()
    grid = redshift.MuGrid.load(snakemake.input.grid)
    # each calibration as the methods applied it: an H0-scaled zero point at the run's H0
    cals = {methods.REGISTRY[m].prefix: conventions.at_run_h0(calibration.load_calibration(p), grid.h0)
            for m, p in snakemake.params.calibrations.items()}
    prefixes = methods.prefixes(snakemake.params.methods)
    outputs = dict(snakemake.output.items())
    if sorted(outputs) != sorted(plots.plot_names(prefixes)):
        raise ValueError(f"plots rule outputs {sorted(outputs)} are not the plots of methods {prefixes}: "
                         f"{plots.plot_names(prefixes)}")
    sections = {methods.REGISTRY[m].prefix: section for m, section in snakemake.params.sections.items()}
    workers = max(1, min(snakemake.threads, len(outputs)))
    if workers == 1:
        drawn = list(map(draw, outputs.items()))
    else:  # forked workers inherit the table and settings read above
        with ProcessPoolExecutor(workers, mp_context=multiprocessing.get_context("fork")) as pool:
            drawn = list(pool.map(draw, outputs.items()))
    for name, n in drawn:
        log.info("%s: %d galaxies drawn", name, n)
