"""Fundamental-Plane (FP) distances of early-type galaxies (column prefix ``fp_``).

The plane (calibration form ``plane``, coefficients [a, b, c]):

    r = a (s - s_p) + b (i - i_p) + c
    r = log10 R_e   (physical effective radius, kpc at the calibration's H0; with
                     H0 = 100 that is h^-1 kpc),
    s = log10 sigma_0   (km/s, central velocity dispersion in the standard aperture),
    i = log10 <I_e>     (L_sun / pc^2, mean surface intensity within R_e),

s_p = the calibration's ``pivot``, i_p = ``plane.pivot_log_ie`` (0 and 0 give the
published r = a s + b i + c). Magoulas et al. 2012, MNRAS 427, 245 (6dFGS J band)
for the form and the 3-D Gaussian below.

Correction chain (each step a function below, each intermediate returned):

1. aperture: sigma_0 = sigma_ap (r_ap / (R_e / 8))^0.04, r_ap and R_e both
   angular (arcsec), so no distance enters (Jorgensen, Franx & Kjaergaard 1995,
   MNRAS 276, 1341; exponent and the R_e/8 standard aperture from the
   calibration's ``plane`` terms, defaults 0.04 and 1/8). r_ap is the radius of
   a circular aperture: half a fibre's diameter; a slit of width x and length y
   counts as r_ap = 1.025 sqrt(x y / pi) (same paper, from memory);
2. photometric system: <mu_e> + the bands config's offset onto the calibration's
   system (AB - Vega per band, as in ``galdist.sbf.system_offset``);
3. <mu_e>_0 = <mu_e> - A_band - K_band - 10 log10(1 + z_helio): Galactic
   extinction, K-correction, and the Tolman (1 + z)^4 surface-brightness dimming
   (common practice). z_helio, the observed redshift, is the z of Etherington's
   reciprocity D_L = (1 + z)^2 D_A, which is what makes the dimming exact;
   where only a total magnitude m is given, <mu_e> = m + 2.5 log10(2 pi R_e^2)
   (half the light inside the area pi R_e^2; follows from the definition);
4. i = 0.4 (M_sun + 21.572 - <mu_e>_0): 1 L_sun/pc^2 seen from 10 pc spreads
   M_sun over (206264.8 / 10)^2 arcsec^2, i.e. 21.572 = 5 log10(206264.8 / 10)
   (follows from the definitions); M_sun in the calibration's band and system is
   the calibration's ``plane.abs_mag_sun``;
5. the distance: sigma_0 and <mu_e>_0 do not depend on distance, so the plane
   predicts the physical size R_pred outright and the angular-diameter distance is
   D_A = R_pred / theta_e (no iteration). The calibration's sizes assume its H0
   (``conventions.zero_point_h0``; null = absolute sizes, no rescaling); the run's
   distances assume the run's H0 (``FPSettings.hubble_constant``), and a size
   inferred from a redshift scales as 1/H0, so r_run = r_cal - log10(H0_run /
   H0_cal). Then D_L = (1 + z_helio)^2 D_A and fp_mu = 5 log10(D_L / 10 pc);
6. eta = log10(D_A(z) / D_A), angular-diameter distances on both sides (like with
   like): D_A(z) = D_L(z_cmb) / (1 + z_cmb)^2 from the redshift stage's mu_z. It is
   also r_z - r_pred, r_z = log10(theta_e D_A(z)) the size at the redshift distance.
   fp_mu does not need mu_z; eta does.

Estimators (``FPSettings.estimator``):

* ``plane`` (default): eta = r_z - r_pred. First-order error with
  g = (1, -a, -b) on (r_z, s, i): sigma_eta^2 = g E g^T + sigma_r^2 + var_coeff +
  sigma_zp^2, E the measurement covariance of (r_z, s, i) (below), sigma_r the
  calibration's ``scatter`` (dex in r about the plane), var_coeff the plane's
  variance from the coefficient covariance at (s, i). fp_mu_err = 5 sigma_eta
  (fp_mu = const - 5 eta). Optional homogeneous Malmquist factor on the distance
  (Lynden-Bell et al. 1988, ApJ 326, 19; ``galdist.distance.malmquist_factor``).
* ``gaussian``: the galaxies of the sample are a 3-D Gaussian in (r, s, i)
  (Magoulas et al. 2012): mean (r_bar, s_bar, i_bar) on the plane, axes
  v1 = (1, -a, -b)/sqrt(1 + a^2 + b^2)              (normal to the plane),
  v2 = (b, 0, 1)/sqrt(1 + b^2),
  v3 = (-a, -(1 + b^2), a b)/sqrt((1 + b^2)(1 + a^2 + b^2)),
  widths sigma_1..3 (``plane.gaussian``), Sigma = sum_k sigma_k^2 v_k v_k^T. A
  galaxy observed at x_z = (r_z, s, i) with measurement covariance E has
      P(x_z | eta) = N(x_z; x_bar + eta e_r, Sigma + E) / f(eta),
  f(eta) the probability that a galaxy at that eta passes the sample's selection
  (``selection_log_sigma_min`` on s, ``selection_mag_limit`` on the observed total
  magnitude, i.e. 2 r_z + i >= l_n, a bivariate-normal orthant probability computed
  with Owen's T function, Owen 1956, Ann. Math. Stat. 27, 1075, from memory). With a flat prior
  in eta this is each galaxy's posterior in eta, as in Springob et al. 2014, MNRAS
  445, 2677 (from memory); fp_eta is its mean, fp_eta_post_std/mode the rest of
  the summary, and ``eta_posterior`` returns it on any grid of eta. The posterior
  carries the plane's intrinsic scatter; the coefficient and zero-point errors are
  added to fp_eta_err in quadrature as in the plane estimator. With a selection, the
  likelihood's score at the true eta averages to zero over a simulated sample (the
  normalisation is right), and its maximum (fp_eta_post_mode) is unbiased there to
  0.002 dex; the posterior mean, the average over a likelihood the selection makes
  skewed, sits about 0.007 dex low in that test (tests/test_fp.py).

Measurement covariance E of (r_z, s, i): (sigma_ap, theta_e, <mu_e> or m) with their
errors and correlations (``fp_*_corr``), A and K with theirs, carried through steps
1-4 by their Jacobian (r_z: dlog theta; s: dlog sigma - alpha dlog theta; i: -0.4
(d<mu_e> - dA - dK), d<mu_e> = dm + 5 dlog theta where <mu_e> comes from m).

Monte Carlo (``fp_mu_err_mc``, seeded): plane estimator - redraws (sigma, theta,
<mu_e> or m) jointly with their correlations, A, K, the coefficients (full
covariance) and the plane's scatter, and re-runs the same chain. Gaussian estimator -
a parametric bootstrap: each draw is a galaxy from the model itself at the fitted
eta, N(x_bar + eta e_r, Sigma + E), kept only if it passes the selection, with
redrawn coefficients and zero point; the posterior mean is recomputed for it.

Row-level problems never raise: a missing or impossible input (beyond
``PHYSICAL_BOUNDS``), an invalid error or correlation sets MISSING_INPUT; s or i
outside the calibration's range sets OUT_OF_RANGE (the distance is NaN unless
``allow_extrapolation``, which adds EXTRAPOLATED); for the gaussian estimator a galaxy
outside the declared selection, or a posterior the grid cannot contain, sets
OUT_OF_RANGE and gives NaN. Structural problems (unknown or missing keys, shapes, a
calibration that is not an FP plane) raise ValueError.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import yaml

from . import flags as F
from .calibration import Calibration
from .distance import finish
from .settings import method_settings
from .uncertainty import monte_carlo, quadrature

LN10 = math.log(10.0)
ARCSEC_PER_RAD = 648000.0 / math.pi
#: <mu_e> of 1 L_sun/pc^2 minus M_sun: 5 log10(206264.8 / 10) = 21.572 (definitions).
SB_ZERO_POINT = 5.0 * math.log10(ARCSEC_PER_RAD / 10.0)


# Inputs of ``fp_distance``: name -> (required, meaning with unit).
INPUTS = {
    "fp_sigma": (True, "central velocity dispersion measured in the spectroscopic aperture (km/s)"),
    "fp_sigma_err": (False, "error of fp_sigma (km/s); absent = 0; NaN/negative = omitted and flagged"),
    "fp_aperture_arcsec": (False, "radius of the circular spectroscopic aperture (arcsec): half the fibre "
                                  "diameter (6dF 6.7 arcsec fibre -> 3.35, SDSS 3 arcsec -> 1.5); a slit "
                                  "counts as slit_aperture_radius(width, length); a scalar serves every "
                                  "row; required unless apply_aperture_correction is false"),
    "fp_re_arcsec": (True, "effective (half-light) radius, angular (arcsec), defined as the calibration "
                           "defines it (circularised for the shipped ones)"),
    "fp_re_err": (False, "error of fp_re_arcsec (arcsec); absent = 0; NaN/negative = omitted and flagged"),
    "fp_mu_e": (False, "mean surface brightness within R_e, <mu_e> (mag/arcsec^2), observed (no "
                       "extinction, K or dimming correction), in the calibration's band; fp_mu_e or "
                       "fp_mag is required, rows with a NaN fp_mu_e use fp_mag"),
    "fp_mu_e_err": (False, "error of fp_mu_e (mag/arcsec^2); absent = 0; NaN/negative = flagged"),
    "fp_mag": (False, "total apparent magnitude (mag), observed, in the calibration's band; used where "
                      "fp_mu_e is absent: <mu_e> = m + 2.5 log10(2 pi R_e^2)"),
    "fp_mag_err": (False, "error of fp_mag (mag); absent = 0; NaN/negative = flagged"),
    "fp_re_mu_corr": (False, "correlation coefficient of the errors of fp_re_arcsec and fp_mu_e; "
                             "absent/NaN = 0; |value| > 1 or a set that is not positive semi-definite "
                             "is flagged"),
    "fp_re_mag_corr": (False, "correlation coefficient of the errors of fp_re_arcsec and fp_mag "
                              "(rows using fp_mag); absent/NaN = 0"),
    "fp_sigma_re_corr": (False, "correlation coefficient of the errors of fp_sigma and fp_re_arcsec; "
                                "absent/NaN = 0"),
    "fp_sigma_mu_corr": (False, "correlation coefficient of the errors of fp_sigma and fp_mu_e; "
                                "absent/NaN = 0"),
    "z_helio": (True, "heliocentric (observed) redshift: dimming and D_L = (1 + z)^2 D_A"),
    "z_cmb": (False, "CMB-frame redshift (redshift stage): D_A(z) = D_L(z_cmb) / (1 + z_cmb)^2 for eta; "
                     "required by the gaussian estimator"),
    "mu_z": (False, "distance modulus of z_cmb (mag, redshift stage, at the run's H0); needed for eta "
                    "(plane) and required by the gaussian estimator"),
    "a_gal": (False, "Galactic extinction A of the calibration's band (mag); required if "
                     "apply_galactic_extinction"),
    "a_gal_err": (False, "error of a_gal (mag); absent or NaN = 0 (not flagged)"),
    "k_corr": (False, "K-correction of the calibration's band (mag); required if apply_kcorrection"),
    "k_corr_err": (False, "error of k_corr (mag); absent or NaN = 0 (not flagged)"),
    "quality_flags": (False, "ingest flags (Quality): REDSHIFT_INVALID and any FP_* bit -> MISSING_INPUT"),
    "ext_flags": (False, "extinction flags (Ext): NO_EBV/HIGH_EXTINCTION/OUTSIDE_MAP -> HIGH_EXTINCTION"),
    "kcorr_flags": (False, "K-correction flags (KCorr): any bit -> KCORR_PROBLEM"),
}

#: Bounds (low < x <= high) beyond which an input is impossible, not just
#: uncalibrated: such a row is flagged MISSING_INPUT. Common practice, generous: no
#: galaxy has a central dispersion of 1500 km/s, an R_e of a degree, a mean surface
#: brightness outside 5-35 mag/arcsec^2; magnitudes as ingest bounds them; redshifts
#: up to ingest's 1, down to -0.01 (cz = -3000 km/s: blueshifted neighbours exist).
PHYSICAL_BOUNDS = {
    "fp_sigma": (0.0, 1500.0), "fp_aperture_arcsec": (0.0, 600.0), "fp_re_arcsec": (0.0, 3600.0),
    "fp_mu_e": (5.0, 35.0), "fp_mag": (-10.0, 40.0), "z_helio": (-0.01, 1.0), "z_cmb": (-0.01, 1.0),
}

#: Keys of the ``fp:`` config section that the workflow handles, not FPSettings.
WORKFLOW_KEYS = ("calibration", "band", "mc_max_rows", "accept_passband_mismatch")

_FLAG_INPUTS = ("quality_flags", "ext_flags", "kcorr_flags")
_POSTERIOR_HALF_WIDTH = 7.0   # per-row grid: +-7 likelihood widths around the unselected peak
_POSTERIOR_POINTS = 81        # 0.175 width apart (mean and std agree with 141 points to 1e-7 dex)
_POSTERIOR_EDGE = 1e-6        # density at a grid end, relative to the peak, that means "truncated"
_CHUNK = 8192                 # rows per posterior block (memory: a few (chunk, points) arrays)


# --------------------------------------------------------------------------- settings

def _is_number(v) -> bool:
    return isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool)


class FPSettings(method_settings("fp", {
        "hubble_constant": ({"type": ["number", "null"], "exclusiveMinimum": 0, "exclusiveMaximum": 1000}, None),
        "mag_offset": ({"type": "number"}, 0.0)})):
    """Settings of the FP stage: the keys of the ``fp:`` section of the config schema, with
    its defaults and rules (``galdist.settings``), plus two rules across keys below.

    estimator: 'plane' (eta = r_z - r_pred) or 'gaussian' (posterior in eta under the
        3-D Gaussian with the sample's selection; needs the calibration's
        ``plane.gaussian`` terms, z_cmb and mu_z); ``selection_*`` only with 'gaussian',
        ``malmquist`` only with 'plane'.
    Derived, not user keys: ``hubble_constant``, the run's H0 (km/s/Mpc) from the
    cosmology config, required when the calibration's sizes assume an H0; ``mag_offset``,
    the offset of <mu_e>/m onto the calibration's system (``galdist.photometry``).
    """

    def __post_init__(self):
        super().__post_init__()
        for key in ("selection_log_sigma_min", "selection_mag_limit"):
            if getattr(self, key) is not None and self.estimator != "gaussian":
                raise ValueError(f"fp.{key} = {getattr(self, key)!r}: must be null: the sample's selection "
                                 "enters only the gaussian estimator (set fp.estimator: gaussian, or remove the key)")
        if self.malmquist and self.estimator == "gaussian":
            raise ValueError("fp.malmquist = True: must be false with the gaussian estimator (its selection "
                             "term replaces a homogeneous Malmquist correction)")


# --------------------------------------------------------------------- calibration

@dataclass(frozen=True)
class GaussianTerms:
    """The 3-D Gaussian of Magoulas et al. 2012: centre (s_bar, i_bar) (r_bar lies on
    the plane) and widths (sigma_1, sigma_2, sigma_3) along v1 (normal), v2, v3 (dex)."""

    mean_log_sigma: float
    mean_log_ie: float
    sigmas: tuple[float, float, float]


@dataclass(frozen=True)
class PlaneTerms:
    """The calibration's ``plane`` mapping: what an FP calibration adds to the common keys.

    abs_mag_sun: M_sun in the calibration's band and system (defines i; the zero point
        c depends on it). hubble_constant: H0 (km/s/Mpc) at which the calibration's
        sizes were computed (100 = h^-1 kpc; the calibration's
        ``conventions.zero_point_h0``); None = absolute sizes.
    pivot_log_ie: i_p of the plane (the s pivot is the common ``pivot``).
    log_ie_range: valid range of i (None = only s is checked, via ``valid_range``).
    aperture_exponent, aperture_fraction: sigma_0 = sigma_ap (r_ap / (fraction R_e))^exponent.
    gaussian: ``GaussianTerms`` or None (then the gaussian estimator is unavailable).
    """

    abs_mag_sun: float
    hubble_constant: float | None
    pivot_log_ie: float = 0.0
    log_ie_range: tuple[float, float] | None = None
    aperture_exponent: float = 0.04
    aperture_fraction: float = 0.125
    gaussian: GaussianTerms | None = None

    KEYS = ("abs_mag_sun", "pivot_log_ie", "log_ie_range", "aperture_exponent", "aperture_fraction",
            "gaussian")

    @classmethod
    def from_mapping(cls, raw, where: str, hubble_constant: float | None = None) -> "PlaneTerms":
        if not isinstance(raw, dict):
            raise ValueError(f"{where}: key 'plane' must be a mapping with {', '.join(cls.KEYS)}")
        unknown = sorted(set(raw) - set(cls.KEYS))
        if unknown:
            raise ValueError(f"{where}: unknown key(s) in 'plane': {unknown}; allowed: {list(cls.KEYS)}")

        def number(key, lo, hi, default=None, optional=False):
            v = raw.get(key, default)
            if v is None and optional:
                return None
            if not (_is_number(v) and math.isfinite(v) and lo <= v <= hi):
                raise ValueError(f"{where}: key 'plane.{key}' = {v!r}: must be a number in [{lo:g}, {hi:g}]")
            return float(v)

        if "abs_mag_sun" not in raw:
            raise ValueError(f"{where}: key 'plane.abs_mag_sun' (M_sun in the band) is required")
        rng = raw.get("log_ie_range")
        if rng is not None:
            if not (isinstance(rng, (list, tuple)) and len(rng) == 2 and all(_is_number(x) and math.isfinite(x)
                                                                                for x in rng)
                    and rng[0] < rng[1]):
                raise ValueError(f"{where}: key 'plane.log_ie_range' = {rng!r}: must be [low, high], low < high")
            rng = (float(rng[0]), float(rng[1]))
        gauss = raw.get("gaussian")
        if gauss is not None:
            keys = ("mean_log_sigma", "mean_log_ie", "sigmas")
            if not isinstance(gauss, dict) or set(gauss) != set(keys):
                raise ValueError(f"{where}: key 'plane.gaussian' must be a mapping with exactly {list(keys)}")
            sig = gauss["sigmas"]
            if not (isinstance(sig, (list, tuple)) and len(sig) == 3
                    and all(_is_number(x) and math.isfinite(x) and 0 < x <= 5 for x in sig)):
                raise ValueError(f"{where}: key 'plane.gaussian.sigmas' = {sig!r}: must be three numbers "
                                 "in (0, 5] dex (widths along v1, v2, v3)")
            for key in keys[:2]:
                v = gauss[key]
                if not (_is_number(v) and math.isfinite(v) and -10 <= v <= 10):
                    raise ValueError(f"{where}: key 'plane.gaussian.{key}' = {v!r}: must be a number in [-10, 10]")
            gauss = GaussianTerms(float(gauss["mean_log_sigma"]), float(gauss["mean_log_ie"]),
                                  tuple(float(x) for x in sig))
        return cls(abs_mag_sun=number("abs_mag_sun", -10.0, 20.0), hubble_constant=hubble_constant,
                   pivot_log_ie=number("pivot_log_ie", -10.0, 10.0, default=0.0), log_ie_range=rng,
                   aperture_exponent=number("aperture_exponent", 0.0, 0.5, default=0.04),
                   aperture_fraction=number("aperture_fraction", 1e-3, 1.0, default=0.125),
                   gaussian=gauss)


def plane_terms(cal: Calibration) -> PlaneTerms:
    """The ``plane`` terms of an FP calibration.

    Read from ``cal.plane`` when the Calibration carries that field, else from the
    ``plane`` mapping of the file text the calibration was loaded from (``cal.text``,
    parsed with ``yaml.safe_load``). Raises ValueError naming the calibration.
    """
    where = f"calibration {cal.name} ({cal.path or 'in memory'})"
    raw = getattr(cal, "plane", None)
    if raw is None and cal.text:
        try:
            data = yaml.safe_load(cal.text)
        except yaml.YAMLError as exc:
            raise ValueError(f"{where}: its text is not valid YAML ({exc})") from None
        raw = data.get("plane") if isinstance(data, dict) else None
    if raw is None:
        raise ValueError(f"{where}: key 'plane' (abs_mag_sun, ...) is required for FP")
    return PlaneTerms.from_mapping(raw, where, cal.zero_point_h0)


def check_calibration(cal: Calibration) -> PlaneTerms:
    """Raise ValueError unless ``cal`` is an FP plane calibration; return its plane terms."""
    where = f"calibration {cal.name} ({cal.path or 'in memory'})"
    if cal.method != "fp":
        raise ValueError(f"{where}: method must be 'fp', got {cal.method!r}")
    if cal.form != "plane":
        raise ValueError(f"{where}: form must be 'plane' for FP, got {cal.form!r}")
    if cal.predictor != "log_sigma":
        raise ValueError(f"{where}: predictor must be 'log_sigma' (valid_range is a range of "
                         f"log10 sigma_0), got {cal.predictor!r}")
    coeffs = np.asarray(cal.coefficients, dtype=float)
    if coeffs.shape != (3,) or not np.all(np.isfinite(coeffs)):
        raise ValueError(f"{where}: the plane needs exactly 3 finite coefficients [a, b, c], got "
                         f"{coeffs.tolist()}")
    cov = np.asarray(cal.covariance, dtype=float)
    if cov.shape != (3, 3):
        raise ValueError(f"{where}: the coefficient covariance must be 3x3, got shape {cov.shape}")
    if cal.quadratic:
        raise ValueError(f"{where}: key 'quadratic' is not used by the FP plane")
    if not (math.isfinite(cal.scatter) and cal.scatter >= 0):
        raise ValueError(f"{where}: scatter (dex in r) must be a finite number >= 0")
    return plane_terms(cal)


# ------------------------------------------------------------------- step functions

def slit_aperture_radius(width_arcsec, length_arcsec):
    """Radius of the circular aperture equivalent to a slit: 1.025 sqrt(x y / pi)
    (Jorgensen, Franx & Kjaergaard 1995, MNRAS 276, 1341; from memory)."""
    return 1.025 * np.sqrt(np.asarray(width_arcsec, dtype=float) * np.asarray(length_arcsec, dtype=float) / np.pi)


def aperture_corrected_sigma(sigma_ap, aperture_arcsec, re_arcsec, exponent: float = 0.04,
                             fraction: float = 0.125):
    """sigma_0 = sigma_ap (r_ap / (fraction R_e))^exponent: the dispersion in the
    standard aperture of radius R_e/8 (Jorgensen, Franx & Kjaergaard 1995, MNRAS 276,
    1341). r_ap and R_e in the same angular unit."""
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.asarray(aperture_arcsec, dtype=float) / (fraction * np.asarray(re_arcsec, dtype=float))
        return np.asarray(sigma_ap, dtype=float) * ratio ** exponent


def surface_brightness_dimming(z):
    """Tolman dimming of a surface brightness, 10 log10(1 + z) mag (common practice)."""
    return 10.0 * np.log10(1.0 + np.asarray(z, dtype=float))


def mean_surface_brightness(mag_total, re_arcsec):
    """<mu_e> = m + 2.5 log10(2 pi R_e^2): half the light within pi R_e^2 (definitions)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        area = 2.0 * np.pi * np.asarray(re_arcsec, dtype=float) ** 2
        return np.asarray(mag_total, dtype=float) + 2.5 * np.log10(area)


def log_surface_intensity(mu_0, abs_mag_sun: float):
    """i = log10 <I_e> / (L_sun/pc^2) = 0.4 (M_sun + 21.572 - <mu_e>_0) (definitions)."""
    return 0.4 * (abs_mag_sun + SB_ZERO_POINT - np.asarray(mu_0, dtype=float))


def plane_log_radius(cal: Calibration, terms: PlaneTerms, s, i, coeffs=None):
    """r = a (s - s_p) + b (i - i_p) + c; ``coeffs`` (3,) or per row (n, 3) overrides."""
    k = np.asarray(cal.coefficients if coeffs is None else coeffs, dtype=float)
    return (k[..., 0] * (np.asarray(s, dtype=float) - cal.pivot)
            + k[..., 1] * (np.asarray(i, dtype=float) - terms.pivot_log_ie) + k[..., 2])


def plane_axes(a, b):
    """(v1, v2, v3), each (..., 3): the axes of Magoulas et al. 2012 for the plane a, b."""
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    n1 = np.sqrt(1.0 + a * a + b * b)
    n2 = np.sqrt(1.0 + b * b)
    zero = np.zeros(np.broadcast(a, b).shape)
    v1 = np.stack([1.0 / n1 + zero, -a / n1 + zero, -b / n1 + zero], axis=-1)
    v2 = np.stack([b / n2 + zero, zero, 1.0 / n2 + zero], axis=-1)
    v3 = np.stack([-a / (n1 * n2) + zero, -(1.0 + b * b) / (n1 * n2) + zero, a * b / (n1 * n2) + zero], axis=-1)
    return v1, v2, v3


def plane_covariance(a, b, sigmas):
    """Sigma = sum_k sigma_k^2 v_k v_k^T (Magoulas et al. 2012), shape (..., 3, 3)."""
    total = 0.0
    for v, sig in zip(plane_axes(a, b), sigmas):
        total = total + sig * sig * v[..., :, None] * v[..., None, :]
    return total


def bivariate_upper(h, k, rho):
    """P(X > h, Y > k) for standard normals of correlation rho, |rho| < 1.

    Owen 1956 (Ann. Math. Stat. 27, 1075; from memory) through his T function:
    P(X <= h, Y <= k) = [Phi(h) + Phi(k)]/2 - T(h, a_h) - T(k, a_k) - beta,
    a_h = (k - rho h)/(h sqrt(1 - rho^2)), a_k likewise, beta = 1/2 where h k < 0 (or
    h k = 0 with h + k < 0), else 0; the upper orthant is that at (-h, -k).
    """
    from scipy.special import ndtr, owens_t  # imported here: only the gaussian estimator needs it

    h, k, rho = np.broadcast_arrays(-np.asarray(h, dtype=float), -np.asarray(k, dtype=float),
                                    np.asarray(rho, dtype=float))
    # h or k exactly 0 would divide by zero below; the probability is continuous there
    h = np.where(h == 0.0, 1e-12, h)
    k = np.where(k == 0.0, 1e-12, k)
    root = np.sqrt(1.0 - rho * rho)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = (0.5 * (ndtr(h) + ndtr(k)) - owens_t(h, (k - rho * h) / (h * root))
             - owens_t(k, (h - rho * k) / (k * root)) - np.where(h * k < 0.0, 0.5, 0.0))
    # rounding can leave a tiny negative or an excess: bound by the marginals
    return np.clip(p, 0.0, np.minimum(ndtr(h), ndtr(k)))


#: below this the difference of Owen's T terms has lost its digits: integrate instead
_ORTHANT_FLOOR = 1e-9
_LAGUERRE = np.polynomial.laguerre.laggauss(40)


def log_bivariate_upper(h, k, rho):
    """ln P(X > h, Y > k), standard normals of correlation rho, |rho| < 1, accurate in
    the tails: ``bivariate_upper`` where it is above 1e-9; below, where its difference
    of Owen's T terms has lost its digits, the integral over the more extreme variable,
    ln int_h^inf phi(x) Phi((rho x - k) / sqrt(1 - rho^2)) dx (definitions), by 40-point
    Gauss-Laguerre quadrature in x - h scaled by the integrand's log-slope at h."""
    from scipy.special import log_ndtr, logsumexp

    h, k, rho = np.broadcast_arrays(np.asarray(h, dtype=float), np.asarray(k, dtype=float),
                                    np.asarray(rho, dtype=float))
    shape = h.shape
    h, k, rho = h.ravel(), k.ravel(), rho.ravel()
    with np.errstate(divide="ignore"):
        out = np.log(bivariate_upper(h, k, rho))
    low = ~(out > math.log(_ORTHANT_FLOOR)) & np.isfinite(h) & np.isfinite(k) & np.isfinite(rho)
    if not low.any():
        return out.reshape(shape)
    hh, kk, rr = h[low], k[low], rho[low]
    swap = kk > hh
    hh, kk = np.where(swap, kk, hh), np.where(swap, hh, kk)
    root = np.sqrt(1.0 - rr * rr)

    def g(x):  # the log integrand; x (m,) or (m, nodes)
        pad = (slice(None),) + (None,) * (np.ndim(x) - 1)
        return -0.5 * x * x - 0.5 * math.log(2.0 * math.pi) + log_ndtr((rr[pad] * x - kk[pad]) / root[pad])

    step = 1e-4
    slope = np.maximum(-(g(hh + step) - g(hh)) / step, 0.5)
    u, w = _LAGUERRE
    x = hh[..., None] + u / slope[..., None]
    out[low] = logsumexp(np.log(w) + u + g(x), axis=-1) - np.log(slope)
    return out.reshape(shape)


# ------------------------------------------------------------------------ the chain

def _h_term(terms: PlaneTerms, st: FPSettings) -> float:
    """log10(H0_run / H0_cal): r_cal = r_run + this (sizes from redshifts scale as 1/H0)."""
    if terms.hubble_constant is None:
        return 0.0
    return math.log10(st.hubble_constant / terms.hubble_constant)


def _chain(cal, terms, st, *, sigma, theta, w, from_mag, aperture, a_gal, k_corr, z_helio, log_da_z,
           coeffs=None, scatter=0.0):
    """Every intermediate from the raw measurements; vectorised, re-run by the Monte Carlo.

    ``w`` is <mu_e> (mag/arcsec^2) or, where ``from_mag``, the total magnitude;
    ``log_da_z`` log10 D_A(z) in Mpc (NaN = no eta); ``scatter`` a draw of the plane's
    scatter in r (dex).
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        mu_obs = np.where(from_mag, mean_surface_brightness(w, theta), w) + st.mag_offset
        if st.apply_aperture_correction:
            sigma_0 = aperture_corrected_sigma(sigma, aperture, theta, terms.aperture_exponent,
                                               terms.aperture_fraction)
        else:
            sigma_0 = np.asarray(sigma, dtype=float)
        dim = surface_brightness_dimming(z_helio) if st.apply_dimming else 0.0
        mu_0 = mu_obs - a_gal - k_corr - dim
        s = np.log10(sigma_0)
        i = log_surface_intensity(mu_0, terms.abs_mag_sun)
        r_pred = plane_log_radius(cal, terms, s, i, coeffs) + scatter
        log_theta = np.log10(theta) - math.log10(ARCSEC_PER_RAD)         # radians
        h = _h_term(terms, st)
        log_da = r_pred - h - log_theta - 3.0                             # kpc -> Mpc
        mu = 5.0 * (log_da + 2.0 * np.log10(1.0 + np.asarray(z_helio, dtype=float))) + 25.0
        r_z = log_theta + log_da_z + 3.0 + h
    return {"mu_obs": mu_obs, "sigma_0": sigma_0, "mu_0": mu_0, "s": s, "i": i, "r_pred": r_pred,
            "log_theta": log_theta, "log_da": log_da, "mu": mu, "r_z": r_z, "eta": log_da_z - log_da}


def measurement_covariance(a, c, st, alpha):
    """E (n, 3, 3): covariance of (r_z, s, i) from the measurement errors (first order).

    Also returns the linear covariance (n, 3, 3) of (sigma, theta, w) used by the
    Monte Carlo.
    """
    n = a["sigma"].shape[0]
    errs = np.stack([a["sigma_err"], a["theta_err"], a["w_err"]], axis=-1)
    corr = np.broadcast_to(np.eye(3), (n, 3, 3)).copy()
    corr[:, 0, 1] = corr[:, 1, 0] = a["rho_st"]
    corr[:, 1, 2] = corr[:, 2, 1] = a["rho_tw"]
    corr[:, 0, 2] = corr[:, 2, 0] = a["rho_sw"]
    lin = corr * errs[:, :, None] * errs[:, None, :]
    with np.errstate(divide="ignore", invalid="ignore"):
        dlt = 1.0 / (a["theta"] * LN10)       # dlog theta / dtheta
        dls = 1.0 / (a["sigma"] * LN10)       # dlog sigma / dsigma
    dmu_dtheta = np.where(a["from_mag"], 5.0 * dlt, 0.0)
    jac = np.zeros((n, 3, 3))
    jac[:, 0, 1] = dlt
    jac[:, 1, 0] = dls
    jac[:, 1, 1] = -alpha * dlt if st.apply_aperture_correction else 0.0
    jac[:, 2, 1] = -0.4 * dmu_dtheta
    jac[:, 2, 2] = -0.4
    e = np.einsum("nij,njk,nlk->nil", jac, lin, jac)
    # A and K enter <mu_e>_0 with a minus sign, i with +0.4; independent of the rest
    e[:, 2, 2] += 0.16 * (a["a_gal_err"] ** 2 + a["k_corr_err"] ** 2)
    return e, lin


def plane_coordinates(inputs: dict, calibration: Calibration, settings: FPSettings | None = None) -> dict:
    """(r_z, s, i) of every row with their measurement covariance, for fitting a plane.

    The same checks and correction chain as ``fp_distance``; r_z is log10 R_e (kpc) at
    the distance ``inputs['mu_z']`` gives (with ``z_cmb``). Returns {"r_z", "s", "i"
    (n,), "cov" (n, 3, 3) (``measurement_covariance``), "flags" (fp_flags before any
    range or distance), "missing" (bool, unusable inputs)}.
    """
    st = settings or FPSettings()
    terms, _, a, out_flags, missing_row = _prepare(inputs, calibration, st)
    c = _chain(calibration, terms, st, **_chain_kwargs(a))
    e, _ = measurement_covariance(a, c, st, terms.aperture_exponent)
    return {"r_z": c["r_z"], "s": c["s"], "i": c["i"], "cov": e, "flags": out_flags, "missing": missing_row}


def _psd_root(cov):
    """L (..., k, k) with L L^T = cov (eigen-decomposition; zero directions allowed)."""
    w, v = np.linalg.eigh(cov)
    return v * np.sqrt(np.clip(w, 0.0, None))[..., None, :]


def _coefficient_variance(cal, terms, s, i):
    jac = np.stack([s - cal.pivot, i - terms.pivot_log_ie, np.ones_like(s)], axis=-1)
    return np.einsum("...i,ij,...j->...", jac, np.asarray(cal.covariance, dtype=float), jac)


# ---------------------------------------------------------------- gaussian posterior

@dataclass
class _Model:
    """Per-row pieces of the gaussian likelihood (rows of one block)."""

    d: np.ndarray        # (n, 3) x_z - x_bar at eta = 0
    m: np.ndarray        # (n, 3, 3) (Sigma + E)^-1
    v: np.ndarray        # (n, 3, 3) Sigma + E
    s_bar: np.ndarray    # (n,)
    u2_bar: np.ndarray   # (n,) mean of 2 r + i at eta = 0
    s_cut: float | None
    ell: np.ndarray | None  # (n,) selection bound on 2 r_z + i, or None


def _gauss_model(cal, terms, st, x_z, e, ell, coeffs=None):
    g = terms.gaussian
    k = np.asarray(cal.coefficients if coeffs is None else coeffs, dtype=float)
    a, b = k[..., 0], k[..., 1]
    r_bar = plane_log_radius(cal, terms, g.mean_log_sigma, g.mean_log_ie, k)
    n = x_z.shape[0]
    mean = np.stack([np.broadcast_to(r_bar, (n,)), np.full(n, g.mean_log_sigma), np.full(n, g.mean_log_ie)],
                    axis=-1)
    v = plane_covariance(a, b, g.sigmas) + e
    return _Model(d=x_z - mean, m=np.linalg.inv(v), v=v, s_bar=mean[:, 1],
                  u2_bar=2.0 * mean[:, 0] + mean[:, 2], s_cut=st.selection_log_sigma_min, ell=ell)


def log_selection(v, s_bar, u2_bar, s_cut, ell, eta=0.0):
    """log P(selected), shape of ``eta`` (n, m) or (n,) for a scalar ``eta``: the
    probability that a galaxy drawn from N(mean, v) (v (n, 3, 3) on (r, s, i), mean with
    s = ``s_bar`` and 2 r + i = ``u2_bar`` + 2 eta) passes the cut s >= ``s_cut`` and the
    magnitude limit 2 r + i >= ``ell`` (None: no such cut). The two together are a
    bivariate-normal orthant probability (``bivariate_upper``). Used by the gaussian
    estimator and by the plane fit (galdist.relation_fit.fit_plane)."""
    from scipy.special import log_ndtr

    eta = np.asarray(eta, dtype=float)
    col = (lambda x: x[:, None]) if eta.ndim == 2 else (lambda x: x)
    if s_cut is None and ell is None:
        return np.zeros(eta.shape if eta.ndim == 2 else np.shape(s_bar))
    sd1 = np.sqrt(v[:, 1, 1])
    var2 = 4.0 * v[:, 0, 0] + 4.0 * v[:, 0, 2] + v[:, 2, 2]
    sd2 = np.sqrt(var2)
    if ell is not None:
        kk = (col(ell) - (col(u2_bar) + 2.0 * eta)) / col(sd2)
    if s_cut is None:
        return log_ndtr(-kk)
    hh = col((s_cut - s_bar) / sd1)
    if ell is None:
        return np.broadcast_to(log_ndtr(-hh), np.broadcast(eta, hh).shape)
    rho = col((2.0 * v[:, 0, 1] + v[:, 2, 1]) / (sd1 * sd2))
    return log_bivariate_upper(hh, kk, rho)


def _log_selection(mod: _Model, eta):
    """log f(eta), (n, m): probability that a galaxy at eta passes the selection."""
    return log_selection(mod.v, mod.s_bar, mod.u2_bar, mod.s_cut, mod.ell, eta)


def _log_posterior(mod: _Model, eta):
    """Unnormalised log posterior (flat prior) on eta (n, m)."""
    md = np.einsum("nij,nj->ni", mod.m, mod.d)
    quad_a = np.einsum("ni,ni->n", mod.d, md)
    quad_b = md[:, 0]
    quad_c = mod.m[:, 0, 0]
    q = quad_a[:, None] - 2.0 * quad_b[:, None] * eta + quad_c[:, None] * eta * eta
    return -0.5 * q - _log_selection(mod, eta)


def _normalise(logp, eta):
    """(density, log normaliser): exp(logp - log normaliser) integrates to 1 along the last
    axis (trapezoid rule); NaN rows stay NaN."""
    with np.errstate(invalid="ignore"):
        peak = np.max(logp, axis=-1, keepdims=True)
        dens = np.exp(logp - peak)
        area = np.trapezoid(dens, eta, axis=-1)[..., None] if hasattr(np, "trapezoid") else \
            np.trapz(dens, eta, axis=-1)[..., None]
        return dens / area, peak + np.log(area)


def _row_grid_posterior(mod: _Model):
    """Each row's posterior on its own grid: (eta, density, index of the peak, contained,
    log normaliser). The grid spans +-7 widths 1/sqrt(M_rr) around the peak without
    selection and is re-centred (twice at most) on the mode when the selection moves the
    posterior."""
    width = 1.0 / np.sqrt(mod.m[:, 0, 0])
    md = np.einsum("nij,nj->ni", mod.m, mod.d)
    centre = md[:, 0] / mod.m[:, 0, 0]
    t = np.linspace(-_POSTERIOR_HALF_WIDTH, _POSTERIOR_HALF_WIDTH, _POSTERIOR_POINTS)
    for _ in range(3):
        eta = centre[:, None] + width[:, None] * t
        dens, log_norm = _normalise(_log_posterior(mod, eta), eta)
        top = np.argmax(np.nan_to_num(dens, nan=-1.0), axis=-1)
        contained = (dens[:, 0] < _POSTERIOR_EDGE * dens[np.arange(len(top)), top]) & \
                    (dens[:, -1] < _POSTERIOR_EDGE * dens[np.arange(len(top)), top])
        if np.all(contained | ~np.isfinite(centre)):
            break
        centre = np.where(contained, centre, eta[np.arange(len(top)), top])
    return eta, dens, top, contained, log_norm[:, 0]


def _posterior_summary(mod: _Model):
    """(mean, std, mode, contained) of each row's posterior, on a per-row grid
    (``_row_grid_posterior``)."""
    eta, dens, top, contained, _ = _row_grid_posterior(mod)
    trap = np.trapezoid if hasattr(np, "trapezoid") else np.trapz
    mean = trap(dens * eta, eta, axis=-1)
    var = trap(dens * (eta - mean[:, None]) ** 2, eta, axis=-1)
    # mode: parabola through the grid maximum and its neighbours
    j = np.clip(top, 1, _POSTERIOR_POINTS - 2)
    rows = np.arange(len(j))
    with np.errstate(divide="ignore", invalid="ignore"):
        lp = np.log(dens[rows[:, None], j[:, None] + np.array([-1, 0, 1])])
        denom = lp[:, 0] - 2.0 * lp[:, 1] + lp[:, 2]
        shift = np.where(denom < 0, 0.5 * (lp[:, 0] - lp[:, 2]) / denom, 0.0)
    mode = eta[rows, j] + np.clip(shift, -1.0, 1.0) * (eta[rows, 1] - eta[rows, 0])
    return mean, np.sqrt(np.maximum(var, 0.0)), mode, contained


def _in_chunks(n, func):
    outs = [func(slice(lo, min(lo + _CHUNK, n))) for lo in range(0, n, _CHUNK)]
    return tuple(np.concatenate([o[k] for o in outs]) for k in range(len(outs[0]))) if outs else ()


# ------------------------------------------------------------------------- inputs

def _as_rows(name, value, n):
    arr = np.asarray(value)
    dtype = F.FLAG_DTYPE if name in _FLAG_INPUTS else float
    if arr.ndim == 0:
        return np.full(n, arr.item(), dtype=dtype)
    if arr.shape != (n,):
        raise ValueError(f"fp input '{name}' has shape {arr.shape}; expected ({n},) like 'fp_sigma' or a scalar")
    return arr.astype(dtype, copy=False)


def _outside(x, key):
    lo, hi = PHYSICAL_BOUNDS[key]
    with np.errstate(invalid="ignore"):
        return ~((x > lo) & (x <= hi))


def _prepare(inputs: dict, cal: Calibration, st: FPSettings):
    """Checked, broadcast inputs and the row-level flags; structural problems raise."""
    terms = check_calibration(cal)
    unknown = sorted(set(inputs) - set(INPUTS))
    if unknown:
        raise ValueError(f"unknown fp input(s) {', '.join(map(repr, unknown))}; allowed: {', '.join(INPUTS)}")
    needed = [k for k, (req, _) in INPUTS.items() if req]
    needed += ["fp_aperture_arcsec"] if st.apply_aperture_correction else []
    needed += ["a_gal"] if st.apply_galactic_extinction else []
    needed += ["k_corr"] if st.apply_kcorrection else []
    needed += ["z_cmb", "mu_z"] if st.estimator == "gaussian" else []
    missing = [k for k in needed if k not in inputs]
    if missing:
        raise ValueError(f"fp input(s) missing: {', '.join(map(repr, missing))} (required with these settings)")
    if "fp_mu_e" not in inputs and "fp_mag" not in inputs:
        raise ValueError("fp input 'fp_mu_e' (mean surface brightness within R_e) or 'fp_mag' (total "
                         "magnitude) is required")
    if "mu_z" in inputs and "z_cmb" not in inputs:
        raise ValueError("fp input 'mu_z' needs 'z_cmb' (D_A(z) = D_L(z_cmb) / (1 + z_cmb)^2)")
    if terms.hubble_constant is not None and st.hubble_constant is None:
        raise ValueError(f"calibration {cal.name}: its sizes assume H0 = {terms.hubble_constant:g} km/s/Mpc; "
                         "FPSettings.hubble_constant (the run's H0, from the cosmology config) is required")
    if st.estimator == "gaussian" and terms.gaussian is None:
        raise ValueError(f"calibration {cal.name}: fp.estimator 'gaussian' needs the calibration's "
                         "'plane.gaussian' terms (mean_log_sigma, mean_log_ie, sigmas)")

    n = np.shape(np.asarray(inputs["fp_sigma"]))[0] if np.ndim(inputs["fp_sigma"]) else 1
    col = {k: _as_rows(k, v, n) for k, v in inputs.items()}
    nan = np.full(n, np.nan)
    zeros = np.zeros(n)

    def err(key):
        e = col.get(key, zeros)
        bad = ~np.isfinite(e) | (e < 0)
        return np.where(bad, 0.0, e), bad

    sigma, theta = col["fp_sigma"], col["fp_re_arcsec"]
    mu_e = col.get("fp_mu_e", nan)
    from_mag = ~np.isfinite(mu_e) & np.isfinite(col.get("fp_mag", nan))
    w = np.where(from_mag, col.get("fp_mag", nan), mu_e)
    sigma_err, sigma_err_bad = err("fp_sigma_err")
    theta_err, theta_err_bad = err("fp_re_err")
    mu_err, mu_err_bad = err("fp_mu_e_err")
    mag_err, mag_err_bad = err("fp_mag_err")
    w_err = np.where(from_mag, mag_err, mu_err)
    w_err_bad = np.where(from_mag, mag_err_bad, mu_err_bad)

    def corr(key):
        return np.nan_to_num(col.get(key, zeros), nan=0.0)

    rho_st = corr("fp_sigma_re_corr")
    rho_tw = np.where(from_mag, corr("fp_re_mag_corr"), corr("fp_re_mu_corr"))
    rho_sw = np.where(from_mag, 0.0, corr("fp_sigma_mu_corr"))
    # a correlation matrix is valid iff |rho| <= 1 each and its determinant >= 0
    det = 1.0 - rho_st ** 2 - rho_tw ** 2 - rho_sw ** 2 + 2.0 * rho_st * rho_tw * rho_sw
    corr_bad = (np.abs(rho_st) > 1) | (np.abs(rho_tw) > 1) | (np.abs(rho_sw) > 1) | (det < -1e-12)
    corr_bad |= ~np.isfinite(rho_st) | ~np.isfinite(rho_tw) | ~np.isfinite(rho_sw)

    aperture = col.get("fp_aperture_arcsec", np.ones(n)) if st.apply_aperture_correction else np.ones(n)
    a_gal = col["a_gal"] if st.apply_galactic_extinction else zeros
    k_corr = col["k_corr"] if st.apply_kcorrection else zeros
    a_gal_err = np.nan_to_num(col.get("a_gal_err", zeros), nan=0.0) if st.apply_galactic_extinction else zeros
    k_corr_err = np.nan_to_num(col.get("k_corr_err", zeros), nan=0.0) if st.apply_kcorrection else zeros
    z_helio = col["z_helio"]
    if "mu_z" in col:
        with np.errstate(invalid="ignore", divide="ignore"):
            log_da_z = 0.2 * (col["mu_z"] - 25.0) - 2.0 * np.log10(1.0 + col["z_cmb"])
        log_da_z = np.where(_outside(col["z_cmb"], "z_cmb"), np.nan, log_da_z)
    else:
        log_da_z = nan

    # --- flags -----------------------------------------------------------------------
    out_flags = F.new(n)
    qf = col.get("quality_flags", F.new(n))
    q_bits = F.Quality.REDSHIFT_INVALID
    for member in F.Quality:  # ingest's FP_* bits, once it has them
        if member.name.startswith("FP_"):
            q_bits |= member
    missing_row = (_outside(sigma, "fp_sigma") | _outside(theta, "fp_re_arcsec")
                   | np.where(from_mag, _outside(w, "fp_mag"), _outside(w, "fp_mu_e"))
                   | _outside(z_helio, "z_helio") | ~np.isfinite(a_gal) | ~np.isfinite(k_corr)
                   | sigma_err_bad | theta_err_bad | w_err_bad | corr_bad | F.has(qf, q_bits))
    if st.apply_aperture_correction:
        missing_row |= _outside(aperture, "fp_aperture_arcsec")
    if st.estimator == "gaussian":
        missing_row |= ~np.isfinite(log_da_z)
    F.set_where(out_flags, missing_row, F.Method.MISSING_INPUT)
    if st.apply_galactic_extinction:
        ef = col.get("ext_flags", F.new(n))
        F.set_where(out_flags, F.has(ef, F.Ext.NO_EBV | F.Ext.HIGH_EXTINCTION | F.Ext.OUTSIDE_MAP)
                    | ~np.isfinite(a_gal), F.Method.HIGH_EXTINCTION)
    if st.apply_kcorrection:
        kf = col.get("kcorr_flags", F.new(n))
        F.set_where(out_flags, (kf != 0) | ~np.isfinite(k_corr), F.Method.KCORR_PROBLEM)

    arrays = {"sigma": sigma, "theta": theta, "w": w, "from_mag": from_mag, "aperture": aperture,
              "a_gal": a_gal, "k_corr": k_corr, "z_helio": z_helio, "log_da_z": log_da_z,
              "sigma_err": sigma_err, "theta_err": theta_err, "w_err": w_err, "a_gal_err": a_gal_err,
              "k_corr_err": k_corr_err, "rho_st": rho_st, "rho_tw": rho_tw, "rho_sw": rho_sw}
    return terms, n, arrays, out_flags, missing_row


def _chain_kwargs(a):
    return {k: a[k] for k in ("sigma", "theta", "w", "from_mag", "aperture", "a_gal", "k_corr", "z_helio",
                              "log_da_z")}


def _selection_bound(terms, st, a, c):
    """l_n: the magnitude limit as 2 r_z + i >= l_n (None without a limit); see module doc."""
    if st.selection_mag_limit is None:
        return None
    dim = surface_brightness_dimming(a["z_helio"]) if st.apply_dimming else 0.0
    k_n = c["r_z"] - (c["log_theta"] + math.log10(ARCSEC_PER_RAD))        # r_z - log10 theta_arcsec
    m_lim = st.selection_mag_limit + st.mag_offset                           # onto the calibration's system
    return (terms.abs_mag_sun + SB_ZERO_POINT + a["a_gal"] + a["k_corr"] + dim
            - 2.5 * math.log10(2.0 * math.pi) + 5.0 * k_n - m_lim) / 2.5


# ------------------------------------------------------------------------- main API

def fp_distance(inputs: dict, calibration: Calibration, settings: FPSettings | None = None) -> dict:
    """FP distances, eta and flags; one output row per input row.

    ``inputs``: dict of arrays (scalars broadcast) named as in ``INPUTS``. Returns the
    columns of its registry entry (``galdist.methods.REGISTRY['fp'].output_units()``). Row-level problems give
    NaN and a ``fp_flags`` bit, never an exception; structural ones raise ValueError.
    """
    st = settings or FPSettings()
    terms, n, a, out_flags, missing_row = _prepare(inputs, calibration, st)
    alpha = terms.aperture_exponent
    c = _chain(calibration, terms, st, **_chain_kwargs(a))

    # --- range ---------------------------------------------------------------------
    s, i = c["s"], c["i"]
    known = ~missing_row & np.isfinite(s) & np.isfinite(i)
    out_of_range = known & ~calibration.in_range(s)
    if terms.log_ie_range is not None:
        out_of_range |= known & ~((i >= terms.log_ie_range[0]) & (i <= terms.log_ie_range[1]))
    F.set_where(out_flags, out_of_range, F.Method.OUT_OF_RANGE)
    if st.allow_extrapolation:
        F.set_where(out_flags, out_of_range, F.Method.EXTRAPOLATED)
        blank = missing_row | ~np.isfinite(s) | ~np.isfinite(i)
    else:
        blank = missing_row | ~known | out_of_range

    e, lin = measurement_covariance(a, c, st, alpha)
    coef_var = np.maximum(_coefficient_variance(calibration, terms, s, i), 0.0)
    nan = np.full(n, np.nan)
    post_std = nan.copy()
    post_mode = nan.copy()

    if st.estimator == "plane":
        k = np.asarray(calibration.coefficients, dtype=float)
        g = np.array([1.0, -k[0], -k[1]])
        meas_var = np.einsum("i,nij,j->n", g, e, g)
        eta_err_full = quadrature(np.sqrt(np.maximum(meas_var, 0.0)), calibration.scatter)
        eta = np.where(blank, np.nan, c["eta"])
        log_da = np.where(blank, np.nan, c["log_da"])
        mu = np.where(blank, np.nan, c["mu"])
        eta_err = np.where(np.isfinite(eta), eta_err_full, np.nan)
        mu_err = np.where(np.isfinite(mu), 5.0 * eta_err_full, np.nan)
    else:
        x_z = np.stack([c["r_z"], s, i], axis=-1)
        ell = _selection_bound(terms, st, a, c)
        # a galaxy outside the declared selection cannot come from it: no distance
        with np.errstate(invalid="ignore"):
            outside_sel = np.zeros(n, dtype=bool)
            if st.selection_log_sigma_min is not None:
                outside_sel |= s < st.selection_log_sigma_min
            if ell is not None:
                outside_sel |= 2.0 * c["r_z"] + i < ell
        outside_sel &= ~blank
        use = ~blank & ~outside_sel
        rows = np.flatnonzero(use)
        mean = nan.copy()
        contained = np.zeros(n, dtype=bool)
        if rows.size:
            def block(sl):
                r = rows[sl]
                mod = _gauss_model(calibration, terms, st, x_z[r], e[r], None if ell is None else ell[r])
                return _posterior_summary(mod)
            pm, ps, pmode, pc = _in_chunks(rows.size, block)
            mean[rows], post_std[rows], post_mode[rows], contained[rows] = pm, ps, pmode, pc
        lost = use & ~contained
        F.set_where(out_flags, outside_sel | lost, F.Method.OUT_OF_RANGE)
        ok = use & contained
        eta = np.where(ok, mean, np.nan)
        post_std = np.where(ok, post_std, np.nan)
        post_mode = np.where(ok, post_mode, np.nan)
        eta_err = np.where(ok, post_std, np.nan)
        log_da = a["log_da_z"] - eta
        with np.errstate(invalid="ignore"):
            mu = 5.0 * (log_da + 2.0 * np.log10(1.0 + a["z_helio"])) + 25.0
        mu_err = 5.0 * eta_err

    good = np.isfinite(mu)
    # --- Monte Carlo -------------------------------------------------------------------
    mu_err_mc = nan.copy()
    if st.mc_draws > 0 and np.any(good):
        if st.estimator == "plane":
            mu_err_mc = _mc_plane(calibration, terms, st, a, lin, good)
        else:
            mu_err_mc = _mc_gaussian(calibration, terms, st, a, c, e, eta, good)
        mu_err_mc = np.where(good, mu_err_mc, np.nan)

    # systematic: the plane's coefficients (covariance at (s, i)) and zero point, in dex of eta
    eta_err_sys = quadrature(np.sqrt(coef_var), calibration.zero_point_error)
    return {
        "fp_sigma_0": c["sigma_0"],
        "fp_mu_e_0": c["mu_0"],
        "fp_log_sigma_0": s,
        "fp_log_ie": i,
        "fp_log_re_z": c["r_z"],
        "fp_log_re_pred": c["r_pred"],
        "fp_eta": eta,
        "fp_eta_err": eta_err,
        "fp_eta_post_std": post_std,
        "fp_eta_post_mode": post_mode,
    } | finish("fp", mu, mu_err, 5.0 * eta_err_sys, mu_err_mc, out_flags, st.malmquist, st.malmquist_kind)


def _mc_plane(cal, terms, st, a, lin, good):
    """Std of fp_mu over seeded redraws of every input of the plane chain (rows ``good``)."""
    rows = np.flatnonzero(good)
    sub = {k: (v[rows] if isinstance(v, np.ndarray) and v.ndim else v) for k, v in a.items()}
    root3 = _psd_root(lin[rows])                      # (m, 3, 3), correlated (sigma, theta, w)
    base = _chain_kwargs(sub)

    def mu_of(u, a_gal, k_corr, scatter_draw):
        shift = np.einsum("nij,nj->ni", root3, u)
        kw = dict(base, sigma=base["sigma"] + shift[:, 0], theta=base["theta"] + shift[:, 1],
                  w=base["w"] + shift[:, 2], a_gal=a_gal, k_corr=k_corr)
        return _chain(cal, terms, st, **kw, scatter=scatter_draw)["mu"]

    values = {"u": np.zeros((rows.size, 3)), "a_gal": base["a_gal"], "k_corr": base["k_corr"],
              "scatter_draw": np.zeros(rows.size)}
    sigmas = {"u": 1.0, "a_gal": sub["a_gal_err"], "k_corr": sub["k_corr_err"], "scatter_draw": cal.scatter}
    _, std = monte_carlo(mu_of, values, sigmas, n_draws=int(st.mc_draws), seed=int(st.mc_seed))
    out = np.full(good.shape, np.nan)
    out[rows] = std
    return out


def _mc_gaussian(cal, terms, st, a, c, e, eta, good):
    """Std of fp_mu over a seeded parametric bootstrap of the gaussian estimator.

    Each draw is a galaxy of the model at the fitted eta, x ~ N(x_bar + eta e_r, Sigma +
    E), NaN unless it passes the selection, estimated with redrawn coefficients and
    zero point by the same posterior summary.
    """
    rows = np.flatnonzero(good)
    sub_c = {k: v[rows] for k, v in c.items()}
    sub_a = {k: (v[rows] if isinstance(v, np.ndarray) and v.ndim else v) for k, v in a.items()}
    ell = _selection_bound(terms, st, sub_a, sub_c)
    x_z = np.stack([sub_c["r_z"], sub_c["s"], sub_c["i"]], axis=-1)
    truth = _gauss_model(cal, terms, st, x_z, e[rows], ell)
    centre = x_z - truth.d + eta[rows, None] * np.array([1.0, 0.0, 0.0])    # x_bar + eta e_r
    root = _psd_root(truth.v)
    log_da_z, zh = sub_a["log_da_z"], sub_a["z_helio"]

    def mu_of(u):
        x = centre + np.einsum("nij,nj->ni", root, u)
        passed = np.ones(rows.size, dtype=bool)
        if st.selection_log_sigma_min is not None:
            passed &= x[:, 1] >= st.selection_log_sigma_min
        if ell is not None:
            passed &= 2.0 * x[:, 0] + x[:, 2] >= ell
        mod = _gauss_model(cal, terms, st, x, e[rows], ell)
        est = np.concatenate([_posterior_summary(_Model(
            d=mod.d[sl], m=mod.m[sl], v=mod.v[sl], s_bar=mod.s_bar[sl], u2_bar=mod.u2_bar[sl],
            s_cut=mod.s_cut, ell=None if ell is None else ell[sl]))[0]
            for sl in (slice(lo, lo + _CHUNK) for lo in range(0, rows.size, _CHUNK))])
        mu = 5.0 * (log_da_z - est + 2.0 * np.log10(1.0 + zh)) + 25.0
        return np.where(passed, mu, np.nan)

    values = {"u": np.zeros((rows.size, 3))}
    sigmas = {"u": 1.0}
    _, std = monte_carlo(mu_of, values, sigmas, n_draws=int(st.mc_draws), seed=int(st.mc_seed))
    out = np.full(good.shape, np.nan)
    out[rows] = std
    return out


def eta_posterior(inputs: dict, calibration: Calibration, settings: FPSettings | None = None,
                  eta_grid=None, eta_offset=None, whole_line: bool = False) -> dict:
    """Each galaxy's posterior in eta (gaussian estimator, flat prior) on a common grid.

    ``eta_grid``: increasing 1-d array (default -1 to 1 dex in steps of 0.005). Returns
    {"eta": grid (m,), "log_posterior": (n, m) log density normalised over the grid
    (trapezoid rule), "truncated": (n,) bool, the density at a grid end above 1e-6 of
    the peak (the grid does not contain the posterior), "flags": fp_flags as
    ``fp_distance`` sets them before the posterior}. Rows without a measurement, out of
    range or outside the selection are NaN. ``settings.estimator`` must be 'gaussian'.
    ``eta_offset`` (per row, dex): the posterior of eta + offset, i.e. evaluated at grid -
    offset. ``whole_line``: normalised over the whole line (each row's own grid, as
    ``fp_distance``'s summary) rather than over ``eta_grid``, so a posterior the grid cuts
    keeps only its mass on the grid.
    """
    st = settings or FPSettings(estimator="gaussian")
    if st.estimator != "gaussian":
        raise ValueError("eta_posterior needs FPSettings(estimator='gaussian')")
    grid = np.arange(-1.0, 1.0 + 1e-9, 0.005) if eta_grid is None else np.asarray(eta_grid, dtype=float)
    if grid.ndim != 1 or grid.size < 3 or not np.all(np.isfinite(grid)) or np.any(np.diff(grid) <= 0):
        raise ValueError("eta_grid must be a 1-d, finite, strictly increasing array of >= 3 values")
    terms, n, a, out_flags, missing_row = _prepare(inputs, calibration, st)
    c = _chain(calibration, terms, st, **_chain_kwargs(a))
    e, _ = measurement_covariance(a, c, st, terms.aperture_exponent)
    s, i = c["s"], c["i"]
    use = ~missing_row & np.isfinite(s) & np.isfinite(i) & np.isfinite(c["r_z"])
    in_range = calibration.in_range(s)
    if terms.log_ie_range is not None:
        in_range &= (i >= terms.log_ie_range[0]) & (i <= terms.log_ie_range[1])
    F.set_where(out_flags, use & ~in_range, F.Method.OUT_OF_RANGE)
    if not st.allow_extrapolation:
        use &= in_range
    else:
        F.set_where(out_flags, use & ~in_range, F.Method.EXTRAPOLATED)
    ell = _selection_bound(terms, st, a, c)
    with np.errstate(invalid="ignore"):
        if st.selection_log_sigma_min is not None:
            use &= s >= st.selection_log_sigma_min
        if ell is not None:
            use &= 2.0 * c["r_z"] + i >= ell
    x_z = np.stack([c["r_z"], s, i], axis=-1)
    logp = np.full((n, grid.size), np.nan)
    rows = np.flatnonzero(use)
    for lo in range(0, rows.size, _CHUNK):
        r = rows[lo:lo + _CHUNK]
        mod = _gauss_model(calibration, terms, st, x_z[r], e[r], None if ell is None else ell[r])
        at = np.broadcast_to(grid, (r.size, grid.size))
        if eta_offset is not None:
            at = at - np.broadcast_to(np.asarray(eta_offset, dtype=float), (n,))[r, None]
        raw = _log_posterior(mod, at)
        log_norm = _row_grid_posterior(mod)[4][:, None] if whole_line else _normalise(raw, grid)[1]
        logp[r] = raw - log_norm
    with np.errstate(invalid="ignore"):
        peak = np.max(logp, axis=-1)
        edge = np.log(_POSTERIOR_EDGE)
        truncated = use & ((logp[:, 0] - peak > edge) | (logp[:, -1] - peak > edge))
    return {"eta": grid, "log_posterior": logp, "truncated": truncated, "flags": out_flags}


def eta_likelihood(inputs: dict, calibration: Calibration, settings: FPSettings, grid) -> np.ndarray | None:
    """The eta likelihood on ``grid`` of each row (density in 1/dex, normalised over the whole
    line; NaN where there is no posterior), in the product's eta = log10(d_z / d) of
    luminosity distances (``galdist.likelihood``), for the gaussian estimator: its
    selection-corrected posterior (``eta_posterior``), moved by 2 log10((1 + z_cmb) /
    (1 + z_helio)), the difference between that eta, (mu_z - fp_mu) / 5, and fp_eta of
    angular-diameter distances. None for the plane estimator (its error is Gaussian
    to first order; its Monte Carlo draws decide)."""
    if settings.estimator != "gaussian":
        return None
    with np.errstate(invalid="ignore", divide="ignore"):
        offset = 2.0 * np.log10((1.0 + np.asarray(inputs["z_cmb"], dtype=float))
                                / (1.0 + np.asarray(inputs["z_helio"], dtype=float)))
    post = eta_posterior(inputs, calibration, settings, eta_grid=grid, eta_offset=np.nan_to_num(offset),
                         whole_line=True)
    return np.exp(post["log_posterior"])
