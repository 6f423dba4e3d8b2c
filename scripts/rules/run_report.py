"""Rule script: the run's report page (report.html)."""
from pathlib import Path

from galdist import io, report
from galdist.logs import logged

with logged(snakemake.log[0], "run report"):
    product_files = [snakemake.input.distances] if isinstance(snakemake.input.distances, str) \
        else list(snakemake.input.distances)  # one file, or the parts
    plots = [(Path(png).stem, png, report.caption_text(cap))
             for png, cap in zip(snakemake.input.plots, snakemake.params.captions)]
    fits = ([(io.read_json(snakemake.input.fit_summary), snakemake.input.fit_report)]
            if "fit_summary" in snakemake.input.keys() else [])
    report.write(snakemake.output[0], snakemake.params.run, io.read_json(snakemake.input.summary),
                 report.read_provenance(product_files[0]), plots, fits, snakemake.params.config_files)
