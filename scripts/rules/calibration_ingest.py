"""Rule script: the calibration sample into one validated, flagged shard (galdist.ingest)."""
import shutil
from pathlib import Path

from galdist import calibrate, ingest
from galdist.logs import logged

with logged(snakemake.log[0], "calibration sample ingest") as log:
    plan = calibrate.sample_plan(snakemake.config)
    out = Path(snakemake.output.shard)
    work = out.parent.parent / ".ingest-work"
    summary = ingest.run(plan, work, snakemake.output.summary, shard_rows=calibrate.SAMPLE_SHARD_ROWS)
    shutil.move(str(work / "part-00000.parquet"), out)
    shutil.rmtree(work, ignore_errors=True)
    log.info("%d rows", summary["rows_out"])
