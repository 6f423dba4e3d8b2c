"""Fundamental-Plane calibrations fitted by the calibrate target (galdist.calibrate,
galdist.relation_fit.fit_plane): recovery of a plane simulated here with a selection,
the bias of the fit that ignores the selection, the fitted file through fp_distance
(both estimators), the pre-flight checks, and `snakemake calibrate` on the demo sample.

The planes are invented here ("truth" below), drawn as the 3-D Gaussian of Magoulas et
al. 2012 (MNRAS 427, 245; the model galdist.fp uses), with slopes near the published
ones but not equal to the fit's starting point.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
import yaml

from galdist import calibrate, preflight
from galdist import fp
from galdist import relation_fit as rf
from galdist.calibration import load_calibration
from galdist.errors import ConfigError

from conftest import calibration_sample_file, copy_workflow, run_snakemake

# invented truth: slopes, the Gaussian's centre (s, i), widths (v1, v2, v3; dex)
A, B = 1.35, -0.80
S_BAR, I_BAR, R_BAR = 2.25, 3.05, 0.45
SIGMAS = (0.05, 0.30, 0.16)


def truth_c(pivot_s, pivot_i):
    """c of the true plane at the fit's pivots (the centre lies on the plane)."""
    return R_BAR + A * (pivot_s - S_BAR) + B * (pivot_i - I_BAR)


def draw_plane(rng, n):
    """True (r, s, i) of n galaxies: x_bar + sum_k sigma_k N(0, 1) v_k (Magoulas et al. 2012)."""
    axes = fp.plane_axes(A, B)
    x = np.array([R_BAR, S_BAR, I_BAR]) + sum(rng.normal(0.0, s, (n, 1)) * v for s, v in zip(SIGMAS, axes))
    return x[:, 0], x[:, 1], x[:, 2]


# ------------------------------------------------------------ the fit on (r, s, i)

def simulated_plane_sample(seed, n_groups=12, per_group=60, s_min=2.0, u_cut=True):
    """A PlaneSample of galaxies in groups, measured with correlated errors of (r, i)
    (correlation -0.5, as a shared R_e error moves r and <I_e> oppositely; common
    practice) and cut at s >= s_min and at a magnitude limit (2 r + i above a bound
    that rises 0.4 per magnitude of distance), keeping about half of them; three groups
    have reference moduli (error 0.05 mag)."""
    rng = np.random.default_rng(seed)
    mu = rng.uniform(32.0, 35.0, n_groups)
    group = np.repeat(np.arange(n_groups), per_group)
    r, s, i = draw_plane(rng, group.size)
    err = np.array([0.02, 0.02, 0.03])
    cov1 = np.diag(err ** 2)
    cov1[0, 2] = cov1[2, 0] = -0.5 * err[0] * err[2]
    obs = np.stack([r, s, i], axis=1) + rng.multivariate_normal(np.zeros(3), cov1, group.size)
    u_limit0 = np.full(group.size, 2 * R_BAR + I_BAR - 0.4 * 33.5) if u_cut else None
    keep = obs[:, 1] >= s_min
    if u_cut:
        keep &= 2 * obs[:, 0] + obs[:, 2] >= u_limit0 + 0.4 * mu[group]
    present, codes = np.unique(group[keep], return_inverse=True)
    ref_mu = np.full(n_groups, np.nan)
    ref_err = np.full(n_groups, np.nan)
    ref_mu[:3] = mu[:3] + rng.normal(0.0, 0.05, 3)
    ref_err[:3] = 0.05
    return rf.PlaneSample(obs[keep, 0] - 0.2 * mu[group[keep]], obs[keep, 1], obs[keep, 2],
                          np.broadcast_to(cov1, (int(keep.sum()), 3, 3)).copy(), codes, ref_mu[present],
                          ref_err[present], s_min, None if u_limit0 is None else u_limit0[keep])


@pytest.fixture(scope="module")
def seeds_fitted():
    """Selection-aware and naive fits of four simulated samples."""
    out = []
    for seed in range(4):
        sample = simulated_plane_sample(seed)
        model = rf.PlaneModel(2.25, 3.05)
        out.append((sample, rf.fit_plane(sample, model), rf.fit_plane(sample, rf.naive(model))))
    return out


def test_plane_fit_recovers_the_simulated_plane(seeds_fitted):
    """a, b, c, the centre and the widths come back within 3 of their Hessian errors in
    every sample (the pulls of a, b, c over these four seeds measured: largest 2.02,
    spread 1.06; over 20 other seeds: means -0.16, 0.11, 0.11, spreads 1.05, 0.85,
    0.92, 95% within 2), and sigma_1 is the thinnest width; the scatter is sigma_1
    sqrt(1 + a^2 + b^2) (Magoulas et al. 2012, from memory)."""
    pulls = []
    for sample, best, _ in seeds_fitted:
        assert best.converged and np.all(np.isfinite(best.coefficient_errors)) and best.normal_is_thinnest
        truth = np.array([A, B, truth_c(2.25, 3.05)])
        pulls.append((best.coefficients - truth) / best.coefficient_errors)
        assert np.all(np.abs(best.centre - [S_BAR, I_BAR]) < 3 * best.centre_err)
        assert np.all(np.abs(best.sigmas - SIGMAS) < 3 * best.sigmas_err)
        a, b = best.coefficients[:2]
        assert best.scatter == pytest.approx(best.sigmas[0] * np.sqrt(1 + a * a + b * b))
    pulls = np.array(pulls)
    assert np.all(np.abs(pulls) < 3.0), pulls
    assert 0.4 < pulls.std() < 1.8, pulls


def test_naive_fit_is_biased_where_the_selection_aware_one_is_not(seeds_fitted):
    """Averaged over the four samples, the fit without the truncation tilts the plane
    (the magnitude limit removes small, faint galaxies, the sigma cut those of low s): its
    mean a lies more than 3 errors of the mean below the truth and its mean b more than 3
    above (measured: -0.17 and +0.05, 4.6 and 4.0 errors; over 20 other seeds -0.214 +-
    0.014 and +0.055 +- 0.004), while the selection-aware means lie within 2.5 errors."""
    for k, sign in ((0, -1), (1, 1)):
        aware = np.array([f.coefficients[k] for _, f, _ in seeds_fitted])
        naive = np.array([f.coefficients[k] for _, _, f in seeds_fitted])
        err_mean = np.sqrt(np.mean([f.coefficient_errors[k] ** 2 for _, f, _ in seeds_fitted]) / len(aware))
        truth = (A, B)[k]
        assert abs(aware.mean() - truth) < 2.5 * err_mean
        assert sign * (naive.mean() - truth) > 3 * err_mean


def test_bootstrap_over_groups_is_seeded_and_agrees_with_the_hessian(seeds_fitted):
    """The bootstrap over groups repeats with its seed (a shorter run is the same first
    draws), and its spread of a is of the Hessian error's size (within a factor 2 with 10
    draws; common practice)."""
    sample, best, _ = seeds_fitted[0]
    model = best.model
    one = rf.bootstrap_plane(sample, model, 10, seed=3, best=best)
    two = rf.bootstrap_plane(sample, model, 2, seed=3, best=best)
    np.testing.assert_array_equal(one[:2], two)
    assert 0.5 < one[:, 0].std(ddof=1) / best.coefficient_errors[0] < 2.0


# ------------------------------------------------- observables through galdist.fp

def config(**calibrate_section):
    from galdist.config import validate

    return validate(preflight.resolve({"catalog": "unused.parquet",
                                       "calibrate": {"method": "fp", **calibrate_section}}))


def fp_observables(seed, terms, n_groups=8, per_group=60, noise=True):
    """FP catalog inputs of galaxies on the true plane at invented group moduli,
    generated forward through the steps galdist.fp undoes: the size at D_A = D_L /
    (1 + z)^2, <mu_e> from i with M_sun and the (1 + z)^4 dimming, extinction and K
    added, the dispersion in a 1.5 arcsec aperture by the aperture correction; then
    measurement errors (``noise``; else the errors are quoted only). Returns (inputs,
    group, mu_true, the true (r, s, i))."""
    rng = np.random.default_rng(seed)
    mu_true = rng.uniform(32.5, 34.5, n_groups)
    group = np.repeat(np.arange(n_groups), per_group)
    n = group.size
    r, s, i = draw_plane(rng, n)
    mu = mu_true[group]
    z = 10 ** (0.2 * mu - 5) * 70.0 / 299792.458 * (1 + rng.normal(0, 0.03, n))
    log_da = 0.2 * mu - 5 - 2 * np.log10(1 + z)
    theta = 10 ** (r - log_da - 3) * fp.ARCSEC_PER_RAD
    a_gal, k_corr = rng.uniform(0.01, 0.05, n), rng.uniform(0.0, 0.03, n)
    mu_e = terms.abs_mag_sun + fp.SB_ZERO_POINT - 2.5 * i + fp.surface_brightness_dimming(z) + a_gal + k_corr
    sigma = 10 ** s / fp.aperture_corrected_sigma(1.0, 1.5, theta, terms.aperture_exponent, terms.aperture_fraction)
    e_sigma, e_theta, e_mu = 0.04 * sigma, 0.05 * theta, np.full(n, 0.04)
    k = 1.0 if noise else 0.0
    inputs = {"fp_sigma": sigma + k * rng.normal(0, 1, n) * e_sigma, "fp_sigma_err": e_sigma,
              "fp_aperture_arcsec": np.full(n, 1.5), "fp_re_arcsec": theta + k * rng.normal(0, 1, n) * e_theta,
              "fp_re_err": e_theta, "fp_mu_e": mu_e + k * rng.normal(0, 1, n) * e_mu, "fp_mu_e_err": e_mu,
              "z_helio": z, "a_gal": a_gal, "a_gal_err": np.full(n, 0.005), "k_corr": k_corr,
              "k_corr_err": np.full(n, 0.005)}
    return inputs, group, mu_true, (r, s, i)


SELECTIONS = [{"predictor_min": 2.1}, {"predictor_min": 2.1, "mag_limit": 10.5}]


@pytest.fixture(scope="module", params=SELECTIONS, ids=["sigma_cut", "sigma_cut_and_mag_limit"])
def fitted_file(tmp_path_factory, request):
    """The calibrate stage's steps on forward-generated observables cut at log sigma_0 >=
    2.1, and also at a total magnitude of 10.5 (about half the sample): corrected
    quantities, sample, fit (no bootstrap), the calibration file."""
    cfg = config(selection=request.param)
    ph = calibrate.placeholder(cfg)
    settings = calibrate.method_settings(cfg, ph)
    inputs, group, mu_true, _ = fp_observables(7, fp.plane_terms(ph))
    q = calibrate.corrected("fp", inputs, ph, settings)
    ids = np.array([f"G{g}" for g in group], dtype=object)
    ref = np.where(group < 2, mu_true[group], np.nan)
    sample, reason = calibrate.build_plane_sample(q, ids, ref, np.where(group < 2, 0.03, np.nan), cfg["calibrate"])
    model = calibrate.model_for(cfg["calibrate"], "fp", sample)
    result = calibrate.fit_sample(sample, model, 0, 1)
    data = calibrate.calibration_data(cfg, sample, result["fit"], "fp_round_trip",
                                      [{"path": "x", "sha256": "0" * 64}])
    path = tmp_path_factory.mktemp("fpfit") / "fp_round_trip.yaml"
    path.write_text(calibrate.calibration_yaml(data))
    return {"cfg": cfg, "selection": request.param, "settings": settings, "inputs": inputs, "group": group, "mu_true": mu_true, "q": q,
            "sample": sample, "reason": reason, "result": result, "path": path, "ids": ids}


def test_corrected_quantities_invert_the_forward_generation(fitted_file):
    """Without the noise the chain returns the true s and i; r0 + 0.2 mu is the true r
    (to rounding): the stage's sizes use D_A = D_L / (1 + z)^2 as fp_distance does."""
    f = fitted_file
    ph = calibrate.placeholder(f["cfg"])
    exact, group, mu_true, (r, s, i) = fp_observables(7, fp.plane_terms(ph), noise=False)
    theta = exact["fp_re_arcsec"]
    q = calibrate.corrected("fp", exact, ph, f["settings"])
    np.testing.assert_allclose(q["s"], s, atol=1e-9)
    np.testing.assert_allclose(q["i"], i, atol=1e-9)
    np.testing.assert_allclose(q["r0"] + 0.2 * mu_true[group], r, atol=1e-9)
    # the observed total magnitude: m = <mu_e> - 2.5 log10(2 pi R_e^2) (definitions)
    np.testing.assert_allclose(q["observed"], exact["fp_mu_e"] - 2.5 * np.log10(2 * np.pi * theta ** 2))
    # measurement covariance: var(r) = (e_theta / (theta ln 10))^2 (first order)
    np.testing.assert_allclose(np.sqrt(q["cov"][:, 0, 0]), 0.05 / np.log(10), rtol=1e-6)


def test_fitted_file_is_a_complete_fp_calibration(fitted_file):
    """The file validates against the calibration schema, is a plane fp_distance accepts
    with both estimators, and carries the fitted numbers: scatter sigma_1 sqrt(1 + a^2 +
    b^2), valid ranges of the fitted galaxies, the run's conventions, sizes independent
    of H0; the recovered plane is the true one within 3 errors."""
    f = fitted_file
    cal = load_calibration(f["path"])
    data = yaml.safe_load(f["path"].read_text())
    best = f["result"]["fit"]
    terms = fp.check_calibration(cal)
    assert cal.form == "plane" and cal.fit == "gaussian_3d" and cal.provenance == "fitted by galdist"
    assert data["conventions"] == {"extinction": "sf11", "zero_point_h0": None}
    assert terms.gaussian.sigmas == pytest.approx(tuple(best.sigmas))
    a, b = cal.coefficients[:2]
    assert cal.scatter == pytest.approx(terms.gaussian.sigmas[0] * np.sqrt(1 + a * a + b * b))
    assert cal.valid_range == (pytest.approx(f["sample"].s.min()), pytest.approx(f["sample"].s.max()))
    assert terms.log_ie_range == (pytest.approx(f["sample"].i.min()), pytest.approx(f["sample"].i.max()))
    assert f["sample"].s.min() >= 2.1 and (f["reason"] == "log sigma_0 below selection.predictor_min").any()
    if "mag_limit" in f["selection"]:
        assert f["q"]["observed"][f["reason"] == ""].max() <= 10.5
        assert (f["reason"] == "fainter than selection.mag_limit").sum() > 100
    truth = np.array([A, B, truth_c(cal.pivot, terms.pivot_log_ie)])
    assert np.all(np.abs(cal.coefficients - truth) < 3 * np.sqrt(np.diag(cal.covariance)))
    assert data["fitted_from"]["selection_in_likelihood"] is True


def test_round_trip_through_fp_distance(fitted_file):
    """fp_distance with the fitted file gives back the distances: (plane estimator) every
    fitted galaxy's fp_mu is its group's fitted modulus minus 5 times its residual from
    the plane (fp_mu = 5 log10(D_L / 10 pc) with D_A = R_pred / theta; derived), and
    (gaussian estimator, told the sample's cuts) the posterior modes of eta at the
    injected distances average to zero within 3 errors of their mean."""
    f = fitted_file
    cal = load_calibration(f["path"])
    used = f["reason"] == ""
    plane = fp.fp_distance(f["inputs"], cal, dataclasses.replace(f["settings"], allow_extrapolation=True))
    best = f["result"]["fit"]
    res = rf.plane_residuals(f["sample"], best)
    np.testing.assert_allclose(plane["fp_mu"][used], best.group_mu[f["sample"].group] - 5 * res, atol=1e-6)
    # free groups: the injected modulus within 3 errors
    for g in range(f["sample"].n_groups):
        if best.group_free[g] and not np.isfinite(f["sample"].ref_mu[g]):
            true = f["mu_true"][int(f["sample"].group_names[g][1:])]
            assert abs(best.group_mu[g] - true) < 3 * best.group_mu_err[g]
    gauss = dataclasses.replace(f["settings"], estimator="gaussian", selection_log_sigma_min=2.1,
                                selection_mag_limit=f["selection"].get("mag_limit"), allow_extrapolation=True)
    inputs = {**f["inputs"], "z_cmb": f["inputs"]["z_helio"], "mu_z": f["mu_true"][f["group"]]}
    out = fp.fp_distance(inputs, cal, gauss)
    mode = out["fp_eta_post_mode"][used]
    assert np.isfinite(mode).all()
    assert abs(mode.mean()) < 3 * (mode.std() / np.sqrt(mode.size) + np.sqrt(cal.covariance[2, 2]))


# ------------------------------------------------------------------ pre-flight

def _errors(tmp_path, **section):
    import pyarrow as pa
    import pyarrow.parquet as pq

    from conftest import small_catalog

    survey = tmp_path / "survey.parquet"
    pq.write_table(pa.table(small_catalog(20)), survey)
    result = preflight.check({"catalog": str(survey), "calibrate": {"method": "fp", **section}}, sample_rows=False)
    return [f.message for f in result.errors if f.check == "calibration sample"]


def test_preflight_names_fp_columns_and_options(tmp_path):
    """A sample without an FP column, without both <mu_e> and the total magnitude, or
    with options the plane does not take stops before any job, naming the key or
    column."""
    good = calibration_sample_file(tmp_path)
    assert _errors(tmp_path, catalog=good) == []
    msgs = _errors(tmp_path, catalog=calibration_sample_file(tmp_path, drop=("fp_sigma",)))
    assert any("fp_sigma" in m for m in msgs), msgs
    msgs = _errors(tmp_path, catalog=calibration_sample_file(tmp_path, drop=("fp_mu_e", "fp_mu_e_err")))
    assert any("'fp_mu_e'" in m and "'fp_mag'" in m for m in msgs), msgs
    for key, value in (("form", "bivariate"), ("degree", 2), ("curvature_break", 2.3), ("magnitude_pivot", -20.0)):
        (msg,) = _errors(tmp_path, catalog=good, **{key: value})
        assert f"calibrate.{key}" in msg
    msgs = _errors(tmp_path, catalog=good, selection={"hi_flux_limit": 1.0})
    assert any("calibrate.selection.hi_flux_limit" in m for m in msgs)
    (msg,) = [m for m in _errors(tmp_path, catalog=good, method="sbf", form="plane")]
    assert "calibrate.form" in msg and "Fundamental Plane" in msg


def test_calibrate_check_raises_config_error():
    cfg = config(form="forward")
    with pytest.raises(ConfigError, match="calibrate.form"):
        calibrate.check(cfg)


# ----------------------------------------------------------- the workflow target

@pytest.mark.slow
def test_calibrate_target_fits_the_demo_plane(tmp_path):
    """`snakemake calibrate` with config/demo_calibrate_fp.yaml on a small invented
    sample: an FP calibration file fp_distance accepts, the fit report, and a plane close
    to the shipped one the demo's early types were drawn from (a, b within 4 errors: the
    demo's in-plane positions are cut to the calibrated ranges, a mild departure from the
    3-D Gaussian the fit assumes)."""
    work = copy_workflow(tmp_path)
    proc = run_snakemake(work, "calibrate", "--configfile", "config/demo_calibrate_fp.yaml",
                         "--config", "calibrate={bootstrap: 4}")
    assert proc.returncode == 0, proc.stderr[-3000:]
    out = work / "results" / "demo" / "calibrate"
    cal = load_calibration(out / "fp_fitted_demo.yaml")
    fp.check_calibration(cal)
    data = yaml.safe_load((out / "fp_fitted_demo.yaml").read_text())
    assert data["fit"] == "gaussian_3d" and data["fitted_from"]["selection_in_likelihood"] is True
    report = json.loads((out / "fit_summary.json").read_text())
    assert report["method"] == "fp" and report["bootstrap"]["draws"] == 4
    assert report["naive"]["coefficients"] != report["selection_aware"]["coefficients"]
    assert (out / "fit_report.png").stat().st_size > 10_000
    shipped = load_calibration("fp_j_magoulas_2012")  # the demo's plane (from memory)
    err = np.sqrt(np.diag(cal.covariance))
    assert np.all(np.abs(cal.coefficients[:2] - shipped.coefficients[:2]) < 4 * err[:2])
    # the zero point: the shipped plane at the fit's pivots, its h^-1 kpc sizes at the demo's H0
    from galdist.conventions import run_h0

    terms, shipped_terms = fp.plane_terms(cal), fp.plane_terms(shipped)
    c_demo = (fp.plane_log_radius(shipped, shipped_terms, cal.pivot, terms.pivot_log_ie)
              - np.log10(run_h0(config()) / shipped.zero_point_h0))
    assert abs(cal.coefficients[2] - c_demo) < 4 * err[2]
    import os

    here = os.getcwd()
    try:
        os.chdir(work)
        result = preflight.check({"fp": {"calibration": str(out / "fp_fitted_demo.yaml"), "estimator": "gaussian"}},
                                 buildable=frozenset({"results/demo-input/corvid_reach_survey.parquet"}))
    finally:
        os.chdir(here)
    assert result.errors == [], result.errors
