"""Rule script: the run's report page (report.html)."""
from pathlib import Path

from galdist import io, report
from galdist.logs import logged

with logged(snakemake.log[0], "run report"):
    plots = [(Path(png).stem, png, report.caption_text(cap))
             for png, cap in zip(snakemake.input.plots, snakemake.params.captions)]
    fits = ([(io.read_json(snakemake.input.fit_summary), snakemake.input.fit_report)]
            if "fit_summary" in snakemake.input.keys() else [])
    report.write(snakemake.output[0], snakemake.params.run, io.read_json(snakemake.input.summary),
                 report.read_provenance(snakemake.input.distances), plots, fits, snakemake.params.config_files)
