"""Rule script: per-galaxy K-corrections for one shard (colour after Galactic extinction)."""
import numpy as np

from galdist import io, kcorrect
from galdist.logs import logged

with logged(snakemake.log[0], f"K-corrections, shard {snakemake.wildcards.shard}"):
    cfg = snakemake.params.kcorrect
    grid = kcorrect.KGrid.from_file(snakemake.input.grid)
    colour = None
    pair = cfg["colour_pair"]
    names = ["z_helio"] + ([f"mag_{b}" for b in pair] if pair else [])
    cols, fp = io.read_shard(snakemake.input.shard, names, {"extinction": snakemake.input.extinction},
                             {"extinction": [f"A_{b}" for b in pair] if pair else []})
    if pair:
        blue, red = pair
        colour = (cols[f"mag_{blue}"] - cols[f"A_{blue}"]) - (cols[f"mag_{red}"] - cols[f"A_{red}"])
    out = kcorrect.assign(grid, cols["z_helio"], colour, cfg["default_template"], cfg["clip_tolerance"])
    io.write_stage_columns(out, snakemake.output[0], fp, {k: "mag" for k in out if k.startswith("K_")})
