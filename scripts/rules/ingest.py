"""Rule script: stream the catalog into validated, flagged shards."""
from galdist import ingest
from galdist.logs import logged

with logged(snakemake.log[0], "ingest"):
    p = snakemake.params
    plan = ingest.plan(list(snakemake.input), p.fmt, p.columns, p.units, p.bands, p.methods, keep=p.keep)
    ingest.run(plan, snakemake.output.shards, snakemake.output.summary, p.shard_rows)
