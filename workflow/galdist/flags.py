"""Every quality flag of galdist, in one place.

Each flag column is an unsigned integer of independent bits, one meaning per bit.
A set bit says how far to trust a value; it never removes a row. Values that can
still be computed are computed. The README's flag table is generated from the
``describe`` texts below (``python -m galdist.flags``).

Columns and the enum that defines their bits:

==================  =============  ==========================================
column              enum           written by
==================  =============  ==========================================
``quality_flags``   ``Quality``    ingest (row-level input problems)
``ext_flags``       ``Ext``        Galactic extinction
``kcorr_flags``     ``KCorr``      K-corrections
``z_flags``         ``Redshift``   redshift distances
``<prefix>_flags``  ``Method``     each distance method (``tf_flags``, ``sbf_flags``,
                                   one per entry of ``galdist.methods.REGISTRY``)
==================  =============  ==========================================

``inherited`` is the one rule by which every method takes bits from the stages
before it.
"""

from __future__ import annotations

import enum

import numpy as np

FLAG_DTYPE = np.uint32


class _Documented(enum.IntFlag):
    """IntFlag whose members carry a meaning and an action for the user."""

    def __new__(cls, bit: int, meaning: str, action: str):
        obj = int.__new__(cls, 1 << bit)
        obj._value_ = 1 << bit
        obj.meaning = meaning
        obj.action = action
        return obj

    @classmethod
    def describe(cls) -> list[dict]:
        return [
            {"name": m.name, "bit": int(m.value).bit_length() - 1, "value": int(m.value),
             "meaning": m.meaning, "action": m.action}
            for m in cls
        ]


class Quality(_Documented):
    """Row-level input problems found at ingest. The offending value is set to NaN
    in the shards (the input file keeps the original), so no later stage uses it.
    A group of inputs left entirely empty (no HI for an early type, no SBF for a
    disc, a band not observed) means "not observed" and sets no bit; the methods
    then flag MISSING_INPUT for the galaxies they cannot measure."""

    POSITION_INVALID = (0, "ra or dec missing, non-finite, abs(dec) > 90 or ra outside [0, 360)",
                        "fix the coordinates; extinction and the CMB frame need them")
    REDSHIFT_INVALID = (1, "z_helio missing, non-finite, < -0.005 (cz < -1500 km/s) or > 1",
                        "check the redshift; no redshift distance or K-correction is possible")
    REDSHIFT_ERR_INVALID = (2, "z_helio_err missing, non-finite, negative or > 1",
                            "supply an error; mu_z error then omits the measurement term")
    MAG_INVALID = (3, "a band magnitude is infinite, outside [-10, 40], or missing while its error is given",
                   "the methods using that band get no distance for this row")
    MAG_ERR_INVALID = (4, "a magnitude error is negative, > 10 mag, infinite, or missing while the magnitude "
                          "is given",
                       "supply errors; distance errors omit that term")
    WIDTH_INVALID = (5, "w50 < 1 km/s (narrower than thermal broadening of cold HI), > 2000 km/s, infinite, "
                        "or missing while other TF inputs are given",
                     "no Tully-Fisher distance for this row")
    WIDTH_ERR_INVALID = (6, "w50_err negative, > 2000 km/s, infinite, or missing while other TF inputs are "
                            "given",
                         "supply an error; TF error omits the width term")
    AXIS_RATIO_INVALID = (7, "axis_ratio outside [0.01, 1] (no observed disc is thinner than 0.01), infinite, "
                             "or missing while other TF inputs are given",
                          "no inclination, hence no Tully-Fisher distance")
    AXIS_RATIO_ERR_INVALID = (8, "axis_ratio_err negative, > 1, infinite, or missing while other TF inputs are "
                                 "given",
                              "supply an error; TF error omits the inclination term")
    SBF_MAG_INVALID = (9, "sbf_mag outside [-10, 50], infinite, or missing while other SBF inputs are given",
                       "no SBF distance for this row")
    SBF_COLOR_INVALID = (10, "sbf_color outside [-2, 5], infinite, or missing while other SBF inputs are given",
                         "no SBF distance for this row")
    SBF_ERR_INVALID = (11, "sbf_mag_err or sbf_color_err negative, > 10 mag, infinite, or missing while other "
                           "SBF inputs are given",
                       "supply errors; SBF error omits that term")
    EBV_INVALID = (12, "catalog ebv negative, > 10 mag (A_V ~ 31 mag: no usable correction) or infinite, or "
                       "ebv_err negative, > 10 mag, infinite or missing while ebv is given",
                   "no Galactic extinction correction from the catalog for this row")
    OPTIONAL_INVALID = (13, "an optional numeric column (hi_flux, w50_resolution) is negative, infinite or "
                            "absurdly large (hi_flux > 1e7 Jy km/s, w50_resolution > 500 km/s)",
                        "the step that needs it is skipped for this row")
    METHOD_INPUT_INVALID = (14, "an input column of a distance method without bits of its own above is outside "
                                "the bounds its entry in galdist.methods declares, infinite, or missing while "
                                "the method's other inputs are given",
                            "no distance from that method for this row; the method's columns in the README "
                            "give the bounds")


class Ext(_Documented):
    """Galactic extinction stage."""

    NO_EBV = (0, "no E(B-V) available (missing in catalog or position invalid)",
              "A_<band> is NaN; magnitudes of this row are not corrected, methods flag it")
    HIGH_EXTINCTION = (1, "E(B-V) above the configured limit (default 0.5 mag)",
                       "corrections are unreliable near the Galactic plane: treat distances with care")
    OUTSIDE_MAP = (2, "position outside the map's valid area or on a blank pixel",
                   "supply E(B-V) another way for this row")


class KCorr(_Documented):
    """K-correction stage."""

    COLOR_CLIPPED = (0, "observed colour outside the template range; nearest template used",
                     "K may be biased; check the photometry")
    Z_BEYOND_GRID = (1, "redshift beyond the K(z) grid (or invalid); K is NaN",
                     "no K-correction: methods flag the row")
    COLOR_MISSING = (2, "colour unavailable; the configured default template was used",
                     "K assumes the default spectrum")


class Redshift(_Documented):
    """Redshift-distance stage."""

    NO_REDSHIFT = (0, "no valid z_helio or position: no z_cmb, mu_z",
                   "no Hubble-flow comparison for this row")
    LOCAL_FLOW = (1, "cz_cmb below the configured minimum (default 3000 km/s)",
                  "peculiar velocities are a large part of cz: redshift distance is not a distance here")


class Method(_Documented):
    """Distance-method flags; the same bits serve ``tf_flags`` and ``sbf_flags``."""

    MISSING_INPUT = (0, "an input the method needs is missing or was flagged invalid at ingest",
                     "no distance; see quality_flags for which input")
    OUT_OF_RANGE = (1, "predictor (log W^i or colour) outside the calibration's valid range",
                    "extrapolated (if allowed) or NaN: the calibration does not cover this galaxy")
    LOW_INCLINATION = (2, "inclination below the configured limit (default 45 deg)",
                       "TF only: deprojection blows up for face-on discs; do not use the distance")
    HIGH_EXTINCTION = (3, "inherited: Galactic E(B-V) above the limit, missing, or outside the map",
                       "extinction corrections are unreliable")
    KCORR_PROBLEM = (4, "inherited: K-correction clipped, defaulted or missing",
                     "check the K-correction flags")
    OUTLIER = (5, "|dmu| from the Hubble flow beyond the clipping threshold",
               "inspect: wrong redshift, bad photometry, or a real large peculiar velocity")
    LOCAL_FLOW = (6, "inherited: redshift inside the local velocity field",
                  "dmu and v_pec are not meaningful there; the distance itself is fine")
    EXTRAPOLATED = (7, "distance computed outside the calibrated range because config allows it",
                    "use only with the caution the calibration's reference gives")
    PASSBAND_OVERRIDE = (8, "the calibration's passband differs from the data's; config "
                            "accept_passband_mismatch let the run go on",
                         "expect a zero-point offset of the size of the colour term between the passbands")


#: The flag columns of the stages before the methods, and their bits.
STAGE_FLAGS = {"quality_flags": Quality, "ext_flags": Ext, "kcorr_flags": KCorr, "z_flags": Redshift}


def __getattr__(name):
    """``ALL``: every flag column and its enum, the stages' then one ``<prefix>_flags``
    per registered method (built on first use: the registry imports this module)."""
    if name == "ALL":
        from .methods import REGISTRY

        return STAGE_FLAGS | {spec.flags_column: Method for spec in REGISTRY.values()}
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def inherited(ext_flags, kcorr_flags, *, extinction: bool = True, kcorrection: bool = True) -> np.ndarray:
    """The Method bits a distance takes from the stages it used, the same for every method:
    HIGH_EXTINCTION where the extinction stage set any bit (E(B-V) missing, above the
    limit, or outside the map), KCORR_PROBLEM where the K-correction stage set any
    (colour clipped or missing, redshift beyond the grid). A correction the method
    switched off (``extinction``/``kcorrection`` false) passes nothing on."""
    ext = np.asarray(ext_flags, dtype=FLAG_DTYPE)
    out = new(ext.shape[0] if ext.ndim else 1)
    if extinction:
        set_where(out, ext != 0, Method.HIGH_EXTINCTION)
    if kcorrection:
        set_where(out, np.asarray(kcorr_flags, dtype=FLAG_DTYPE) != 0, Method.KCORR_PROBLEM)
    return out


def set_where(flags: np.ndarray, mask: np.ndarray, flag: enum.IntFlag) -> None:
    """Set ``flag`` in ``flags`` (in place) where ``mask`` is true."""
    flags[np.asarray(mask, dtype=bool)] |= FLAG_DTYPE(int(flag))


def has(flags: np.ndarray, flag: enum.IntFlag | int) -> np.ndarray:
    """Boolean array: rows where any bit of ``flag`` is set."""
    return (np.asarray(flags, dtype=FLAG_DTYPE) & FLAG_DTYPE(int(flag))) != 0


def new(n: int) -> np.ndarray:
    """A fresh all-clear flag column of length ``n``."""
    return np.zeros(n, dtype=FLAG_DTYPE)


def decode(column: str, value: int) -> list[str]:
    """The names of the bits set in one value of flag column ``column`` (``ALL``'s keys),
    lowest bit first; a set bit the column does not define is named ``BIT<k>``."""
    enum_cls = __getattr__("ALL")[column]
    value = int(value)
    if value < 0:
        raise ValueError(f"{value}: flag values are never negative")
    defined = {int(m.value): m.name for m in enum_cls}
    return [defined.get(1 << k, f"BIT{k}") for k in range(value.bit_length()) if value >> k & 1]


def decoded(column: str, values) -> np.ndarray:
    """A flag column's values as text, the set bits' names joined by '|' ("" where none
    is set): one decode per distinct value, so a survey-sized column costs little."""
    values = np.asarray(values, dtype=FLAG_DTYPE)
    distinct, index = np.unique(values, return_inverse=True)
    names = np.array(["|".join(decode(column, v)) for v in distinct], dtype=object)
    return names[index.ravel()].reshape(values.shape)


def markdown_table() -> str:
    """The flag table of the README."""
    lines = []
    for column, enum_cls in __getattr__("ALL").items():
        lines.append(f"\n**`{column}`**\n")
        lines.append("| bit | name | meaning | what to do |")
        lines.append("|---|---|---|---|")
        for d in enum_cls.describe():
            lines.append(f"| {d['bit']} | `{d['name']}` | {d['meaning']} | {d['action']} |")
    return "\n".join(lines)


if __name__ == "__main__":
    print(markdown_table())
