"""Surface-brightness-fluctuation (SBF) distances from a colour calibration.

For each galaxy (all arrays, vectorised over rows):

    m0 = m + off_m - A_m - K_m                      fluctuation magnitude, corrected
    c0 = c + off_c - E(c) - (K_blue - K_red)        colour, corrected
    E(c) = A_blue - A_red = (R_blue - R_red) E(B-V)
    M  = sum_k a_k (c0 - pivot)^k                   calibration (``colour_polynomial``)
    mu = m0 - M

``off_m``/``off_c`` put the catalog's photometry on the calibration's system
(m_AB = m_Vega + (AB - Vega); ``galdist.photometry``). Extinction and K-terms are
the same in AB and Vega (differences of magnitudes in one band). A_m, A_blue and
A_red are the extinction stage's A_<band> columns, R_<band> E(B-V) each.

Analytic error (first order), E(B-V) entering m0 and c0 as ONE error source: the
extinction stage's errors A_<band>_err = R_<band> sigma_E are fully correlated, so

    sigma_mu^2     = sigma_m^2 + (s sigma_c)^2 + (-sigma_A,m + s (sigma_A,blue - sigma_A,red))^2
                     + (K terms)^2 + sigma_int^2              (random, sbf_mu_err)
    sigma_mu,sys^2 = var_coeff(c0) + sigma_zp^2               (systematic, sbf_mu_err_sys)

s = dM/dc at c0 (the third term is (dmu/dE sigma_E)^2 with dmu/dE = -R_m + s (R_blue -
R_red)); var_coeff is the calibration polynomial's variance from its coefficient
covariance and sigma_zp the calibration's separate ``zero_point_error`` (each
calibration file says which of the two holds its zero-point error; never both): both
are common to every galaxy, so they are kept apart from the random part.
The seeded Monte Carlo of the random part redraws m, c, the extinction (one standard
normal per galaxy and draw, scaling all three A errors, i.e. E(B-V) redrawn once for
m0 and c0), the K terms and the scatter, and re-runs the same functions that compute
the value.

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


import numpy as np

from . import flags as F
from .calibration import Calibration
from .distance import finish
from .settings import method_settings
from .uncertainty import monte_carlo, quadrature


_EXTINCTION_ERR = "error of {} (mag); the three A errors are one source, E(B-V)'s; absent, NaN or negative = 0"
# Inputs of ``sbf_distance``: name -> (required, meaning).
INPUTS = {
    "sbf_mag": (True, "observed fluctuation magnitude in the calibration's band (mag)"),
    "sbf_mag_err": (False, "error of sbf_mag (mag); absent = 0; NaN/negative = omitted and flagged"),
    "sbf_color": (True, "observed colour blue - red of the calibration (mag)"),
    "sbf_color_err": (False, "error of sbf_color (mag); absent = 0; NaN/negative = omitted and flagged"),
    "A_mag": (True, "Galactic extinction of the SBF band (mag), from the extinction stage"),
    "A_blue": (True, "Galactic extinction of the colour's blue band (mag)"),
    "A_red": (True, "Galactic extinction of the colour's red band (mag)"),
    "A_mag_err": (False, _EXTINCTION_ERR.format("A_mag")),
    "A_blue_err": (False, _EXTINCTION_ERR.format("A_blue")),
    "A_red_err": (False, _EXTINCTION_ERR.format("A_red")),
    "K_mag": (False, "K-correction of the SBF band (needed if apply_kcorrection)"),
    "K_blue": (False, "K-correction of the colour's blue band (needed if apply_kcorrection)"),
    "K_red": (False, "K-correction of the colour's red band (needed if apply_kcorrection)"),
    "K_mag_err": (False, "error of K_mag (mag; the K stage's template spread); absent = 0"),
    "K_blue_err": (False, "error of K_blue (mag); absent = 0"),
    "K_red_err": (False, "error of K_red (mag); absent = 0"),
    "quality_flags": (False, "ingest flags (Quality); SBF_* bits -> MISSING_INPUT"),
    "ext_flags": (False, "extinction flags (Ext) -> HIGH_EXTINCTION (galdist.flags.inherited)"),
    "kcorr_flags": (False, "K-correction flags (KCorr) -> KCORR_PROBLEM (galdist.flags.inherited)"),
}
_FLAG_INPUTS = ("quality_flags", "ext_flags", "kcorr_flags")
_K_INPUTS = ("K_mag", "K_blue", "K_red")
_A_INPUTS = ("A_mag", "A_blue", "A_red")


class SBFSettings(method_settings("sbf", {"mag_offset": ({"type": "number"}, 0.0),
                                          "color_offset": ({"type": "number"}, 0.0)})):
    """Settings of the SBF stage: the keys of the ``sbf:`` section of the config schema,
    with its defaults and rules (``galdist.settings``), e.g.

    allow_extrapolation: compute distances outside the calibration's colour range
        (flagged EXTRAPOLATED); otherwise those rows get NaN (flagged OUT_OF_RANGE).
    apply_kcorrection: subtract the K stage's K of the SBF band and of the colour.
    mc_draws, mc_seed: Monte Carlo for sbf_mu_err_mc (0 draws = column NaN).
    malmquist, malmquist_kind: the homogeneous Malmquist factor on distances.

    Derived from the bands config, not keys of the section: ``mag_offset`` and
    ``color_offset``, the photometric-system offsets (``galdist.photometry``).
    """


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


def check_setup(cal: Calibration, settings: SBFSettings) -> None:
    """Raise ValueError now for anything ``sbf_distance`` would refuse later."""
    check_calibration(cal)


def corrected_magnitudes(sbf_mag, sbf_color, *, A_mag, A_blue, A_red, K_mag=0.0, K_blue=0.0, K_red=0.0,
                         mag_offset=0.0, color_offset=0.0):
    """(m0, c0): fluctuation magnitude and colour corrected for system, extinction, K.

    m0 = m + mag_offset - A_mag - K_mag;
    c0 = c + color_offset - (A_blue - A_red) - (K_blue - K_red).
    """
    mag_0 = np.asarray(sbf_mag, dtype=float) + mag_offset - A_mag - K_mag
    color_0 = np.asarray(sbf_color, dtype=float) + color_offset - (A_blue - A_red) - (K_blue - K_red)
    return mag_0, color_0


def _modulus_draw(sbf_mag, sbf_color, extinction_draw, scatter_draw, K_mag, K_blue, K_red, *, cal, corr, a_err):
    """mu of one Monte Carlo draw: the same corrections and calibration as the value;
    ``extinction_draw`` (one standard normal per row) shifts all three A by their errors;
    the three K are drawn each within its own error."""
    shifted = {k: corr[k] + extinction_draw * a_err[k] for k in _A_INPUTS}
    shifted |= {"K_mag": K_mag, "K_blue": K_blue, "K_red": K_red}
    mag_0, color_0 = corrected_magnitudes(sbf_mag, sbf_color, **(corr | shifted))
    return mag_0 - cal.relation(color_0) + scatter_draw


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
    Returns the columns of its registry entry (``galdist.methods``). Rows with a missing input, or a
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
    n = np.shape(np.asarray(inputs["sbf_mag"]))[0] if np.ndim(inputs["sbf_mag"]) else 1
    col = {k: _as_rows(k, inputs[k], n) for k in inputs}
    zeros = np.zeros(n)
    m, c = col["sbf_mag"], col["sbf_color"]
    m_err, m_err_bad = _valid_err(col.get("sbf_mag_err", zeros))
    c_err, c_err_bad = _valid_err(col.get("sbf_color_err", zeros))
    a_err = {k: _valid_err(col.get(f"{k}_err", zeros))[0] for k in _A_INPUTS}
    kcorr_on = settings.apply_kcorrection
    K = {k: (col[k] if kcorr_on else zeros) for k in _K_INPUTS}
    k_err = {k: (_valid_err(col.get(f"{k}_err", zeros))[0] if kcorr_on else zeros) for k in _K_INPUTS}
    corr = {k: col[k] for k in _A_INPUTS} | K | dict(mag_offset=float(settings.mag_offset),
                                                     color_offset=float(settings.color_offset))

    # --- flags -------------------------------------------------------------------
    qf = col.get("quality_flags", F.new(n))
    missing_row = (~np.isfinite(m) | ~np.isfinite(c) | m_err_bad | c_err_bad
                   | F.has(qf, F.Quality.SBF_MAG_INVALID | F.Quality.SBF_COLOR_INVALID
                           | F.Quality.SBF_ERR_INVALID))
    for k in _A_INPUTS + (_K_INPUTS if kcorr_on else ()):
        missing_row |= ~np.isfinite(corr[k])
    out_flags = F.inherited(col.get("ext_flags", F.new(n)), col.get("kcorr_flags", F.new(n)),
                            kcorrection=kcorr_on)
    F.set_where(out_flags, missing_row, F.Method.MISSING_INPUT)

    # --- value ----------------------------------------------------------------------
    mag_0, color_0 = corrected_magnitudes(m, c, **corr)
    out_of_range = np.isfinite(color_0) & ~calibration.in_range(color_0)
    F.set_where(out_flags, out_of_range, F.Method.OUT_OF_RANGE)
    if settings.allow_extrapolation:
        F.set_where(out_flags, out_of_range, F.Method.EXTRAPOLATED)
        refuse = np.zeros(n, dtype=bool)
    else:
        refuse = out_of_range
    abs_mag = np.where(refuse, np.nan, calibration.relation(color_0))
    mu = mag_0 - abs_mag

    # --- analytic error ------------------------------------------------------------
    slope = calibration.relation_slope(color_0)
    extinction_term = -a_err["A_mag"] + slope * (a_err["A_blue"] - a_err["A_red"])  # dmu/dE sigma_E
    # K enters like A: mu = m0 - M(c0), m0 = m - K_mag, c0 = c - (K_blue - K_red)
    k_terms = (k_err["K_mag"], slope * k_err["K_blue"], slope * k_err["K_red"])
    mu_err = quadrature(m_err, slope * c_err, extinction_term, *k_terms, calibration.scatter)
    mu_err_sys = quadrature(np.sqrt(np.maximum(calibration.relation_variance(color_0), 0.0)),
                            calibration.zero_point_error)
    good = np.isfinite(mu)
    mu_err = np.where(good, mu_err, np.nan)

    # --- Monte Carlo -----------------------------------------------------------------
    if settings.mc_draws > 0:
        with_error = (a_err["A_mag"] > 0) | (a_err["A_blue"] > 0) | (a_err["A_red"] > 0)
        values = {"sbf_mag": m, "sbf_color": c, "extinction_draw": zeros, "scatter_draw": zeros} | K
        sigmas = {"sbf_mag": m_err, "sbf_color": c_err, "extinction_draw": np.where(with_error, 1.0, 0.0),
                  "scatter_draw": calibration.scatter} | k_err
        _, mu_err_mc = monte_carlo(_modulus_draw, values, sigmas, n_draws=int(settings.mc_draws),
                                   seed=int(settings.mc_seed),
                                   fixed={"cal": calibration, "corr": corr, "a_err": a_err})
        mu_err_mc = np.where(good, mu_err_mc, np.nan)
    else:
        mu_err_mc = np.full(n, np.nan)

    return {"sbf_color_0": color_0, "sbf_mag_0": mag_0, "sbf_abs_mag": abs_mag} | finish(
        "sbf", mu, mu_err, mu_err_sys, mu_err_mc, out_flags, settings.malmquist, settings.malmquist_kind)
