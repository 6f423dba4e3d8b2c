"""Rule script: CMB-frame redshifts and redshift distances for one shard."""
from galdist import io, redshift, stages
from galdist.logs import logged

with logged(snakemake.log[0], f"redshift distances, shard {snakemake.wildcards.shard}"):
    cfg = snakemake.params.redshift
    cols, fp = io.read_shard(snakemake.input.shard, ["gal_l", "gal_b", "z_helio", "z_helio_err"])
    grid = redshift.MuGrid.load(snakemake.input.grid)
    out = redshift.redshift_distances(cols["gal_l"], cols["gal_b"], cols["z_helio"], cols["z_helio_err"], grid,
                                      v_sun=cfg["v_sun_kms"], apex_l=cfg["apex_l_deg"], apex_b=cfg["apex_b_deg"],
                                      sigma_v=cfg["sigma_v_kms"], min_cz=cfg["min_cz_kms"])
    io.write_stage_columns(out, snakemake.output[0], fp, stages.output_units("redshift", []))
