"""The canonical input columns: names, units, and which ones a run needs.

A user's columns are mapped onto these names in config (``columns:``); units are
converted on ingest to the canonical unit given here.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Column:
    name: str
    unit: str  # canonical unit ("" for dimensionless, "string" for text)
    meaning: str

    @property
    def is_text(self) -> bool:
        return self.unit == "string"


def _c(name, unit, meaning):
    return Column(name, unit, meaning)


#: z_helio accepted at ingest: blueshifts down to cz = -1500 km/s (Local Group members,
#: nearby cluster galaxies falling towards us: classic TF and SBF objects; galdist's
#: choice), up to z = 1. The K(z) grids start at the lower end.
Z_HELIO_RANGE = (-0.005, 1.0)

BASE = [
    _c("galaxy_id", "string", "unique identifier"),
    _c("ra", "deg", "right ascension, ICRS"),
    _c("dec", "deg", "declination, ICRS"),
    _c("z_helio", "", "heliocentric redshift"),
    _c("z_helio_err", "", "error of z_helio"),
]
OPTIONAL = [
    _c("ebv", "mag", "E(B-V) on the scale of the map it came from"),
    _c("ebv_err", "mag", "error of ebv"),
    _c("galaxy_class", "string", "free-text class"),
    _c("hi_flux", "Jy km / s", "integrated HI line flux"),
    _c("w50_resolution", "km / s", "instrumental velocity resolution of the HI spectrum"),
]
TULLY_FISHER = [
    _c("w50", "km / s", "observed HI width at 50% of peak"),
    _c("w50_err", "km / s", "error of w50"),
    _c("axis_ratio", "", "optical b/a"),
    _c("axis_ratio_err", "", "error of axis_ratio"),
]
SBF = [
    _c("sbf_mag", "mag", "fluctuation magnitude in the SBF calibration's band"),
    _c("sbf_mag_err", "mag", "error of sbf_mag"),
    _c("sbf_color", "mag", "the SBF calibration's colour, as observed"),
    _c("sbf_color_err", "mag", "error of sbf_color"),
]
METHOD_COLUMNS = {"tully_fisher": TULLY_FISHER, "sbf": SBF}


def band_columns(label: str) -> list[Column]:
    return [_c(f"mag_{label}", "mag", f"total apparent magnitude in band {label}"),
            _c(f"mag_{label}_err", "mag", f"error of mag_{label}")]


def required_columns(bands: list[str], methods: list[str], extra=()) -> list[Column]:
    """Columns the catalog must have: the base ones, the methods' inputs, and ``extra``
    (optional or band columns that the configured stages make required). A band's
    magnitudes are required only where a stage uses them (``config.extra_required_columns``)."""
    cols = list(BASE)
    for m in methods:
        cols += METHOD_COLUMNS[m]
    pool = {c.name: c for c in OPTIONAL + [bc for b in bands for bc in band_columns(b)]}
    return cols + [pool[name] for name in extra if pool[name] not in cols]


def all_columns(bands: list[str], methods: list[str]) -> list[Column]:
    """Every canonical column a shard carries (absent ones are NaN): base, bands, methods, optional."""
    cols = list(BASE)
    for b in bands:
        cols += band_columns(b)
    for m in methods:
        cols += METHOD_COLUMNS[m]
    return cols + OPTIONAL
