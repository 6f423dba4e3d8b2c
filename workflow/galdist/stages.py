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

#: stage -> output column -> (unit ("" dimensionless), description for the column dictionary);
#: "{band}" stands for each configured band
_OUTPUTS = {
    "extinction": {
        "ebv_used": ("mag", "E(B-V) the corrections used: the catalog's or the map's value times "
                            "extinction.ebv_scale (on the true scale); ebv is the value as given"),
        "ebv_used_err": ("mag", "error of ebv_used"),
        "A_{band}": ("mag", "Galactic extinction in band {band} (subtracted from the magnitudes)"),
        "A_{band}_err": ("mag", "error of A_{band}"),
        "ext_flags": ("", "Galactic extinction flags, a bit per reason"),
    },
    "kcorr": {
        "K_{band}": ("mag", "K-correction of band {band} (subtracted from the magnitudes)"),
        "K_{band}_err": ("mag", "error of K_{band}"),
        "kcorr_template": ("", "the spectral template used for the K-corrections, as a fractional index "
                               "along the ordered template sequence (0 = first template; 3.85 lies "
                               "between the 4th and 5th, nearer the 5th)"),
        "kcorr_flags": ("", "K-correction flags, a bit per reason"),
    },
    "redshift": {
        "z_cmb": ("", "redshift in the CMB rest frame"),
        "z_cmb_err": ("", "error of z_cmb (measurement and the configured peculiar-velocity term)"),
        "mu_z": ("mag", "distance modulus of z_cmb in the configured cosmology (a convention, not a "
                        "measurement)"),
        "mu_z_err": ("mag", "error of mu_z from z_cmb_err"),
        "d_z_mpc": ("Mpc", "luminosity distance of z_cmb in the configured cosmology"),
        "z_flags": ("", "redshift-distance flags, a bit per reason"),
    },
}


def output_units(stage: str, bands) -> dict[str, str]:
    """Every column ``stage`` writes with its unit, for the configured ``bands``."""
    return {name: unit for name, (unit, _) in output_columns(stage, bands).items()}


def output_columns(stage: str, bands) -> dict[str, tuple[str, str]]:
    """Every column ``stage`` writes -> (unit, description), for the configured ``bands``
    (``bands`` None: the templates, "{band}" left in)."""
    if bands is None:
        return dict(_OUTPUTS[stage])
    return {name.format(band=label): (unit, text.format(band=label))
            for name, (unit, text) in _OUTPUTS[stage].items()
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
