"""Rule script: one distance method's columns for one shard with one calibration
(the method named by the {method} wildcard, galdist.methods.REGISTRY)."""
from galdist import methods
from galdist.logs import logged

method = snakemake.wildcards.method
with logged(snakemake.log[0], f"{methods.REGISTRY[method].title}, shard {snakemake.wildcards.shard}") as log:
    files = {k: v for k, v in snakemake.input.items() if k != "calibration"}
    rows = methods.shard_distances(method, files, snakemake.params.method_config, snakemake.input.calibration,
                                   snakemake.output.distances, dict(snakemake.output.items()).get("likelihoods"))
    log.info("%d rows", rows)
