"""Rule script: E(B-V) and A_<band> for one shard."""

from galdist import ebv_maps, extinction, io
from galdist.logs import logged

with logged(snakemake.log[0], f"extinction, shard {snakemake.wildcards.shard}") as log:
    cfg = snakemake.params.extinction
    cols, fp = io.read_shard(snakemake.input.shard, ["ra", "dec", "ebv", "ebv_err"])
    coeffs = extinction.ExtinctionCoefficients.from_dict(io.read_json(snakemake.input.coefficients))
    ebv, ebv_err, outside = cols["ebv"], cols["ebv_err"], None
    if cfg["source"] == "healpix":
        sky = ebv_maps.HealpixMap.from_fits(cfg["map_file"], column=cfg["map_column"])
    elif cfg["source"] == "zea":
        sky = ebv_maps.ZeaPair.from_fits(cfg["map_north"], cfg["map_south"])
    if cfg["source"] != "catalog":
        ebv, outside = sky.lookup_icrs(cols["ra"], cols["dec"], cfg["interpolation"])
        ebv_err = None
    out = extinction.apply_extinction(ebv, ebv_err, coeffs, cfg["ebv_scale"], high_limit=cfg["high_ebv_limit"],
                                      outside=outside, ebv_fractional_error=cfg["ebv_fractional_error"])
    units = {k: "mag" for k in out if k != "ext_flags"}
    io.write_stage_columns(out, snakemake.output[0], fp, units,
                           {"galdist.extinction.source": cfg["source"], "galdist.extinction.path": coeffs.method})
