"""Tully-Fisher distances: HI line width + disc photometry -> distance modulus.

Correction chain (each step switchable in ``TFSettings``, each intermediate returned):

1. inclination of an oblate disc of intrinsic axis ratio q0 (Hubble 1926 form;
   q0 = 0.2 is common practice): cos^2 i = ((b/a)^2 - q0^2) / (1 - q0^2),
   b/a <= q0 -> i = 90 deg;
2. instrumental resolution (optional; W^2 - R^2 in quadrature, common practice,
   applied in the observed frame) and redshift broadening W / (1 + z_helio);
3. turbulence (random motions): Tully & Fouque 1985, ApJS 58, 67 (form as given
   in the galdist issue; equation number not checked)
   W_R^2 = W^2 + W_t^2 [1 - 2 e^{-(W/W_c)^2}] - 2 W W_t [1 - e^{-(W/W_c)^2}];
   W50: W_t = 9, W_c = 100 km/s (Courtois et al. 2009, AJ 138, 1938, from memory);
   W20: W_t = 38, W_c = 120 km/s (Tully & Fouque 1985, from memory);
4. deprojection W^i = W_R / sin i, predictor x = log10 W^i;
5. internal extinction A_int = gamma log10(a/b), gamma = gamma0 + gamma1 (x - 2.5)
   (Tully et al. 1998, AJ 115, 2264, from memory; gamma is floored at 0, common
   practice, so slow rotators are never brightened);
6. m_c = m - A_gal - K - A_int in the calibration's photometric system
   (AB - Vega offsets per band, e.g. Blanton & Roweis 2007, AJ 133, 734, Table 1).

Calibration forms (YAML data, ``galdist.calibration``):

* ``luminosity``: M = sum a_k (x - pivot)^k [+ c (x - break)^2 for x > break];
* ``inverse``: x - pivot = a_0 + a_1 (M - magnitude_pivot), solved exactly for M
  (degree 1 only);
* ``baryonic``: log10 M_b = sum a_k (log V - pivot)^k, V = f W^i (f = 1/2 by
  default), M_b = Upsilon L + 1.33 M_HI with M_HI = 2.356e5 d_L^2 S_21 / (1 + z)
  (Meyer et al. 2017, PASA 34, 52, Eq. 48, from memory; z the observed redshift). Both
  mass terms scale as d^2, so d = sqrt(M_b,pred / beta) exactly, beta = M_b / d^2.

Errors, kept apart (``galdist.distance.finish``): the random error ``tf_mu_err``,
first-order analytic propagation of magnitude, width, axis ratio (through i, W^i
and A_int), A_gal, K, HI flux, mass-to-light ratio and the intrinsic scatter; the
systematic error ``tf_mu_err_sys`` of the calibration coefficients (with
covariance) and zero point, common to every galaxy; and an independent seeded Monte
Carlo of the random part (``tf_mu_err_mc``) that redraws the same inputs and
re-runs the same vectorised chain (``galdist.uncertainty.monte_carlo``).
Optional homogeneous Malmquist correction of the distance, d exp(3.5 Delta^2)
(Lynden-Bell et al. 1988, ApJ 326, 19, from memory); ``tf_mu`` itself is never
Malmquist-corrected.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from galdist import distance, flags, photometry, uncertainty
from galdist.calibration import Calibration
from galdist.flags import Method, Quality
from galdist.settings import method_settings

LN10 = np.log(10.0)

#: Turbulence constants (W_t, W_c) in km/s by width definition.
#: w50: Courtois et al. 2009, AJ 138, 1938 (from memory);
#: w20: Tully & Fouque 1985, ApJS 58, 67 (from memory).
TURBULENCE_CONSTANTS = {"w50": (9.0, 100.0), "w20": (38.0, 120.0)}

#: Internal-extinction gamma = gamma0 + gamma1 (log W^i - 2.5), keyed by the
#: calibration's ``band`` string (used only when TFSettings leaves gamma unset).
#: Tully et al. 1998, AJ 115, 2264 (I and K' bands, from memory; K' used for Ks).
INTERNAL_EXTINCTION_GAMMA = {"Cousins I": (0.92, 1.63), "2MASS Ks": (0.22, 0.40)}

#: HI mass M_HI / M_sun = HI_MASS_COEFFICIENT d_Mpc^2 S_21 / (Jy km/s)
#: (common practice; Roberts 1962, Haynes & Giovanelli 1984, from memory).
HI_MASS_COEFFICIENT = 2.356e5

_REQUIRED_INPUTS = ("mag", "w50", "axis_ratio", "z_helio")
_OPTIONAL_INPUTS = ("mag_err", "w50_err", "axis_ratio_err", "a_gal", "a_gal_err", "k_corr",
                    "k_corr_err", "w50_resolution", "hi_flux", "hi_flux_err",
                    "quality_flags", "ext_flags", "kcorr_flags")


# --------------------------------------------------------------------------- settings

class TFSettings(method_settings("tully_fisher", {
        "input_system": ({"enum": [None, "AB", "Vega"]}, None),
        "ab_minus_vega": ({"type": ["number", "null"]}, None)})):
    """Options of the Tully-Fisher stage: the keys of the ``tully_fisher:`` section of
    the config schema, with its defaults and rules (``galdist.settings``).

    ``None`` for ``turbulence_wt``/``turbulence_wc`` means "by width definition"
    (``TURBULENCE_CONSTANTS``); for ``gamma0``/``gamma1`` "by calibration band"
    (``INTERNAL_EXTINCTION_GAMMA``). ``mass_to_light`` and ``abs_mag_sun`` (the band's
    solar absolute magnitude, in the calibration's system) are needed only by the
    baryonic form. Derived from the bands config, not keys of the section:
    ``input_system``, the system of the magnitudes (None: already the calibration's),
    and the band's ``ab_minus_vega``.
    """

    def turbulence_constants(self) -> tuple[float, float]:
        wt, wc = TURBULENCE_CONSTANTS[self.width_definition]
        return (float(self.turbulence_wt if self.turbulence_wt is not None else wt),
                float(self.turbulence_wc if self.turbulence_wc is not None else wc))


# ------------------------------------------------------------------- step functions

def inclination(axis_ratio, q0: float = 0.2) -> np.ndarray:
    """Inclination (deg) of an oblate disc of intrinsic axis ratio ``q0``.

    cos^2 i = ((b/a)^2 - q0^2) / (1 - q0^2) (Hubble 1926, ApJ 64, 321, from memory);
    b/a <= q0 gives 90 deg; b/a outside (0, 1] or NaN gives NaN.
    """
    q = np.asarray(axis_ratio, dtype=float)
    with np.errstate(invalid="ignore"):
        cos2 = np.clip((q * q - q0 * q0) / (1.0 - q0 * q0), 0.0, 1.0)
        incl = np.degrees(np.arccos(np.sqrt(cos2)))
        return np.where((q > 0.0) & (q <= 1.0), incl, np.nan)


def redshift_broadening(w, z) -> np.ndarray:
    """Rest-frame width W / (1 + z) (cosmological/Doppler stretch of the spectrum)."""
    return np.asarray(w, dtype=float) / (1.0 + np.asarray(z, dtype=float))


def resolution_correction(w, resolution) -> np.ndarray:
    """Instrumental broadening removed in quadrature, sqrt(W^2 - R^2) (common practice).

    Apply in the observed frame (before ``redshift_broadening``). NaN resolution
    leaves W unchanged (the step is skipped for that row); W <= R gives NaN.
    """
    w = np.asarray(w, dtype=float)
    r = np.asarray(resolution, dtype=float)
    with np.errstate(invalid="ignore"):
        diff = w * w - r * r
        out = np.where(diff > 0.0, np.sqrt(np.where(diff > 0.0, diff, 1.0)), np.nan)
    return np.where(np.isnan(r), w, out)


def _turbulence_sq(w, w_t, w_c):
    e = np.exp(-(w / w_c) ** 2)
    return w * w + w_t * w_t * (1.0 - 2.0 * e) - 2.0 * w * w_t * (1.0 - e), e


def turbulence_correction(w, w_t: float, w_c: float) -> np.ndarray:
    """Width corrected for random motions (Tully & Fouque 1985, ApJS 58, 67).

    W_R^2 = W^2 + W_t^2 [1 - 2 e^{-(W/W_c)^2}] - 2 W W_t [1 - e^{-(W/W_c)^2}]:
    linear subtraction W - W_t for W >> W_c, quadrature sqrt(W^2 - W_t^2) for
    W << W_c. W_R = 0 at W = W_t; W <= W_t gives NaN.
    """
    w = np.asarray(w, dtype=float)
    sq, _ = _turbulence_sq(w, w_t, w_c)
    with np.errstate(invalid="ignore"):
        return np.where(sq > 0.0, np.sqrt(np.where(sq > 0.0, sq, 1.0)), np.nan)


def _turbulence_derivative(w, w_r, w_t, w_c):
    """dW_R / dW of ``turbulence_correction``."""
    _, e = _turbulence_sq(w, w_t, w_c)
    de = -2.0 * w / (w_c * w_c) * e
    dsq = 2.0 * w - 2.0 * w_t * (1.0 - e) + (2.0 * w * w_t - 2.0 * w_t * w_t) * de
    return dsq / (2.0 * w_r)


def deproject(w_r, incl_deg) -> np.ndarray:
    """Edge-on width W^i = W_R / sin i; NaN for i = 0 (face-on) or NaN inputs."""
    s = np.sin(np.radians(np.asarray(incl_deg, dtype=float)))
    w_r = np.asarray(w_r, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(s > 0.0, w_r / np.where(s > 0.0, s, 1.0), np.nan)


def internal_extinction(axis_ratio, logw_i, gamma0: float, gamma1: float) -> np.ndarray:
    """A_int = gamma log10(a/b), gamma = max(gamma0 + gamma1 (log W^i - 2.5), 0).

    Form and I-band values gamma = 0.92 + 1.63 (log W^i - 2.5): Tully et al. 1998,
    AJ 115, 2264 (from memory). The floor at 0 is common practice.
    """
    q = np.asarray(axis_ratio, dtype=float)
    gamma = np.maximum(gamma0 + gamma1 * (np.asarray(logw_i, dtype=float) - 2.5), 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        return gamma * -np.log10(q)


# --------------------------------------------------------------------- calibration

def _check_calibration(cal: Calibration, s: TFSettings) -> None:
    where = f"calibration {cal.name} ({cal.path or 'in memory'})"
    if cal.method != "tully_fisher":
        raise ValueError(f"{where}: method is {cal.method!r}, expected 'tully_fisher'")
    if cal.form not in ("luminosity", "inverse", "baryonic"):
        raise ValueError(f"{where}: form {cal.form!r} is not a Tully-Fisher form "
                         "(allowed: luminosity, inverse, baryonic)")
    want = "log_v" if cal.form == "baryonic" else "log_w_i"
    if cal.predictor != want:
        raise ValueError(f"{where}: predictor {cal.predictor!r}; the {cal.form} form needs {want!r}")
    if cal.width_definition is not None and cal.width_definition != s.width_definition:
        raise ValueError(f"{where}: expects width_definition {cal.width_definition!r} but "
                         f"tully_fisher.width_definition is {s.width_definition!r}")
    if cal.form == "inverse":
        if cal.coefficients.size != 2:
            raise ValueError(f"{where}: the inverse form supports polynomial degree 1 only "
                             f"(2 coefficients), got {cal.coefficients.size}")
        if cal.magnitude_pivot is None:
            raise ValueError(f"{where}: the inverse form needs 'magnitude_pivot'")
        if cal.coefficients[1] == 0:
            raise ValueError(f"{where}: inverse slope coefficients[1] must be non-zero")
    if cal.quadratic is not None and cal.form != "luminosity":
        raise ValueError(f"{where}: 'quadratic' is supported for the luminosity form only")
    if cal.form == "baryonic":
        missing = [k for k in ("mass_to_light", "abs_mag_sun") if getattr(s, k) is None]
        if missing:
            raise ValueError(f"tully_fisher.{' and tully_fisher.'.join(missing)} must be set for the "
                             f"baryonic calibration {cal.name}")


def check_setup(cal: Calibration, s: TFSettings) -> None:
    """Raise ValueError now for anything the distance step would refuse later (the
    calibration's form and predictor, baryonic inputs, internal-extinction gamma)."""
    _check_calibration(cal, s)
    _gamma(cal, s)


def _gamma(cal: Calibration, s: TFSettings) -> tuple[float, float]:
    if not s.apply_internal_extinction:
        return 0.0, 0.0
    if s.gamma0 is not None and s.gamma1 is not None:
        return float(s.gamma0), float(s.gamma1)
    if s.gamma0 is not None or s.gamma1 is not None:
        raise ValueError("tully_fisher.gamma0 and tully_fisher.gamma1 must be set together")
    if cal.form != "baryonic" and cal.band in INTERNAL_EXTINCTION_GAMMA:
        return INTERNAL_EXTINCTION_GAMMA[cal.band]
    raise ValueError(f"tully_fisher.gamma0/gamma1 must be set: no default internal-extinction gamma for "
                     f"calibration {cal.name} (band {cal.band!r}, form {cal.form}); defaults exist for "
                     f"{sorted(INTERNAL_EXTINCTION_GAMMA)} in the luminosity/inverse forms")


# ------------------------------------------------------------------------ the chain

def _chain(cal, s, g0, g1, *, mag, a_gal, k_corr, w50, axis_ratio, z, z_obs, resolution, hi_flux,
           mass_to_light, scatter=0.0):
    """Every intermediate of the chain; vectorised, also used by the Monte Carlo. ``z``:
    the redshift the width is de-stretched with (0 when that step is off); ``z_obs``: the
    observed redshift of the HI mass's 1/(1 + z) (baryonic form)."""
    w = resolution_correction(w50, resolution) if resolution is not None else w50
    w_z = redshift_broadening(w, z) if s.apply_redshift_broadening else w
    wt, wc = s.turbulence_constants()
    w_r = turbulence_correction(w_z, wt, wc) if s.apply_turbulence else w_z
    incl = inclination(axis_ratio, s.q0)
    with np.errstate(divide="ignore", invalid="ignore"):
        logw_i = np.log10(deproject(w_r, incl))
    a_int = internal_extinction(axis_ratio, logw_i, g0, g1)
    m_c = photometry.convert(mag, s.input_system, cal.system, s.ab_minus_vega) - a_gal - k_corr - a_int
    out = {"incl": incl, "w_z": w_z, "w_r": w_r, "logw_i": logw_i, "a_int": a_int, "m_c": m_c}
    if cal.form == "baryonic":
        log_v = logw_i + np.log10(s.velocity_width_factor)
        log_mb = cal.relation(log_v) + scatter
        # beta = M_b / d^2: stellar Upsilon L / d^2 plus gas 1.33 M_HI / d^2 (d in Mpc,
        # mu = 5 log10 d + 25, so L / d^2 = 10^(-0.4 (m_c - M_sun - 25)) L_sun).
        ell = 10.0 ** (-0.4 * (m_c - s.abs_mag_sun - 25.0))
        # M_HI = 2.356e5 d_L^2 S / (1 + z) (Meyer et al. 2017, PASA 34, 52, Eq. 48; from memory)
        gas_per_flux = s.hi_mass_factor * s.hi_mass_coefficient / (1.0 + np.asarray(z_obs, dtype=float))
        gas = gas_per_flux * hi_flux
        beta = mass_to_light * ell + gas
        with np.errstate(divide="ignore", invalid="ignore"):
            mu = 2.5 * (log_mb - np.log10(beta)) + 25.0
        out.update(log_v=log_v, log_mb=log_mb, ell=ell, gas=gas, gas_per_flux=gas_per_flux, beta=beta,
                   mu=mu, abs_mag=m_c - mu)
    else:
        abs_mag = cal.relation(logw_i) + scatter
        out.update(abs_mag=abs_mag, mu=m_c - abs_mag)
    return out


def _analytic_mu_err(cal, s, g0, g1, c, a, have_res):
    """First-order (random, systematic) sigma_mu; ``c`` = central chain, ``a`` = arrays.
    Random: the measurements and the intrinsic scatter; systematic: the calibration's
    coefficients (covariance) and zero point."""
    q = a["axis_ratio"]
    x = c["logw_i"]
    # d x / d W50 through resolution, (1+z) and turbulence
    dw = np.ones_like(x)
    w_res = a["w50"]
    if have_res:
        w_res = resolution_correction(a["w50"], a["resolution"])
        dw = np.where(np.isnan(a["resolution"]), 1.0, a["w50"] / w_res)
    if s.apply_redshift_broadening:
        dw = dw / (1.0 + a["z"])
    if s.apply_turbulence:
        wt, wc = s.turbulence_constants()
        dw = dw * _turbulence_derivative(c["w_z"], c["w_r"], wt, wc)
    dx_dw = dw / (c["w_r"] * LN10)
    # d x / d q through sin i (zero where b/a <= q0: i pinned at 90 deg)
    sin2 = np.sin(np.radians(c["incl"])) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        dx_dq = np.where(q > s.q0, q / (LN10 * (1.0 - s.q0 ** 2) * sin2), 0.0)
        gamma = g0 + g1 * (x - 2.5)
        live = gamma > 0.0
        dA_dx = np.where(live, -g1 * np.log10(q), 0.0)
        dA_dq = -np.maximum(gamma, 0.0) / (q * LN10)
    if cal.form == "baryonic":
        f_star = a["mass_to_light"] * c["ell"] / c["beta"]
        dmu_dmc = f_star
        dmu_dx = 2.5 * cal.polynomial_slope(c["log_v"]) - f_star * dA_dx
        dmu_dq = -f_star * dA_dq + dmu_dx * dx_dq
        gas_term = -2.5 * c["gas_per_flux"] / (c["beta"] * LN10) * a["hi_flux_err"]
        ml_term = -2.5 * c["ell"] / (c["beta"] * LN10) * s.mass_to_light_err
        cal_var = 6.25 * cal.relation_variance(c["log_v"])
        scatter = 2.5 * cal.scatter
    else:
        dmu_dmc = np.ones_like(x)
        dmu_dx = -(dA_dx + cal.relation_slope(x))
        dmu_dq = -dA_dq + dmu_dx * dx_dq
        gas_term = ml_term = 0.0
        cal_var = cal.relation_variance(x)
        scatter = cal.scatter
    random = uncertainty.quadrature(
        dmu_dmc * a["mag_err"], dmu_dmc * a["a_gal_err"], dmu_dmc * a["k_corr_err"],
        dmu_dx * dx_dw * a["w50_err"], dmu_dq * a["axis_ratio_err"], gas_term, ml_term,
        np.full_like(x, scatter))
    return random, uncertainty.quadrature(np.sqrt(cal_var), np.full_like(x, cal.zero_point_error))


def _monte_carlo_mu_err(cal, s, g0, g1, a, have_res, have_hi):
    """Standard deviation of mu over seeded Gaussian redraws of every measured input and
    the intrinsic scatter: the Monte Carlo of the random error (the calibration's
    coefficients are fixed)."""
    values = {"mag": a["mag"], "a_gal": a["a_gal"], "k_corr": a["k_corr"], "w50": a["w50"],
              "axis_ratio": a["axis_ratio"]}
    sigmas = {"mag": a["mag_err"], "a_gal": a["a_gal_err"], "k_corr": a["k_corr_err"],
              "w50": a["w50_err"], "axis_ratio": a["axis_ratio_err"]}
    if have_hi:
        values["hi_flux"], sigmas["hi_flux"] = a["hi_flux"], a["hi_flux_err"]
    if cal.form == "baryonic":
        values["mass_to_light"], sigmas["mass_to_light"] = float(s.mass_to_light), s.mass_to_light_err
    values["scatter"], sigmas["scatter"] = 0.0, cal.scatter
    fixed_res = a["resolution"] if have_res else None

    def mu_of(**kw):
        return _chain(cal, s, g0, g1, mag=kw["mag"], a_gal=kw["a_gal"], k_corr=kw["k_corr"],
                      w50=kw["w50"], axis_ratio=kw["axis_ratio"], z=a["z"], z_obs=a["z_obs"], resolution=fixed_res,
                      hi_flux=kw.get("hi_flux", 0.0), mass_to_light=kw.get("mass_to_light", 1.0),
                      scatter=kw["scatter"])["mu"]

    _, std = uncertainty.monte_carlo(mu_of, values, sigmas, n_draws=s.mc_draws, seed=s.mc_seed)
    return std


# ------------------------------------------------------------------------- main API

def tully_fisher_distance(inputs: Mapping[str, np.ndarray], calibration: Calibration,
                          settings: TFSettings | None = None) -> dict[str, np.ndarray]:
    """Tully-Fisher distance columns for one shard.

    ``inputs`` (arrays of one length n): required ``mag`` (the calibration's band,
    system ``settings.input_system``), ``w50`` (km/s, observed), ``axis_ratio`` (b/a),
    ``z_helio``; ``a_gal`` and ``k_corr`` (required unless the step is switched
    off); optional ``mag_err``, ``w50_err``, ``axis_ratio_err``, ``a_gal_err``,
    ``k_corr_err``, ``w50_resolution`` (km/s), ``hi_flux`` (Jy km/s, baryonic gas
    term; absent means stellar mass only), ``hi_flux_err``, ``quality_flags``,
    ``ext_flags``, ``kcorr_flags``. Returns the columns of its registry entry (``galdist.methods``) as arrays of length n.
    Row-level problems give NaN plus a ``tf_flags`` bit; structural ones raise
    ValueError.
    """
    s = settings or TFSettings()
    _check_calibration(calibration, s)
    g0, g1 = _gamma(calibration, s)
    unknown = sorted(set(inputs) - set(_REQUIRED_INPUTS) - set(_OPTIONAL_INPUTS))
    if unknown:
        raise ValueError(f"tully_fisher_distance: unknown input(s) {unknown}; allowed: "
                         f"{list(_REQUIRED_INPUTS + _OPTIONAL_INPUTS)}")
    need = list(_REQUIRED_INPUTS)
    need += ["a_gal"] if s.apply_galactic_extinction else []
    need += ["k_corr"] if s.apply_kcorrection else []
    missing = [k for k in need if k not in inputs]
    if missing:
        raise ValueError(f"tully_fisher_distance: input(s) {missing} are required with these settings")
    n = np.asarray(inputs["mag"]).shape[0]
    for key, val in inputs.items():
        if np.ndim(val) != 1 or np.shape(val)[0] != n:
            raise ValueError(f"tully_fisher_distance: input {key!r} must be 1-d of length {n}")

    def col(key, default=np.nan):
        return np.asarray(inputs[key], dtype=float) if key in inputs else np.full(n, default)

    have_res = s.apply_resolution and "w50_resolution" in inputs
    have_hi = calibration.form == "baryonic" and "hi_flux" in inputs
    a = {"mag": col("mag"), "w50": col("w50"), "axis_ratio": col("axis_ratio"), "z": col("z_helio"),
         "mag_err": col("mag_err"), "w50_err": col("w50_err"), "axis_ratio_err": col("axis_ratio_err"),
         "a_gal": col("a_gal") if s.apply_galactic_extinction else np.zeros(n),
         "a_gal_err": col("a_gal_err") if s.apply_galactic_extinction else np.zeros(n),
         "k_corr": col("k_corr") if s.apply_kcorrection else np.zeros(n),
         "k_corr_err": col("k_corr_err") if s.apply_kcorrection else np.zeros(n),
         "resolution": col("w50_resolution") if have_res else None,
         "hi_flux": col("hi_flux") if have_hi else np.zeros(n),
         "hi_flux_err": col("hi_flux_err") if have_hi else np.zeros(n),
         "mass_to_light": float(s.mass_to_light or 1.0)}
    z_used = a["z"] if s.apply_redshift_broadening else np.zeros(n)
    a["z_obs"] = a["z"] if have_hi else np.zeros(n)

    c = _chain(calibration, s, g0, g1, mag=a["mag"], a_gal=a["a_gal"], k_corr=a["k_corr"],
               w50=a["w50"], axis_ratio=a["axis_ratio"], z=z_used, z_obs=a["z_obs"], resolution=a["resolution"],
               hi_flux=a["hi_flux"], mass_to_light=a["mass_to_light"])

    # ---- flags
    f = flags.new(n)
    quality = np.asarray(inputs.get("quality_flags", np.zeros(n)), dtype=flags.FLAG_DTYPE)
    ext = np.asarray(inputs.get("ext_flags", np.zeros(n)), dtype=flags.FLAG_DTYPE)
    kcf = np.asarray(inputs.get("kcorr_flags", np.zeros(n)), dtype=flags.FLAG_DTYPE)
    needed = [a["mag"], a["w50"], a["axis_ratio"], a["a_gal"], a["k_corr"], a["hi_flux"]]
    if s.apply_redshift_broadening or have_hi:
        needed.append(a["z"])
    missing_row = np.zeros(n, dtype=bool)
    for v in needed:
        missing_row |= ~np.isfinite(v)
    # Quality bits that name one TF input (MAG_INVALID does not say which band, so
    # the magnitude is judged by its value, which ingest set to NaN if invalid).
    q_bits = Quality.WIDTH_INVALID | Quality.AXIS_RATIO_INVALID
    if s.apply_redshift_broadening or have_hi:
        q_bits |= Quality.REDSHIFT_INVALID
    missing_row |= flags.has(quality, q_bits)
    flags.set_where(f, missing_row, Method.MISSING_INPUT)
    flags.set_where(f, c["incl"] < s.min_inclination_deg, Method.LOW_INCLINATION)
    predictor = c["log_v"] if calibration.form == "baryonic" else c["logw_i"]
    out_of_range = ~missing_row & ~calibration.in_range(predictor)  # NaN predictor counts
    flags.set_where(f, out_of_range, Method.OUT_OF_RANGE)
    if s.allow_extrapolation:
        flags.set_where(f, out_of_range & np.isfinite(predictor), Method.EXTRAPOLATED)
    f |= flags.inherited(ext, kcf, extinction=s.apply_galactic_extinction, kcorrection=s.apply_kcorrection)

    # ---- values, errors, distances
    blank = missing_row | (out_of_range & (not s.allow_extrapolation))
    mu = np.where(blank, np.nan, c["mu"])
    abs_mag = np.where(blank, np.nan, c["abs_mag"])
    mu_err, mu_err_sys = _analytic_mu_err(calibration, s, g0, g1, c, {**a, "z": z_used}, have_res)
    mu_err = np.where(np.isfinite(mu), mu_err, np.nan)
    if s.mc_draws:
        mc_inputs = {**a, "z": z_used}
        mu_err_mc = np.where(np.isfinite(mu), _monte_carlo_mu_err(calibration, s, g0, g1, mc_inputs,
                                                                  have_res, have_hi), np.nan)
    else:
        mu_err_mc = np.full(n, np.nan)
    return {
        "tf_inclination_deg": c["incl"], "tf_w_z": c["w_z"], "tf_w_r": c["w_r"],
        "tf_logw_i": c["logw_i"], "tf_a_int": c["a_int"], "tf_mag_corr": c["m_c"], "tf_abs_mag": abs_mag,
    } | distance.finish("tf", mu, mu_err, mu_err_sys, mu_err_mc, f, s.malmquist, s.malmquist_kind)
