"""A calibration's own conventions, applied to a run: the Galactic-extinction convention
its magnitudes were corrected with, and the H0 its zero point assumes.

Every calibration file states both (``conventions`` in the calibration schema).

Extinction. A calibration built on magnitudes corrected one way must be fed magnitudes
corrected the same way, whatever the run's own extinction settings. The two conventions:

``sf11``
    E(B-V)_true = 0.86 x the 1998 map value, with Fitzpatrick (1999, PASP 111, 63)
    R_V = 3.1 coefficients (Schlafly & Finkbeiner 2011, ApJ 737, 103): galdist's default.
``sfd98``
    the 1998 map value unscaled, with O'Donnell (1994, ApJ 422, 158) R_V = 3.1
    coefficients (Schlegel, Finkbeiner & Davis 1998, ApJ 500, 525, Table 6; e.g. Cousins
    I: R = 1.94, from memory).

Both are computed the way the run computes its own law coefficients (its filter curves,
source spectrum and bandpass normalisation, ``galdist.extinction``). For each band the
method reads, A_conv / A_run is a constant (both are linear in the input E(B-V)):

    A_run  = (R_run / s_incl) x s_run x E_in        (the run's extinction stage)
    A_conv = R_conv x s_conv x E_1998map,  E_1998map = s_run x E_in / 0.86

so factor = (R_conv s_conv / 0.86) / (R_run / s_incl), where s_incl is the E(B-V) scale
folded into the run's coefficients (1 for a law, 0.86 for the SF11 table), s_run the
run's ``extinction.ebv_scale`` and s_conv the convention's map scale. With galdist's
defaults and an ``sf11`` calibration the factor is 1 exactly. The extinction errors
scale with the same factor.

H0. A zero point tied to the Hubble flow (a relation in M - 5 log10 h, sizes in h^-1
kpc) holds at the H0 it assumes. galdist rescales it to the run's H0 (``at_run_h0``):
M_run = M_cal + 5 log10(H0_run / H0_cal) for magnitude relations, log M_b shifts by
-2 log10(H0_run / H0_cal) for the baryonic form (masses scale as d^2), and the plane's
sizes are rescaled inside ``galdist.fp`` (r_run = r_cal - log10(H0_run / H0_cal)). The
method's implied H0 is then not an independent measurement: it returns the run's H0 up
to the zero point's own error (``independent_h0``).
"""

from __future__ import annotations

import dataclasses
import json
import math
from collections.abc import Mapping
from functools import lru_cache

#: true E(B-V) per 1998-map E(B-V) (Schlafly & Finkbeiner 2011, ApJ 737, 103)
SF11_MAP_SCALE = 0.86

#: convention -> the law, its R_V and the scale of the map values its coefficients multiply
EXTINCTION_CONVENTIONS = {
    "sf11": {"law": "F99", "r_v": 3.1, "map_scale": SF11_MAP_SCALE},
    "sfd98": {"law": "O94", "r_v": 3.1, "map_scale": 1.0},
}


def run_extinction_convention(config: Mapping) -> str | None:
    """The convention the run's own extinction settings follow ('sf11' or 'sfd98', as a
    calibration fitted from the run states it), else None: the law with R_V = 3.1 and the
    convention's map scale, or the shipped SF11 table (which holds the 0.86) on 1998-map values."""
    ext = config["extinction"]
    if ext["coefficients"] == "table":
        return "sf11" if ext["table"] == "sf11_table6" and math.isclose(ext["ebv_scale"], SF11_MAP_SCALE) else None
    if ext["r_v"] != 3.1:
        return None
    for name, conv in EXTINCTION_CONVENTIONS.items():
        if ext["law"] == conv["law"] and math.isclose(ext["ebv_scale"], conv["map_scale"]):
            return name
    return None


def run_h0(config: Mapping) -> float:
    """The run's H0 (km/s/Mpc): the named cosmology's, or ``redshift.cosmology.H0``."""
    cosmology = config["redshift"]["cosmology"]
    if cosmology["name"] is None:
        return float(cosmology["H0"])
    from .redshift import make_cosmology

    return float(make_cosmology(cosmology["name"]).H0.value)


def independent_h0(calibration) -> bool:
    """False when the calibration's zero point assumes an H0 (its implied H0 is circular)."""
    return calibration.zero_point_h0 is None


def at_run_h0(calibration, h0: float):
    """The calibration with its zero point moved to the run's H0 (unchanged when it assumes
    none, or for the plane form, which ``galdist.fp`` rescales itself)."""
    h_cal = calibration.zero_point_h0
    if h_cal is None or calibration.form == "plane" or h0 == h_cal:
        return calibration
    shift = 5.0 * math.log10(h0 / h_cal)  # magnitudes: M_run - M_cal
    if calibration.form == "inverse":
        return dataclasses.replace(calibration, magnitude_pivot=calibration.magnitude_pivot + shift,
                                   zero_point_h0=float(h0))
    coeffs = calibration.coefficients.copy()
    coeffs[0] += -0.4 * shift if calibration.form == "baryonic" else shift  # log M_b: -2 log10(h ratio)
    return dataclasses.replace(calibration, coefficients=coeffs, zero_point_h0=float(h0))


@lru_cache(maxsize=32)
def _factors(bands_json: str, extinction_json: str, convention: str) -> tuple:
    from . import extinction, filters, stages

    bands, ext = json.loads(bands_json), json.loads(extinction_json)
    run = stages.extinction_coefficients({"bands": bands, "extinction": ext})
    conv = EXTINCTION_CONVENTIONS[convention]
    theirs = extinction.law_coefficients(filters.load_bands(bands), law=conv["law"], r_v=conv["r_v"],
                                         source_temperature=ext["source_temperature"],
                                         normalisation="bandpass")
    out = []
    for band in bands:
        r_run = float(run[band]) / float(run.ebv_scale_included)
        r_conv = float(theirs[band]) * conv["map_scale"] / SF11_MAP_SCALE
        out.append((band, r_conv / r_run if r_run > 0 else 1.0))
    return tuple(out)


def extinction_factors(config: Mapping, convention: str, bands=None, cache_dir=None) -> dict[str, float]:
    """A_conv / A_run for each of ``bands`` (default: every configured band).

    ``cache_dir``: remember the factors there (``galdist.grid_cache.remembered``: keyed by
    the bands, their filter files' content, the extinction section and its table's
    content, galdist's code and the libraries' versions), so the workflow's start need
    not import speclite and dust_extinction when nothing changed."""
    if convention not in EXTINCTION_CONVENTIONS:
        raise ValueError(f"unknown extinction convention {convention!r}; known: {', '.join(EXTINCTION_CONVENTIONS)}")
    wanted = {b: config["bands"][b] for b in (bands if bands is not None else config["bands"])}
    bands_json = json.dumps(wanted, sort_keys=True)
    ext_json = json.dumps(dict(config["extinction"]), sort_keys=True, default=str)
    if cache_dir is None:
        return dict(_factors(bands_json, ext_json, convention))
    from . import grid_cache
    from .config import extinction_table_file

    ext = config["extinction"]
    table = extinction_table_file(config) if ext["coefficients"] == "table" else None
    inputs = {"bands": json.loads(bands_json), "extinction": json.loads(ext_json), "convention": convention,
              "filter_files": {b: grid_cache.file_digest(v["filter"]) for b, v in wanted.items()},
              "table_file": grid_cache.file_digest(table)}
    pairs = grid_cache.remembered(cache_dir, "extinction_factors", inputs,
                                  lambda: [list(p) for p in _factors(bands_json, ext_json, convention)])
    return {band: float(factor) for band, factor in pairs}


def mark_h0_independence(statistics: dict, calibrations: Mapping) -> dict:
    """Add to each method's statistics ``h0_implied_independent`` and, where it is False,
    ``h0_implied_note`` naming the calibration and the H0 its zero point assumes.
    ``calibrations``: method prefix -> Calibration. Returns ``statistics``."""
    for prefix, stats in statistics.get("methods", {}).items():
        cal = calibrations.get(prefix)
        if cal is None:
            continue
        stats["h0_implied_independent"] = independent_h0(cal)
        if not independent_h0(cal):
            stats["h0_implied_note"] = (f"not independent: the zero point of calibration {cal.name} assumes "
                                        f"H0 = {cal.zero_point_h0:g} km/s/Mpc, rescaled to the run's H0, so the "
                                        "implied H0 returns the run's H0 by construction")
    return statistics
