"""Rule script: group distances and the zero-point tie between methods, over all shards."""
from pathlib import Path

from galdist import calibration, groups, io, redshift
from galdist.logs import logged
from galdist.methods import REGISTRY

with logged(snakemake.log[0], "groups") as log:
    inp, methods = snakemake.input, snakemake.params.methods
    prefixes = [REGISTRY[m].prefix for m in methods]
    shards = [{"shard": s, "redshift": inp.redshift[i]} | {REGISTRY[m].prefix: inp[m][i] for m in methods}
              for i, s in enumerate(inp.shards)]
    cals = {m: calibration.load_calibration(p) for m, p in snakemake.params.calibrations.items()}
    zp, cfg = snakemake.params.zero_point, snakemake.params.groups
    reference = None if zp["reference"] == "auto" else REGISTRY[zp["reference"]].prefix
    out_dir = Path(snakemake.output.members)
    out_dir.mkdir(parents=True, exist_ok=True)
    summary = groups.reduce_shards(
        shards, prefixes, redshift.MuGrid.load(inp.grid), snakemake.output.groups,
        [out_dir / Path(s).name for s in inp.shards], clip_sigma=cfg["clip_sigma"], max_iter=cfg["max_iter"],
        reference=reference, apply=zp["apply"],
        zero_point_errors={REGISTRY[m].prefix: c.zero_point_error for m, c in cals.items()}, log=log)
    log.info("groups: %s; zero point: %s", summary["groups"], summary["zero_point"])
    io.write_json(summary, snakemake.output.summary)
