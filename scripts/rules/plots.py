"""Rule script: the diagnostic plots, from the product's plotting subsample."""
import pyarrow.parquet as pq

from galdist import calibration, plots, redshift
from galdist.logs import logged
from galdist.product import METHOD_PREFIX

with logged(snakemake.log[0], "plots"):
    df = pq.read_table(snakemake.input.sample).to_pandas()
    cals = {m: calibration.load_calibration(p) for m, p in snakemake.params.calibrations.items()}
    out = snakemake.output
    grid = redshift.MuGrid.load(snakemake.input.grid)
    prefixes = [METHOD_PREFIX[m] for m in snakemake.params.methods]
    plots.hubble_diagram(df, out.hubble_diagram, grid, prefixes)
    plots.tf_relation(df, out.tf_relation, cals.get("tully_fisher"))
    plots.sbf_relation(df, out.sbf_relation, cals.get("sbf"))
    plots.dmu_histograms(df, out.dmu_histograms, prefixes, snakemake.params.min_cz)
    plots.vpec_sky(df, out.vpec_sky, prefixes)
