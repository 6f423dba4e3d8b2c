"""Surface-brightness-fluctuation (SBF) distances from a colour calibration.

For each galaxy (all arrays, vectorised over rows):

    m0 = m + off_m - A_m - K_m                      fluctuation magnitude, corrected
    c0 = c + off_c - E(c) - (K_blue - K_red)        colour, corrected
    E(c) = (R_blue - R_red) E(B-V),   A_m = R_m E(B-V)
    M  = sum_k a_k (c0 - pivot)^k                   calibration (``colour_polynomial``)
    mu = m0 - M

``off_m``/``off_c`` put the catalog's photometry on the calibration's system
(m_AB = m_Vega + (AB - Vega); see ``system_offset``). Extinction and K-terms are
the same in AB and Vega (differences of magnitudes in one band).

Analytic error (first order), E(B-V) entering m0 and c0 as ONE error source:

    dmu/dE = -R_m + s (R_blue - R_red),   s = dM/dc at c0
    sigma_mu^2 = sigma_m^2 + (s sigma_c)^2 + (dmu/dE sigma_E)^2
                 + sigma_int^2 + var_coeff(c0) + sigma_zp^2

where var_coeff is the calibration polynomial's variance from its coefficient
covariance and sigma_zp the calibration's separate ``zero_point_error`` (each
calibration file says which of the two holds its zero-point error; never both).
The seeded Monte Carlo redraws m, c, E(B-V) (once per draw, used in m0 and c0),
the coefficients (full covariance) and the scatter, and re-runs the same
functions that compute the value.

Calibrations shipped in ``config/calibrations/``: Tonry et al. 1997 (ApJ 475,
399) Cousins I vs (V-I)_0; Blakeslee et al. 2009 (ApJ 694, 556) ACS z850 vs
(g475-z850)_0, cubic; Jensen et al. 2015 (ApJ 808, 91) WFC3/IR F110W.
Optional homogeneous Malmquist correction of the distance (Lynden-Bell et al.
1988, ApJ 326, 19; ``galdist.distance.malmquist_factor``).

K-term: at SBF distances (z < ~0.03) the K-correction is a few hundredths of a
magnitude at most. The library uses the K stage's broadband K of the SBF band
(template matched on the broadband colour) for the fluctuation magnitude; the
fluctuation spectrum is redder than the integrated light, so this is an
approximation, small against the other terms at these redshifts.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import flags as F
from .calibration import Calibration
from .distance import malmquist_factor, mpc_err_from_mu, mpc_from_mu
from .uncertainty import monte_carlo, quadrature

SYSTEMS = ("AB", "Vega")

OUTPUT_COLUMNS = ("sbf_color_0", "sbf_mag_0", "sbf_abs_mag", "sbf_mu", "sbf_mu_err",
                  "sbf_mu_err_mc", "sbf_d_mpc", "sbf_d_err_mpc", "sbf_malmquist_applied",
                  "sbf_flags")

# Inputs of ``sbf_distance``: name -> (required, meaning).
INPUTS = {
    "sbf_mag": (True, "observed fluctuation magnitude in the calibration's band (mag)"),
    "sbf_mag_err": (False, "error of sbf_mag (mag); absent = 0; NaN/negative = omitted and flagged"),
    "sbf_color": (True, "observed colour blue - red of the calibration (mag)"),
    "sbf_color_err": (False, "error of sbf_color (mag); absent = 0; NaN/negative = omitted and flagged"),
    "ebv_used": (True, "E(B-V) from the extinction stage (mag)"),
    "ebv_used_err": (False, "error of ebv_used (mag); absent, NaN or negative = 0 (not flagged)"),
    "R_mag": (True, "A/E(B-V) of the SBF band"),
    "R_blue": (True, "A/E(B-V) of the colour's blue band"),
    "R_red": (True, "A/E(B-V) of the colour's red band"),
    "K_mag": (False, "K-correction of the SBF band (needed if apply_kcorrection)"),
    "K_blue": (False, "K-correction of the colour's blue band (needed if apply_kcorrection)"),
    "K_red": (False, "K-correction of the colour's red band (needed if apply_kcorrection)"),
    "quality_flags": (False, "ingest flags (Quality); SBF_* bits -> MISSING_INPUT"),
    "ext_flags": (False, "extinction flags (Ext); NO_EBV/HIGH_EXTINCTION -> HIGH_EXTINCTION"),
    "kcorr_flags": (False, "K-correction flags (KCorr); any bit -> KCORR_PROBLEM"),
}
#: Keys of the ``sbf:`` config section that the workflow handles, not SBFSettings.
WORKFLOW_KEYS = ("calibration", "band", "color_bands", "mc_max_rows", "accept_passband_mismatch")
_FLAG_INPUTS = ("quality_flags", "ext_flags", "kcorr_flags")
_K_INPUTS = ("K_mag", "K_blue", "K_red")


def system_offset(from_system: str, to_system: str, ab_minus_vega: float) -> float:
    """Additive offset taking a magnitude in one band from ``from_system`` to ``to_system``.

    m_AB = m_Vega + (AB - Vega), so Vega -> AB adds ``ab_minus_vega`` and AB -> Vega
    subtracts it; the same system gives 0. ``ab_minus_vega`` as in the bands
    config (e.g. Blanton & Roweis 2007, AJ 133, 734, Table 1).
    """
    for key, value in (("from_system", from_system), ("to_system", to_system)):
        if value not in SYSTEMS:
            raise ValueError(f"{key} must be one of {', '.join(SYSTEMS)}, got {value!r}")
    if from_system == to_system:
        return 0.0
    if ab_minus_vega is None or not math.isfinite(float(ab_minus_vega)):
        raise ValueError("ab_minus_vega must be a finite number when the systems differ "
                         f"({from_system} -> {to_system})")
    return float(ab_minus_vega) if to_system == "AB" else -float(ab_minus_vega)


def color_system_offset(blue_system: str, blue_ab_minus_vega: float,
                        red_system: str, red_ab_minus_vega: float, to_system: str) -> float:
    """Additive offset of a colour blue - red onto ``to_system``.

    (blue - red)_to = (blue - red)_from + offset(blue) - offset(red); for a Vega
    colour going to AB that is (AB - Vega)_blue - (AB - Vega)_red.
    """
    return (system_offset(blue_system, to_system, blue_ab_minus_vega)
            - system_offset(red_system, to_system, red_ab_minus_vega))


@dataclass(frozen=True)
class SBFSettings:
    """Settings of the SBF stage (config section ``sbf:``), checked on creation.

    allow_extrapolation: compute distances outside the calibration's colour range
        (flagged EXTRAPOLATED); otherwise those rows get NaN (flagged OUT_OF_RANGE).
    apply_kcorrection: subtract the K stage's K of the SBF band and of the colour.
    mc_draws: Monte Carlo draws for sbf_mu_err_mc (0 = no Monte Carlo, column NaN).
    mc_seed: seed of the Monte Carlo.
    malmquist: multiply distances by the homogeneous Malmquist factor.
    malmquist_kind: 'mean' (exp(3.5 Delta^2)) or 'median' (exp(3 Delta^2)).
    mag_offset, color_offset: photometric-system offsets (``system_offset``,
        ``color_system_offset``); derived from the bands config, not user keys.
    """

    allow_extrapolation: bool = False
    apply_kcorrection: bool = True
    mc_draws: int = 200
    mc_seed: int = 12345
    malmquist: bool = False
    malmquist_kind: str = "mean"
    mag_offset: float = 0.0
    color_offset: float = 0.0

    CONFIG_KEYS = ("allow_extrapolation", "apply_kcorrection", "mc_draws", "mc_seed",
                   "malmquist", "malmquist_kind")

    def __post_init__(self):
        for key in ("allow_extrapolation", "apply_kcorrection", "malmquist"):
            if not isinstance(getattr(self, key), bool):
                raise ValueError(f"sbf.{key} must be true or false, got {getattr(self, key)!r}")
        for key in ("mc_draws", "mc_seed"):
            v = getattr(self, key)
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 0:
                raise ValueError(f"sbf.{key} must be an integer >= 0, got {v!r}")
        if self.malmquist_kind not in ("mean", "median"):
            raise ValueError(f"sbf.malmquist_kind must be 'mean' or 'median', got {self.malmquist_kind!r}")
        for key in ("mag_offset", "color_offset"):
            v = getattr(self, key)
            if isinstance(v, bool) or not isinstance(v, (int, float, np.floating)) or not math.isfinite(v):
                raise ValueError(f"sbf {key} must be a finite number, got {v!r}")

    @classmethod
    def from_config(cls, section: dict | None, *, mag_offset: float = 0.0,
                    color_offset: float = 0.0, ignore=()) -> "SBFSettings":
        """Settings from the ``sbf:`` config mapping.

        Keys: ``CONFIG_KEYS``; keys listed in ``ignore`` (e.g. the calibration path
        or band labels the workflow handles itself) are skipped; any other key is
        rejected by name. The system offsets come from the bands config.
        """
        section = dict(section or {})
        unknown = sorted(k for k in section if k not in cls.CONFIG_KEYS and k not in set(ignore))
        if unknown:
            raise ValueError(f"unknown config key(s) in 'sbf': {', '.join(map(repr, unknown))}; "
                             f"allowed: {', '.join(cls.CONFIG_KEYS)}")
        kwargs = {k: section[k] for k in cls.CONFIG_KEYS if k in section}
        return cls(**kwargs, mag_offset=mag_offset, color_offset=color_offset)


def check_calibration(cal: Calibration) -> None:
    """Raise ValueError unless ``cal`` is an SBF colour-polynomial calibration."""
    if cal.method != "sbf":
        raise ValueError(f"calibration {cal.name}: method must be 'sbf', got {cal.method!r}")
    if cal.form != "colour_polynomial":
        raise ValueError(f"calibration {cal.name}: form must be 'colour_polynomial' for SBF, "
                         f"got {cal.form!r}")
    if cal.quadratic:
        raise ValueError(f"calibration {cal.name}: key 'quadratic' is not used by SBF; "
                         "put higher orders in 'coefficients'")
    if not cal.color_bands:
        raise ValueError(f"calibration {cal.name}: key 'color_bands' (blue, red) is required for SBF")


def corrected_magnitudes(sbf_mag, sbf_color, ebv, *, R_mag, R_blue, R_red,
                         K_mag=0.0, K_blue=0.0, K_red=0.0, mag_offset=0.0, color_offset=0.0):
    """(m0, c0): fluctuation magnitude and colour corrected for system, extinction, K.

    m0 = m + mag_offset - R_mag E(B-V) - K_mag;
    c0 = c + color_offset - (R_blue - R_red) E(B-V) - (K_blue - K_red).
    """
    ebv = np.asarray(ebv, dtype=float)
    mag_0 = np.asarray(sbf_mag, dtype=float) + mag_offset - R_mag * ebv - K_mag
    color_0 = np.asarray(sbf_color, dtype=float) + color_offset - (R_blue - R_red) * ebv - (K_blue - K_red)
    return mag_0, color_0


def _poly(t, coeffs):
    """Horner evaluation of sum_k a_k t^k; ``coeffs`` (k,) or per row (n, k)."""
    coeffs = np.asarray(coeffs, dtype=float)
    out = np.zeros(np.shape(t)) + coeffs[..., -1]
    for k in range(coeffs.shape[-1] - 2, -1, -1):
        out = out * t + coeffs[..., k]
    return out


def absolute_magnitude(cal: Calibration, color_0, coeff_shift=None):
    """M = sum a_k (c0 - pivot)^k; ``coeff_shift`` (n, k) perturbs the coefficients per row."""
    coeffs = cal.coefficients if coeff_shift is None else cal.coefficients + coeff_shift
    return _poly(np.asarray(color_0, dtype=float) - cal.pivot, coeffs)


def _coefficient_root(cov):
    """L (k, r) with L L^T = cov, over the non-zero directions only (r may be 0)."""
    w, v = np.linalg.eigh(np.asarray(cov, dtype=float))
    keep = w > 1e-15 * max(float(np.max(np.abs(w))), 1e-300)
    return v[:, keep] * np.sqrt(w[keep])


def _modulus_draw(sbf_mag, sbf_color, ebv, scatter_draw, coeff_draw, *, cal, root, corr):
    """mu of one Monte Carlo draw: the same corrections and calibration as the value."""
    mag_0, color_0 = corrected_magnitudes(sbf_mag, sbf_color, ebv, **corr)
    shift = coeff_draw @ root.T if root.shape[1] else None
    return mag_0 - absolute_magnitude(cal, color_0, shift) + scatter_draw


def _as_rows(name, value, n):
    arr = np.asarray(value)
    if arr.ndim == 0:
        return np.full(n, arr.item(), dtype=float if name not in _FLAG_INPUTS else F.FLAG_DTYPE)
    if arr.shape != (n,):
        raise ValueError(f"sbf input '{name}' has shape {arr.shape}; expected ({n},) like 'sbf_mag' or a scalar")
    return arr.astype(F.FLAG_DTYPE if name in _FLAG_INPUTS else float, copy=False)


def _valid_err(err):
    """Error array with invalid (non-finite or negative) entries set to 0, and their mask."""
    bad = ~np.isfinite(err) | (err < 0)
    return np.where(bad, 0.0, err), bad


def sbf_distance(inputs: dict, calibration: Calibration, settings: SBFSettings | None = None) -> dict:
    """SBF distance moduli, distances and flags; one output row per input row.

    ``inputs``: dict of arrays (scalars broadcast) named as in ``INPUTS``.
    Returns the columns of ``OUTPUT_COLUMNS``. Rows with a missing input, or a
    corrected colour outside the calibration's valid range (unless
    ``settings.allow_extrapolation``), get NaN distances and a flag; no row is
    dropped. Raises ValueError for structural problems (unknown or missing keys,
    wrong shapes, a calibration that is not an SBF colour polynomial).
    """
    settings = settings or SBFSettings()
    check_calibration(calibration)
    unknown = sorted(set(inputs) - set(INPUTS))
    if unknown:
        raise ValueError(f"unknown sbf input(s) {', '.join(map(repr, unknown))}; allowed: {', '.join(INPUTS)}")
    needed = [k for k, (req, _) in INPUTS.items() if req]
    if settings.apply_kcorrection:
        needed += list(_K_INPUTS)
    missing = [k for k in needed if k not in inputs]
    if missing:
        hint = " (or set sbf.apply_kcorrection: false)" if set(missing) & set(_K_INPUTS) else ""
        raise ValueError(f"sbf input(s) missing: {', '.join(map(repr, missing))}{hint}")
    for key in ("R_mag", "R_blue", "R_red"):
        r = np.asarray(inputs[key], dtype=float)
        if r.ndim == 0 and not np.isfinite(r):
            raise ValueError(f"sbf input '{key}' (extinction coefficient) must be finite, got {r}")

    n = np.shape(np.asarray(inputs["sbf_mag"]))[0] if np.ndim(inputs["sbf_mag"]) else 1
    col = {k: _as_rows(k, inputs[k], n) for k in inputs}
    zeros = np.zeros(n)
    m, c, ebv = col["sbf_mag"], col["sbf_color"], col["ebv_used"]
    m_err, m_err_bad = _valid_err(col.get("sbf_mag_err", zeros))
    c_err, c_err_bad = _valid_err(col.get("sbf_color_err", zeros))
    e_err, _ = _valid_err(col.get("ebv_used_err", zeros))
    kcorr_on = settings.apply_kcorrection
    K = {k: (col[k] if kcorr_on else zeros) for k in _K_INPUTS}
    corr = dict(R_mag=col["R_mag"], R_blue=col["R_blue"], R_red=col["R_red"],
                K_mag=K["K_mag"], K_blue=K["K_blue"], K_red=K["K_red"],
                mag_offset=float(settings.mag_offset), color_offset=float(settings.color_offset))

    # --- flags -------------------------------------------------------------------
    out_flags = F.new(n)
    qf = col.get("quality_flags", F.new(n))
    ef = col.get("ext_flags", F.new(n))
    kf = col.get("kcorr_flags", F.new(n))
    k_bad = np.zeros(n, dtype=bool)
    if kcorr_on:
        for k in _K_INPUTS:
            k_bad |= ~np.isfinite(K[k])
    r_bad = ~(np.isfinite(col["R_mag"]) & np.isfinite(col["R_blue"]) & np.isfinite(col["R_red"]))
    missing_row = (~np.isfinite(m) | ~np.isfinite(c) | ~np.isfinite(ebv) | r_bad | k_bad
                   | m_err_bad | c_err_bad
                   | F.has(qf, F.Quality.SBF_MAG_INVALID | F.Quality.SBF_COLOR_INVALID
                           | F.Quality.SBF_ERR_INVALID))
    F.set_where(out_flags, missing_row, F.Method.MISSING_INPUT)
    F.set_where(out_flags, F.has(ef, F.Ext.NO_EBV | F.Ext.HIGH_EXTINCTION) | ~np.isfinite(ebv),
                F.Method.HIGH_EXTINCTION)
    if kcorr_on:
        F.set_where(out_flags, (kf != 0) | k_bad, F.Method.KCORR_PROBLEM)

    # --- value ----------------------------------------------------------------------
    mag_0, color_0 = corrected_magnitudes(m, c, ebv, **corr)
    out_of_range = np.isfinite(color_0) & ~calibration.in_range(color_0)
    F.set_where(out_flags, out_of_range, F.Method.OUT_OF_RANGE)
    if settings.allow_extrapolation:
        F.set_where(out_flags, out_of_range, F.Method.EXTRAPOLATED)
        refuse = np.zeros(n, dtype=bool)
    else:
        refuse = out_of_range
    abs_mag = np.where(refuse, np.nan, absolute_magnitude(calibration, color_0))
    mu = mag_0 - abs_mag

    # --- analytic error ------------------------------------------------------------
    slope = calibration.polynomial_slope(color_0)
    dmu_debv = -corr["R_mag"] + slope * (corr["R_blue"] - corr["R_red"])
    mu_err = quadrature(m_err, slope * c_err, dmu_debv * e_err, calibration.scatter,
                        np.sqrt(np.maximum(calibration.polynomial_variance(color_0), 0.0)),
                        calibration.zero_point_error)
    good = np.isfinite(mu)
    mu_err = np.where(good, mu_err, np.nan)

    # --- Monte Carlo -----------------------------------------------------------------
    if settings.mc_draws > 0:
        root = _coefficient_root(calibration.covariance)
        values = {"sbf_mag": m, "sbf_color": c, "ebv": ebv, "scatter_draw": zeros,
                  "coeff_draw": np.zeros((n, root.shape[1]))}
        sigmas = {"sbf_mag": m_err, "sbf_color": c_err, "ebv": e_err,
                  "scatter_draw": math.hypot(calibration.scatter, calibration.zero_point_error),
                  "coeff_draw": 1.0}
        _, mu_err_mc = monte_carlo(_modulus_draw, values, sigmas, n_draws=int(settings.mc_draws),
                                   seed=int(settings.mc_seed),
                                   fixed={"cal": calibration, "root": root, "corr": corr})
        mu_err_mc = np.where(good, mu_err_mc, np.nan)
    else:
        mu_err_mc = np.full(n, np.nan)

    # --- distance ---------------------------------------------------------------------
    d = mpc_from_mu(mu)
    applied = np.zeros(n, dtype=bool)
    if settings.malmquist:
        applied = good & np.isfinite(mu_err)
        d = np.where(applied, d * malmquist_factor(mu_err, settings.malmquist_kind), d)
    d_err = mpc_err_from_mu(d, mu_err)

    return {
        "sbf_color_0": color_0,
        "sbf_mag_0": mag_0,
        "sbf_abs_mag": abs_mag,
        "sbf_mu": mu,
        "sbf_mu_err": mu_err,
        "sbf_mu_err_mc": mu_err_mc,
        "sbf_d_mpc": d,
        "sbf_d_err_mpc": d_err,
        "sbf_malmquist_applied": applied,
        "sbf_flags": out_flags,
    }
