"""Tests of galdist.tully_fisher.

Every check value names its source. "from memory" = recalled, not checked against
the paper; "common practice" = a fact of the trade without a single source;
"hand arithmetic" = worked out by hand (calculator) and written here as literals.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from galdist import flags
from galdist.methods import REGISTRY
from galdist.calibration import load_calibration
from galdist.flags import Ext, KCorr, Method, Quality
from galdist.photometry import convert as convert_system
from galdist.tully_fisher import (TFSettings, deproject, inclination,
                                  internal_extinction, redshift_broadening, resolution_correction,
                                  tully_fisher_distance, turbulence_correction)

CAL_DIR = Path(__file__).resolve().parent.parent / "workflow" / "galdist" / "data" / "calibrations"


@pytest.fixture(scope="module")
def cal_i():
    return load_calibration(CAL_DIR / "tf_i_tully_courtois_2012.yaml")


@pytest.fixture(scope="module")
def cal_i_inverse():
    return load_calibration(CAL_DIR / "tf_i_tully_courtois_2012_inverse.yaml")


@pytest.fixture(scope="module")
def cal_ks():
    return load_calibration(CAL_DIR / "tf_ks_masters_2008.yaml")


@pytest.fixture(scope="module")
def cal_btfr():
    return load_calibration(CAL_DIR / "tf_btfr_lelli_2019.yaml")


def _rows(n, **over):
    """n identical, well-behaved I-band galaxies; keyword overrides per column."""
    base = {"mag": 13.2, "mag_err": 0.0, "w50": 300.0, "w50_err": 0.0, "axis_ratio": 0.4,
            "axis_ratio_err": 0.0, "z_helio": 0.01, "a_gal": 0.05, "a_gal_err": 0.0,
            "k_corr": 0.01, "k_corr_err": 0.0}
    base.update(over)
    return {k: np.broadcast_to(np.asarray(v, dtype=float), (n,)).copy() if k not in
            ("quality_flags", "ext_flags", "kcorr_flags") else np.asarray(v, dtype=np.uint32)
            for k, v in base.items()}


NO_MC = TFSettings(mc_draws=0)


# --------------------------------------------------------------- worked example

def test_worked_example_one_galaxy_to_mu(cal_i):
    """One galaxy from raw catalog values to mu, every intermediate by hand.

    Raw values (invented galaxy): m_I = 13.65 AB, A_I = 0.05, K_I = 0.01,
    W50 = 300 km/s observed, instrumental resolution R = 10 km/s, b/a = 0.40,
    z_helio = 0.01. Calibration: Tully & Courtois 2012, ApJ 749, 78 (from memory)
    M_I = -21.39 - 8.81 (log W^i - 2.5), Vega.
    """
    inputs = {"mag": np.array([13.65]), "a_gal": np.array([0.05]), "k_corr": np.array([0.01]),
              "w50": np.array([300.0]), "w50_resolution": np.array([10.0]),
              "axis_ratio": np.array([0.40]), "z_helio": np.array([0.01])}
    # AB - Vega for Cousins I = 0.45: Blanton & Roweis 2007, AJ 133, 734, Table 1 (secondary copy)
    s = TFSettings(input_system="AB", ab_minus_vega=0.45, mc_draws=0)
    out = tully_fisher_distance(inputs, cal_i, s)

    # 1. inclination, q0 = 0.2 (common practice):
    #    cos^2 i = (0.40^2 - 0.2^2) / (1 - 0.2^2) = (0.16 - 0.04) / 0.96 = 0.125
    #    cos i = 0.3535533906, i = arccos(0.3535533906) = 69.29518895 deg
    #    sin i = sqrt(1 - 0.125) = sqrt(0.875) = 0.9354143467          (hand arithmetic)
    assert out["tf_inclination_deg"][0] == pytest.approx(69.29518895, abs=1e-7)
    # 2. resolution in quadrature (common practice): sqrt(300^2 - 10^2) = sqrt(89900)
    #    = 299.8332870; redshift: 299.8332870 / 1.01 = 296.8646406 km/s  (hand arithmetic)
    assert out["tf_w_z"][0] == pytest.approx(296.8646406, abs=1e-6)
    # 3. turbulence, W_t = 9, W_c = 100 km/s for W50 (Courtois et al. 2009, from memory),
    #    form of Tully & Fouque 1985, ApJS 58, 67:
    #    (W/W_c)^2 = 2.968646406^2 = 8.812861484; e = exp(-8.812861484) = 1.488068377e-4
    #    W^2 = 88128.61484
    #    W_t^2 (1 - 2e) = 81 * (1 - 2.976136755e-4) = 80.97589329
    #    2 W W_t (1 - e) = 2 * 296.8646406 * 9 * (1 - 1.488068377e-4) = 5342.768372
    #    W_R^2 = 88128.61484 + 80.97589329 - 5342.768372 = 82866.82236
    #    W_R = sqrt(82866.82236) = 287.8659799 km/s                       (hand arithmetic)
    assert out["tf_w_r"][0] == pytest.approx(287.8659799, abs=1e-6)
    # 4. W^i = 287.8659799 / 0.9354143467 = 307.7416771; log10 W^i = 2.488186316
    assert out["tf_logw_i"][0] == pytest.approx(2.488186316, abs=1e-8)
    # 5. gamma = 0.92 + 1.63 (2.488186316 - 2.5) = 0.92 - 0.01925630 = 0.9007436955
    #    (Tully et al. 1998, AJ 115, 2264, from memory); log10(a/b) = log10(2.5) = 0.3979400087
    #    A_int = 0.9007436955 * 0.3979400087 = 0.3584419540              (hand arithmetic)
    assert out["tf_a_int"][0] == pytest.approx(0.3584419540, abs=1e-9)
    # 6. m_c (Vega) = (13.65 - 0.45) - 0.05 - 0.01 - 0.3584419540 = 12.78155805
    assert out["tf_mag_corr"][0] == pytest.approx(12.78155805, abs=1e-8)
    # 7. M = -21.39 - 8.81 (2.488186316 - 2.5) = -21.39 + 0.1040785366 = -21.28592146
    assert out["tf_abs_mag"][0] == pytest.approx(-21.28592146, abs=1e-7)
    # 8. mu = 12.78155805 - (-21.28592146) = 34.06747951; d = 10^((34.06747951 - 25)/5)
    #    = 10^1.813495902 = 65.0872464 Mpc                                 (hand arithmetic)
    assert out["tf_mu"][0] == pytest.approx(34.06747951, abs=1e-7)
    assert out["tf_d_mpc"][0] == pytest.approx(65.0872464, abs=1e-5)
    assert out["tf_flags"][0] == 0
    assert not out["tf_malmquist_applied"][0]


# ----------------------------------------------------------------- step functions

def test_inclination_edge_cases():
    # Oblate-disc formula with q0 = 0.2 (common practice): b/a = 1 is face-on (0 deg),
    # b/a <= q0 is edge-on (90 deg); outside (0, 1] or NaN is invalid (NaN).
    q = np.array([1.0, 0.2, 0.1, 0.0, -0.1, 1.2, np.nan])
    i = inclination(q, 0.2)
    assert i[0] == 0.0
    assert i[1] == pytest.approx(90.0, abs=1e-12)
    assert i[2] == pytest.approx(90.0, abs=1e-12)
    assert np.isnan(i[3:]).all()
    # q0 = 0 reduces to cos i = b/a: b/a = 0.5 -> 60 deg (hand arithmetic)
    assert inclination(np.array([0.5]), 0.0)[0] == pytest.approx(60.0, abs=1e-10)
    # b/a = sqrt(0.5 (1 - 0.04) + 0.04) = sqrt(0.52) gives cos^2 i = 0.5 -> 45 deg (hand arithmetic)
    assert inclination(np.array([np.sqrt(0.52)]), 0.2)[0] == pytest.approx(45.0, abs=1e-10)
    # monotonic: flatter looking discs are more inclined (geometry)
    grid = np.linspace(0.21, 1.0, 500)
    assert np.all(np.diff(inclination(grid, 0.2)) < 0)


def test_redshift_and_resolution_steps():
    # W / (1 + z): 404 / 1.01 = 400 (hand arithmetic)
    assert redshift_broadening(np.array([404.0]), np.array([0.01]))[0] == pytest.approx(400.0)
    # sqrt(W^2 - R^2) (common practice): sqrt(50^2 - 30^2) = 40 (hand arithmetic)
    r = resolution_correction(np.array([50.0, 50.0, 20.0]), np.array([30.0, np.nan, 25.0]))
    assert r[0] == pytest.approx(40.0)
    assert r[1] == 50.0           # NaN resolution: step skipped for that row
    assert np.isnan(r[2])         # W <= R: no width left


def test_turbulence_limits_and_monotonic():
    wt, wc = 9.0, 100.0   # W50 constants, Courtois et al. 2009, AJ 138, 1938 (from memory)
    # W >> W_c: the Gaussian terms vanish (e^-100 ~ 4e-44) and the correction becomes
    # the linear subtraction W - W_t (Tully & Fouque 1985, ApJS 58, 67): 1000 - 9 = 991.
    assert turbulence_correction(np.array([1000.0]), wt, wc)[0] == pytest.approx(991.0, abs=1e-9)
    # ...so the departure from the linear limit tends to zero as W / W_c grows
    w = np.array([150.0, 200.0, 300.0, 400.0])
    dep = turbulence_correction(w, wt, wc) - (w - wt)
    assert np.all(dep > 0) and np.all(np.diff(dep) < 0) and dep[-1] < 1e-5
    # W << W_c: e -> 1 and W_R^2 -> W^2 - W_t^2 (quadrature), e.g. W_c = 1e6, W = 15:
    # sqrt(225 - 81) = 12 (hand arithmetic)
    assert turbulence_correction(np.array([15.0]), wt, 1e6)[0] == pytest.approx(12.0, rel=1e-6)
    # W = W_t exactly: W_R^2 = W_t^2 + W_t^2 (1 - 2e) - 2 W_t^2 (1 - e) = 0 (hand algebra)
    assert turbulence_correction(np.array([wt]), wt, wc)[0] == pytest.approx(0.0, abs=1e-6)
    assert np.isnan(turbulence_correction(np.array([5.0]), wt, wc)[0])
    # W_t = 0: no correction at all
    assert turbulence_correction(np.array([123.0]), 0.0, wc)[0] == pytest.approx(123.0)
    # monotonic in W and never more than W_t (W_R >= W - W_t, hand algebra:
    # W_R^2 - (W - W_t)^2 = 2 e W_t (W - W_t) >= 0), for both width definitions
    for wt_, wc_ in ((9.0, 100.0), (38.0, 120.0)):  # W20: Tully & Fouque 1985 (from memory)
        grid = np.linspace(wt_ + 0.5, 1500.0, 5000)
        wr = turbulence_correction(grid, wt_, wc_)
        assert np.all(np.diff(wr) > 0)
        assert np.all(grid - wr <= wt_ + 1e-9) and np.all(wr < grid)


def test_deproject_and_internal_extinction():
    # W / sin i: sin 90 = 1, sin 30 = 0.5 (hand arithmetic); face-on is undefined
    d = deproject(np.array([200.0, 200.0, 200.0]), np.array([90.0, 30.0, 0.0]))
    assert d[0] == pytest.approx(200.0) and d[1] == pytest.approx(400.0) and np.isnan(d[2])
    # gamma_I = 0.92 + 1.63 (log W - 2.5) (Tully et al. 1998, AJ 115, 2264, from memory):
    # b/a = 0.1, log W = 2.5 -> 0.92 * log10(10) = 0.92; face-on -> 0;
    # log W = 1.8 -> gamma = 0.92 - 1.141 < 0 -> floored at 0 (common practice)
    a = internal_extinction(np.array([0.1, 1.0, 0.1]), np.array([2.5, 2.5, 1.8]), 0.92, 1.63)
    assert a[0] == pytest.approx(0.92) and a[1] == 0.0 and a[2] == 0.0


def test_convert_system():
    # AB - Vega, 2MASS Ks 1.85 (Blanton & Roweis 2007, AJ 133, 734, Table 1; secondary copy)
    assert convert_system(np.array([12.0]), "AB", "Vega", 1.85)[0] == pytest.approx(10.15)
    assert convert_system(np.array([10.15]), "Vega", "AB", 1.85)[0] == pytest.approx(12.0)
    assert convert_system(np.array([12.0]), None, "Vega", None)[0] == 12.0
    with pytest.raises(ValueError, match="ab_minus_vega"):
        convert_system(np.array([12.0]), "AB", "Vega", None)


def test_ks_calibration_uses_near_ir_gamma_and_system(cal_ks):
    # Ks: AB input converted with 1.85 (Blanton & Roweis 2007, Table 1, secondary copy);
    # gamma_K' = 0.22 + 0.40 (log W - 2.5) (Tully et al. 1998, from memory).
    # Edge-on (b/a = 0.2 -> i = 90) with no turbulence, resolution or z: W^i = W50 = 10^2.5,
    # so gamma = 0.22, A_int = 0.22 * log10(5) = 0.22 * 0.6989700043 = 0.1537734009
    # m_c = 12.0 - 1.85 - 0.02 - 0.03 - 0.1537734009 = 9.946226599; M = -22.963 (file a0)
    # mu = 9.946226599 + 22.963 = 32.909226599                      (hand arithmetic)
    inputs = _rows(1, mag=12.0, w50=10**2.5, axis_ratio=0.2, z_helio=0.0, a_gal=0.02, k_corr=0.03)
    s = TFSettings(input_system="AB", ab_minus_vega=1.85, apply_turbulence=False, mc_draws=0)
    out = tully_fisher_distance(inputs, cal_ks, s)
    assert out["tf_a_int"][0] == pytest.approx(0.1537734009, abs=1e-9)
    assert out["tf_mu"][0] == pytest.approx(32.909226599, abs=1e-8)


def test_steps_can_be_switched_off(cal_i):
    inputs = _rows(1)
    on = tully_fisher_distance(inputs, cal_i, NO_MC)
    off = tully_fisher_distance({k: v for k, v in inputs.items() if k not in ("k_corr", "a_gal")},
                                cal_i, TFSettings(apply_turbulence=False, apply_redshift_broadening=False,
                                                  apply_internal_extinction=False, apply_kcorrection=False,
                                                  apply_galactic_extinction=False, mc_draws=0))
    assert off["tf_w_z"][0] == 300.0 and off["tf_w_r"][0] == 300.0 and off["tf_a_int"][0] == 0.0
    assert off["tf_mag_corr"][0] == 13.2
    assert on["tf_mag_corr"][0] < 13.2 - 0.06


# ------------------------------------------------------------------------- flags

def test_flags_and_rows_kept(cal_i):
    n = 9
    inputs = _rows(n)
    inputs["axis_ratio"][1] = 0.9          # i = 26.4 deg < 45: LOW_INCLINATION, still computed
    inputs["w50"][2] = 1200.0              # log W^i ~ 3.1 > 2.9: OUT_OF_RANGE (+ EXTRAPOLATED)
    inputs["mag"][3] = np.nan              # missing: MISSING_INPUT, no mu
    inputs["quality_flags"] = np.zeros(n, dtype=np.uint32)
    inputs["quality_flags"][4] = int(Quality.WIDTH_INVALID)
    inputs["w50"][4] = np.nan
    inputs["ext_flags"] = np.zeros(n, dtype=np.uint32)
    inputs["ext_flags"][5] = int(Ext.HIGH_EXTINCTION)
    inputs["kcorr_flags"] = np.zeros(n, dtype=np.uint32)
    inputs["kcorr_flags"][6] = int(KCorr.COLOR_CLIPPED)
    inputs["axis_ratio"][7] = 1.0          # exactly face-on: no W^i at all
    inputs["w50"][8] = 5.0                 # below W_t = 9 km/s: no turbulence-corrected width
    out = tully_fisher_distance(inputs, cal_i, NO_MC)
    f = out["tf_flags"]
    assert all(len(v) == n for v in out.values())
    assert set(out) == set(REGISTRY['tully_fisher'].output_units())
    assert f[0] == 0 and np.isfinite(out["tf_mu"][0])
    assert flags.has(f[1:2], Method.LOW_INCLINATION)[0] and np.isfinite(out["tf_mu"][1])
    assert flags.has(f[2:3], Method.OUT_OF_RANGE)[0] and flags.has(f[2:3], Method.EXTRAPOLATED)[0]
    assert np.isfinite(out["tf_mu"][2])
    assert flags.has(f[3:4], Method.MISSING_INPUT)[0] and np.isnan(out["tf_mu"][3])
    assert np.isfinite(out["tf_logw_i"][3])          # intermediates kept where computable
    assert flags.has(f[4:5], Method.MISSING_INPUT)[0] and np.isnan(out["tf_mu"][4])
    assert f[5] == int(Method.HIGH_EXTINCTION) and np.isfinite(out["tf_mu"][5])
    assert f[6] == int(Method.KCORR_PROBLEM) and np.isfinite(out["tf_mu"][6])
    assert flags.has(f[7:8], Method.LOW_INCLINATION)[0] and flags.has(f[7:8], Method.OUT_OF_RANGE)[0]
    assert np.isnan(out["tf_mu"][7]) and not flags.has(f[7:8], Method.EXTRAPOLATED)[0]
    assert flags.has(f[8:9], Method.OUT_OF_RANGE)[0] and np.isnan(out["tf_mu"][8])
    # no silent NaN: every row without mu says why
    why = flags.has(f, Method.MISSING_INPUT | Method.OUT_OF_RANGE)
    assert np.all(why[np.isnan(out["tf_mu"])])
    # errors and distances exist exactly where mu does
    for key in ("tf_mu_err", "tf_d_mpc", "tf_d_err_mpc"):
        assert np.array_equal(np.isfinite(out[key]), np.isfinite(out["tf_mu"]))


def test_out_of_range_without_extrapolation(cal_i):
    inputs = _rows(2, w50=[300.0, 1200.0])
    out = tully_fisher_distance(inputs, cal_i, TFSettings(allow_extrapolation=False, mc_draws=0))
    assert np.isfinite(out["tf_mu"][0]) and np.isnan(out["tf_mu"][1])
    assert out["tf_flags"][1] == int(Method.OUT_OF_RANGE)
    assert np.isfinite(out["tf_logw_i"][1])


def test_no_ebv_inherited_and_nan_extinction(cal_i):
    inputs = _rows(1, a_gal=np.nan)
    inputs["ext_flags"] = np.array([int(Ext.NO_EBV)], dtype=np.uint32)
    out = tully_fisher_distance(inputs, cal_i, NO_MC)
    assert flags.has(out["tf_flags"], Method.HIGH_EXTINCTION | Method.MISSING_INPUT)[0]
    assert out["tf_flags"][0] == int(Method.HIGH_EXTINCTION | Method.MISSING_INPUT)
    assert np.isnan(out["tf_mu"][0])


# ------------------------------------------------------------------ other forms

def test_inverse_form_matches_luminosity_form(cal_i, cal_i_inverse):
    # The inverse file is the same relation (Tully & Courtois 2012, from memory) solved
    # for log W: a1 = 1/(-8.81) rounded to -0.113507, so M agrees to
    # |x - 2.5| * 8.81 * 3e-6 < 1e-5 mag over the valid range (hand arithmetic).
    inputs = _rows(4, w50=[150.0, 250.0, 400.0, 600.0], axis_ratio=[0.3, 0.5, 0.6, 0.25])
    a = tully_fisher_distance(inputs, cal_i, NO_MC)
    b = tully_fisher_distance(inputs, cal_i_inverse, NO_MC)
    np.testing.assert_allclose(b["tf_mu"], a["tf_mu"], atol=1e-5)
    # inverse slope error 0.00206 ~ 0.16 / 8.81^2: errors agree to first order too
    np.testing.assert_allclose(b["tf_mu_err"], a["tf_mu_err"], rtol=2e-3)


def test_inverse_form_requires_degree_one(cal_i_inverse):
    bad = dataclasses.replace(cal_i_inverse, coefficients=np.array([0.0, -0.11, 0.01]),
                              covariance=np.eye(3) * 1e-4)
    with pytest.raises(ValueError, match="degree 1"):
        tully_fisher_distance(_rows(1), bad, NO_MC)


def test_quadratic_term_above_break(cal_i):
    quad = dataclasses.replace(cal_i, quadratic={"break": 2.5, "coefficient": 3.0, "error": 0.5})
    inputs = _rows(2, w50=[200.0, 500.0], axis_ratio=0.2, z_helio=0.0)
    s = TFSettings(apply_turbulence=False, mc_draws=0)
    lin = tully_fisher_distance(inputs, cal_i, s)
    qd = tully_fisher_distance(inputs, quad, s)
    # below the break nothing changes; above: M += 3.0 (log10 500 - 2.5)^2
    # = 3.0 * 0.1989700043^2 = 0.1187671 mag (hand arithmetic), edge-on so W^i = W50
    assert qd["tf_abs_mag"][0] == lin["tf_abs_mag"][0]
    assert qd["tf_abs_mag"][1] - lin["tf_abs_mag"][1] == pytest.approx(0.1187671, abs=1e-7)
    # the quadratic coefficient's error adds (0.5 * 0.1989700043^2)^2 = 0.01979453^2
    # = 3.918234e-4 mag^2 above the break only (hand arithmetic), to the systematic error:
    # the coefficient is the same for every galaxy; the random error does not change
    extra = qd["tf_mu_err_sys"] ** 2 - lin["tf_mu_err_sys"] ** 2
    assert extra[0] == pytest.approx(0.0, abs=1e-12)
    assert extra[1] == pytest.approx(3.918234e-4, rel=1e-5)
    np.testing.assert_array_equal(qd["tf_mu_err"], lin["tf_mu_err"])


def test_baryonic_distance_solves_its_own_equation(cal_btfr):
    # Lelli et al. 2019, MNRAS 484, 3267 (from memory): log M_b = 1.99 + 3.85 log V,
    # V = W^i / 2; M_b = Upsilon L + 1.33 M_HI, M_HI = 2.356e5 d^2 S / (1 + z) (Meyer et al. 2017,
    # PASA 34, 52, Eq. 48, from memory; z = 0.01 here).
    # M_sun,Ks = 3.27 Vega (Willmer 2018, ApJS 236, 47, from memory); Upsilon = 0.6.
    n = 4
    inputs = _rows(n, mag=[10.0, 11.5, 12.0, 9.0], w50=[180.0, 250.0, 120.0, 420.0],
                   axis_ratio=[0.3, 0.5, 0.45, 0.35], hi_flux=[5.0, 20.0, 0.0, 12.0])
    s = TFSettings(mass_to_light=0.6, abs_mag_sun=3.27, gamma0=0.22, gamma1=0.40, mc_draws=0)
    out = tully_fisher_distance(inputs, cal_btfr, s)
    d = out["tf_d_mpc"]
    assert np.all(np.isfinite(d)) and np.all(out["tf_flags"] == 0)
    # masses at the returned distance, written out from the definitions
    abs_mag = out["tf_mag_corr"] - (5 * np.log10(d) + 25)
    stellar = 0.6 * 10 ** (-0.4 * (abs_mag - 3.27))
    gas = 1.33 * 2.356e5 * d**2 * inputs["hi_flux"] / (1 + inputs["z_helio"])
    log_v = out["tf_logw_i"] - np.log10(2.0)
    np.testing.assert_allclose(np.log10(stellar + gas), 1.99 + 3.85 * log_v, atol=1e-10)
    np.testing.assert_allclose(out["tf_abs_mag"], abs_mag, atol=1e-10)
    # more gas at fixed width and light -> more mass per d^2 -> the galaxy is nearer
    more_gas = dict(inputs, hi_flux=inputs["hi_flux"] + 10.0)
    assert np.all(tully_fisher_distance(more_gas, cal_btfr, s)["tf_d_mpc"] < d)


def test_baryonic_missing_hi_flux_and_settings(cal_btfr):
    s = TFSettings(mass_to_light=0.6, abs_mag_sun=3.27, gamma0=0.22, gamma1=0.40, mc_draws=0)
    inputs = _rows(2, hi_flux=[np.nan, 3.0])
    out = tully_fisher_distance(inputs, cal_btfr, s)
    assert out["tf_flags"][0] == int(Method.MISSING_INPUT) and np.isnan(out["tf_mu"][0])
    assert np.isfinite(out["tf_mu"][1])
    with pytest.raises(ValueError, match="mass_to_light"):
        tully_fisher_distance(inputs, cal_btfr, TFSettings(abs_mag_sun=3.27, gamma0=0.2, gamma1=0.4))
    with pytest.raises(ValueError, match="gamma0"):
        tully_fisher_distance(inputs, cal_btfr, TFSettings(mass_to_light=0.6, abs_mag_sun=3.27))


# ------------------------------------------------------------------------ errors

ERROR_CASES = {
    "magnitude": {"mag_err": 0.08},
    "width": {"w50_err": 12.0},
    "axis_ratio": {"axis_ratio_err": 0.02},
    "extinction_and_k": {"a_gal_err": 0.03, "k_corr_err": 0.02},
    "all": {"mag_err": 0.05, "w50_err": 8.0, "axis_ratio_err": 0.015, "a_gal_err": 0.02},
}


@pytest.mark.parametrize("case", sorted(ERROR_CASES))
def test_analytic_and_monte_carlo_errors_agree(cal_i, case):
    # Linear regime: small errors, inclinations well away from 90 deg and from q0.
    # Zero the calibration terms so that each input's own term is what is compared.
    quiet = dataclasses.replace(cal_i, scatter=0.0, covariance=np.zeros((2, 2)))
    inputs = _rows(4, w50=[200.0, 300.0, 450.0, 600.0], axis_ratio=[0.35, 0.45, 0.55, 0.4],
                   **ERROR_CASES[case])
    out = tully_fisher_distance(inputs, quiet, TFSettings(mc_draws=4000, mc_seed=7))
    assert np.all(out["tf_mu_err"] > 0.005)
    # 4000 draws: the MC standard deviation itself is uncertain by 1/sqrt(8000) ~ 1.1%
    np.testing.assert_allclose(out["tf_mu_err_mc"], out["tf_mu_err"], rtol=0.05)


def test_width_errors_through_resolution_redshift_and_turbulence(cal_i):
    # Narrow widths with the W20 turbulence constants (W_t = 38, W_c = 120 km/s,
    # Tully & Fouque 1985, from memory), a resolution term and z = 0.15, where the
    # chain's derivatives differ from 1 by 10-20%: the analytic width term must
    # follow all of them to agree with the Monte Carlo.
    w20_cal = dataclasses.replace(cal_i, width_definition="w20", scatter=0.0,
                                  covariance=np.zeros((2, 2)))
    inputs = _rows(3, w50=[95.0, 120.0, 160.0], w50_err=2.5, w50_resolution=[30.0, 25.0, 20.0],
                   z_helio=0.15, axis_ratio=0.45)
    out = tully_fisher_distance(inputs, w20_cal, TFSettings(width_definition="w20", mc_draws=8000,
                                                            mc_seed=11))
    # 8000 draws: MC standard deviation uncertain by 1/sqrt(16000) ~ 0.8%
    np.testing.assert_allclose(out["tf_mu_err_mc"], out["tf_mu_err"], rtol=0.03)


def test_axis_ratio_errors_with_thick_discs(cal_i):
    # q0 = 0.45 (a thick-disc choice; q0 is configurable): the (1 - q0^2) = 0.7975 of
    # the inclination formula must appear in the axis-ratio derivative.
    quiet = dataclasses.replace(cal_i, scatter=0.0, covariance=np.zeros((2, 2)))
    inputs = _rows(3, axis_ratio=[0.6, 0.7, 0.8], axis_ratio_err=0.01, w50=[250.0, 300.0, 350.0])
    out = tully_fisher_distance(inputs, quiet, TFSettings(q0=0.45, min_inclination_deg=0.0,
                                                          mc_draws=4000, mc_seed=9))
    np.testing.assert_allclose(out["tf_mu_err_mc"], out["tf_mu_err"], rtol=0.05)


BARYONIC_ERROR_CASES = {
    "magnitude": {"mag_err": 0.1},
    "hi_flux": {"hi_flux_err": [4.0, 2.5, 1.5]},
    "mass_to_light": {},
    "width_and_axis_ratio": {"w50_err": 6.0, "axis_ratio_err": 0.02},
}


@pytest.mark.parametrize("case", sorted(BARYONIC_ERROR_CASES))
def test_baryonic_errors_agree(cal_btfr, case):
    # Gas fractions 0.42, 0.66, 0.61 at the returned distances (so the stellar share
    # of M_b, which scales the magnitude term, is far from 1); calibration terms zeroed.
    quiet = dataclasses.replace(cal_btfr, scatter=0.0, covariance=np.zeros((2, 2)))
    inputs = _rows(3, mag=[10.0, 11.5, 12.0], w50=[180.0, 250.0, 120.0], axis_ratio=[0.4, 0.5, 0.35],
                   a_gal=0.02, k_corr=0.0, hi_flux=[30.0, 20.0, 10.0], **BARYONIC_ERROR_CASES[case])
    s = TFSettings(mass_to_light=0.6, mass_to_light_err=0.15 if case == "mass_to_light" else 0.0,
                   abs_mag_sun=3.27, gamma0=0.22, gamma1=0.40, mc_draws=4000, mc_seed=5)
    out = tully_fisher_distance(inputs, quiet, s)
    assert np.all(out["tf_mu_err"] > 0.01)
    np.testing.assert_allclose(out["tf_mu_err_mc"], out["tf_mu_err"], rtol=0.05)


@pytest.mark.parametrize("which", ["luminosity", "inverse", "baryonic"])
def test_errors_agree_with_calibration_terms(which, cal_i, cal_i_inverse, cal_btfr):
    cal = {"luminosity": cal_i, "inverse": cal_i_inverse, "baryonic": cal_btfr}[which]
    extra = {"hi_flux": [4.0, 8.0, 2.0], "hi_flux_err": [0.4, 0.8, 0.3]} if which == "baryonic" else {}
    inputs = _rows(3, w50=[220.0, 320.0, 480.0], axis_ratio=[0.4, 0.5, 0.3], mag_err=0.05,
                   w50_err=6.0, axis_ratio_err=0.015, a_gal_err=0.02, **extra)
    s = TFSettings(mc_draws=4000, mc_seed=3, mass_to_light=0.6, mass_to_light_err=0.05,
                   abs_mag_sun=3.27, gamma0=0.92, gamma1=1.63)
    out = tully_fisher_distance(inputs, cal, s)
    np.testing.assert_allclose(out["tf_mu_err_mc"], out["tf_mu_err"], rtol=0.05)
    # the calibration scatter alone is a floor (0.41 mag; 2.5 * 0.10 dex for the BTFR)
    floor = 2.5 * cal.scatter if which == "baryonic" else cal.scatter
    assert np.all(out["tf_mu_err"] > floor)


def test_malmquist_correction(cal_i):
    # Homogeneous Malmquist, mean distance x exp(3.5 Delta^2), Delta = (ln 10 / 5) sigma_mu
    # (Lynden-Bell et al. 1988, ApJ 326, 19, from memory): sigma_mu = 0.4 -> 1.126
    # (reference-values.md). sigma_mu = 0.4 exactly: scatter 0.4, no other error.
    exact = dataclasses.replace(cal_i, scatter=0.4, covariance=np.zeros((2, 2)))
    inputs = _rows(2)
    plain = tully_fisher_distance(inputs, exact, NO_MC)
    corr = tully_fisher_distance(inputs, exact, TFSettings(malmquist=True, mc_draws=0))
    np.testing.assert_allclose(plain["tf_mu_err"], 0.4)
    np.testing.assert_allclose(corr["tf_d_mpc"] / plain["tf_d_mpc"], 1.126, atol=5e-4)
    assert corr["tf_malmquist_applied"].all() and not plain["tf_malmquist_applied"].any()
    assert np.array_equal(corr["tf_mu"], plain["tf_mu"])   # mu is never corrected


# ---------------------------------------------------------------------- recovery

def _invert_turbulence(w_r, wt, wc):
    """Observed-frame width whose turbulence-corrected value is w_r (bisection).
    Bracket: W_R(W_t) = 0 and W_R(W) >= W - W_t (see the turbulence test)."""
    lo = np.full_like(w_r, wt)
    hi = w_r + wt + 1.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        below = turbulence_correction(mid, wt, wc) < w_r
        lo, hi = np.where(below, mid, lo), np.where(below, hi, mid)
    return 0.5 * (lo + hi)


@pytest.mark.parametrize("form", ["luminosity", "baryonic"])
def test_recovery_on_simulated_sample(form, cal_i, cal_btfr):
    """Sample drawn from the calibration itself, run through the full chain."""
    rng = np.random.default_rng(2024)
    n = 40000
    cal = cal_i if form == "luminosity" else cal_btfr
    lo, hi = cal.valid_range
    x = rng.uniform(lo + 0.05, hi - 0.05, n)              # log W^i (or log V)
    log_wi = x if form == "luminosity" else x + np.log10(2.0)
    incl = np.degrees(np.arccos(rng.uniform(np.cos(np.radians(85)), np.cos(np.radians(50)), n)))
    q0 = 0.2
    cos2 = np.cos(np.radians(incl)) ** 2
    axis_ratio = np.sqrt(cos2 * (1 - q0**2) + q0**2)       # the oblate-disc relation, inverted
    z = rng.uniform(0.005, 0.05, n)
    mu_true = rng.uniform(30.0, 36.0, n)
    w_r = 10**log_wi * np.sin(np.radians(incl))
    w50 = _invert_turbulence(w_r, 9.0, 100.0) * (1 + z)
    a_gal = rng.uniform(0.0, 0.2, n)
    k_corr = rng.uniform(0.0, 0.05, n)
    g0, g1 = (0.92, 1.63) if form == "luminosity" else (0.22, 0.40)
    a_int = np.maximum(g0 + g1 * (log_wi - 2.5), 0.0) * np.log10(1.0 / axis_ratio)
    inputs = {"w50": w50, "axis_ratio": axis_ratio, "z_helio": z, "a_gal": a_gal, "k_corr": k_corr}
    if form == "luminosity":
        sigma = cal.scatter                                 # 0.41 mag
        abs_mag = cal.polynomial(x) + rng.normal(0.0, sigma, n)
        inputs["mag"] = abs_mag + mu_true + a_gal + k_corr + a_int
        s = TFSettings(mc_draws=0)
    else:
        sigma = 2.5 * cal.scatter                           # 0.10 dex in M_b -> 0.25 mag
        log_mb = cal.polynomial(x) + rng.normal(0.0, cal.scatter, n)
        gas_frac = rng.uniform(0.0, 0.8, n)
        d = 10 ** (0.2 * (mu_true - 25.0))
        # S = M_HI (1 + z) / (2.356e5 d^2) (Meyer et al. 2017, PASA 34, 52, Eq. 48, from memory)
        hi_flux = gas_frac * 10**log_mb * (1 + z) / (1.33 * 2.356e5 * d**2)
        l_star = (1 - gas_frac) * 10**log_mb / 0.6          # Upsilon = 0.6
        inputs["mag"] = 3.27 - 2.5 * np.log10(l_star) + mu_true + a_gal + k_corr + a_int
        inputs["hi_flux"] = hi_flux
        s = TFSettings(mc_draws=0, mass_to_light=0.6, abs_mag_sun=3.27, gamma0=g0, gamma1=g1)
    out = tully_fisher_distance(inputs, cal, s)
    dmu = out["tf_mu"] - mu_true
    assert np.all(np.isfinite(dmu))
    assert abs(np.median(dmu)) < 0.01
    assert np.std(dmu) == pytest.approx(sigma, rel=0.05)
    np.testing.assert_allclose(out["tf_logw_i"], log_wi, atol=1e-9)


# ---------------------------------------------------------------------- settings

def test_settings_from_config():
    s = TFSettings.from_config({"q0": 0.15, "mc_draws": 50, "calibrations": ["x"]},
                               ignore=["calibrations"])
    assert s.q0 == 0.15 and s.mc_draws == 50
    assert s.turbulence_constants() == (9.0, 100.0)     # Courtois et al. 2009 (from memory)
    assert TFSettings(width_definition="w20").turbulence_constants() == (38.0, 120.0)  # T&F 1985
    with pytest.raises(ValueError, match="q_zero"):
        TFSettings.from_config({"q_zero": 0.2})
    with pytest.raises(ValueError, match="tully_fisher.q0"):
        TFSettings.from_config({"q0": 1.5})
    with pytest.raises(ValueError, match="mc_draws"):
        TFSettings.from_config({"mc_draws": 1})
    with pytest.raises(ValueError, match="input_system"):
        TFSettings.from_config({"input_system": "ST"})


def test_structural_problems_raise(cal_i):
    with pytest.raises(ValueError, match="width_definition"):
        tully_fisher_distance(_rows(1), cal_i, TFSettings(width_definition="w20", mc_draws=0))
    with pytest.raises(ValueError, match="unknown input"):
        tully_fisher_distance(dict(_rows(1), w20=np.ones(1)), cal_i, NO_MC)
    with pytest.raises(ValueError, match="k_corr"):
        tully_fisher_distance({k: v for k, v in _rows(1).items() if k != "k_corr"}, cal_i, NO_MC)
    with pytest.raises(ValueError, match="length"):
        tully_fisher_distance(dict(_rows(2), mag=np.ones(3)), cal_i, NO_MC)


def test_shipped_calibrations_are_marked():
    files = sorted(CAL_DIR.glob("tf_*.yaml"))
    forms = set()
    for p in files:
        c = load_calibration(p)
        forms.add(c.form)
        assert c.method == "tully_fisher"
        assert "from memory" in (c.provenance + c.notes)
    assert {"luminosity", "baryonic", "inverse"} <= forms
    btfr = load_calibration(CAL_DIR / "tf_btfr_lelli_2019.yaml")
    assert btfr.coefficients[1] == 3.85              # Lelli et al. 2019 slope (secondary copy)
    assert "W^i / 2" in btfr.velocity_definition
