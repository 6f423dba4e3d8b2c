"""Each calibration's own conventions, and errors kept apart into random and systematic.

- Every shipped calibration states its extinction convention and the H0 its zero point
  assumes; galdist applies both (galdist.conventions): A_<band> rescaled onto the
  calibration's convention, an H0-scaled zero point moved to the run's H0, and the
  implied H0 of such a calibration reported as not independent.
- A simulated sample with a known zero-point error: the sample statistics test with the
  random errors (chi^2_nu ~ 1) and report the zero point's error once, mapped through
  dH0 = H0 ln10 / 5 dmu.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from galdist import config as gconfig
from galdist import conventions, crosscheck, flags
from galdist.calibration import load_calibration
from galdist.methods import REGISTRY
from galdist.report import render
from galdist.sbf import SBFSettings, sbf_distance

DEFAULT = gconfig.validate(gconfig.load(gconfig.DEFAULT_CONFIG))
LN10 = math.log(10.0)

#: every shipped calibration -> (extinction convention, H0 of its zero point), as its
#: file's notes give the reasons (all from memory, see each file)
SHIPPED = {
    "fp_j_magoulas_2012": ("sfd98", 100.0),      # sizes in h^-1 kpc
    "fp_r_bernardi_2003": ("sfd98", 70.0),       # sizes in h70^-1 kpc
    "sbf_blakeslee2009_acs_z850": ("sfd98", None),   # Cepheid zero point
    "sbf_jensen2015_wfc3_f110w": ("sf11", None),
    "sbf_tonry1997_cousins_i": ("sfd98", None),
    "tf_btfr_lelli_2019": ("sf11", None),
    "tf_i_tully_courtois_2012": ("sfd98", None),     # Cepheid and TRGB zero point
    "tf_i_tully_courtois_2012_inverse": ("sfd98", None),
    "tf_ks_masters_2008": ("sfd98", 70.0),       # M - 5 log10 h with h = 0.70
}


@pytest.mark.parametrize("name", sorted(SHIPPED))
def test_shipped_calibration_states_and_applies_its_conventions(name):
    cal = load_calibration(name)
    extinction, h0 = SHIPPED[name]
    assert (cal.extinction_convention, cal.zero_point_h0) == (extinction, h0)
    # extinction: the factor onto the calibration's convention, for galdist's default bands
    factors = conventions.extinction_factors(DEFAULT, cal.extinction_convention)
    if extinction == "sf11":   # galdist's default is that convention: nothing changes
        assert factors == pytest.approx({b: 1.0 for b in DEFAULT["bands"]}, abs=1e-12)
    else:   # all A larger: the 1998 map unscaled, and O'Donnell's law above Fitzpatrick's in V and I
        assert all(f > 1.1 for f in factors.values())
    # H0: moved to the run's H0 (67.4 here) when the zero point assumes one, else untouched
    moved = conventions.at_run_h0(cal, 67.4)
    assert conventions.independent_h0(cal) is (h0 is None)
    if h0 is None or cal.form == "plane":   # the plane's sizes are rescaled inside galdist.fp
        assert moved is cal
    else:
        assert moved.zero_point_h0 == 67.4
        shift = 5 * math.log10(67.4 / h0)
        assert moved.relation(np.array([2.5]))[0] - cal.relation(np.array([2.5]))[0] == pytest.approx(shift, abs=1e-12)


def test_masters_zero_point_at_another_h0():
    # Masters, Springob & Huchra 2008, AJ 135, 1738 (from memory): M_K - 5 log10 h = -22.188
    # at log W = 2.5, so at H0 = 67.4: -22.188 + 5 log10(0.674) = -23.0446 (the file rounds to 1e-3)
    cal = conventions.at_run_h0(load_calibration("tf_ks_masters_2008"), 67.4)
    assert cal.relation(np.array([2.5]))[0] == pytest.approx(-22.188 + 5 * math.log10(0.674), abs=1e-3)


def test_sfd98_convention_reproduces_the_1998_coefficients():
    # Schlegel, Finkbeiner & Davis 1998, ApJ 500, 525, Table 6 (from memory): A/E(B-V) for
    # Landolt V 3.315 and Landolt (Cousins) I 1.940 per 1998-map E(B-V). galdist's sfd98
    # convention computes them with O'Donnell's law through the configured filters; the
    # rescaled A per 1998-map E(B-V) is factor x R_run x 0.86 (the run's defaults).
    from galdist import stages

    run = stages.extinction_coefficients(DEFAULT).per_true_ebv()
    factors = conventions.extinction_factors(DEFAULT, "sfd98")
    assert factors["V"] * run["V"] * 0.86 == pytest.approx(3.315, rel=0.05)
    assert factors["I"] * run["I"] * 0.86 == pytest.approx(1.940, rel=0.05)


def test_methods_read_extinction_in_the_calibration_convention():
    spec = REGISTRY["sbf"]
    section = DEFAULT["sbf"]
    n = 4
    cols = {c: np.full(n, 0.1) for stage in spec.stage_columns(section).values() for c in stage}
    factors = {"V": 1.3, "I": 1.25, "Ks": 1.1}
    plain = spec.inputs_from(cols, section)
    scaled = spec.inputs_from(cols, section, factors)
    for name, inp in spec.inputs.items():
        if inp.stage == "extinction" and inp.column.startswith("A_"):
            band = spec.band_labels(section)[inp.column[3:].split("}")[0]]
            np.testing.assert_allclose(scaled[name], plain[name] * factors[band])
        else:
            np.testing.assert_array_equal(scaled[name], plain[name])


def test_implied_h0_of_an_h0_scaled_calibration_is_not_independent():
    stats = {"methods": {"tf": {"h0_implied": 70.1, "h0_implied_err_stat": 0.4, "h0_implied_err_sys": 2.4,
                                "n_used": 10, "n_measured": 10}}}
    conventions.mark_h0_independence(stats, {"tf": load_calibration("tf_ks_masters_2008")})
    tf = stats["methods"]["tf"]
    assert tf["h0_implied_independent"] is False
    assert "H0 = 70 km/s/Mpc" in tf["h0_implied_note"] and "not independent" in tf["h0_implied_note"]
    page = render("t", {"statistics": stats}, {}, [])
    assert "not independent" in page
    conventions.mark_h0_independence(stats, {"tf": load_calibration("tf_i_tully_courtois_2012")})
    assert stats["methods"]["tf"]["h0_implied_independent"] is True


def test_known_zero_point_error_statistics_use_random_errors_and_report_the_systematic_once():
    """SBF sample built here: true distances on a Hubble flow, galaxies scattered about the
    calibration (Tonry et al. 1997 form, from memory) by its intrinsic scatter and measured
    with errors; the calibration in use has its zero point off by +0.07 mag and says so
    (zero_point_error 0.07, no other coefficient error)."""
    truth = load_calibration("sbf_tonry1997_cousins_i")
    used = dataclasses.replace(truth, covariance=np.zeros((2, 2)), zero_point_error=0.07,
                               coefficients=truth.coefficients + np.array([0.07, 0.0]))
    rng = np.random.default_rng(17)
    n = 4000
    h0 = 70.0
    cz = rng.uniform(3500.0, 9000.0, n)
    mu_true = 5 * np.log10(cz / h0) + 25          # low-z Hubble law, the test's own cosmology
    lo, hi = truth.valid_range
    colour = rng.uniform(lo + 0.02, hi - 0.02, n)
    m_err, c_err = rng.uniform(0.05, 0.15, n), np.full(n, 0.02)
    abs_mag = truth.relation(colour) + rng.normal(0, truth.scatter, n)
    inputs = {"sbf_mag": abs_mag + mu_true + rng.normal(0, 1, n) * m_err, "sbf_mag_err": m_err,
              "sbf_color": colour + rng.normal(0, 1, n) * c_err, "sbf_color_err": c_err,
              "A_mag": np.zeros(n), "A_blue": np.zeros(n), "A_red": np.zeros(n),
              "K_mag": np.zeros(n), "K_blue": np.zeros(n), "K_red": np.zeros(n)}
    out = sbf_distance(inputs, used, SBFSettings(mc_draws=0))
    measured = np.isfinite(out["sbf_mu"])   # a few colours scatter outside the range: flagged, NaN
    assert measured.mean() > 0.97
    np.testing.assert_allclose(out["sbf_mu_err_sys"][measured], 0.07)
    mu_z_err = np.full(n, 0.01)
    cols = {"z_cmb": cz / 299792.458, "z_cmb_err": np.full(n, 1e-5), "mu_z": mu_true, "mu_z_err": mu_z_err,
            "z_flags": flags.new(n)} | {k: out[k] for k in ("sbf_mu", "sbf_mu_err", "sbf_mu_err_sys", "sbf_flags")}
    sample = crosscheck.collect_samples([crosscheck.method_sample(cols, ["sbf"])])
    stats = crosscheck.sample_statistics(sample, n, h0, min_cz=3000.0)["methods"]["sbf"]
    # the random errors describe the scatter: chi^2_nu within 0.9-1.1 (with the zero point's
    # 0.07 mag inside every error it would be ~ (0.13^2)/(0.13^2 + 0.07^2) ~ 0.78)
    assert 0.9 < stats["chi2_nu"] < 1.1
    # the offset is the injected zero-point error, -0.07 mag (a brighter M gives smaller mu)
    assert stats["wmean"] == pytest.approx(-0.07, abs=4 * stats["wmean_err"])
    # its systematic error is the zero point's, once: 0.07 mag -> H0 ln10/5 x 0.07 km/s/Mpc
    assert stats["wmean_err_sys"] == pytest.approx(0.07, rel=1e-6)
    assert stats["h0_implied_err_sys"] == pytest.approx(stats["h0_implied"] * LN10 / 5 * 0.07, rel=0.01)
    # and the statistical error is the random one alone, far below it: the implied H0 misses
    # the true 70 by many statistical errors but within its systematic one, as it should
    assert stats["h0_implied_err_stat"] < 0.2 * stats["h0_implied_err_sys"]
    assert abs(stats["h0_implied"] - h0) > 5 * stats["h0_implied_err_stat"]
    assert abs(stats["h0_implied"] - h0) < 1.5 * stats["h0_implied_err_sys"]
