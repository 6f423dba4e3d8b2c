"""Tests of galdist.fp: Fundamental-Plane distances.

Every check value names its source beside it. Hand arithmetic is written out as
literal numbers; the library's own helpers are never used to make a check value.
The simulated planes below are generated forward from the published definitions
(the test writes its own axes, corrections and selection), then inverted by the
module.

Calibrations go through the loader and the calibration schema: the shipped files by
name, the test planes from a mapping written to a temporary file.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
import yaml

from galdist import flags as F
from galdist.methods import REGISTRY
from galdist.calibration import Calibration, calibration_from_mapping, load_calibration
from galdist.fp import (
    INPUTS, FPSettings, aperture_corrected_sigma, bivariate_upper,
    check_calibration, eta_posterior, fp_distance, log_surface_intensity, mean_surface_brightness,
    plane_covariance, slit_aperture_radius, surface_brightness_dimming,
)

REPO = Path(__file__).resolve().parent.parent
LN10 = math.log(10.0)
ARCSEC = 206264.806247  # arcsec per radian, 648000 / pi (definition)
SB_UNIT = 21.572125666  # 5 log10(206264.806 / 10): mu of 1 L_sun/pc^2 minus M_sun (definitions)

# Magoulas et al. 2012, MNRAS 427, 245, 6dFGS J band (from memory):
# r = 1.52 s - 0.89 i - 0.33 ; Gaussian centre (s, i) = (2.188, 3.184), widths 0.053, 0.318, 0.170
A_J, B_J, C0_J = 1.52, -0.89, -0.33
S_BAR, I_BAR = 2.188, 3.184
C_PIVOT_J = 0.162            # = -0.33 + 1.52*2.188 - 0.89*3.184 (hand)
SIGMAS_J = (0.053, 0.318, 0.170)
M_SUN_J = 3.67               # 2MASS J, Vega (e.g. Willmer 2018, ApJS 236, 47; from memory)
SIGMA_R_J = 0.10734953      # 0.053 * sqrt(1 + 1.52^2 + 0.89^2) = 0.053 * 2.025463 (hand)
ALPHA = 0.04                 # Jorgensen, Franx & Kjaergaard 1995, MNRAS 276, 1341: sigma ~ r^-0.04
H0_RUN = 70.0                # the run's H0 in these tests (a convention, not a measurement)

def _shipped(name: str) -> Calibration:
    """A shipped FP calibration, through the loader and the calibration schema."""
    return load_calibration(name)


def _plane_cal(*, cov=None, scatter=SIGMA_R_J, valid_range=(1.0, 3.5), plane_extra=None, h0=100.0, **changes):
    """J-band-like plane (Magoulas et al. 2012 numbers, from memory) with test-chosen errors/ranges;
    ``h0``: the H0 its sizes assume (None: absolute sizes)."""
    plane = {"abs_mag_sun": M_SUN_J, "pivot_log_ie": I_BAR,
             "gaussian": {"mean_log_sigma": S_BAR, "mean_log_ie": I_BAR, "sigmas": list(SIGMAS_J)}}
    plane.update(plane_extra or {})
    data = {"name": "fp_test", "method": "fp", "form": "plane", "band": "2MASS J", "system": "Vega",
            "predictor": "log_sigma", "pivot": S_BAR, "coefficients": [A_J, B_J, C_PIVOT_J],
            "coefficient_errors": [0.0, 0.0, 0.0], "scatter": scatter, "valid_range": list(valid_range),
            "reference": {"authors": "test", "year": 2012, "journal": "test"}, "provenance": "test",
            "plane": plane, "conventions": {"extinction": "sfd98", "zero_point_h0": h0}}
    data.update(changes)
    cal = calibration_from_mapping(data)
    if cov is not None:
        cal = dataclasses.replace(cal, covariance=np.asarray(cov, dtype=float))
    return cal


def _axes(a, b):
    """Magoulas et al. 2012 (from memory): v1 normal to the plane, v2, v3 in it."""
    n1 = math.sqrt(1 + a * a + b * b)
    n2 = math.sqrt(1 + b * b)
    return (np.array([1.0, -a, -b]) / n1, np.array([b, 0.0, 1.0]) / n2,
            np.array([-a, -(1 + b * b), a * b]) / (n1 * n2))


def _sigma_matrix(a=A_J, b=B_J, sigmas=SIGMAS_J):
    return sum(s * s * np.outer(v, v) for s, v in zip(sigmas, _axes(a, b)))


NO_MC = FPSettings(mc_draws=0, hubble_constant=H0_RUN)


# ----------------------------------------------------------------------------------------
# Step functions against hand computation from the cited formulas
# ----------------------------------------------------------------------------------------

def test_aperture_correction_hand():
    # Jorgensen, Franx & Kjaergaard 1995: sigma_0 = sigma_ap (r_ap / (r_e/8))^0.04.
    # SDSS fibre 3 arcsec across -> r_ap = 1.5; R_e = 4 arcsec: ratio 1.5 / 0.5 = 3,
    # 3^0.04 = exp(0.04 * 1.0986123) = 1.0449244 -> 200 * 1.0449244 = 208.98487
    assert aperture_corrected_sigma(200.0, 1.5, 4.0) == pytest.approx(208.98487, abs=1e-5)
    # aperture equal to R_e/8: no correction (definition of the standard aperture)
    assert aperture_corrected_sigma(150.0, 0.5, 4.0) == pytest.approx(150.0, abs=1e-12)
    # a bigger aperture sees a lower dispersion, so the correction raises it (same paper)
    assert aperture_corrected_sigma(150.0, 5.0, 4.0) > 150.0 > aperture_corrected_sigma(150.0, 0.1, 4.0)
    # slit 2 x 4 arcsec: 1.025 sqrt(8 / pi) = 1.025 * 1.5957691 = 1.6356633 (same paper, from memory)
    assert slit_aperture_radius(2.0, 4.0) == pytest.approx(1.6356633, abs=1e-6)


def test_dimming_and_surface_brightness_hand():
    # Tolman dimming 10 log10(1 + z) (common practice): z = 0.1 -> 0.4139269, z = 1 -> 3.0103000
    assert surface_brightness_dimming([0.1, 1.0]) == pytest.approx([0.4139269, 3.0103000], abs=1e-7)
    # <mu_e> = m + 2.5 log10(2 pi R_e^2) (half the light in pi R_e^2; definitions):
    # m = 12, R_e = 5: 2 pi 25 = 157.07963, log10 = 2.1961199 -> 12 + 5.4902997 = 17.4902997
    assert mean_surface_brightness(12.0, 5.0) == pytest.approx(17.4902997, abs=1e-6)
    # i = 0.4 (M_sun + 21.572 - mu_0): mu_0 = 17, M_sun = 3.67 -> 0.4 * 8.2421257 = 3.2968503
    assert log_surface_intensity(17.0, 3.67) == pytest.approx(3.2968503, abs=1e-6)


def test_bivariate_orthant_probabilities():
    from math import asin, erfc, pi, sqrt
    q = lambda x: 0.5 * erfc(x / sqrt(2.0))  # noqa: E731  (upper normal tail, definition)
    # independent (rho = 0): the product of the tails
    assert bivariate_upper(0.3, -0.7, 0.0) == pytest.approx(q(0.3) * q(-0.7), abs=1e-12)
    # at the origin: 1/4 + arcsin(rho) / (2 pi) (Sheppard 1899, Phil. Trans. A 192, 101; from memory)
    for rho in (-0.8, -0.2, 0.5, 0.95):
        assert bivariate_upper(0.0, 0.0, rho) == pytest.approx(0.25 + asin(rho) / (2 * pi), abs=1e-9)
    # general case against a direct integral: P = int_h^inf phi(x) Q((k - rho x)/sqrt(1 - rho^2)) dx
    # (conditional normal; common practice), fine trapezoid in the test
    for h, k, rho in ((0.4, -1.1, 0.6), (-1.5, 0.8, -0.7), (1.2, 1.9, 0.3), (-0.2, -0.3, 0.9)):
        x = np.linspace(h, h + 12.0, 200001)
        phi = np.exp(-0.5 * x * x) / math.sqrt(2 * math.pi)
        tail = np.array([q(v) for v in (k - rho * x[::100]) / math.sqrt(1 - rho * rho)])
        tail = np.interp(x, x[::100], tail)
        direct = float(np.sum(0.5 * (phi[1:] * tail[1:] + phi[:-1] * tail[:-1]) * np.diff(x)))
        assert bivariate_upper(h, k, rho) == pytest.approx(direct, abs=2e-6)


def test_log_orthant_probability_in_the_far_tails():
    """ln P(X > h, Y > k) keeps its digits where the Owen's-T difference has none (the
    plane fit's selection term needs it): against adaptive quadrature of the conditional
    integral int_h^inf phi(x) Phi((rho x - k) / sqrt(1 - rho^2)) dx (common practice),
    relative 1e-9, and equal to bivariate_upper's log where that is well above 1e-9."""
    from scipy.integrate import quad
    from scipy.stats import norm

    from galdist.fp import log_bivariate_upper

    for h, k, rho in ((6.0, 6.0, -0.3), (2.0, 2.0, -0.9), (7.0, -1.0, -0.5), (9.0, 0.5, 0.3), (-1.0, 7.0, 0.2)):
        a, b = (h, k) if h >= k else (k, h)  # integrate over the more extreme variable
        direct = quad(lambda x: norm.pdf(x) * norm.cdf((rho * x - b) / math.sqrt(1 - rho * rho)), a, np.inf,
                      epsabs=0, epsrel=1e-12, limit=200)[0]
        assert direct < 1e-11  # the far tail, below the 1e-9 where the integral takes over
        assert log_bivariate_upper(h, k, rho) == pytest.approx(math.log(direct), rel=1e-9)
    grid = np.array([[0.4, -1.1, 0.6], [1.2, 1.9, 0.3], [2.5, 3.0, 0.5]])
    np.testing.assert_allclose(log_bivariate_upper(grid[:, 0], grid[:, 1], grid[:, 2]),
                               np.log(bivariate_upper(grid[:, 0], grid[:, 1], grid[:, 2])), rtol=1e-12)


def test_plane_covariance_axes():
    # Magoulas et al. 2012: v1 = (1, -a, -b)/norm is the plane's normal, Sigma's eigenvector of
    # variance sigma_1^2; the three variances are sigma_1..3^2 (from memory)
    cov = plane_covariance(A_J, B_J, SIGMAS_J)
    v1 = np.array([1.0, -A_J, -B_J]) / math.sqrt(1 + A_J ** 2 + B_J ** 2)
    assert cov @ v1 == pytest.approx(0.053 ** 2 * v1, abs=1e-14)
    assert np.sort(np.linalg.eigvalsh(cov)) == pytest.approx(sorted([0.053 ** 2, 0.170 ** 2, 0.318 ** 2]), abs=1e-14)
    # the residual r - a s - b i of a Gaussian galaxy has sd sigma_1 sqrt(1 + a^2 + b^2) = 0.1073495 (hand)
    g = np.array([1.0, -A_J, -B_J])
    assert math.sqrt(g @ cov @ g) == pytest.approx(SIGMA_R_J, abs=1e-7)


# ----------------------------------------------------------------------------------------
# Worked example: raw sigma, R_e, <mu_e> to eta, every intermediate
# ----------------------------------------------------------------------------------------

def _worked_inputs(**over):
    """Illustrative 6dFGS-like galaxy (inputs invented, not published)."""
    base = dict(fp_sigma=np.array([180.0]), fp_sigma_err=np.array([9.0]), fp_aperture_arcsec=3.35,
                fp_re_arcsec=np.array([6.0]), fp_re_err=np.array([0.4]), fp_mu_e=np.array([17.30]),
                fp_mu_e_err=np.array([0.08]), fp_re_mu_corr=np.array([0.8]), z_helio=np.array([0.030]),
                z_cmb=np.array([0.031]), mu_z=np.array([35.600]), a_gal=np.array([0.020]),
                a_gal_err=np.array([0.010]), k_corr=np.array([-0.030]), k_corr_err=np.array([0.020]))
    base.update(over)
    return base


def test_worked_example_j_band():
    """Calibration: the shipped J-band plane (Magoulas et al. 2012, from memory); 6dF fibre
    6.7 arcsec across -> r_ap = 3.35 arcsec; run H0 = 70 against the calibration's 100."""
    cal = _shipped("fp_j_magoulas_2012")
    out = fp_distance(_worked_inputs(), cal, NO_MC)
    # 1. aperture: r_ap / (R_e/8) = 3.35 / 0.75 = 4.4666667; ^0.04 = 1.0616939 (Jorgensen et al. 1995)
    #    sigma_0 = 180 * 1.0616939 = 191.10491 km/s ; s = log10 = 2.2812718
    assert out["fp_sigma_0"][0] == pytest.approx(191.10491, abs=1e-5)
    assert out["fp_log_sigma_0"][0] == pytest.approx(2.2812718, abs=1e-7)
    # 2. dimming 10 log10(1.030) = 0.1283722 (Tolman, common practice)
    #    <mu_e>_0 = 17.30 - 0.020 - (-0.030) - 0.1283722 = 17.1816278
    assert out["fp_mu_e_0"][0] == pytest.approx(17.1816278, abs=1e-7)
    # 3. i = 0.4 (3.67 + 21.5721257 - 17.1816278) = 0.4 * 8.0604979 = 3.2241992
    assert out["fp_log_ie"][0] == pytest.approx(3.2241992, abs=1e-7)
    # 4. r_pred = 1.52 (2.2812718 - 2.188) - 0.89 (3.2241992 - 3.184) + 0.162
    #           = 0.1417732 - 0.0357773 + 0.162 = 0.2679959 (h^-1 kpc)
    #    same as the published form 1.52 s - 0.89 i - 0.33 (Magoulas et al. 2012, from memory):
    #    3.4675332 - 2.8695373 - 0.33 = 0.2679959
    assert out["fp_log_re_pred"][0] == pytest.approx(0.2679959, abs=1e-7)
    # 5. at H0 = 70: r = 0.2679959 - log10(70/100) = 0.2679959 + 0.1549020 = 0.4228979 -> 2.6476 kpc
    #    theta = 6 / 206264.806 = 2.9088821e-5 rad ; D_A = 2.6476 kpc / theta = 91.027328 Mpc
    #    D_L = 1.030^2 * 91.027328 = 96.570892 Mpc ; mu = 5 log10(96.570892) + 25 = 34.924231
    assert out["fp_d_mpc"][0] == pytest.approx(96.570892, abs=1e-5)
    assert out["fp_mu"][0] == pytest.approx(34.924231, abs=1e-6)
    # 6. D_L(z) = 10^(0.2 (35.6 - 25)) = 131.82567 Mpc ; D_A(z) = 131.82567 / 1.031^2 = 124.01741
    #    eta = log10(124.01741 / 91.027328) = 0.1343109 dex
    #    r_z = log10(2.9088821e-5 * 124017.41 kpc) + log10(0.7) = 0.4023068 = r_pred + eta
    assert out["fp_eta"][0] == pytest.approx(0.1343109, abs=1e-7)
    assert out["fp_log_re_z"][0] == pytest.approx(0.4023068, abs=1e-7)
    # Error (first order; derivatives of the formulas above by hand):
    #  d eta / d log theta = 1 + a alpha = 1.0608 ; d eta / d log sigma = -a = -1.52 ;
    #  d eta / d mu = 0.4 b = -0.356 ; d eta / dA = d eta / dK = -0.4 b = 0.356
    #  sigma_log theta = 0.4 / (6 ln10) = 0.0289530 ; sigma_log sigma = 9 / (180 ln10) = 0.0217147
    #  measurement: (1.0608*0.0289530)^2 + (1.52*0.0217147)^2 + (0.356*0.08)^2
    #             + 2*1.0608*(-0.356)*0.8*0.0289530*0.08 + 0.356^2 (0.01^2 + 0.02^2) = 0.00150766
    #  scatter 0.107^2 (the file) -> random eta_err = sqrt(0.00150766 + 0.011449) = 0.1138273
    assert out["fp_eta_err"][0] == pytest.approx(0.1138273, abs=1e-6)
    assert out["fp_mu_err"][0] == pytest.approx(5 * 0.1138273, abs=5e-6)
    #  systematic, the coefficients (diagonal 0.03, 0.01, 0.01 of the file): 0.0932718^2 * 0.03^2
    #             + 0.0401992^2 * 0.01^2 + 0.01^2 = 0.00010799 -> 5 sqrt(0.00010799) = 0.0519591 mag
    assert out["fp_mu_err_sys"][0] == pytest.approx(0.0519591, abs=5e-6)
    # sigma_d = d ln10/5 sigma_mu (random) = 96.570892 * 0.4605170 * 0.5691366 = 25.31095 Mpc
    assert out["fp_d_err_mpc"][0] == pytest.approx(25.31095, abs=1e-4)
    assert out["fp_flags"][0] == 0
    assert np.isnan(out["fp_eta_post_std"][0]) and np.isnan(out["fp_mu_err_mc"][0])
    # the R_e - <mu_e> error correlation matters: without it 0.1198174 (same hand sum, no cross
    # term 2*1.0608*(-0.356)*0.8*0.0289530*0.08 = -0.0013995)
    no_corr = fp_distance(_worked_inputs(fp_re_mu_corr=np.array([0.0])), cal, NO_MC)
    assert no_corr["fp_eta_err"][0] == pytest.approx(0.1198174, abs=1e-6)
    assert set(out) == set(REGISTRY['fp'].output_units())


def test_worked_example_monte_carlo():
    # the Monte Carlo of the worked galaxy re-runs the chain: 4000 draws, noise ~1.1 % (common practice)
    cal = _shipped("fp_j_magoulas_2012")
    out = fp_distance(_worked_inputs(), cal, FPSettings(mc_draws=4000, mc_seed=3, hubble_constant=H0_RUN))
    assert out["fp_mu_err_mc"][0] == pytest.approx(0.5691366, rel=0.04)  # the random part, worked example
    again = fp_distance(_worked_inputs(), cal, FPSettings(mc_draws=4000, mc_seed=3, hubble_constant=H0_RUN))
    assert again["fp_mu_err_mc"][0] == out["fp_mu_err_mc"][0]  # seeded


def test_total_magnitude_route_equals_surface_brightness_route():
    # <mu_e> = m + 2.5 log10(2 pi R_e^2): m = 17.30 - 2.5 log10(2 pi 36) = 17.30 - 5.8862059 = 11.4137941
    cal = _shipped("fp_j_magoulas_2012")
    ref = fp_distance(_worked_inputs(fp_re_mu_corr=np.array([0.0]), fp_mu_e_err=np.array([0.0])), cal, NO_MC)
    via_mag = fp_distance(_worked_inputs(fp_mu_e=np.array([np.nan]), fp_mag=np.array([11.41379408]),
                                         fp_mag_err=np.array([0.0]), fp_re_mu_corr=np.array([0.0]),
                                         fp_mu_e_err=np.array([np.nan])), cal, NO_MC)
    assert via_mag["fp_eta"][0] == pytest.approx(ref["fp_eta"][0], abs=1e-7)
    # an R_e error now moves <mu_e> by 5 dlog R_e (same formula): d eta/d log theta becomes
    # 1.0608 + 5 * (-0.356) = -0.7192 instead of 1.0608, i.e. measurement variance
    # (0.7192*0.0289530)^2 + (1.52*0.0217147)^2 + 0.356^2 * 0.0005 = 0.0015864 vs 0.0020961
    var_ref = ref["fp_eta_err"][0] ** 2
    var_mag = via_mag["fp_eta_err"][0] ** 2
    assert var_ref - var_mag == pytest.approx(0.0020961 - 0.0015864, abs=2e-7)


def test_hubble_constant_convention():
    # sizes in h^-1 kpc (H0 = 100) read at a run H0 of 70 are 100/70 times larger, so is D
    # (distance ~ 1/H0, common practice); eta does not depend on the run's H0 when mu_z uses it too
    h100 = _plane_cal()
    absolute = _plane_cal(h0=None)
    inp = _worked_inputs()
    d_h = fp_distance(inp, h100, NO_MC)["fp_d_mpc"][0]
    d_abs = fp_distance(inp, absolute, NO_MC)["fp_d_mpc"][0]
    assert d_h / d_abs == pytest.approx(100 / 70, rel=1e-12)
    # run H0 = 50: mu_z grows by 5 log10(70/50) = 0.7306402 (mu_z ~ 5 log10(cz/H0))
    at50 = fp_distance(_worked_inputs(mu_z=np.array([35.6 + 0.7306402])), h100,
                       FPSettings(mc_draws=0, hubble_constant=50.0))
    at70 = fp_distance(inp, h100, NO_MC)
    assert at50["fp_eta"][0] == pytest.approx(at70["fp_eta"][0], abs=1e-7)
    assert at50["fp_d_mpc"][0] == pytest.approx(at70["fp_d_mpc"][0] * 70 / 50, rel=1e-12)
    with pytest.raises(ValueError, match="hubble_constant"):
        fp_distance(inp, h100, FPSettings(mc_draws=0))


def test_shipped_r_band_reproduces_published_form():
    # Bernardi et al. 2003, AJ 125, 1866 (from memory): log R_o = 1.49 log sigma_o + 0.75 mu_o/2.5 - 8.778
    # (h70^-1 kpc). Galaxy with s = log10 200 = 2.3010300, mu_0 = 20.0 (no corrections):
    # 1.49 * 2.3010300 + 0.75 * 8.0 - 8.778 = 3.4285347 + 6.0 - 8.778 = 0.6505347
    cal = _shipped("fp_r_bernardi_2003")
    check_calibration(cal)
    inp = dict(fp_sigma=np.array([200.0]), fp_re_arcsec=np.array([3.0]), fp_mu_e=np.array([20.0]),
               z_helio=np.array([0.05]), mu_z=np.array([36.8]), z_cmb=np.array([0.05]))
    settings = FPSettings(mc_draws=0, hubble_constant=H0_RUN, apply_aperture_correction=False,
                          apply_galactic_extinction=False, apply_kcorrection=False, apply_dimming=False)
    out = fp_distance(inp, cal, settings)
    # the file's c at the pivot is rounded to 1e-4 (0.4916)
    assert out["fp_log_re_pred"][0] == pytest.approx(0.6505347, abs=1e-4)
    assert out["fp_flags"][0] == 0


# ----------------------------------------------------------------------------------------
# Shipped calibration files
# ----------------------------------------------------------------------------------------

@pytest.mark.parametrize("name", ["fp_j_magoulas_2012", "fp_r_bernardi_2003"])
def test_shipped_files_load_as_planes(name):
    cal = _shipped(name)
    terms = check_calibration(cal)
    assert "from memory" in cal.provenance
    assert terms.aperture_exponent == 0.04 and terms.aperture_fraction == 0.125  # Jorgensen et al. 1995


def test_shipped_j_band_values():
    # Magoulas et al. 2012 (from memory): a = 1.52, b = -0.89, c = -0.33 with r in h^-1 kpc
    cal = _shipped("fp_j_magoulas_2012")
    terms = check_calibration(cal)
    a, b, c = cal.coefficients
    assert (a, b) == (1.52, -0.89)
    assert c + a * (0 - cal.pivot) + b * (0 - terms.pivot_log_ie) == pytest.approx(-0.33, abs=1e-12)
    assert terms.hubble_constant == 100
    assert terms.gaussian.sigmas == (0.053, 0.318, 0.170)
    # sigma cut 112 km/s of 6dFGS (from memory): log10 112 = 2.0492
    assert cal.valid_range[0] == pytest.approx(2.05, abs=0.001)
    assert cal.scatter == pytest.approx(SIGMA_R_J, abs=5e-4)


# ----------------------------------------------------------------------------------------
# Gaussian estimator: single galaxy against the conditional-Gaussian formula
# ----------------------------------------------------------------------------------------

def test_gaussian_posterior_without_errors_is_the_conditional_gaussian():
    """No selection, no measurement errors: P(eta) is Gaussian with mean r_z - E[r | s, i] and
    variance Sigma_rr - Sigma_r,si Sigma_si^-1 Sigma_si,r (regression on the 3-D Gaussian of
    Magoulas et al. 2012; conditional normal, common practice)."""
    cal = _plane_cal()
    inp = _worked_inputs(fp_sigma_err=np.array([0.0]), fp_re_err=np.array([0.0]), fp_mu_e_err=np.array([0.0]),
                         a_gal_err=np.array([0.0]), k_corr_err=np.array([0.0]))
    settings = FPSettings(estimator="gaussian", mc_draws=0, hubble_constant=H0_RUN)
    out = fp_distance(inp, cal, settings)
    # from the worked example: (r_z, s, i) = (0.4023068, 2.2812718, 3.2241992)
    x = np.array([0.4023068, 2.2812718, 3.2241992])
    centre = np.array([C_PIVOT_J, S_BAR, I_BAR])   # the centre lies on the plane (pivot = centre here)
    sig = _sigma_matrix()
    w = np.linalg.solve(sig[1:, 1:], sig[1:, 0])
    eta_hat = x[0] - (centre[0] + w @ (x[1:] - centre[1:]))
    sd = math.sqrt(sig[0, 0] - sig[0, 1:] @ w)
    assert out["fp_eta"][0] == pytest.approx(eta_hat, abs=2e-6)
    assert out["fp_eta_post_std"][0] == pytest.approx(sd, abs=2e-6)
    assert out["fp_eta_post_mode"][0] == pytest.approx(eta_hat, abs=1e-4)
    # the shipped file has zero-point and coefficient errors; this one has none: eta_err = posterior sd
    assert out["fp_eta_err"][0] == pytest.approx(sd, abs=2e-6)
    # D_A = D_A(z) 10^-eta ; D_L = (1+z_helio)^2 D_A ; D_A(z) = 124.01741 Mpc (worked example)
    assert out["fp_d_mpc"][0] == pytest.approx(1.03 ** 2 * 124.01741 * 10 ** -eta_hat, rel=1e-5)
    # the same posterior on a grid: the Gaussian density, normalised over the grid
    grid = np.linspace(-0.6, 0.9, 301)
    post = eta_posterior(inp, cal, settings, eta_grid=grid)
    expect = -0.5 * ((grid - eta_hat) / sd) ** 2 - math.log(sd * math.sqrt(2 * math.pi))
    assert post["log_posterior"][0] == pytest.approx(expect, abs=1e-5)
    assert not post["truncated"][0]
    narrow = eta_posterior(inp, cal, settings, eta_grid=np.linspace(0.0, 0.2, 41))
    assert narrow["truncated"][0]


def test_selection_term_against_brute_force():
    """log f(eta) of one galaxy: the fraction of model galaxies at eta passing the cuts, drawn
    in the test from the Gaussian and turned into observables with the forward formulas."""
    cal = _plane_cal()
    inp = _worked_inputs(fp_sigma_err=np.array([0.0]), fp_re_err=np.array([0.0]), fp_mu_e_err=np.array([0.0]),
                         a_gal_err=np.array([0.0]), k_corr_err=np.array([0.0]))
    s_cut, m_lim = 2.20, 11.6    # the worked galaxy: s = 2.2813, m = 17.30 - 5.8862507 = 11.4137
    grid = np.array([-0.1, 0.0, 0.1, 0.2, 0.3])
    plain = eta_posterior(inp, cal, FPSettings(estimator="gaussian", mc_draws=0, hubble_constant=H0_RUN),
                          eta_grid=grid)["log_posterior"][0]
    sel = eta_posterior(inp, cal, FPSettings(estimator="gaussian", mc_draws=0, hubble_constant=H0_RUN,
                                             selection_log_sigma_min=s_cut, selection_mag_limit=m_lim),
                        eta_grid=grid)["log_posterior"][0]
    module_log_f = -(sel - plain)
    rng = np.random.default_rng(11)
    root = np.linalg.cholesky(_sigma_matrix())
    da_z_kpc = 124017.41                                  # worked example
    frac = []
    for eta in grid:
        x = np.array([C_PIVOT_J + eta, S_BAR, I_BAR]) + rng.standard_normal((400000, 3)) @ root.T
        # r_z (h^-1 kpc at D_A(z)) -> angle: log theta_rad = r_z - log10(0.7) - log10 D_A(z)
        theta = 10 ** (x[:, 0] - math.log10(0.7) - math.log10(da_z_kpc)) * ARCSEC
        mu_obs = M_SUN_J + SB_UNIT - 2.5 * x[:, 2] + 0.020 - 0.030 + 10 * math.log10(1.03)
        m = mu_obs - 2.5 * np.log10(2 * np.pi * theta ** 2)
        frac.append(np.mean((x[:, 1] >= s_cut) & (m <= m_lim)))
    brute = np.log(frac)
    # compare shapes (the posterior's normalisation is a constant); binomial noise < 0.005
    assert (module_log_f - module_log_f.mean()) == pytest.approx(brute - brute.mean(), abs=0.01)
    assert np.ptp(brute) > 0.3  # the cut matters over this range (else the test could not fail)


# ----------------------------------------------------------------------------------------
# Recovery on simulated planes
# ----------------------------------------------------------------------------------------

# Measurement errors of the simulation, in log space (so E is the same for every galaxy):
SIG_LOG_SIGMA, SIG_LOG_THETA, SIG_MU, RHO = 0.026, 0.035, 0.20, 0.95
R_AP = 3.35


def _simulate(n, seed, *, eta_sd=0.04):
    """Galaxies drawn from the 3-D Gaussian plane, put at distances, observed with errors.

    Forward model written here from the definitions: axes of Magoulas et al. 2012; sizes in
    h^-1 kpc read at H0 = 70; sigma_ap from sigma_0 by Jorgensen et al. 1995; <mu_e> from i
    with M_sun and 21.572, plus A, K and Tolman dimming. Errors Gaussian in log sigma,
    log theta and <mu_e>, the last two correlated (RHO), as reported to the module.
    """
    rng = np.random.default_rng(seed)
    v1, v2, v3 = _axes(A_J, B_J)
    xi = rng.standard_normal((n, 3)) * np.array(SIGMAS_J)
    x = np.array([C_PIVOT_J, S_BAR, I_BAR]) + xi[:, :1] * v1 + xi[:, 1:2] * v2 + xi[:, 2:3] * v3
    r, s, i = x.T
    z_cmb = 0.05 * rng.uniform(0.2 ** 3, 1.0, n) ** (1 / 3)             # uniform in volume
    d_l_z = 299792.458 * z_cmb / H0_RUN * (1 + 0.5 * (1 + 0.55) * z_cmb)  # q0 = -0.55 (reference-values.md)
    mu_z = 5 * np.log10(d_l_z) + 25
    da_z = d_l_z / (1 + z_cmb) ** 2
    eta = rng.standard_normal(n) * eta_sd
    da = da_z * 10 ** -eta
    z_helio = z_cmb - 0.0005
    theta = 10 ** r * (100 / H0_RUN) / (da * 1000) * ARCSEC
    sigma_ap = 10 ** s / (R_AP / (theta / 8)) ** ALPHA
    a_gal = rng.uniform(0, 0.05, n)
    k_corr = -2.0 * z_helio
    mu = M_SUN_J + SB_UNIT - 2.5 * i + a_gal + k_corr + 10 * np.log10(1 + z_helio)
    g = rng.standard_normal((n, 3))
    sigma_ap = sigma_ap * 10 ** (SIG_LOG_SIGMA * g[:, 0])
    theta = theta * 10 ** (SIG_LOG_THETA * g[:, 1])
    mu = mu + SIG_MU * (RHO * g[:, 1] + math.sqrt(1 - RHO ** 2) * g[:, 2])
    inputs = dict(fp_sigma=sigma_ap, fp_sigma_err=sigma_ap * SIG_LOG_SIGMA * LN10, fp_aperture_arcsec=R_AP,
                  fp_re_arcsec=theta, fp_re_err=theta * SIG_LOG_THETA * LN10, fp_mu_e=mu,
                  fp_mu_e_err=np.full(n, SIG_MU), fp_re_mu_corr=np.full(n, RHO), z_helio=z_helio,
                  z_cmb=z_cmb, mu_z=mu_z, a_gal=a_gal, k_corr=k_corr)
    return inputs, eta


def _measurement_matrix():
    """E of (r_z, s, i) for the simulation's errors, by hand from the chain:
    r_z = log theta + ..., s = log sigma - alpha log theta + ..., i = -0.4 <mu_e> + ..."""
    lt, ls, mu = SIG_LOG_THETA, SIG_LOG_SIGMA, SIG_MU
    c_tm = RHO * lt * mu
    return np.array([
        [lt ** 2, -ALPHA * lt ** 2, -0.4 * c_tm],
        [-ALPHA * lt ** 2, ls ** 2 + ALPHA ** 2 * lt ** 2, 0.4 * ALPHA * c_tm],
        [-0.4 * c_tm, 0.4 * ALPHA * c_tm, 0.16 * mu ** 2],
    ])


def _recovery_figures(out, eta_true):
    d = out["fp_eta"] - eta_true
    ok = np.isfinite(d)
    return ok, float(np.median(d[ok])), float(np.std(d[ok])), float(np.std(d[ok] / out["fp_eta_err"][ok]))


def test_recovery_plane_estimator():
    inputs, eta_true = _simulate(20000, seed=1)
    out = fp_distance(inputs, _plane_cal(), NO_MC)
    ok, median, scatter, pull = _recovery_figures(out, eta_true)
    assert ok.all()
    # injected: plane scatter sigma_1 sqrt(1 + a^2 + b^2) (Magoulas et al. 2012 model) plus the
    # measurement errors through eta = r_z - a s - b i: g E g^T, g = (1, -a, -b) (hand)
    g = np.array([1.0, -A_J, -B_J])
    injected = math.sqrt(SIGMA_R_J ** 2 + g @ _measurement_matrix() @ g)   # = 0.1213
    assert abs(median) < 0.005                       # issue: median delta eta within 0.005 dex
    assert scatter / injected == pytest.approx(1.0, abs=0.05)   # issue: within 5 % of injected
    assert 0.9 < pull < 1.1                          # issue: eta error pull within 0.9-1.1


def test_recovery_gaussian_estimator():
    inputs, eta_true = _simulate(20000, seed=2)
    settings = FPSettings(estimator="gaussian", mc_draws=0, hubble_constant=H0_RUN)
    out = fp_distance(inputs, _plane_cal(), settings)
    ok, median, scatter, pull = _recovery_figures(out, eta_true)
    assert ok.all()
    # injected: the conditional sd of r given (s, i) under Sigma + E (conditional normal)
    v = _sigma_matrix() + _measurement_matrix()
    injected = math.sqrt(v[0, 0] - v[0, 1:] @ np.linalg.solve(v[1:, 1:], v[1:, 0]))   # = 0.1076
    assert abs(median) < 0.005
    assert scatter / injected == pytest.approx(1.0, abs=0.05)
    assert 0.9 < pull < 1.1
    # the gaussian estimator beats the plane estimator on the same galaxies (Magoulas et al. 2012)
    plane = fp_distance(inputs, _plane_cal(), NO_MC)
    assert scatter < np.std(plane["fp_eta"] - eta_true)


def _select(inputs, s_cut, m_lim):
    """The survey's cuts on observed quantities (forward formulas, as in _simulate)."""
    m = inputs["fp_mu_e"] - 2.5 * np.log10(2 * np.pi * inputs["fp_re_arcsec"] ** 2)
    s = np.log10(inputs["fp_sigma"] * (R_AP / (inputs["fp_re_arcsec"] / 8)) ** ALPHA)
    keep = (s >= s_cut) & (m <= m_lim)
    return {k: (v[keep] if np.ndim(v) else v) for k, v in inputs.items()}, keep


def test_recovery_gaussian_estimator_with_selection():
    """A sigma cut and a magnitude limit (about 55 % kept). All galaxies at eta = 0 so the
    likelihood's score can be tested at the truth: for a correctly normalised likelihood
    (selection included) its mean over the selected sample is zero (common practice)."""
    inputs, eta_true = _simulate(60000, seed=3, eta_sd=0.0)
    s_cut, m_lim = 2.05, 13.4   # sigma >= 112 km/s as 6dFGS (from memory); m_lim chosen for the test
    sub, keep = _select(inputs, s_cut, m_lim)
    assert 0.4 < keep.mean() < 0.7
    cal = _plane_cal()
    with_sel = FPSettings(estimator="gaussian", mc_draws=0, hubble_constant=H0_RUN,
                          selection_log_sigma_min=s_cut, selection_mag_limit=m_lim)
    blind = FPSettings(estimator="gaussian", mc_draws=0, hubble_constant=H0_RUN)
    grid = np.array([-0.01, 0.0, 0.01])
    scores = {}
    for label, st in (("with", with_sel), ("blind", blind)):
        lp = eta_posterior(sub, cal, st, eta_grid=grid)["log_posterior"]
        score = (lp[:, 2] - lp[:, 0]) / 0.02
        scores[label] = (score.mean(), score.std() / math.sqrt(score.size))
    mean, err = scores["with"]
    assert abs(mean) < 3 * err, scores
    mean_b, err_b = scores["blind"]
    assert abs(mean_b) > 10 * err_b, scores          # ignoring the selection is detectably wrong

    out = fp_distance(sub, cal, with_sel)
    ok, median, scatter, pull = _recovery_figures(out, 0.0)
    assert ok.all()
    # the posterior mode (the maximum-likelihood eta) is unbiased to the 0.005 dex
    assert abs(np.median(out["fp_eta_post_mode"])) < 0.005
    # the posterior mean of a single truncated likelihood keeps a small offset (about -0.007 dex
    # here, a few % of its width): bounded, not hidden
    assert abs(median) < 0.015
    assert 0.9 < pull < 1.1
    blind_out = fp_distance(sub, cal, blind)
    assert np.median(blind_out["fp_eta"]) > 0.02     # selection-blind: biased by ~0.03 dex


def test_gaussian_monte_carlo_matches_posterior_width():
    inputs, _ = _simulate(2000, seed=4)
    sub, _ = _select(inputs, 2.05, 13.4)
    sub = {k: (v[:120] if np.ndim(v) else v) for k, v in sub.items()}
    cal = _plane_cal(cov=np.diag([0.03, 0.01, 0.01]) ** 2)
    st = FPSettings(estimator="gaussian", mc_draws=300, mc_seed=5, hubble_constant=H0_RUN,
                    selection_log_sigma_min=2.05, selection_mag_limit=13.4)
    out = fp_distance(sub, cal, st)
    ratio = out["fp_mu_err_mc"] / out["fp_mu_err"]
    assert np.isfinite(ratio).all()
    # parametric bootstrap vs posterior width: equal on average (300 draws: ~4 % noise per row)
    assert np.median(ratio) == pytest.approx(1.0, abs=0.05)


def test_plane_monte_carlo_matches_analytic_on_a_sample():
    inputs, _ = _simulate(300, seed=6)
    cal = _plane_cal(cov=np.diag([0.03, 0.01, 0.01]) ** 2)
    out = fp_distance(inputs, cal, FPSettings(mc_draws=400, mc_seed=8, hubble_constant=H0_RUN))
    ratio = out["fp_mu_err_mc"] / out["fp_mu_err"]
    assert np.median(ratio) == pytest.approx(1.0, abs=0.03)


# ----------------------------------------------------------------------------------------
# Edges: flags, never a crash, no silent extrapolation
# ----------------------------------------------------------------------------------------

def _rows(n):
    inp = _worked_inputs()
    return {k: (np.repeat(v, n) if np.ndim(v) else v) for k, v in inp.items()}


def test_impossible_inputs_are_missing_input():
    cal = _shipped("fp_j_magoulas_2012")
    inp = _rows(9)
    inp["fp_sigma"][0] = -5.0          # negative dispersion
    inp["fp_sigma"][1] = np.nan
    inp["fp_re_arcsec"][2] = 0.0       # zero size
    inp["fp_mu_e"][3] = 45.0           # beyond PHYSICAL_BOUNDS (5-35 mag/arcsec^2)
    inp["fp_sigma_err"][4] = -1.0      # invalid error
    inp["fp_re_mu_corr"][5] = 1.3      # |rho| > 1
    inp["z_helio"][6] = np.inf
    inp["a_gal"][7] = np.nan
    out = fp_distance(inp, cal, NO_MC)
    missing = F.has(out["fp_flags"], F.Method.MISSING_INPUT)
    assert missing.tolist() == [True] * 8 + [False]
    for key in ("fp_eta", "fp_eta_err", "fp_mu", "fp_mu_err", "fp_d_mpc", "fp_d_err_mpc"):
        assert np.isnan(out[key][:8]).all() and np.isfinite(out[key][8])
    assert F.has(out["fp_flags"], F.Method.HIGH_EXTINCTION)[7]   # no A: extinction unknown
    assert all(len(out[k]) == 9 for k in REGISTRY['fp'].output_units())


def test_correlation_set_must_be_a_valid_matrix():
    # rho_st = rho_tw = 0.9 with rho_sw = -0.9: each |rho| <= 1 but det < 0 (not a covariance)
    cal = _shipped("fp_j_magoulas_2012")
    inp = _worked_inputs(fp_sigma_re_corr=np.array([0.9]), fp_re_mu_corr=np.array([0.9]),
                         fp_sigma_mu_corr=np.array([-0.9]))
    out = fp_distance(inp, cal, NO_MC)
    assert F.has(out["fp_flags"], F.Method.MISSING_INPUT)[0] and np.isnan(out["fp_mu"][0])


def test_out_of_range_not_extrapolated_unless_allowed():
    # J-band file: valid s in [2.05, 2.60], i in [2.45, 3.95] (galdist's choices, see the file)
    cal = _shipped("fp_j_magoulas_2012")
    inp = _rows(3)
    inp["fp_sigma"] = np.array([80.0, 180.0, 180.0])   # s = log10(80 * 1.0617) = 1.929 < 2.05
    inp["fp_mu_e"] = np.array([17.30, 17.30, 13.0])    # mu_0 = 12.88 -> i = 0.4 * 12.36 = 4.944 > 3.95
    out = fp_distance(inp, cal, NO_MC)
    assert F.has(out["fp_flags"], F.Method.OUT_OF_RANGE).tolist() == [True, False, True]
    assert not F.has(out["fp_flags"], F.Method.EXTRAPOLATED).any()
    assert np.isnan(out["fp_mu"][[0, 2]]).all() and np.isfinite(out["fp_mu"][1])
    assert np.isfinite(out["fp_log_sigma_0"]).all()      # intermediates still reported
    ext = fp_distance(inp, cal, FPSettings(mc_draws=0, hubble_constant=H0_RUN, allow_extrapolation=True))
    assert F.has(ext["fp_flags"], F.Method.EXTRAPOLATED).tolist() == [True, False, True]
    assert np.isfinite(ext["fp_mu"]).all()


def test_inherited_flags_and_missing_redshift_distance():
    cal = _shipped("fp_j_magoulas_2012")
    inp = _rows(4)
    inp["quality_flags"] = np.array([0, int(F.Quality.REDSHIFT_INVALID), 0, 0], dtype=np.uint32)
    inp["ext_flags"] = np.array([0, 0, int(F.Ext.HIGH_EXTINCTION), 0], dtype=np.uint32)
    inp["kcorr_flags"] = np.array([0, 0, 0, int(F.KCorr.COLOR_CLIPPED)], dtype=np.uint32)
    inp["mu_z"] = np.array([np.nan, 35.6, 35.6, 35.6])
    out = fp_distance(inp, cal, NO_MC)
    f = out["fp_flags"]
    assert F.has(f, F.Method.MISSING_INPUT).tolist() == [False, True, False, False]
    assert F.has(f, F.Method.HIGH_EXTINCTION).tolist() == [False, False, True, False]
    assert F.has(f, F.Method.KCORR_PROBLEM).tolist() == [False, False, False, True]
    # no redshift distance: eta is NaN, the FP distance itself is not (it never uses mu_z)
    assert np.isnan(out["fp_eta"][0]) and np.isfinite(out["fp_mu"][0])
    assert out["fp_mu"][0] == pytest.approx(34.924231, abs=1e-6)   # worked example


def test_gaussian_flags_galaxies_outside_the_selection():
    cal = _plane_cal()
    inp = _rows(2)
    inp["fp_sigma"] = np.array([180.0, 100.0])  # s = 2.2813 and log10(100 * 1.0617) = 2.0260 < 2.05
    st = FPSettings(estimator="gaussian", mc_draws=0, hubble_constant=H0_RUN, selection_log_sigma_min=2.05)
    out = fp_distance(inp, cal, st)
    assert F.has(out["fp_flags"], F.Method.OUT_OF_RANGE).tolist() == [False, True]
    assert np.isnan(out["fp_eta"][1]) and np.isfinite(out["fp_eta"][0])
    inp["mu_z"] = np.array([np.nan, 35.6])      # the gaussian estimator needs the redshift distance
    out = fp_distance(inp, cal, st)
    assert F.has(out["fp_flags"], F.Method.MISSING_INPUT)[0]


def test_all_nan_shard_and_scalars():
    cal = _shipped("fp_j_magoulas_2012")
    n = 5
    inp = {k: np.full(n, np.nan) for k in ("fp_sigma", "fp_re_arcsec", "fp_mu_e", "z_helio", "a_gal", "k_corr")}
    inp["fp_aperture_arcsec"] = 3.35
    for st in (NO_MC, FPSettings(mc_draws=20, hubble_constant=H0_RUN)):
        out = fp_distance(inp, cal, st)
        assert F.has(out["fp_flags"], F.Method.MISSING_INPUT).all()
        assert np.isnan(out["fp_mu"]).all() and np.isnan(out["fp_mu_err_mc"]).all()
    inp.update(z_cmb=np.full(n, np.nan), mu_z=np.full(n, np.nan))
    out = fp_distance(inp, cal, FPSettings(estimator="gaussian", mc_draws=20, hubble_constant=H0_RUN))
    assert np.isnan(out["fp_eta"]).all()
    # scalars broadcast: a single galaxy given as scalars equals the array form
    scalar = {k: (float(v[0]) if np.ndim(v) else v) for k, v in _worked_inputs().items()}
    assert fp_distance(scalar, cal, NO_MC)["fp_mu"][0] == pytest.approx(34.924231, abs=1e-6)


def test_malmquist_plane_only():
    # homogeneous Malmquist, mean: exp(3.5 Delta^2), Delta = ln10/5 sigma_mu (Lynden-Bell et al.
    # 1988, from memory) of the random error: sigma_mu = 0.5691366 -> Delta = 0.2620971,
    # factor exp(0.2404321) = 1.2717986
    cal = _shipped("fp_j_magoulas_2012")
    out = fp_distance(_worked_inputs(), cal, FPSettings(mc_draws=0, hubble_constant=H0_RUN, malmquist=True))
    assert out["fp_malmquist_applied"][0]
    assert out["fp_d_mpc"][0] == pytest.approx(96.570892 * 1.2717986, rel=1e-6)
    with pytest.raises(ValueError, match="malmquist"):
        FPSettings(estimator="gaussian", malmquist=True)


# ----------------------------------------------------------------------------------------
# Settings and structural errors
# ----------------------------------------------------------------------------------------

def test_settings_from_config():
    st = FPSettings.from_config({"estimator": "gaussian", "selection_log_sigma_min": 2.05, "mc_draws": 50,
                                 "calibration": "fp_j_magoulas_2012", "band": "J", "mc_max_rows": 10},
                                hubble_constant=70.0, mag_offset=-0.91, ignore=("calibration", "band", "mc_max_rows"))
    assert (st.estimator, st.selection_log_sigma_min, st.mc_draws, st.hubble_constant, st.mag_offset) == \
        ("gaussian", 2.05, 50, 70.0, -0.91)
    with pytest.raises(ValueError, match="unknown config key"):
        FPSettings.from_config({"estimater": "plane"})
    with pytest.raises(ValueError, match="hubble_constant"):
        FPSettings.from_config({"hubble_constant": 70})     # not a user key
    for bad in ({"estimator": "ml"}, {"mc_draws": 1}, {"mc_seed": -1}, {"apply_dimming": "yes"},
                {"selection_mag_limit": 13.0}, {"malmquist_kind": "mode"},
                {"estimator": "gaussian", "selection_log_sigma_min": float("nan")}):
        with pytest.raises(ValueError, match=r"fp\."):
            FPSettings(**bad)
    with pytest.raises(ValueError, match="hubble_constant"):
        FPSettings(hubble_constant=-1.0)


def test_system_offset_applies_to_surface_brightness():
    # a catalog in AB for a Vega calibration: 2MASS J AB - Vega = 0.91 (Blanton & Roweis 2007,
    # AJ 133, 734, Table 1; secondary copy) -> mag_offset = -0.91 brings 18.21 AB to 17.30 Vega
    cal = _shipped("fp_j_magoulas_2012")
    out = fp_distance(_worked_inputs(fp_mu_e=np.array([18.21])), cal,
                      FPSettings(mc_draws=0, hubble_constant=H0_RUN, mag_offset=-0.91))
    assert out["fp_mu_e_0"][0] == pytest.approx(17.1816278, abs=1e-7)   # worked example


def test_structural_errors():
    cal = _shipped("fp_j_magoulas_2012")
    inp = _worked_inputs()
    with pytest.raises(ValueError, match="unknown fp input"):
        fp_distance({**inp, "fp_sigmaa": 1.0}, cal, NO_MC)
    with pytest.raises(ValueError, match="fp_aperture_arcsec"):
        fp_distance({k: v for k, v in inp.items() if k != "fp_aperture_arcsec"}, cal, NO_MC)
    assert np.isfinite(fp_distance({k: v for k, v in inp.items() if k != "fp_aperture_arcsec"}, cal,
                                   FPSettings(mc_draws=0, hubble_constant=H0_RUN,
                                              apply_aperture_correction=False))["fp_mu"][0])
    with pytest.raises(ValueError, match="fp_mu_e"):
        fp_distance({k: v for k, v in inp.items() if k != "fp_mu_e"}, cal, NO_MC)
    with pytest.raises(ValueError, match="shape"):
        fp_distance({**inp, "fp_re_arcsec": np.array([6.0, 7.0])}, cal, NO_MC)
    with pytest.raises(ValueError, match="z_cmb"):
        fp_distance({k: v for k, v in inp.items() if k != "z_cmb"}, cal, NO_MC)
    with pytest.raises(ValueError, match="method must be 'fp'"):
        check_calibration(dataclasses.replace(cal, method="sbf"))
    with pytest.raises(ValueError, match="form must be 'plane'"):
        check_calibration(dataclasses.replace(cal, form="luminosity"))
    with pytest.raises(ValueError, match="3 finite coefficients"):
        check_calibration(dataclasses.replace(cal, coefficients=np.array([1.5, -0.9])))
    with pytest.raises(ValueError, match="'plane'"):
        check_calibration(dataclasses.replace(cal, text="name: x\n"))
    with pytest.raises(ValueError, match="abs_mag_sun"):
        check_calibration(_plane_cal(plane_extra={"abs_mag_sun": "3.67"}))
    with pytest.raises(ValueError, match="gaussian"):
        fp_distance(inp, _shipped("fp_r_bernardi_2003"),
                    FPSettings(estimator="gaussian", mc_draws=0, hubble_constant=H0_RUN))
    with pytest.raises(ValueError, match="eta_grid"):
        eta_posterior(inp, cal, FPSettings(estimator="gaussian", hubble_constant=H0_RUN), eta_grid=[0.1, 0.0, 0.2])


def test_inputs_table_names_units():
    # every input says what it is and in which unit (the registry builds ingest from this)
    assert INPUTS["fp_sigma"][0] and INPUTS["fp_re_arcsec"][0] and INPUTS["z_helio"][0]
    for key in ("fp_sigma", "fp_aperture_arcsec", "fp_re_arcsec", "fp_mu_e", "fp_mag", "a_gal", "mu_z"):
        assert "(" in INPUTS[key][1], key
