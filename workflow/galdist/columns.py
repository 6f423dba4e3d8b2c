"""The canonical input columns: names, units, and which ones a run needs.

A user's columns are mapped onto these names in config (``columns:``); units are
converted on ingest to the canonical unit given here. The distance methods declare
their own catalog columns in their registry entries (``galdist.methods``); ingest
adds the Galactic coordinates (``DERIVED``), computed once for every stage.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Column:
    name: str
    unit: str  # canonical unit ("" for dimensionless, "string" for text)
    meaning: str
    #: a distance method's input: (low, high) bounds of a usable value in ``unit``, and the
    #: ``flags.Quality`` bit ingest sets outside them (METHOD_INPUT_INVALID if None)
    valid: tuple[float, float] | None = None
    quality: str | None = None
    #: False: a method's column the catalog may lack (read as missing), e.g. one of two
    #: alternatives or an optional correlation
    required: bool = True

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
    _c("group_id", "string", "the galaxy's group in your group catalog (galaxies sharing it are at one "
                             "distance); empty: a group of one"),
    _c("hi_flux", "Jy km / s", "integrated HI line flux"),
    _c("w50_resolution", "km / s", "instrumental velocity resolution of the HI spectrum"),
]
#: computed at ingest from ra, dec (galdist.ebv_maps.galactic_coordinates), once for all stages
DERIVED = [
    _c("gal_l", "deg", "Galactic longitude"),
    _c("gal_b", "deg", "Galactic latitude"),
]


def method_columns(method: str) -> list[Column]:
    """The catalog columns of a registered distance method."""
    from .methods import REGISTRY

    return list(REGISTRY[method].catalog_columns)


def band_columns(label: str) -> list[Column]:
    return [_c(f"mag_{label}", "mag", f"total apparent magnitude in band {label}"),
            _c(f"mag_{label}_err", "mag", f"error of mag_{label}")]


def required_columns(bands: list[str], methods: list[str], extra=()) -> list[Column]:
    """Columns the catalog must have: the base ones, the methods' inputs, and ``extra``
    (optional or band columns that the configured stages make required). A band's
    magnitudes are required only where a stage uses them (``config.extra_required_columns``)."""
    cols = _unique(BASE + [c for m in methods for c in method_columns(m) if c.required])
    pool = {c.name: c for c in OPTIONAL + [bc for b in bands for bc in band_columns(b)]}
    return cols + [pool[name] for name in extra if pool[name] not in cols]


def all_columns(bands: list[str], methods: list[str]) -> list[Column]:
    """Every canonical column a shard carries (absent ones are NaN): base, bands, methods, optional."""
    return _unique(BASE + [c for b in bands for c in band_columns(b)]
                   + [c for m in methods for c in method_columns(m)] + OPTIONAL)


def _unique(cols: list[Column]) -> list[Column]:
    """``cols`` without repeats of a name (two methods may read one column)."""
    return list({c.name: c for c in reversed(cols)}.values())[::-1]
