"""The per-shard stages before the distance methods: what each writes, and the objects
each builds from the configuration.

Each stage declares its output columns with their units once (``output_units``); the
rule scripts write them with those units, the product carries them on, and the tests
check every stage against its declaration (the methods declare theirs in
``galdist.methods``). The factories turn config sections into the stage's objects
(extinction coefficients, an E(B-V) map, K(z) grids, the mu(z) grid) for the rule
scripts, the demo generator and the accuracy tests alike, so the choice between an
extinction law and a table, or a map and a catalog column, is written once.
"""

from __future__ import annotations

#: stage -> output column -> unit ("" dimensionless); "{band}" stands for each configured band
_OUTPUTS = {
    "extinction": {"ebv_used": "mag", "ebv_used_err": "mag", "A_{band}": "mag", "A_{band}_err": "mag",
                   "ext_flags": ""},
    "kcorr": {"K_{band}": "mag", "K_{band}_err": "mag", "kcorr_template": "", "kcorr_flags": ""},
    "redshift": {"z_cmb": "", "z_cmb_err": "", "mu_z": "mag", "mu_z_err": "mag", "d_z_mpc": "Mpc",
                 "z_flags": ""},
}


def output_units(stage: str, bands) -> dict[str, str]:
    """Every column ``stage`` writes with its unit, for the configured ``bands``."""
    return {name.format(band=label): unit for name, unit in _OUTPUTS[stage].items()
            for label in (bands if "{band}" in name else [None])}


# --------------------------------------------------------------------------- factories

def extinction_coefficients(config: dict):
    """R = A/E(B-V) per configured band: the configured law through each band's filter
    curve, or the configured table."""
    from . import extinction, filters
    from .config import extinction_table_file

    ext = config["extinction"]
    if ext["coefficients"] == "law":
        return extinction.law_coefficients(filters.load_bands(config["bands"]), law=ext["law"], r_v=ext["r_v"],
                                           source_temperature=ext["source_temperature"],
                                           normalisation=ext["normalisation"])
    return extinction.table_coefficients(extinction_table_file(config), ext["table_keys"])


def sky_map(extinction_config: dict):
    """The configured E(B-V) map (HealpixMap or ZeaPair), or None for the catalog's column."""
    from . import ebv_maps

    ext = extinction_config
    if ext["source"] == "healpix":
        return ebv_maps.HealpixMap.from_fits(ext["map_file"], column=ext["map_column"])
    if ext["source"] == "zea":
        return ebv_maps.ZeaPair.from_fits(ext["map_north"], ext["map_south"])
    return None


def extinction_columns(cols: dict, coefficients, extinction_config: dict, sky=None) -> dict:
    """The extinction stage's columns of one shard: E(B-V) from the catalog (``ebv``,
    ``ebv_err``) or from ``sky`` at the shard's Galactic or ICRS position."""
    from .extinction import apply_extinction

    ext = extinction_config
    ebv, ebv_err, outside = cols["ebv"], cols["ebv_err"], None
    if sky is not None:
        ebv, outside = sky.lookup_at(cols["ra"], cols["dec"], cols["gal_l"], cols["gal_b"], ext["interpolation"])
        ebv_err = None
    return apply_extinction(ebv, ebv_err, coefficients, ext["ebv_scale"], high_limit=ext["high_ebv_limit"],
                            outside=outside, ebv_fractional_error=ext["ebv_fractional_error"])


def kcorr_grid(config: dict):
    """K(z) and model-colour grids of every configured band x template, from the lowest
    z_helio ingest accepts to ``kcorr.z_max``."""
    from . import filters, kcorr
    from .columns import Z_HELIO_RANGE

    kc, bands = config["kcorr"], config["bands"]
    vega = {b: v["ab_minus_vega"] for b, v in bands.items() if v["system"] == "Vega" and v["ab_minus_vega"] is not None}
    curves = filters.load_bands(bands)
    grid = kcorr.build_grids(kcorr.load_templates(kc["templates"]), curves, kc["colour_pair"], vega,
                             z_min=Z_HELIO_RANGE[0], z_max=kc["z_max"], dz=kc["dz"])
    if kc["colour_pair"] and kc["disc_internal_reddening"]:
        cousins_i = filters.load_bands({"I": {"filter": "bessell-I", "system": "Vega"}})["I"]
        grid.meta["disc_reddening_per_a_i"] = kcorr.reddening_per_a_i(curves, kc["colour_pair"], cousins_i)
    return grid


def mu_grid(redshift_config: dict):
    """The mu(z) interpolation grid of the configured cosmology."""
    from . import redshift

    cfg = redshift_config
    return redshift.MuGrid.build(redshift.make_cosmology(**cfg["cosmology"]), z_max=cfg["grid_z_max"],
                                 n=cfg["grid_n"])
