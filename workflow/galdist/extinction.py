"""Galactic extinction: band coefficients R_X = A_X / E(B-V) and per-row A_X.

Two ways to get coefficients, chosen by configuration and recorded in the result
(``ExtinctionCoefficients.method``):

``law``
    An extinction law from dust_extinction (Fitzpatrick 1999, PASP 111, 63 [F99,
    default]; Cardelli, Clayton & Mathis 1989, ApJ 345, 245 [CCM89]; O'Donnell
    1994, ApJ 422, 158 [O94]; Fitzpatrick 2004, ASP Conf. 309, 33 [F04]; Gordon et
    al. 2023, ApJ 950, 86 [G23]; law references from memory) applied to a source spectrum (default a 7000 K
    blackbody, the star Schlafly & Finkbeiner 2011 assumed -- from memory) through
    each band's filter curve, with photon-counting band averages.
``table``
    A fixed table of coefficients (YAML, e.g. ``config/extinction/sf11_table6.yaml``
    = Schlafly & Finkbeiner 2011, ApJ 737, 103, Table 6) that declares the E(B-V)
    scale already folded into it (``ebv_scale_included``).

Normalisation (the part that is easy to get wrong)
--------------------------------------------------
A law gives A(lambda) / A(V) with its R_V and E(B-V) defined by the law's own
(monochromatic) convention. A reddening map's E(B-V) is a *bandpass* colour excess
(B - V of real stars through real filters) and is on the map's own scale: Schlafly
& Finkbeiner 2011 found the true excess is 0.86 x the value of the Schlegel,
Finkbeiner & Davis 1998 (ApJ 500, 525) map. galdist therefore

1. computes every band through the law relative to the law's A(V),
   a_X = A_X / A_V,law (photon-counting: A_X = -2.5 log10(<f 10^(-0.4 A)> / <f>),
   taken in the small-E(B-V) limit <f A> / <f> by default, or at a finite
   ``reference_ebv``);
2. normalises by the *bandpass* colour excess of the same source through Landolt B
   and V (speclite's Bessell curves by default):
   R_X = a_X / (a_B - a_V)    (``normalisation='bandpass'``, default).
   The law's internal E(B-V) convention cancels; R_V only sets the law's shape.
   ``normalisation='law'`` gives R_X = R_V a_X instead (per the law's own E(B-V));
   through a delta-function filter that is R_V A(lambda)/A(V).
3. converts the input E(B-V) (catalog column or map) to the true scale with the
   explicit ``ebv_scale`` (default 0.86, for values of the 1998 map):
   ebv_used = ebv_scale x ebv_in, and A_X = (R_X / ebv_scale_included) x ebv_used.

Law coefficients are per true E(B-V) (``ebv_scale_included = 1``). A fixed table
declares the scale it includes (SF11 Table 6: 0.86, i.e. it multiplies the raw 1998
map value), and the factor travels with the coefficients, so with the defaults
A_X = table x ebv_in: the 0.86 cancels and is never applied twice. If the input is
already on the true scale, set ``ebv_scale = 1`` and the table is divided by 0.86.

Colour excess: E(c1 - c2) = (R_c1 - R_c2) E(B-V) (``colour_excess``).
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import yaml

from . import flags as _flags
from .filters import band_average, load_filter

__all__ = ["LAWS", "NORMALISATIONS", "ExtinctionCoefficients", "extinction_law",
           "blackbody_flambda", "relative_band_extinction", "law_coefficients",
           "table_coefficients", "apply_extinction", "colour_excess"]

#: Law names accepted in configuration: class names in dust_extinction.parameter_averages.
LAWS = ("F99", "CCM89", "O94", "F04", "G23")
NORMALISATIONS = ("bandpass", "law")

#: hc/k in Angstrom Kelvin (CODATA 2018 exact constants).
_HC_OVER_K = 6.62607015e-34 * 2.99792458e8 / 1.380649e-23 * 1e10
_N_GRID = 3001


def _is_number(x) -> bool:
    return isinstance(x, numbers.Real) and not isinstance(x, bool)


@dataclass(frozen=True)
class ExtinctionCoefficients(Mapping):
    """Band label -> coefficient, plus the E(B-V) scale folded into the coefficients.

    ``by_band[label]`` multiplies E(B-V) on a scale equal to ``true / ebv_scale_included``
    (law path: 1.0, per true E(B-V); SF11 Table 6: 0.86, per raw 1998-map value).
    ``method`` is 'law' or 'table'; ``details`` records how they were made.
    Behaves as a read-only dict of ``by_band``.
    """

    by_band: dict
    ebv_scale_included: float
    method: str
    details: dict = field(default_factory=dict)

    def __post_init__(self):
        if self.method not in ("law", "table"):
            raise ValueError(f"coefficient method '{self.method}' is not allowed; use law or table")
        s = self.ebv_scale_included
        if not (_is_number(s) and math.isfinite(s) and 0.0 < s <= 2.0):
            raise ValueError(f"ebv_scale_included must be a number in (0, 2], got {s!r}")

    def __getitem__(self, label):
        return self.by_band[label]

    def __iter__(self):
        return iter(self.by_band)

    def __len__(self):
        return len(self.by_band)

    def per_true_ebv(self) -> dict:
        """label -> A_X / E(B-V)_true (what multiplies ``ebv_used``)."""
        return {k: float(v) / self.ebv_scale_included for k, v in self.by_band.items()}

    def to_dict(self) -> dict:
        """Plain, JSON/YAML-serialisable form (the once-per-configuration output)."""
        return {"method": self.method, "ebv_scale_included": float(self.ebv_scale_included),
                "coefficients": {k: float(v) for k, v in self.by_band.items()},
                "per_true_ebv": self.per_true_ebv(), "details": dict(self.details)}

    @classmethod
    def from_dict(cls, d: Mapping) -> "ExtinctionCoefficients":
        for key in ("method", "ebv_scale_included", "coefficients"):
            if key not in d:
                raise ValueError(f"extinction coefficients: missing '{key}'")
        return cls(by_band={str(k): float(v) for k, v in d["coefficients"].items()},
                   ebv_scale_included=float(d["ebv_scale_included"]), method=str(d["method"]),
                   details=dict(d.get("details", {})))


def extinction_law(law: str = "F99", r_v: float = 3.1):
    """A dust_extinction model for ``law`` (one of LAWS) at ``r_v``, range-checked."""
    # imported here: dust_extinction (with scipy) takes ~0.7 s to import, and only the
    # job that computes the band coefficients needs it, not the per-shard jobs
    import dust_extinction.parameter_averages as laws

    if str(law).upper() not in LAWS:
        raise ValueError(f"extinction.law: '{law}' is not allowed; use one of {', '.join(LAWS)}")
    cls = getattr(laws, str(law).upper())
    lo, hi = cls.Rv_range
    if not (_is_number(r_v) and lo <= r_v <= hi):
        raise ValueError(f"extinction.r_v: {law} is defined for R_V in [{lo}, {hi}], got {r_v!r}")
    return cls(Rv=float(r_v))


def _law_wave_range(model) -> tuple[float, float]:
    """Valid wavelength range of a dust_extinction model in Angstrom."""
    x_lo, x_hi = model.x_range  # inverse microns
    return 1e4 / x_hi, 1e4 / x_lo


def blackbody_flambda(wave_aa, temperature: float) -> np.ndarray:
    """Planck f_lambda (arbitrary normalisation) at wavelengths in Angstrom."""
    if not (_is_number(temperature) and 500.0 <= temperature <= 1e6):
        raise ValueError(f"extinction.source_temperature: must be in [500, 1e6] K, got {temperature!r}")
    w = np.asarray(wave_aa, dtype=float)
    x = _HC_OVER_K / (w * temperature)
    # scaled by 5000**5 to keep numbers near unity; the normalisation cancels
    return (5000.0 / w) ** 5 / np.expm1(x)


def _source_function(source, source_temperature):
    if source is None:
        return lambda w: blackbody_flambda(w, source_temperature)
    sw, sf_ = (np.asarray(a, dtype=float) for a in source)
    if sw.ndim != 1 or sw.shape != sf_.shape or sw.size < 2 or np.any(np.diff(sw) <= 0):
        raise ValueError("extinction.source: needs (wave [Angstrom], f_lambda) 1-D arrays, wave increasing")

    def f(w):
        if w[0] < sw[0] or w[-1] > sw[-1]:
            raise ValueError(f"extinction.source: spectrum ({sw[0]:.0f}-{sw[-1]:.0f} A) does not cover "
                             f"{w[0]:.0f}-{w[-1]:.0f} A")
        return np.interp(w, sw, sf_)
    return f


def relative_band_extinction(filt, model, source=None, source_temperature: float = 7000.0,
                             reference_ebv: float = 0.0, label: str | None = None,
                             law_name: str | None = None) -> float:
    """a_X = A_X / A_V,law for one filter: photon-counting band average of the law.

    ``reference_ebv`` = 0 gives the small-extinction limit <f k> / <f> (k = A/A_V);
    otherwise A_X = -2.5 log10(<f 10^(-0.4 A)> / <f>) with A = k R_V E, divided by
    R_V E. The integration covers only where the filter response is positive; a
    filter reaching beyond the law's valid range raises ValueError.
    """
    import astropy.units as u  # here, not at the top: the per-shard extinction jobs need no units

    label = label or getattr(filt, "name", "band")
    law_name = law_name or type(model).__name__
    w_f = np.asarray(filt.wavelength, dtype=float)
    r_f = np.asarray(filt.response, dtype=float)
    pos = np.flatnonzero(r_f > 0)
    if pos.size == 0:
        raise ValueError(f"band '{label}': filter has no positive response")
    # the interpolated response is positive strictly between these two samples
    lo = w_f[max(pos[0] - 1, 0)]
    hi = w_f[min(pos[-1] + 1, w_f.size - 1)]
    lam_min, lam_max = _law_wave_range(model)
    if lo < lam_min * (1 - 1e-12) or hi > lam_max * (1 + 1e-12):
        raise ValueError(f"band '{label}' (filter {getattr(filt, 'name', '?')}, response {lo:.0f}-{hi:.0f} A) "
                         f"reaches beyond the valid range of extinction law {law_name} "
                         f"({lam_min:.0f}-{lam_max:.0f} A); no extrapolation is done -- choose a law "
                         "that covers the band (G23: 912 A-32 um) or another filter")
    grid = np.union1d(w_f, np.linspace(lo, hi, _N_GRID))
    inside = (grid >= lo) & (grid <= hi)
    k = np.zeros_like(grid)
    k[inside] = np.asarray(model(np.clip(grid[inside], lam_min, lam_max) * u.AA), dtype=float)
    f = _source_function(source, source_temperature)(grid)
    f0 = band_average(filt, grid, f)
    if not (np.isfinite(f0) and f0 > 0):
        raise ValueError(f"band '{label}': source spectrum has no flux in the filter")
    if reference_ebv == 0.0:
        return float(band_average(filt, grid, f * k) / f0)
    a_ref = float(model.Rv.value) * reference_ebv
    ratio = band_average(filt, grid, f * 10.0 ** (-0.4 * k * a_ref)) / f0
    return float(-2.5 * np.log10(ratio) / a_ref)


def law_coefficients(filters: Mapping, law: str = "F99", r_v: float = 3.1,
                     source_temperature: float = 7000.0, source=None,
                     normalisation: str = "bandpass", ebv_filters=("bessell-B", "bessell-V"),
                     reference_ebv: float = 0.0) -> ExtinctionCoefficients:
    """R_X = A_X / E(B-V) per band through an extinction law (see module docstring).

    ``filters``: band label -> speclite FilterResponse (from ``filters.load_filter``).
    ``source``: optional (wave [A], f_lambda) replacing the blackbody of
    ``source_temperature``. ``normalisation``: 'bandpass' (per B-V excess of the
    source through ``ebv_filters``, names or FilterResponses) or 'law' (per the law's
    own E(B-V) = A_V / R_V). Returned coefficients are per true E(B-V).
    """
    if normalisation not in NORMALISATIONS:
        raise ValueError(f"extinction.normalisation: '{normalisation}' is not allowed; "
                         f"use one of {', '.join(NORMALISATIONS)}")
    if not (_is_number(reference_ebv) and 0.0 <= reference_ebv <= 5.0):
        raise ValueError(f"extinction.reference_ebv: must be in [0, 5] mag, got {reference_ebv!r}")
    if not filters:
        raise ValueError("extinction: no bands to compute coefficients for")
    model = extinction_law(law, r_v)
    law_name = str(law).upper()
    src = None if source is None else tuple(source)
    kw = dict(source=src, source_temperature=source_temperature, reference_ebv=reference_ebv,
              law_name=law_name)
    rel = {label: relative_band_extinction(filt, model, label=label, **kw)
           for label, filt in filters.items()}
    details = {"law": law_name, "r_v": float(r_v), "normalisation": normalisation,
               "reference_ebv": float(reference_ebv),
               "source": ("user spectrum" if source is not None
                          else f"blackbody {float(source_temperature):g} K"),
               "filters": {label: getattr(filt, "name", "?") for label, filt in filters.items()}}
    if normalisation == "law":
        scale = float(r_v)
    else:
        if len(ebv_filters) != 2:
            raise ValueError("extinction.ebv_filters: give exactly two filters (B, V)")
        bv = [load_filter(f) if isinstance(f, str) else f for f in ebv_filters]
        a_b, a_v = (relative_band_extinction(f, model, label=f"E(B-V) filter {getattr(f, 'name', '?')}", **kw)
                    for f in bv)
        excess = a_b - a_v
        if not excess > 0:
            raise ValueError(f"extinction.ebv_filters: {law_name} gives no positive B-V excess "
                             f"through {[getattr(f, 'name', '?') for f in bv]}")
        scale = 1.0 / excess
        details["ebv_filters"] = [getattr(f, "name", "?") for f in bv]
        details["bandpass_ebv_per_law_ebv"] = float(excess * r_v)
    return ExtinctionCoefficients(by_band={k: v * scale for k, v in rel.items()},
                                  ebv_scale_included=1.0, method="law", details=details)


def table_coefficients(table_path: str | Path, filter_keys: Mapping) -> ExtinctionCoefficients:
    """Coefficients from a fixed table (YAML) for band label -> table key.

    The table must declare ``ebv_scale_included`` (the E(B-V) recalibration already
    folded into its numbers; SF11 Table 6: 0.86) and ``coefficients`` (key -> value).
    """
    path = Path(table_path)
    if not path.exists():
        raise ValueError(f"extinction.table: {path} does not exist")
    with open(path, encoding="utf-8") as fh:
        doc = yaml.safe_load(fh)
    if not isinstance(doc, dict):
        raise ValueError(f"extinction.table: {path} is not a YAML mapping")
    if "ebv_scale_included" not in doc:
        raise ValueError(f"extinction.table: {path} must declare 'ebv_scale_included' (the E(B-V) "
                         "scale folded into its coefficients: 0.86 for SF11 Table 6, 1 if none)")
    table = doc.get("coefficients")
    if not isinstance(table, dict) or not table:
        raise ValueError(f"extinction.table: {path} needs a non-empty 'coefficients' mapping")
    for key, value in table.items():
        if not (_is_number(value) and math.isfinite(value) and value > 0):
            raise ValueError(f"extinction.table: {path}: coefficient '{key}' must be a positive number")
    if not filter_keys:
        raise ValueError("extinction.table_keys: no bands given")
    values = {}
    for label, key in filter_keys.items():
        if key not in table:
            raise ValueError(f"extinction.table_keys: '{key}' (band {label}) is not in {path}; "
                             f"available: {', '.join(table)}")
        values[label] = float(table[key])
    scale = doc["ebv_scale_included"]
    if not _is_number(scale):
        raise ValueError(f"extinction.table: {path}: ebv_scale_included must be a number")
    details = {"table": str(path), "keys": dict(filter_keys),
               **{k: doc[k] for k in ("reference", "status", "law", "r_v", "multiplies") if k in doc}}
    return ExtinctionCoefficients(by_band=values, ebv_scale_included=float(scale), method="table",
                                  details=details)


def _check_scale(name, value):
    if not _is_number(value) or not (0.0 < value <= 2.0):
        raise ValueError(f"extinction.{name}: must be a number in (0, 2], got {value!r}")


def apply_extinction(ebv_in, ebv_in_err, coefficients: ExtinctionCoefficients,
                     ebv_scale: float = 0.86, *, ebv_scale_included: float | None = None,
                     high_limit: float = 0.5, outside=None,
                     ebv_fractional_error: float | None = None) -> dict:
    """Per-row extinction columns: ebv_used, ebv_used_err, A_<band> and A_<band>_err
    (= R_<band> ebv_used_err: the errors of all bands are one source), ext_flags.

    ``ebv_in`` (and ``ebv_in_err``, may be None) are on the input's scale; ``ebv_scale``
    turns them into true E(B-V) (0.86 for raw 1998-map values, 1 if already true).
    The scale folded into ``coefficients`` is taken from them; a plain dict needs
    ``ebv_scale_included`` explicitly (and a conflicting value is refused), so the
    recalibration cannot be applied twice. ``ebv_fractional_error``: error to use,
    as a fraction of ebv_used, where no ``ebv_in_err`` is available (e.g. map look-ups).
    ``outside``: bool mask from a map look-up (sets Ext.OUTSIDE_MAP).
    Flags: Ext.NO_EBV (no finite E(B-V)), Ext.HIGH_EXTINCTION (ebv_used > high_limit).
    """
    _check_scale("ebv_scale", ebv_scale)
    if isinstance(coefficients, ExtinctionCoefficients):
        included = coefficients.ebv_scale_included
        if ebv_scale_included is not None and not math.isclose(ebv_scale_included, included):
            raise ValueError(f"ebv_scale_included={ebv_scale_included} conflicts with the coefficients' "
                             f"own {included} ({coefficients.method} path); do not pass it")
        per_true = coefficients.per_true_ebv()
    elif isinstance(coefficients, Mapping):
        if ebv_scale_included is None:
            raise ValueError("plain coefficient dicts need ebv_scale_included (the E(B-V) scale folded "
                             "into them: 1 for per-true-E(B-V) law values, 0.86 for SF11 Table 6)")
        _check_scale("ebv_scale_included", ebv_scale_included)
        per_true = {k: float(v) / ebv_scale_included for k, v in coefficients.items()}
    else:
        raise ValueError("coefficients must be ExtinctionCoefficients or a mapping label -> value")
    if not (_is_number(high_limit) and high_limit > 0):
        raise ValueError(f"extinction.high_ebv_limit: must be a positive number, got {high_limit!r}")
    if ebv_fractional_error is not None and not (
            _is_number(ebv_fractional_error) and 0 <= ebv_fractional_error < 1):
        raise ValueError(f"extinction.ebv_fractional_error: must be in [0, 1) or null, got {ebv_fractional_error!r}")

    ebv_in = np.atleast_1d(np.asarray(ebv_in, dtype=float))
    n = ebv_in.size
    ebv_used = ebv_in * ebv_scale
    if ebv_in_err is None:
        err = np.full(n, np.nan)
    else:
        err = np.broadcast_to(np.asarray(ebv_in_err, dtype=float), ebv_in.shape) * ebv_scale
        err = np.where(err >= 0, err, np.nan)  # negative or NaN error -> unknown
    if ebv_fractional_error is not None:
        err = np.where(np.isfinite(err), err, ebv_fractional_error * np.abs(ebv_used))
    err = np.where(np.isfinite(ebv_used), err, np.nan)

    out = {"ebv_used": ebv_used, "ebv_used_err": err}
    for label, r in per_true.items():  # one error source for every band: E(B-V)'s
        out[f"A_{label}"] = r * ebv_used
        out[f"A_{label}_err"] = r * err
    ext = _flags.new(n)
    no_ebv = ~np.isfinite(ebv_used)
    _flags.set_where(ext, no_ebv, _flags.Ext.NO_EBV)
    with np.errstate(invalid="ignore"):
        _flags.set_where(ext, ebv_used > high_limit, _flags.Ext.HIGH_EXTINCTION)
    if outside is not None:
        outside = np.broadcast_to(np.asarray(outside, dtype=bool), ebv_in.shape)
        _flags.set_where(ext, outside, _flags.Ext.OUTSIDE_MAP)
    out["ext_flags"] = ext
    return out


def colour_excess(coefficients, blue: str, red: str, ebv_used, ebv_scale_included: float | None = None):
    """E(blue - red) = (R_blue - R_red) E(B-V)_used, with R per true E(B-V).

    ``ebv_used`` is on the true scale (the ``ebv_used`` column of ``apply_extinction``).
    """
    if isinstance(coefficients, ExtinctionCoefficients):
        per_true = coefficients.per_true_ebv()
    elif ebv_scale_included is None:
        raise ValueError("plain coefficient dicts need ebv_scale_included")
    else:
        per_true = {k: float(v) / ebv_scale_included for k, v in coefficients.items()}
    for band in (blue, red):
        if band not in per_true:
            raise ValueError(f"colour_excess: band '{band}' has no coefficient (have {', '.join(per_true)})")
    return (per_true[blue] - per_true[red]) * np.asarray(ebv_used, dtype=float)
