"""Tests of galdist.sbf: surface-brightness-fluctuation distances.

Every check value names its source beside it. Hand arithmetic is written out as
literal numbers; the library's own helpers are never used to make a check value.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import yaml

from galdist import flags as F
from galdist.methods import REGISTRY
from galdist.calibration import load_calibration
from galdist.photometry import color_system_offset, system_offset
from galdist.sbf import INPUTS, SBFSettings, check_calibration, sbf_distance

CAL_DIR = Path(__file__).resolve().parent.parent / "workflow" / "galdist" / "data" / "calibrations"
TONRY = CAL_DIR / "sbf_tonry1997_cousins_i.yaml"
BLAKESLEE = CAL_DIR / "sbf_blakeslee2009_acs_z850.yaml"
JENSEN = CAL_DIR / "sbf_jensen2015_wfc3_f110w.yaml"

# Schlafly & Finkbeiner 2011, ApJ 737, 103, Table 6, R_V = 3.1 (secondary copy):
R_V_LANDOLT, R_I_LANDOLT = 2.742, 1.505
R_F475W, R_F850LP, R_F110W = 3.268, 1.243, 0.881

NO_MC = SBFSettings(mc_draws=0)


def _tmp_calibration(tmp_path, source, **changes):
    """A copy of a shipped calibration file with some keys changed (test fixture)."""
    data = yaml.safe_load(Path(source).read_text())
    data.update(changes)
    path = tmp_path / f"{data['name']}.yaml"
    path.write_text(yaml.safe_dump(data))
    return load_calibration(path)


def _extinction(ebv, ebv_err, R_mag, R_blue, R_red):
    """The extinction stage's columns for the SBF band and the colour's bands, from E(B-V)
    and its error: A = R E(B-V), A_err = R sigma_E (one error source for all three)."""
    ebv, err = np.asarray(ebv, dtype=float), np.asarray(ebv_err, dtype=float)
    return dict(A_mag=R_mag * ebv, A_mag_err=R_mag * err, A_blue=R_blue * ebv, A_blue_err=R_blue * err,
                A_red=R_red * ebv, A_red_err=R_red * err)


def _tonry_inputs(n=1, ebv=0.05, ebv_err=0.008, **over):
    """Inputs of the worked example below (illustrative values, not published)."""
    base = dict(sbf_mag=np.full(n, 29.50), sbf_mag_err=np.full(n, 0.05),
                sbf_color=np.full(n, 1.20), sbf_color_err=np.full(n, 0.02),
                **_extinction(np.full(n, ebv), np.full(n, ebv_err), R_I_LANDOLT, R_V_LANDOLT, R_I_LANDOLT),
                K_mag=np.full(n, 0.010), K_blue=np.full(n, 0.030), K_red=np.full(n, 0.010))
    base.update(over)
    return base


# ----------------------------------------------------------------------------------------
# Shipped calibrations
# ----------------------------------------------------------------------------------------

@pytest.mark.parametrize("path, pivot, zero_point", [
    (TONRY, 1.15, -1.74),      # Tonry et al. 1997, ApJ 475, 399: M_I = -1.74 at (V-I)_0 = 1.15 (secondary copy)
    (BLAKESLEE, 1.3, -2.04),   # Blakeslee et al. 2009, ApJ 694, 556: M_z = -2.04 at (g-z)_0 = 1.3 (from memory)
    (JENSEN, 1.4, -2.947),     # Jensen et al. 2015, ApJ 808, 91: M_110 = -2.947 at (g-z)_0 = 1.4 (from memory)
])
def test_zero_point_at_pivot(path, pivot, zero_point):
    cal = load_calibration(path)
    check_calibration(cal)
    inputs = dict(sbf_mag=np.array([31.0]), sbf_color=np.array([pivot]),
                  **_extinction(np.array([0.0]), np.array([0.0]), 1.0, 2.0, 1.0), K_mag=0.0, K_blue=0.0, K_red=0.0)
    out = sbf_distance(inputs, cal, NO_MC)
    assert out["sbf_abs_mag"][0] == pytest.approx(zero_point, abs=1e-12)
    assert out["sbf_mu"][0] == pytest.approx(31.0 - zero_point, abs=1e-12)
    assert out["sbf_flags"][0] == 0


def test_shipped_calibration_metadata():
    tonry, blakeslee, jensen = (load_calibration(p) for p in (TONRY, BLAKESLEE, JENSEN))
    # Tonry et al. 1997: 1.0 < (V-I)_0 < 1.3, Vega Cousins, errors 0.07 and 0.25 (secondary copy)
    assert tonry.valid_range == (1.0, 1.3)
    assert tonry.system == "Vega"
    assert tonry.color_bands == ("Cousins V", "Cousins I")
    assert np.allclose(np.sqrt(np.diag(tonry.covariance)), [0.07, 0.25])
    # the 0.07 zero-point error is carried once, as coefficient_errors[0] (design choice)
    assert tonry.zero_point_error == 0.0
    # Blakeslee et al. 2009: AB, scatter ~0.06 mag (secondary copy)
    assert blakeslee.system == "AB" and blakeslee.scatter == 0.06
    assert blakeslee.coefficients.size == 4
    assert jensen.system == "AB" and jensen.band == "WFC3/IR F110W"
    for cal in (tonry, blakeslee, jensen):
        assert "from memory" in cal.provenance or "secondary copy" in cal.provenance


def test_blakeslee_cubic_shape():
    # Blakeslee et al. 2009, ApJ 694, 556 (coefficients from memory):
    # x = 0.1:  -2.04 + 1.41*0.1 + 2.60*0.01 + 3.72*0.001 = -1.86928
    # x = -0.3: -2.04 - 0.423 + 0.234 - 0.10044           = -2.32944
    cal = load_calibration(BLAKESLEE)
    inputs = dict(sbf_mag=np.array([30.0, 30.0]), sbf_color=np.array([1.4, 1.0]),
                  **_extinction(np.zeros(2), np.zeros(2), R_F850LP, R_F475W, R_F850LP),
                  K_mag=0.0, K_blue=0.0, K_red=0.0)
    out = sbf_distance(inputs, cal, NO_MC)
    assert out["sbf_abs_mag"] == pytest.approx([-1.86928, -2.32944], abs=1e-10)


# ----------------------------------------------------------------------------------------
# Worked example, raw values to mu
# ----------------------------------------------------------------------------------------

def test_worked_example_tonry():
    """Illustrative galaxy (inputs invented); calibration Tonry et al. 1997 (secondary copy),
    R from Schlafly & Finkbeiner 2011 Table 6 (secondary copy)."""
    cal = load_calibration(TONRY)
    out = sbf_distance(_tonry_inputs(), cal, SBFSettings(mc_draws=4000, mc_seed=7))
    # A_I = 1.505 * 0.05 = 0.07525 ; E(V-I) = (2.742 - 1.505) * 0.05 = 0.06185
    # m0 = 29.50 - 0.07525 - 0.010 = 29.41475
    assert out["sbf_mag_0"][0] == pytest.approx(29.41475, abs=1e-12)
    # c0 = 1.20 - 0.06185 - (0.030 - 0.010) = 1.11815
    assert out["sbf_color_0"][0] == pytest.approx(1.11815, abs=1e-12)
    # M = -1.74 + 4.5 * (1.11815 - 1.15) = -1.74 - 0.143325 = -1.883325
    assert out["sbf_abs_mag"][0] == pytest.approx(-1.883325, abs=1e-12)
    # mu = 29.41475 + 1.883325 = 31.298075
    assert out["sbf_mu"][0] == pytest.approx(31.298075, abs=1e-12)
    # random: sigma^2 = 0.05^2                      (m)        = 0.0025
    #         + (4.5 * 0.02)^2                      (colour)   = 0.0081
    #         + ((-1.505 + 4.5*1.237) * 0.008)^2    (E(B-V), one source) = 0.032492^2 = 0.001055730064
    #         + 0.05^2                              (scatter)  = 0.0025
    #         = 0.014155730064
    assert out["sbf_mu_err"][0] == pytest.approx(math.sqrt(0.014155730064), abs=1e-12)
    assert out["sbf_mu_err"][0] == pytest.approx(0.1189779, abs=1e-7)
    # systematic: 0.07^2 + (0.25 * -0.03185)^2 (coefficients) = 0.00496340140625 -> 0.0704514
    assert out["sbf_mu_err_sys"][0] == pytest.approx(math.sqrt(0.00496340140625), abs=1e-12)
    # d = 10^((31.298075 - 25)/5) Mpc = 18.1808842 ; sigma_d = d ln10/5 sigma_mu (random) = 0.9961548
    assert out["sbf_d_mpc"][0] == pytest.approx(18.1808842, abs=1e-6)
    assert out["sbf_d_err_mpc"][0] == pytest.approx(0.9961548, abs=1e-6)
    # Monte Carlo of the random part: 4000 draws, relative noise ~1/sqrt(8000) = 1.1%
    assert out["sbf_mu_err_mc"][0] == pytest.approx(0.1189779, rel=0.05)
    assert out["sbf_flags"][0] == 0
    assert not out["sbf_malmquist_applied"][0]


def test_worked_example_catalog_in_ab():
    """Same galaxy with AB photometry; the Tonry calibration is Vega.
    AB - Vega: Cousins V 0.02, I 0.45 (Blanton & Roweis 2007, AJ 133, 734, Table 1; secondary copy).
    I_AB = 29.50 + 0.45 = 29.95 ; (V-I)_AB = 1.20 + 0.02 - 0.45 = 0.77."""
    cal = load_calibration(TONRY)
    # AB -> Vega subtracts (AB - Vega): I offset -0.45 ; colour offset -(0.02 - 0.45) = +0.43
    assert system_offset("AB", "Vega", 0.45) == pytest.approx(-0.45)
    assert system_offset("Vega", "AB", 0.45) == pytest.approx(0.45)
    assert system_offset("Vega", "Vega", 0.45) == 0.0
    c_off = color_system_offset("AB", 0.02, "AB", 0.45, "Vega")
    assert c_off == pytest.approx(0.43)
    assert color_system_offset("Vega", 0.02, "Vega", 0.45, "AB") == pytest.approx(-0.43)
    settings = SBFSettings(mc_draws=0, mag_offset=system_offset("AB", "Vega", 0.45), color_offset=c_off)
    out = sbf_distance(_tonry_inputs(sbf_mag=np.array([29.95]), sbf_color=np.array([0.77])), cal, settings)
    # identical to the Vega worked example above
    assert out["sbf_color_0"][0] == pytest.approx(1.11815, abs=1e-12)
    assert out["sbf_mag_0"][0] == pytest.approx(29.41475, abs=1e-12)
    assert out["sbf_mu"][0] == pytest.approx(31.298075, abs=1e-12)


def test_system_offset_rejects_unknown_system():
    with pytest.raises(ValueError, match="from_system"):
        system_offset("ST", "AB", 0.1)
    with pytest.raises(ValueError, match="ab_minus_vega"):
        system_offset("Vega", "AB", float("nan"))


# ----------------------------------------------------------------------------------------
# Colour range
# ----------------------------------------------------------------------------------------

def test_out_of_range_flagged_not_extrapolated():
    # Tonry et al. 1997: valid 1.0 < (V-I)_0 < 1.3 (secondary copy); ends treated as inside
    cal = load_calibration(TONRY)
    colors = np.array([0.95, 1.0, 1.2, 1.3, 1.35])
    inputs = dict(sbf_mag=np.full(5, 30.0), sbf_color=colors,
                  **_extinction(np.zeros(5), np.zeros(5), R_I_LANDOLT, R_V_LANDOLT, R_I_LANDOLT),
                  K_mag=0.0, K_blue=0.0, K_red=0.0)
    out = sbf_distance(inputs, cal, NO_MC)
    oor = F.has(out["sbf_flags"], F.Method.OUT_OF_RANGE)
    assert oor.tolist() == [True, False, False, False, True]
    assert not F.has(out["sbf_flags"], F.Method.EXTRAPOLATED).any()
    for key in ("sbf_abs_mag", "sbf_mu", "sbf_mu_err", "sbf_d_mpc", "sbf_d_err_mpc"):
        assert np.isnan(out[key][[0, 4]]).all()
        assert np.isfinite(out[key][1:4]).all()
    # rows stay, and the corrected colour is still reported
    assert out["sbf_color_0"] == pytest.approx(colors)
    assert all(len(out[k]) == 5 for k in REGISTRY['sbf'].output_units())

    ext = sbf_distance(inputs, cal, SBFSettings(mc_draws=0, allow_extrapolation=True))
    extrap = F.has(ext["sbf_flags"], F.Method.EXTRAPOLATED)
    assert extrap.tolist() == [True, False, False, False, True]
    assert F.has(ext["sbf_flags"], F.Method.OUT_OF_RANGE).tolist() == oor.tolist()
    # hand: M(1.35) = -1.74 + 4.5*0.20 = -0.84 ; M(0.95) = -1.74 - 4.5*0.20 = -2.64
    assert ext["sbf_mu"][[0, 4]] == pytest.approx([32.64, 30.84], abs=1e-12)


def test_out_of_range_uses_corrected_colour():
    # observed (V-I) = 1.32 is outside, but E(V-I) = 1.237*0.05 = 0.06185 brings c0 = 1.25815 inside
    cal = load_calibration(TONRY)
    inputs = _tonry_inputs(sbf_color=np.array([1.32]), K_blue=np.array([0.0]), K_red=np.array([0.0]))
    out = sbf_distance(inputs, cal, NO_MC)
    assert out["sbf_color_0"][0] == pytest.approx(1.25815, abs=1e-12)
    assert out["sbf_flags"][0] == 0 and np.isfinite(out["sbf_mu"][0])


def test_blakeslee_out_of_range():
    # Blakeslee et al. 2009 valid range ~0.8-1.6 (from memory)
    cal = load_calibration(BLAKESLEE)
    inputs = dict(sbf_mag=np.full(3, 31.0), sbf_color=np.array([0.7, 1.2, 1.7]),
                  **_extinction(np.zeros(3), np.zeros(3), R_F850LP, R_F475W, R_F850LP),
                  K_mag=0.0, K_blue=0.0, K_red=0.0)
    out = sbf_distance(inputs, cal, NO_MC)
    assert F.has(out["sbf_flags"], F.Method.OUT_OF_RANGE).tolist() == [True, False, True]
    assert np.isnan(out["sbf_mu"][[0, 2]]).all() and np.isfinite(out["sbf_mu"][1])


# ----------------------------------------------------------------------------------------
# Errors: E(B-V) as one source, analytic vs Monte Carlo
# ----------------------------------------------------------------------------------------

def test_ebv_error_is_one_correlated_source(tmp_path):
    # Tonry coefficients (Tonry et al. 1997, secondary copy) with no calibration error or scatter,
    # so only E(B-V) contributes: |dmu/dE| = |-1.505 + 4.5*(2.742 - 1.505)| = 4.0615
    cal = _tmp_calibration(tmp_path, TONRY, name="tonry_exact", coefficient_errors=[0.0, 0.0], scatter=0.0)
    n = 200
    inputs = _tonry_inputs(n, sbf_mag_err=np.zeros(n), sbf_color_err=np.zeros(n),
                           ebv_err=0.02)
    out = sbf_distance(inputs, cal, SBFSettings(mc_draws=1000, mc_seed=3))
    # hand: 4.0615 * 0.02 = 0.08123 ; treating the two uses as independent would give
    # sqrt(1.505^2 + 5.5665^2) * 0.02 = 0.11533 (wrong)
    assert out["sbf_mu_err"] == pytest.approx(np.full(n, 0.08123), abs=1e-12)
    mc = out["sbf_mu_err_mc"]
    assert np.mean(mc) == pytest.approx(0.08123, rel=0.02)
    assert np.all(np.abs(mc / 0.08123 - 1) < 0.12)
    assert np.all(np.abs(mc - 0.11533) > 0.015)


def test_k_errors_enter_like_the_magnitude_and_colour(tmp_path):
    """m0 = m - K_mag and c0 = c - (K_blue - K_red) (the K-correction's definition, Hogg et
    al. 2002, astro-ph/0210394), so with mu = m0 - M(c0): dmu/dK_mag = -1 and
    dmu/dK_blue = -dmu/dK_red = b1 = 4.5 (Tonry et al. 1997 slope, secondary copy)."""
    cal = _tmp_calibration(tmp_path, TONRY, name="tonry_exact", coefficient_errors=[0.0, 0.0], scatter=0.0)
    n = 100
    base = _tonry_inputs(n, sbf_mag_err=np.zeros(n), sbf_color_err=np.zeros(n), ebv_err=0.0)
    for key, expected in (("K_mag_err", 0.03), ("K_blue_err", 4.5 * 0.03), ("K_red_err", 4.5 * 0.03)):
        out = sbf_distance(base | {key: np.full(n, 0.03)}, cal, SBFSettings(mc_draws=1000, mc_seed=4))
        assert out["sbf_mu_err"] == pytest.approx(np.full(n, expected), rel=1e-12), key
        assert np.mean(out["sbf_mu_err_mc"]) == pytest.approx(expected, rel=0.03), key
    # without the K correction its error does not count either
    off = sbf_distance(base | {"K_mag_err": np.full(n, 0.03)}, cal, SBFSettings(apply_kcorrection=False, mc_draws=0))
    assert np.all(off["sbf_mu_err"] == 0.0)


def test_analytic_matches_monte_carlo_linear():
    # Tonry et al. 1997 (linear, secondary copy): first-order propagation is exact
    cal = load_calibration(TONRY)
    rng = np.random.default_rng(11)
    n = 300
    inputs = dict(sbf_mag=rng.uniform(28, 33, n), sbf_mag_err=rng.uniform(0.02, 0.2, n),
                  sbf_color=rng.uniform(1.18, 1.27, n), sbf_color_err=rng.uniform(0.005, 0.04, n),
                  **_extinction(rng.uniform(0.0, 0.1, n), rng.uniform(0.0, 0.02, n),
                                R_I_LANDOLT, R_V_LANDOLT, R_I_LANDOLT),
                  K_mag=rng.uniform(0, 0.03, n), K_blue=rng.uniform(0, 0.05, n), K_red=rng.uniform(0, 0.03, n))
    out = sbf_distance(inputs, cal, SBFSettings(mc_draws=1000, mc_seed=5))
    ratio = out["sbf_mu_err_mc"] / out["sbf_mu_err"]
    assert np.all(np.isfinite(ratio))
    # per-row MC noise ~ 1/sqrt(2*1000) = 2.2 %; 12 % is > 5 sigma
    assert np.median(ratio) == pytest.approx(1.0, abs=0.01)
    assert np.all(np.abs(ratio - 1) < 0.12)


def test_analytic_matches_monte_carlo_cubic_small_errors():
    # Blakeslee et al. 2009 cubic (from memory): near-linear for small colour errors
    cal = load_calibration(BLAKESLEE)
    rng = np.random.default_rng(12)
    n = 300
    inputs = dict(sbf_mag=rng.uniform(29, 33, n), sbf_mag_err=rng.uniform(0.02, 0.1, n),
                  sbf_color=rng.uniform(1.0, 1.5, n), sbf_color_err=np.full(n, 0.01),
                  **_extinction(rng.uniform(0.0, 0.05, n), np.full(n, 0.005), R_F850LP, R_F475W, R_F850LP),
                  K_mag=0.0, K_blue=0.0, K_red=0.0)
    out = sbf_distance(inputs, cal, SBFSettings(mc_draws=1000, mc_seed=9))
    ratio = out["sbf_mu_err_mc"] / out["sbf_mu_err"]
    assert np.median(ratio) == pytest.approx(1.0, abs=0.02)
    assert np.all(np.abs(ratio - 1) < 0.12)


def test_monte_carlo_is_seeded():
    cal = load_calibration(TONRY)
    inputs = _tonry_inputs(20)
    a = sbf_distance(inputs, cal, SBFSettings(mc_draws=50, mc_seed=1))["sbf_mu_err_mc"]
    b = sbf_distance(inputs, cal, SBFSettings(mc_draws=50, mc_seed=1))["sbf_mu_err_mc"]
    c = sbf_distance(inputs, cal, SBFSettings(mc_draws=50, mc_seed=2))["sbf_mu_err_mc"]
    assert np.array_equal(a, b)
    assert not np.array_equal(a, c)
    assert np.isnan(sbf_distance(inputs, cal, NO_MC)["sbf_mu_err_mc"]).all()


# ----------------------------------------------------------------------------------------
# Recovery of a simulated sample
# ----------------------------------------------------------------------------------------

def _simulate(rng, n, truth_abs_mag, c0_range, R_mag, R_blue, R_red, sig_m, sig_c, sig_e, sig_int):
    mu_true = rng.uniform(30.0, 34.0, n)
    c0_true = rng.uniform(*c0_range, n)
    ebv_true = rng.uniform(0.0, 0.15, n)
    k_mag, k_blue, k_red = rng.uniform(0, 0.03, n), rng.uniform(0, 0.06, n), rng.uniform(0, 0.03, n)
    m_obs = (truth_abs_mag(c0_true) + mu_true + sig_int * rng.standard_normal(n)
             + R_mag * ebv_true + k_mag + sig_m * rng.standard_normal(n))
    c_obs = c0_true + (R_blue - R_red) * ebv_true + (k_blue - k_red) + sig_c * rng.standard_normal(n)
    ebv_obs = ebv_true + sig_e * rng.standard_normal(n)
    inputs = dict(sbf_mag=m_obs, sbf_mag_err=np.full(n, sig_m), sbf_color=c_obs,
                  sbf_color_err=np.full(n, sig_c), **_extinction(ebv_obs, np.full(n, sig_e), R_mag, R_blue, R_red),
                  K_mag=k_mag, K_blue=k_blue, K_red=k_red)
    return inputs, mu_true


def test_recovery_tonry(tmp_path):
    # truth: Tonry et al. 1997 relation (secondary copy), written out by hand
    rng = np.random.default_rng(2024)
    n = 100_000
    inputs, mu_true = _simulate(rng, n, lambda c0: -1.74 + 4.5 * (c0 - 1.15), (1.05, 1.25),
                                R_I_LANDOLT, R_V_LANDOLT, R_I_LANDOLT,
                                sig_m=0.05, sig_c=0.02, sig_e=0.01, sig_int=0.05)
    settings = SBFSettings(mc_draws=0, allow_extrapolation=True)
    out = sbf_distance(inputs, load_calibration(TONRY), settings)
    dmu = out["sbf_mu"] - mu_true
    assert np.isfinite(dmu).all()
    assert abs(np.median(dmu)) < 0.005
    # injected: sqrt(0.05^2 + (4.5*0.02)^2 + (4.0615*0.01)^2 + 0.05^2) = sqrt(0.01487496...) = 0.121963
    injected = math.sqrt(0.0025 + 0.0081 + 0.0016496 + 0.0025)
    assert np.std(dmu) == pytest.approx(injected, rel=0.05)
    # the analytic error (calibration-coefficient errors set to 0: they are not injected) matches
    exact = _tmp_calibration(tmp_path, TONRY, name="tonry_exact", coefficient_errors=[0.0, 0.0])
    err = sbf_distance(inputs, exact, settings)["sbf_mu_err"]
    assert np.median(err) == pytest.approx(injected, rel=1e-6)
    assert np.std(dmu) == pytest.approx(np.median(err), rel=0.05)


def test_recovery_blakeslee_cubic(tmp_path):
    # truth: Blakeslee et al. 2009 cubic (coefficients from memory), written out by hand
    def truth(c0):
        x = c0 - 1.3
        return -2.04 + 1.41 * x + 2.60 * x**2 + 3.72 * x**3

    rng = np.random.default_rng(99)
    n = 100_000
    inputs, mu_true = _simulate(rng, n, truth, (0.9, 1.5), R_F850LP, R_F475W, R_F850LP,
                                sig_m=0.04, sig_c=0.015, sig_e=0.01, sig_int=0.06)
    exact = _tmp_calibration(tmp_path, BLAKESLEE, name="blakeslee_exact",
                             coefficient_errors=[0.0, 0.0, 0.0, 0.0])
    out = sbf_distance(inputs, exact, SBFSettings(mc_draws=0, allow_extrapolation=True))
    dmu = out["sbf_mu"] - mu_true
    assert abs(np.median(dmu)) < 0.005
    pulls = dmu / out["sbf_mu_err"]
    assert np.std(pulls) == pytest.approx(1.0, rel=0.05)


# ----------------------------------------------------------------------------------------
# Flags and missing inputs
# ----------------------------------------------------------------------------------------

def test_flags_inherited_and_missing_inputs():
    cal = load_calibration(TONRY)
    n = 8
    inp = _tonry_inputs(n)
    q, e, k = F.new(n), F.new(n), F.new(n)
    inp["sbf_mag"][1] = np.nan
    q[1] = F.Quality.SBF_MAG_INVALID
    e[2] = F.Ext.HIGH_EXTINCTION
    inp["A_mag"][3] = inp["A_blue"][3] = inp["A_red"][3] = np.nan  # no E(B-V): every A is NaN
    e[3] = F.Ext.NO_EBV
    k[4] = F.KCorr.COLOR_CLIPPED
    inp["K_mag"][5] = np.nan
    k[5] = F.KCorr.Z_BEYOND_GRID
    inp["sbf_mag_err"][6] = np.nan
    q[6] = F.Quality.SBF_ERR_INVALID
    inp["sbf_color"][7] = np.nan
    q[7] = F.Quality.SBF_COLOR_INVALID
    inp.update(quality_flags=q, ext_flags=e, kcorr_flags=k)
    out = sbf_distance(inp, cal, NO_MC)
    fl = out["sbf_flags"]
    M = F.Method
    assert fl[0] == 0
    assert fl[1] == M.MISSING_INPUT and np.isnan(out["sbf_mu"][1])
    assert fl[2] == M.HIGH_EXTINCTION and np.isfinite(out["sbf_mu"][2])
    assert fl[3] == M.HIGH_EXTINCTION | M.MISSING_INPUT
    assert np.isnan(out["sbf_color_0"][3]) and np.isnan(out["sbf_mu"][3])
    assert fl[4] == M.KCORR_PROBLEM and np.isfinite(out["sbf_mu"][4])
    assert fl[5] == M.KCORR_PROBLEM | M.MISSING_INPUT and np.isnan(out["sbf_mu"][5])
    # error flagged invalid: distance kept, the magnitude term is omitted from the error
    # hand: 0.01911913147025 - 0.0025 = 0.01661913147025 (worked example above)
    assert fl[6] == M.MISSING_INPUT
    assert out["sbf_mu"][6] == pytest.approx(31.298075, abs=1e-12)
    assert out["sbf_mu_err"][6] == pytest.approx(math.sqrt(0.011655730064), abs=1e-12)
    assert fl[7] == M.MISSING_INPUT and np.isnan(out["sbf_color_0"][7])
    assert out["sbf_mag_0"][7] == pytest.approx(29.41475, abs=1e-12)
    # NaN distances carry NaN errors, finite ones finite errors
    assert np.array_equal(np.isnan(out["sbf_mu"]), np.isnan(out["sbf_mu_err"]))
    assert np.array_equal(np.isnan(out["sbf_mu"]), np.isnan(out["sbf_d_err_mpc"]))


def test_without_kcorrection():
    cal = load_calibration(TONRY)
    inp = _tonry_inputs(2)
    inp["K_mag"][1] = np.nan
    inp["kcorr_flags"] = np.array([0, int(F.KCorr.Z_BEYOND_GRID)], dtype=np.uint32)
    out = sbf_distance(inp, cal, SBFSettings(mc_draws=0, apply_kcorrection=False))
    assert (out["sbf_flags"] == 0).all()
    # hand: without K, mu changes by +K_mag - 4.5*(K_blue - K_red) = 0.010 - 0.090 = -0.080
    assert out["sbf_mu"] == pytest.approx([31.218075, 31.218075], abs=1e-12)
    # K inputs are then not needed
    del inp["K_mag"], inp["K_blue"], inp["K_red"]
    out2 = sbf_distance(inp, cal, SBFSettings(mc_draws=0, apply_kcorrection=False))
    assert out2["sbf_mu"] == pytest.approx(out["sbf_mu"], abs=0)


def test_rows_never_dropped_large_shard():
    cal = load_calibration(TONRY)
    rng = np.random.default_rng(1)
    n = 50_000
    inp = _tonry_inputs(n, sbf_color=rng.uniform(0.8, 1.5, n))
    bad = rng.random(n) < 0.1
    inp["sbf_mag"] = np.where(bad, np.nan, inp["sbf_mag"])
    out = sbf_distance(inp, cal, SBFSettings(mc_draws=3))
    assert set(out) == set(REGISTRY['sbf'].output_units())
    assert all(len(v) == n for v in out.values())
    assert out["sbf_flags"].dtype == np.uint32
    assert F.has(out["sbf_flags"][bad], F.Method.MISSING_INPUT).all()
    finite = np.isfinite(out["sbf_mu"])
    assert not (finite & bad).any()
    assert (finite == (~bad & ~F.has(out["sbf_flags"], F.Method.OUT_OF_RANGE))).all()


# ----------------------------------------------------------------------------------------
# Malmquist
# ----------------------------------------------------------------------------------------

def test_malmquist(tmp_path):
    # only intrinsic scatter 0.4 mag -> sigma_mu = 0.4; homogeneous Malmquist (mean) factor
    # exp(3.5 (ln10/5 * 0.4)^2) = 1.126 (Lynden-Bell et al. 1988, ApJ 326, 19; from memory)
    cal = _tmp_calibration(tmp_path, TONRY, name="tonry_s04", coefficient_errors=[0.0, 0.0], scatter=0.4)
    inp = _tonry_inputs(1, sbf_mag_err=np.zeros(1), sbf_color_err=np.zeros(1), ebv_err=0.0)
    off = sbf_distance(inp, cal, NO_MC)
    on = sbf_distance(inp, cal, SBFSettings(mc_draws=0, malmquist=True))
    assert off["sbf_mu_err"][0] == pytest.approx(0.4, abs=1e-12)
    assert on["sbf_d_mpc"][0] / off["sbf_d_mpc"][0] == pytest.approx(1.126, abs=5e-4)
    assert on["sbf_malmquist_applied"][0] and not off["sbf_malmquist_applied"][0]
    assert on["sbf_mu"][0] == off["sbf_mu"][0]  # mu stays the direct estimate
    med = sbf_distance(inp, cal, SBFSettings(mc_draws=0, malmquist=True, malmquist_kind="median"))
    # median: exp(3 * 0.184207^2) = 1.1071 (Lynden-Bell et al. 1988; from memory)
    assert med["sbf_d_mpc"][0] / off["sbf_d_mpc"][0] == pytest.approx(1.1071, abs=5e-4)


# ----------------------------------------------------------------------------------------
# Settings and structural errors
# ----------------------------------------------------------------------------------------

def test_settings_from_config():
    s = SBFSettings.from_config({"allow_extrapolation": True, "mc_draws": 50, "calibration": "x.yaml"},
                                ignore=("calibration",), mag_offset=-0.45, color_offset=0.43)
    assert s.allow_extrapolation and s.mc_draws == 50 and s.mag_offset == -0.45 and s.color_offset == 0.43
    assert SBFSettings.from_config(None) == SBFSettings()
    with pytest.raises(ValueError, match="'mc_drawz'"):
        SBFSettings.from_config({"mc_drawz": 10})
    with pytest.raises(ValueError, match="mc_draws"):
        SBFSettings.from_config({"mc_draws": -1})
    with pytest.raises(ValueError, match="malmquist_kind"):
        SBFSettings.from_config({"malmquist_kind": "mode"})
    with pytest.raises(ValueError, match="allow_extrapolation"):
        SBFSettings.from_config({"allow_extrapolation": "yes"})


def test_structural_errors(tmp_path):
    cal = load_calibration(TONRY)
    with pytest.raises(ValueError, match="'A_I'"):
        sbf_distance({**_tonry_inputs(), "A_I": 0.1}, cal, NO_MC)
    inp = _tonry_inputs()
    del inp["K_mag"]
    with pytest.raises(ValueError, match="K_mag"):
        sbf_distance(inp, cal, NO_MC)
    with pytest.raises(ValueError, match="sbf_color"):
        sbf_distance(_tonry_inputs(1, sbf_color=np.array([1.1, 1.2])), cal, NO_MC)
    with pytest.raises(ValueError, match="R_mag"):  # extinction comes as A_<band>, not R and E(B-V)
        sbf_distance(_tonry_inputs(R_mag=1.505), cal, NO_MC)
    tf = _tmp_calibration(tmp_path, TONRY, name="not_sbf", method="tully_fisher", form="luminosity")
    with pytest.raises(ValueError, match="method"):
        sbf_distance(_tonry_inputs(), tf, NO_MC)
    assert set(INPUTS) >= {"sbf_mag", "sbf_color", "A_mag", "A_blue", "A_red"}
