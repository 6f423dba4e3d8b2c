"""Rule script: per-galaxy K-corrections and their template errors for one shard
(colour after Galactic extinction and, for discs, internal reddening; colour error from
the magnitude and E(B-V) errors)."""
import numpy as np
import pyarrow.parquet as pq

from galdist import io, kcorr, stages
from galdist.logs import logged

with logged(snakemake.log[0], f"K-corrections, shard {snakemake.wildcards.shard}"):
    cfg = snakemake.params.kcorr
    grid = kcorr.KGrid.from_file(snakemake.input.grid)
    colour = colour_err = None
    pair = cfg["colour_pair"]
    per_a_i = grid.meta.get("disc_reddening_per_a_i") if pair else None
    discs = per_a_i is not None and {"w50", "axis_ratio"} <= set(pq.read_schema(snakemake.input.shard).names)
    names = ["z_helio"] + ([f"mag_{b}" for b in pair] + [f"mag_{b}_err" for b in pair] if pair else [])
    names += ["w50", "axis_ratio"] if discs else []
    ext = ([f"A_{b}" for b in pair] + ["ebv_used", "ebv_used_err"]) if pair else []
    cols, fp = io.read_shard(snakemake.input.shard, names, {"extinction": snakemake.input.extinction},
                             {"extinction": ext})
    if pair:
        blue, red = pair
        excess = cols[f"A_{blue}"] - cols[f"A_{red}"]
        colour = (cols[f"mag_{blue}"] - cols[f"A_{blue}"]) - (cols[f"mag_{red}"] - cols[f"A_{red}"])
        if discs:
            colour = colour - kcorr.disc_colour_excess(cols["w50"], cols["axis_ratio"], cols["z_helio"], per_a_i)
        # independent magnitude errors; A_blue - A_red = (R_blue - R_red) E(B-V) carries the
        # E(B-V) error as the same fraction (0 where no extinction was applied)
        with np.errstate(divide="ignore", invalid="ignore"):
            ext_err = np.where(cols["ebv_used"] > 0, np.abs(excess) * cols["ebv_used_err"] / cols["ebv_used"], 0.0)
        colour_err = np.sqrt(cols[f"mag_{blue}_err"] ** 2 + cols[f"mag_{red}_err"] ** 2
                             + np.where(np.isfinite(ext_err), ext_err, 0.0) ** 2)
    out = kcorr.assign(grid, cols["z_helio"], colour, cfg["default_template"], cfg["clip_tolerance"],
                          colour_err=colour_err)
    io.write_stage_columns(out, snakemake.output[0], fp, stages.output_units("kcorr", snakemake.config["bands"]))
