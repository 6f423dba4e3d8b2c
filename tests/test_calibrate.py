"""Tests of the calibrate target (galdist.calibrate): the method's corrected quantities
and their correlated errors, the fitted calibration file, the round trip through the
distance stage, the pre-flight checks, and the workflow target on the demo sample.

Samples are invented here, generated forward through the Tully-Fisher and SBF
functions with invented "true" coefficients.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json

import numpy as np
import pytest
import yaml

from galdist import calibrate, preflight
from galdist import tully_fisher as tf
from galdist.calibration import load_calibration
from galdist.demo import _observed_width
from galdist.errors import ConfigError

from conftest import calibration_sample_file, copy_workflow, run_snakemake

A0, A1, SCATTER = -21.2, -8.5, 0.3  # invented truth
Q0 = 0.2


def config(**calibrate_section):
    cfg = preflight.resolve({"catalog": "unused.parquet", "calibrate": calibrate_section})
    from galdist.config import validate

    return validate(cfg)


def tf_sample(seed, n_groups=8, per_group=25):
    """Tully-Fisher observables of discs in groups, generated forward with the Cousins I
    internal-extinction gamma and the w50 turbulence constants of galdist.tully_fisher."""
    rng = np.random.default_rng(seed)
    n = n_groups * per_group
    group = np.repeat(np.arange(n_groups), per_group)
    mu_true = rng.uniform(31.0, 33.0, n_groups)
    z = np.repeat(rng.uniform(0.004, 0.012, n_groups), per_group)
    x = rng.normal(2.5, 0.15, n)
    abs_mag = A0 + A1 * (x - 2.5) + rng.normal(0.0, SCATTER, n)
    cos_i = rng.uniform(np.cos(np.radians(80.0)), np.cos(np.radians(50.0)), n)
    axis_ratio = np.sqrt(cos_i ** 2 * (1 - Q0 ** 2) + Q0 ** 2)
    g0, g1 = tf.INTERNAL_EXTINCTION_GAMMA["Cousins I"]
    a_int = tf.internal_extinction(axis_ratio, x, g0, g1)
    w_t, w_c = tf.TURBULENCE_CONSTANTS["w50"]
    w50 = _observed_width(10 ** x * np.sqrt(1 - cos_i ** 2), w_t, w_c) * (1 + z)
    a_gal, k_corr = rng.uniform(0.02, 0.1, n), rng.uniform(0.0, 0.02, n)
    mag = abs_mag + mu_true[group] + a_gal + k_corr + a_int
    inputs = {"mag": mag, "mag_err": np.full(n, 0.03), "w50": w50, "w50_err": np.full(n, 6.0),
              "axis_ratio": axis_ratio, "axis_ratio_err": np.full(n, 0.03), "z_helio": z,
              "a_gal": a_gal, "a_gal_err": np.full(n, 0.005), "k_corr": k_corr, "k_corr_err": np.full(n, 0.005)}
    return inputs, group, mu_true, x, abs_mag


@pytest.fixture(scope="module")
def tf_setup():
    cfg = config(catalog="unused.parquet")
    ph = calibrate.placeholder(cfg)
    return cfg, ph, calibrate.method_settings(cfg, ph)


def test_corrected_quantities_come_from_the_tully_fisher_chain(tf_setup):
    """x and y invert the forward generation (log W^i and M + mu to rounding), and the
    propagated errors, including the x-y covariance the axis ratio induces (it moves both
    the inclination, hence log W^i, and the internal extinction), match a Monte Carlo
    through tully_fisher_distance itself (common practice: first-order propagation
    agrees with a small-error Monte Carlo to a few per cent)."""
    cfg, ph, settings = tf_setup
    inputs, group, mu_true, x_true, abs_mag = tf_sample(1)
    q = calibrate.corrected("tully_fisher", inputs, ph, settings)
    np.testing.assert_allclose(q["x"], x_true, atol=2e-4)
    np.testing.assert_allclose(q["y"], abs_mag + mu_true[group], atol=2e-3)
    rng = np.random.default_rng(5)
    draws = 4000
    rows = np.arange(0, 200, 40)
    xs, ys = [], []
    for _ in range(draws):
        d = {k: v[rows] for k, v in inputs.items()}
        for key in ("mag", "w50", "axis_ratio", "a_gal", "k_corr"):
            d[key] = d[key] + rng.normal(0, 1, rows.size) * d[f"{key}_err"]
        out = tf.tully_fisher_distance(d, ph, settings)
        xs.append(out["tf_logw_i"])
        ys.append(out["tf_mag_corr"])
    xs, ys = np.array(xs), np.array(ys)
    np.testing.assert_allclose(xs.std(axis=0), q["x_err"][rows], rtol=0.06)
    np.testing.assert_allclose(ys.std(axis=0), q["y_err"][rows], rtol=0.06)
    mc_cov = np.mean((xs - xs.mean(0)) * (ys - ys.mean(0)), axis=0)
    np.testing.assert_allclose(mc_cov, q["xy_cov"][rows], rtol=0.15)
    assert np.all(q["xy_cov"][rows] != 0.0)


def test_round_trip_fit_file_distance_stage(tf_setup, tmp_path):
    """Fit -> calibration file -> tully_fisher_distance: for every group whose modulus
    was free, the inverse-variance mean of the members' tf_mu equals the fitted modulus.
    This is the forward ML condition d(-ln L)/d mu_g = 0 without selection: sum_i
    (y_i - mu_g - M(x_i)) / V_i = 0, and tf_mu_i = y_i - M(x_i) (derived here)."""
    cfg, ph, settings = tf_setup
    inputs, group, mu_true, *_ = tf_sample(2)
    q = calibrate.corrected("tully_fisher", inputs, ph, settings)
    ids = np.array([f"G{g}" for g in group], dtype=object)
    mu_ref, mu_ref_err = np.full(group.size, np.nan), np.full(group.size, np.nan)
    for g in (0, 1):  # two groups with a reference modulus, repeated on every member
        mu_ref[group == g], mu_ref_err[group == g] = mu_true[g] + 0.02, 0.05
    sample, reason = calibrate.build_sample(q, ids, mu_ref, mu_ref_err, cfg["calibrate"])
    assert (reason == "").all()
    model = calibrate.model_for(cfg["calibrate"], "tully_fisher", sample)
    result = calibrate.fit_sample(sample, model, n_bootstrap=0, seed=1)
    best = result["fit"]
    assert best.coefficients == pytest.approx([A0, A1], abs=3 * best.coefficient_errors.max())
    data = calibrate.calibration_data(cfg, sample, best, "tf_round_trip", [{"path": "x", "sha256": "0" * 64}])
    path = tmp_path / "tf_round_trip.yaml"
    path.write_text(calibrate.calibration_yaml(data))
    cal = load_calibration(path)
    assert cal.provenance == "fitted by galdist" and cal.form == "luminosity"
    assert cal.valid_range == (pytest.approx(sample.x.min()), pytest.approx(sample.x.max()))
    assert yaml.safe_load(path.read_text())["conventions"] == {"extinction": "sf11", "zero_point_h0": None}
    out = tf.tully_fisher_distance(inputs, cal, dataclasses.replace(settings, mc_draws=0))
    a1 = best.coefficients[1]
    var = q["y_err"] ** 2 + a1 ** 2 * q["x_err"] ** 2 - 2 * a1 * q["xy_cov"] + best.scatter ** 2
    for g, name in enumerate(sample.group_names):
        if not best.group_free[g] or np.isfinite(sample.ref_mu[g]):
            continue
        m = ids == name
        w = 1.0 / var[m]
        assert np.sum(w * out["tf_mu"][m]) / w.sum() == pytest.approx(best.group_mu[g], abs=1e-5)


def test_sbf_polynomial_fit_loads_and_serves_the_sbf_stage(tmp_path):
    """A quadratic SBF colour relation fitted from groups is a colour_polynomial file the
    SBF stage accepts; its moduli of the fitted galaxies scatter about the group moduli
    as the fitted scatter and the measurement errors together say (within 20%)."""
    from galdist.sbf import sbf_distance

    cfg = config(catalog="unused.parquet", method="sbf", degree=2)
    ph = calibrate.placeholder(cfg)
    settings = calibrate.method_settings(cfg, ph)
    rng = np.random.default_rng(4)
    n_groups, per = 6, 30
    group = np.repeat(np.arange(n_groups), per)
    mu = rng.uniform(30.5, 32.5, n_groups)
    c0 = rng.uniform(1.0, 1.3, group.size)
    abs_sbf = -1.6 + 4.5 * (c0 - 1.15) + 3.0 * (c0 - 1.15) ** 2 + rng.normal(0, 0.08, group.size)
    zeros = np.zeros(group.size)
    noise_m, noise_c = rng.normal(0, 0.05, group.size), rng.normal(0, 0.01, group.size)
    inputs = {"sbf_mag": abs_sbf + mu[group] + noise_m, "sbf_mag_err": np.full(group.size, 0.05),
              "sbf_color": c0 + noise_c,
              "sbf_color_err": np.full(group.size, 0.01), "A_mag": zeros, "A_blue": zeros, "A_red": zeros,
              "K_mag": zeros, "K_blue": zeros, "K_red": zeros}
    q = calibrate.corrected("sbf", inputs, ph, settings)
    mu_ref = np.where(group == 0, mu[0], np.nan)
    sample, _ = calibrate.build_sample(q, group.astype(str), mu_ref, np.where(group == 0, 0.03, np.nan),
                                       cfg["calibrate"])
    model = calibrate.model_for(cfg["calibrate"], "sbf", sample)
    assert model.pivot == 1.15
    best = calibrate.fit_sample(sample, model, 0, 1)["fit"]
    assert np.all(np.abs(best.coefficients - [-1.6, 4.5, 3.0]) < 3 * best.coefficient_errors)
    path = tmp_path / "sbf_fit.yaml"
    path.write_text(calibrate.calibration_yaml(calibrate.calibration_data(cfg, sample, best, "sbf_fit", [])))
    cal = load_calibration(path)
    assert cal.form == "colour_polynomial" and cal.coefficients.size == 3
    out = sbf_distance(inputs, cal, settings)
    resid = out["sbf_mu"] - best.group_mu[sample.group]
    slope = cal.relation_slope(out["sbf_color_0"])
    expected = np.sqrt(np.mean(best.scatter ** 2 + 0.05 ** 2 + (slope * 0.01) ** 2))
    assert np.std(resid) == pytest.approx(expected, rel=0.2)
    assert best.scatter == pytest.approx(0.08, abs=3 * best.scatter_err)


def test_small_free_groups_are_left_out_and_references_combine():
    """Distinct reference moduli of one group combine by inverse variance; a repeated
    value counts once (hand arithmetic: (31/0.1^2 + 31.2/0.2^2) / (1/0.1^2 + 1/0.2^2)
    = 31.04, error 1/sqrt(125) = 0.0894)."""
    names, codes, ref, err = calibrate.group_references(
        np.array(["a", "a", "a", "b"], dtype=object), np.array([31.0, 31.0, 31.2, np.nan]),
        np.array([0.1, 0.1, 0.2, np.nan]))
    assert list(names) == ["a", "b"]
    assert ref[0] == pytest.approx(31.04) and err[0] == pytest.approx(0.0894, abs=1e-4)
    assert np.isnan(ref[1])
    small = calibrate._small_free_groups(np.array(["a", "b", "b", "c"], dtype=object), np.ones(4, bool),
                                         np.array([30.0, np.nan, np.nan, np.nan]), 2)
    assert list(small) == [False, False, False, True]


def _calibrate_errors(user):
    result = preflight.check(user, sample_rows=False)
    return [f.message for f in result.errors if f.check == "calibration sample"]


def test_preflight_names_the_key_and_the_fix(tmp_path):
    from conftest import small_catalog
    import pyarrow as pa
    import pyarrow.parquet as pq

    survey = tmp_path / "survey.parquet"
    pq.write_table(pa.table(small_catalog(20)), survey)
    good = calibration_sample_file(tmp_path)
    assert _calibrate_errors({"catalog": str(survey), "calibrate": {"catalog": good}}) == []
    (msg,) = _calibrate_errors({"catalog": str(survey), "calibrate": {"catalog": good, "method": "sbf",
                                                                      "form": "inverse"}})
    assert "calibrate.form" in msg and "Tully-Fisher only" in msg
    msgs = _calibrate_errors({"catalog": str(survey),
                              "calibrate": {"catalog": calibration_sample_file(tmp_path, drop=("group_id",))}})
    assert any("calibrate.columns.group_id" in m for m in msgs)
    msgs = _calibrate_errors({"catalog": str(survey),
                              "calibrate": {"catalog": calibration_sample_file(tmp_path, drop=("mu_ref_err",))}})
    assert any("mu_ref_err" in m for m in msgs)
    msgs = _calibrate_errors({"catalog": str(survey), "calibrate": {"catalog": good},
                              "extinction": {"ebv_scale": 0.9}})
    assert any("extinction" in m and "sf11" in m for m in msgs)
    msgs = _calibrate_errors({"catalog": str(survey), "calibrate": {"catalog": str(tmp_path / "none.parquet")}})
    assert any("calibrate.catalog" in m and "not found" in m for m in msgs)
    result = preflight.check({"catalog": str(survey), "calibrate": {"catalog": good, "form": "sideways"}})
    assert any("calibrate.form" in f.message for f in result.errors)


@pytest.mark.slow
def test_calibrate_target_on_the_demo_sample(tmp_path):
    """`snakemake calibrate` on the invented demo sample: a calibration file the
    Tully-Fisher stage accepts by path, stamped with the sample's SHA-256, and the fit
    report; the pre-flight checks of a distance run accept the fitted file."""
    work = copy_workflow(tmp_path)
    proc = run_snakemake(work, "calibrate", "--configfile", "config/demo_calibrate.yaml",
                         "--config", "calibrate={bootstrap: 10}")
    assert proc.returncode == 0, proc.stderr[-3000:]
    out = work / "results" / "demo" / "calibrate"
    cal = load_calibration(out / "tf_fitted_demo.yaml")
    data = yaml.safe_load((out / "tf_fitted_demo.yaml").read_text())
    sample = work / "results" / "demo-input" / "corvid_reach_calibration.parquet"
    assert data["fitted_from"]["catalogs"][0]["sha256"] == hashlib.sha256(sample.read_bytes()).hexdigest()
    assert data["fit"] == "forward" and data["fitted_from"]["selection_in_likelihood"] is True
    report = json.loads((out / "fit_summary.json").read_text())
    assert report["naive"]["coefficients"] != report["selection_aware"]["coefficients"]
    assert report["bootstrap"]["draws"] == 10
    assert (out / "fit_report.png").stat().st_size > 10_000
    # the demo sample follows the shipped relation (from memory): recovered within 3 sigma
    shipped = load_calibration("tf_i_tully_courtois_2012")
    err = np.sqrt(np.diag(cal.covariance))
    assert np.all(np.abs(cal.coefficients - shipped.coefficients) < 3 * err)
    import os
    here = os.getcwd()
    try:
        os.chdir(work)
        result = preflight.check({"tully_fisher": {"calibration": str(out / "tf_fitted_demo.yaml")}},
                                 buildable=frozenset({"results/demo-input/corvid_reach_survey.parquet"}))
    finally:
        os.chdir(here)
    assert result.errors == [], result.errors


def test_hi_flux_limit_reaches_the_fit(tf_setup):
    """selection.hi_flux_limit: rows without HI flux or below the limit are left out with
    their reason, the others carry s = -2.5 log10 S_21 and the limit (Jy km/s) in the
    same units, and the model is the forward fit with the flux selection."""
    cfg, ph, settings = tf_setup
    inputs, group, mu_true, *_ = tf_sample(3)
    n = group.size
    inputs["hi_flux"] = np.where(np.arange(n) % 10 == 0, np.nan, np.linspace(1.0, 20.0, n))
    q = calibrate.corrected("tully_fisher", inputs, ph, settings)
    section = {**cfg["calibrate"], "selection": {**cfg["calibrate"]["selection"], "hi_flux_limit": 2.0}}
    ids = np.array([f"G{g}" for g in group], dtype=object)
    mu_ref = np.where(group == 0, mu_true[0], np.nan)
    sample, reason = calibrate.build_sample(q, ids, mu_ref, np.where(group == 0, 0.05, np.nan), section)
    assert (reason == "no HI flux (selection.hi_flux_limit is set)").sum() == n // 10
    assert np.all(inputs["hi_flux"][reason == "below selection.hi_flux_limit"] < 2.0)
    assert sample.s.max() <= sample.s_limit[0] == pytest.approx(-2.5 * np.log10(2.0))
    model = calibrate.model_for(section, "tully_fisher", sample)
    assert model.hi_flux and model.selection and model.form == "forward"
    with pytest.raises(ConfigError, match="hi_flux_limit"):
        calibrate.check({**cfg, "calibrate": {**section, "form": "inverse", "catalog": None}})


@pytest.mark.parametrize("section", [{"form": "inverse"}, {"form": "bivariate"},
                                     {"form": "forward", "curvature_break": 2.6}])
def test_every_form_writes_a_file_the_distance_stage_accepts(tf_setup, tmp_path, section):
    """Inverse (written in the inverse form with its magnitude pivot), bivariate and
    curved fits load as calibrations, and the Tully-Fisher stage's moduli of the
    calibration galaxies average to the fitted group moduli (to 0.1 mag: the forms differ
    in how they weigh the scatter, not in where the groups lie)."""
    cfg, ph, settings = tf_setup
    inputs, group, mu_true, *_ = tf_sample(4)
    q = calibrate.corrected("tully_fisher", inputs, ph, settings)
    ids = np.array([f"G{g}" for g in group], dtype=object)
    mu_ref = np.where(group < 2, mu_true[group], np.nan)
    sec = {**cfg["calibrate"], **section}
    sample, _ = calibrate.build_sample(q, ids, mu_ref, np.where(group < 2, 0.05, np.nan), sec)
    best = calibrate.fit_sample(sample, calibrate.model_for(sec, "tully_fisher", sample), 0, 1)["fit"]
    path = tmp_path / "fit.yaml"
    path.write_text(calibrate.calibration_yaml(calibrate.calibration_data(cfg, sample, best, "tf_fit", [])))
    cal = load_calibration(path)
    assert cal.form == ("inverse" if section["form"] == "inverse" else "luminosity")
    assert (cal.quadratic is not None) == ("curvature_break" in section)
    assert yaml.safe_load(path.read_text())["fit"] == section["form"]
    out = tf.tully_fisher_distance(inputs, cal, dataclasses.replace(settings, mc_draws=0))
    for g, name in enumerate(sample.group_names):
        m = ids == name
        assert np.mean(out["tf_mu"][m]) == pytest.approx(best.group_mu[g], abs=0.1)
