"""Tests of galdist.crosscheck."""

from __future__ import annotations

import json

import numpy as np
import pytest
from astropy import units as u
from astropy.cosmology import FlatLambdaCDM

from galdist import flags
from galdist.crosscheck import (
    best_distance, collect_samples, crosscheck, delta_mu, hubble_sample_statistics, hubble_statistics,
    log_distance_ratio, method_sample, modified_redshift, pair_statistics, peculiar_velocity_exact,
    peculiar_velocity_log_ratio, records, sample_statistics,
)
from galdist.distance import mu_from_mpc
from galdist.flags import Method, Redshift
from galdist.redshift import MuGrid, make_cosmology
from galdist.uncertainty import monte_carlo

C = 299792.458  # km/s, exact (SI definition of the metre)


@pytest.fixture(scope="module")
def cosmo():
    return make_cosmology()  # flat LCDM H0 = 70, Om0 = 0.3 (the convention)


@pytest.fixture(scope="module")
def grid(cosmo):
    return MuGrid.build(cosmo)


def _galaxy(cosmo, z_cos, v):
    """Observed CMB redshift and true mu of a galaxy at z_cos with peculiar velocity v:
    (1 + z_obs) = (1 + z_cos)(1 + v/c) (Davis & Scrimgeour 2014, MNRAS 442, 1117)."""
    z_cos = np.asarray(z_cos, dtype=float)
    return (1 + z_cos) * (1 + np.asarray(v, dtype=float) / C) - 1, cosmo.distmod(z_cos).value


# ---------------------------------------------------------------- per galaxy

def test_delta_mu_and_log_ratio():
    # eta = log10(d_z / d) and dmu = mu - mu_z (definitions in the issue)
    mu, mu_z = mu_from_mpc(110.0), mu_from_mpc(100.0)
    assert delta_mu(mu, mu_z) == pytest.approx(5 * np.log10(1.1), rel=1e-12)
    assert log_distance_ratio(mu, mu_z) == pytest.approx(np.log10(100.0 / 110.0), rel=1e-12)


def test_exact_peculiar_velocity_recovers_input(cosmo, grid):
    # Davis & Scrimgeour 2014, MNRAS 442, 1117: (1 + z_obs) = (1 + z_cos)(1 + z_pec)
    z_cos = np.array([0.005, 0.01, 0.04, 0.1, 0.3, 0.8])
    v_true = np.array([-800.0, 300.0, -300.0, 1000.0, 600.0, -1500.0])
    z_obs, mu = _galaxy(cosmo, z_cos, v_true)
    v, err = peculiar_velocity_exact(mu, np.zeros(6), z_obs, np.zeros(6), grid)
    assert v == pytest.approx(v_true, abs=0.5)
    assert err == pytest.approx(np.zeros(6), abs=1e-9)
    v, err = peculiar_velocity_exact(np.array([np.nan, 40.0]), np.full(2, 0.1),
                                     np.array([0.01, np.nan]), np.full(2, 1e-4), grid)
    assert np.isnan(v).all() and np.isnan(err).all()


def test_modified_redshift_is_the_luminosity_distance_series(cosmo, grid):
    # Watkins & Feldman 2015 (MNRAS 450, 1868) z_mod (secondary copy): c z_mod / H0 must
    # equal d_L to O(z^4) (Visser 2004, CQG 21, 2603, from memory). A wrong q0 or j0
    # term would leave an O(z^2) or O(z^3) residual, i.e. a log-log slope of 2 or 3.
    z = np.array([0.02, 0.04])
    resid = np.abs(C * modified_redshift(z, grid.q0, grid.j0) / 70.0
                   - cosmo.luminosity_distance(z).to_value(u.Mpc))
    slope = np.log(resid[1] / resid[0]) / np.log(2.0)
    assert 3.7 < slope < 4.6
    # relative residual below 2e-5 at z = 0.1: the estimator's zero point is fine there
    z = 0.1
    rel = C * modified_redshift(z, grid.q0, grid.j0) / 70.0 / cosmo.luminosity_distance(z).value - 1
    assert abs(rel) < 2e-5


def test_log_ratio_is_zero_on_the_hubble_flow(cosmo, grid):
    # no peculiar velocity -> v = 0 when d is the luminosity distance (derivation in the docstring)
    z = np.array([0.005, 0.01, 0.03, 0.06, 0.1])
    mu = cosmo.distmod(z).value
    v, _ = peculiar_velocity_log_ratio(mu, np.zeros(5), z, np.zeros(5), grid.h0, grid.q0, grid.j0)
    assert np.max(np.abs(v)) < 1.0  # km/s


def test_exact_and_log_ratio_agree_at_3000_kms(cosmo, grid):
    # the issue: the two agree to < 1% at cz = 3000 km/s, read as |v_lr - v_exact| < 1% of c z
    # for |v| <= 300 km/s (Watkins & Feldman 2015, MNRAS 450, 1868; secondary copy)
    v_true = np.array([-300.0, -100.0, 100.0, 300.0])
    z_obs, mu = _galaxy(cosmo, np.full(4, 0.01), v_true)
    v_ex, _ = peculiar_velocity_exact(mu, np.zeros(4), z_obs, np.zeros(4), grid)
    v_lr, _ = peculiar_velocity_log_ratio(mu, np.zeros(4), z_obs, np.zeros(4), grid.h0, grid.q0, grid.j0)
    assert np.max(np.abs(v_lr - v_ex)) < 0.01 * 3000.0
    assert np.all(np.sign(v_lr) == np.sign(v_true))


@pytest.mark.parametrize("z_cos", [0.01, 0.1])
def test_exact_and_log_ratio_differ_as_derived(cosmo, grid, z_cos):
    # For v << c z the ratio is z_mod'(z)(1 + z)/(1 + z_mod) = 1 + (1 - q0) z
    # - (2 - 2 q0 - 3 q0^2 + j0) z^2 / 2 + O(z^3) (derived in the docstring of
    # peculiar_velocity_log_ratio; q0 = -0.55, j0 = 1: 1.0153 at z = 0.01, 1.1390 at z = 0.1).
    # Averaging +v and -v removes the logarithm's ~v/(2 c z) term.
    q0, j0 = -0.55, 1.0  # flat LCDM, Om0 = 0.3 (reference-values.md, secondary copy)
    expected = 1 + (1 - q0) * z_cos - 0.5 * (2 - 2 * q0 - 3 * q0**2 + j0) * z_cos**2
    v_true = np.array([20.0, -20.0])
    z_obs, mu = _galaxy(cosmo, np.full(2, z_cos), v_true)
    v_ex, _ = peculiar_velocity_exact(mu, np.zeros(2), z_obs, np.zeros(2), grid)
    v_lr, _ = peculiar_velocity_log_ratio(mu, np.zeros(2), z_obs, np.zeros(2), grid.h0, grid.q0, grid.j0)
    assert np.mean(v_lr / v_ex) == pytest.approx(expected, abs=2e-4)


def test_velocity_errors_match_monte_carlo(cosmo, grid):
    # analytic first-order errors against galdist.uncertainty.monte_carlo re-running the same functions
    rng = np.random.default_rng(3)
    n = 40
    z_obs, mu = _galaxy(cosmo, rng.uniform(0.01, 0.1, n), rng.normal(0, 300, n))
    s_mu, s_z = np.full(n, 0.03), np.full(n, 5e-4)  # both terms matter (~200 and ~150 km/s)
    estimators = {
        "exact": lambda mu, z, s_mu, s_z: peculiar_velocity_exact(mu, s_mu, z, s_z, grid),
        "log_ratio": lambda mu, z, s_mu, s_z: peculiar_velocity_log_ratio(
            mu, s_mu, z, s_z, grid.h0, grid.q0, grid.j0),
    }
    for name, est in estimators.items():
        _, mc = monte_carlo(lambda mu, z: est(mu, z, 0.0, 0.0)[0], {"mu": mu, "z": z_obs},
                            {"mu": s_mu, "z": s_z}, n_draws=400, seed=11)
        _, analytic = est(mu, z_obs, s_mu, s_z)
        assert np.median(mc / analytic) == pytest.approx(1.0, abs=0.04), name


# ---------------------------------------------------------------- sample statistics

def _sample(cosmo_true, grid, n=2000, sigma=0.35, seed=5):
    rng = np.random.default_rng(seed)
    z = rng.uniform(0.012, 0.06, n)
    mu_true = cosmo_true.distmod(z).value
    mu = mu_true + rng.normal(0, sigma, n)
    mu_z = grid.mu(z)
    return z, mu, np.full(n, sigma), mu_z


def test_implied_h0_sign_is_exact(grid):
    # d_L scales as 1/H0 at fixed Om0, so galaxies placed by an H0 = 75 universe give
    # dmu = 5 log10(70/75) at every z and the implied H0 must come back as 75 (definition)
    truth = FlatLambdaCDM(H0=75, Om0=0.3)
    z = np.linspace(0.012, 0.2, 50)
    dmu = truth.distmod(z).value - grid.mu(z)
    assert dmu == pytest.approx(np.full(50, 5 * np.log10(70 / 75)), abs=1e-4)
    stats, out = hubble_statistics(dmu, np.full(50, 0.1), flags.new(50), z, 70.0)
    assert stats["h0_implied"] == pytest.approx(75.0, abs=0.01)
    assert not out.any()


def test_hubble_statistics_clipping_outliers_and_cuts(grid):
    truth = FlatLambdaCDM(H0=75, Om0=0.3)
    z, mu, err, mu_z = _sample(truth, grid)
    n = len(z)
    fl = flags.new(n)
    mu[:20] += 3.0                              # gross outliers (e.g. a wrong redshift)
    mu[20:40] += 2.0
    flags.set_where(fl, np.arange(n) >= 1990, Method.OUT_OF_RANGE)
    mu[1990:] += 3.0                            # flagged rows must not bias the zero point
    z[40:60] = 0.005                            # below 3000 km/s: excluded, never outliers
    mu_z = grid.mu(z)
    dmu_err = np.sqrt(err**2 + 0.02**2)
    stats, outlier = hubble_statistics(mu - mu_z, dmu_err, fl, z, 70.0, min_cz=3000, clip_sigma=3.5)
    assert outlier[:40].all()
    assert outlier[1990:].all()                  # flagged rows are still tested against the bounds
    assert not outlier[40:60].any()
    assert outlier[60:1990].sum() <= 5           # 3.5 sigma two-sided: ~0.05% false alarms expected
    assert stats["n_candidates"] == n - 20
    assert stats["n_usable"] == n - 20 - 10
    assert stats["n_clipped"] >= 40
    assert stats["h0_implied"] == pytest.approx(75.0, abs=3 * stats["h0_implied_err_stat"])
    assert 0.2 < stats["h0_implied_err_stat"] < 0.6   # ~ 75 x 0.46 x 0.35 / sqrt(1930)
    assert stats["std"] == pytest.approx(0.35, rel=0.06)
    # the sample keeps values and errors as float32 (7 significant digits)
    assert stats["rms_expected_err"] == pytest.approx(np.sqrt(0.35**2 + 0.02**2), rel=1e-6)
    assert stats["excess_scatter"] < 0.1
    json.dumps(stats, allow_nan=False)


def test_hubble_statistics_empty_and_bad_config():
    stats, out = hubble_statistics(np.full(3, np.nan), np.ones(3), flags.new(3), np.full(3, 0.02), 70.0)
    assert stats["n_used"] == 0 and stats["h0_implied"] is None and not out.any()
    json.dumps(stats, allow_nan=False)
    with pytest.raises(ValueError, match="clip_sigma"):
        hubble_statistics(np.zeros(3), np.ones(3), flags.new(3), np.full(3, 0.02), 70.0, clip_sigma=0)


def test_pair_statistics_offset_and_scatter():
    rng = np.random.default_rng(9)
    n = 600
    true = rng.uniform(31, 34, n)
    a = true + 0.10 + rng.normal(0, 0.2, n)     # TF-like, offset +0.10 mag
    b = true + rng.normal(0, 0.1, n)            # SBF-like
    a[0] += 4.0                                 # one catastrophic row, clipped
    fa, fb = flags.new(n), flags.new(n)
    flags.set_where(fa, np.arange(n) == 1, Method.LOCAL_FLOW)   # still usable for a pair
    flags.set_where(fb, np.arange(n) == 2, Method.MISSING_INPUT)
    b[3] = np.nan
    s = pair_statistics(a, np.full(n, 0.2), fa, b, np.full(n, 0.1), fb, clip_sigma=3.5)
    assert s["n_both"] == n - 1 and s["n_usable"] == n - 2
    assert s["n_clipped"] >= 1
    assert s["wmean"] == pytest.approx(0.10, abs=3 * s["wmean_err"])
    assert s["std"] == pytest.approx(np.sqrt(0.05), rel=0.1)
    assert s["chi2_nu"] == pytest.approx(1.0, abs=0.15)
    json.dumps(s, allow_nan=False)


def _chunked(rec, sizes):
    """Split a record array into consecutive chunks of the given sizes (the rest last)."""
    edges = np.cumsum(sizes)
    return [part for part in np.split(rec, edges[edges < len(rec)])]


@pytest.mark.parametrize("n", [7, 8, 2001])
def test_streamed_statistics_match_numpy_on_the_final_selection(n):
    # The sample statistics pass over chunks, the median by radix selection. Whatever
    # the chunking they must equal numpy's median and ddof=1 standard deviation of the
    # rows the clipping kept (numpy.median: middle value, or mean of the middle two);
    # values with ties, negatives, zeros and outliers
    rng = np.random.default_rng(n)
    value = np.round(rng.normal(0.05, 0.4, n), 2)          # rounding makes ties
    value[: n // 50 + 1] = 4.0                              # outliers, clipped
    value[-1] = -0.0
    err = rng.uniform(0.3, 0.5, n)
    z = rng.uniform(0.005, 0.05, n)
    fl = flags.new(n)
    rec = records(value, err, z, fl)
    whole = hubble_sample_statistics([rec], 70.0, min_cz=3000.0)
    for sizes in ([1] * 5 + [3], [n // 3, 1, 2], [10**6]):
        assert hubble_sample_statistics(_chunked(rec, sizes), 70.0, min_cz=3000.0) == pytest.approx(whole)
    x = rec["value"].astype(float)
    usable = C * z >= 3000.0
    kept = usable & (np.abs(x - whole["clip_center"]) <= 3.5 * whole["clip_scale"])
    assert whole["n_used"] == kept.sum() and whole["n_clipped"] == usable.sum() - kept.sum()
    assert whole["median"] == np.median(x[kept])            # exact, not approximate
    assert whole["std"] == pytest.approx(np.std(x[kept], ddof=1), rel=1e-12)
    w = 1 / rec["error"][kept].astype(float) ** 2
    assert whole["wmean"] == pytest.approx(np.sum(w * x[kept]) / np.sum(w), rel=1e-12)


def test_collected_sample_statistics_do_not_depend_on_sharding(grid):
    # the rule script samples shard by shard; statistics of the collected shards must
    # be those of the whole table
    truth = FlatLambdaCDM(H0=72, Om0=0.3)
    z, mu, err, mu_z = _sample(truth, grid)
    n = len(z)
    rng = np.random.default_rng(3)
    cols = {"z_cmb": z, "z_cmb_err": np.full(n, 1e-4), "mu_z": mu_z, "mu_z_err": np.full(n, 0.02),
            "z_flags": flags.new(n), "tf_mu": mu, "tf_mu_err": err, "tf_mu_err_sys": np.full(n, 0.05), "tf_flags": flags.new(n),
            "sbf_mu": np.where(np.arange(n) % 3 == 0, mu + 0.05 + rng.normal(0, 0.1, n), np.nan),
            "sbf_mu_err": np.full(n, 0.1), "sbf_mu_err_sys": np.full(n, 0.07), "sbf_flags": flags.new(n)}
    whole = sample_statistics(collect_samples([method_sample(cols)]), n, 70.0)
    parts = [method_sample({k: v[i:i + 333] for k, v in cols.items()}) for i in range(0, n, 333)]
    sharded = sample_statistics(collect_samples(parts), n, 70.0)
    for group in ("methods", "pairs"):
        assert sharded[group].keys() == whole[group].keys()
        for name in whole[group]:
            assert sharded[group][name] == pytest.approx(whole[group][name], rel=1e-12)
    assert whole["methods"]["tf"]["h0_implied"] == pytest.approx(72.0, abs=3 * whole["methods"]["tf"]["h0_implied_err_stat"])
    assert whole["pairs"]["tf-sbf"]["median"] == pytest.approx(-0.05, abs=0.02)


def _tf_only_columns(grid, n=400, seed=5):
    """Per-row columns of a Tully-Fisher-only shard (no sbf_* column at all)."""
    rng = np.random.default_rng(seed)
    z = rng.uniform(0.012, 0.05, n)
    mu_z = grid.mu(z)
    return {"z_cmb": z, "z_cmb_err": np.full(n, 1e-4), "mu_z": mu_z, "mu_z_err": np.full(n, 0.02),
            "z_flags": flags.new(n), "tf_mu": mu_z + 0.2 + rng.normal(0, 0.3, n),
            "tf_mu_err": np.full(n, 0.3), "tf_mu_err_sys": np.zeros(n), "tf_flags": flags.new(n)}


def test_one_method_statistics_from_a_spill(grid, tmp_path):
    # the rule script reads the sample back from a RecordSpill, which holds no "pairs"
    # group when only one method ran: that used to stop the run with KeyError: 'pairs'
    from galdist.io import RecordSpill

    cols = _tf_only_columns(grid)
    n = len(cols["z_cmb"])
    with RecordSpill(tmp_path / "stats.json") as spill:
        for i in range(0, n, 150):
            spill.extend(method_sample({k: v[i:i + 150] for k, v in cols.items()}, ["tf"]))
        assert "pairs" not in spill.nested()
        stats = sample_statistics(spill.nested(), n, 70.0, methods=["tf"])
    assert list(stats["methods"]) == ["tf"] and stats["pairs"] == {}
    tf = stats["methods"]["tf"]
    assert tf["n_rows"] == tf["n_measured"] == n and tf["n_used"] >= n - 5
    assert tf["wmean"] == pytest.approx(0.2, abs=4 * tf["wmean_err"])
    json.dumps(stats, allow_nan=False)


def test_statistics_entries_follow_the_configured_methods(grid):
    # a configured method that measured nothing still gets its (empty) entry, and the
    # pair gets one when both are configured; the sample alone decides without ``methods``
    cols = _tf_only_columns(grid, n=50)
    sample = collect_samples([method_sample(cols, ["tf", "sbf"])])
    assert set(sample["methods"]) == {"tf"} and sample["pairs"] == {}
    stats = sample_statistics(sample, 50, 70.0, methods=["tf", "sbf"])
    assert list(stats["methods"]) == ["tf", "sbf"] and list(stats["pairs"]) == ["tf-sbf"]
    assert stats["methods"]["sbf"]["n_used"] == 0 and stats["methods"]["sbf"]["h0_implied"] is None
    assert stats["pairs"]["tf-sbf"]["n_both"] == 0 and stats["pairs"]["tf-sbf"]["median"] is None
    assert sample_statistics(sample, 50, 70.0)["pairs"] == {}
    assert sample_statistics({}, 0, 70.0) == {"methods": {}, "pairs": {}}
    json.dumps(stats, allow_nan=False)


def test_best_distance_with_one_method(grid):
    cols = _tf_only_columns(grid, n=6)
    cols["tf_mu"][1] = np.nan
    flags.set_where(cols["tf_flags"], np.arange(6) == 2, Method.LOW_INCLINATION)
    flags.set_where(cols["z_flags"], np.arange(6) == 3, Redshift.LOCAL_FLOW)
    out, summary = crosscheck(cols, grid, methods=["tf"])
    assert out["best_method"].to_pylist() == ["tf", "none", "none", "tf", "tf", "tf"]  # one spelling: as in summary.json
    use = np.array([True, False, False, True, True, True])
    np.testing.assert_allclose(out["mu_best"][use], cols["tf_mu"][use], rtol=1e-14)
    np.testing.assert_allclose(out["mu_best_err"][use], cols["tf_mu_err"][use], rtol=1e-14)
    assert np.isnan(out["mu_best"][~use]).all() and np.isnan(out["mu_best_err"][~use]).all()
    assert summary["best"] == {"none": 2, "tf": 4} and summary["pairs"] == {}
    assert not any(k.startswith("sbf_") for k in out)

def test_best_distance_inverse_variance():
    mu_tf = np.array([33.0, 33.0, 33.0, np.nan, 33.0, 33.0])
    mu_sbf = np.array([33.2, 33.2, np.nan, np.nan, 33.2, 33.2])
    f_tf = np.array([0, int(Method.HIGH_EXTINCTION), 0, 0, int(Method.LOCAL_FLOW), int(Method.OUTLIER)],
                    dtype=np.uint32)
    f_sbf = flags.new(6)
    out = best_distance({"tf": (mu_tf, np.full(6, 0.4), f_tf, np.full(6, 0.07)),
                         "sbf": (mu_sbf, np.full(6, 0.1), f_sbf, np.full(6, 0.05))})
    w = np.array([1 / 0.4**2, 1 / 0.1**2])
    assert out["mu_best"][0] == pytest.approx((33.0 * w[0] + 33.2 * w[1]) / w.sum(), rel=1e-12)
    assert out["mu_best_err"][0] == pytest.approx(1 / np.sqrt(w.sum()), rel=1e-12)
    # independent calibrations: sigma_sys = sqrt((w_tf 0.07)^2 + (w_sbf 0.05)^2) / (w_tf + w_sbf)
    # = sqrt(0.4375^2 + 5^2) / 106.25 = 5.0191044 / 106.25 = 0.0472386 (hand arithmetic)
    assert out["mu_best_err_sys"][0] == pytest.approx(0.0472386, abs=1e-7)
    assert out["mu_best"][1] == 33.2 and out["mu_best_err"][1] == pytest.approx(0.1)
    assert out["mu_best_err_sys"][1] == pytest.approx(0.05)
    assert out["mu_best"][2] == 33.0
    assert np.isnan(out["mu_best"][3]) and np.isnan(out["mu_best_err"][3]) and np.isnan(out["mu_best_err_sys"][3])
    # LOCAL_FLOW and OUTLIER leave the distance usable (the flag stays on tf_flags)
    assert out["best_method"].to_pylist() == ["tf+sbf", "sbf", "tf", "none", "tf+sbf", "tf+sbf"]
    assert out["mu_best"][5] == out["mu_best"][0]
    with pytest.raises(ValueError, match="crosscheck.best_ignore_flags.*LOCAL_FLOW"):
        best_distance({"tf": (mu_tf, np.full(6, 0.4), f_tf)}, ignore_flags=("LOCAL_FLOWS",))


# ---------------------------------------------------------------- driver

def test_crosscheck_driver_any_methods(cosmo, grid):
    truth = FlatLambdaCDM(H0=70, Om0=0.3)
    z, mu, err, mu_z = _sample(truth, grid, n=300, sigma=0.3)
    n = len(z)
    z[:5] = 0.004
    z_flags = flags.new(n)
    flags.set_where(z_flags, z * C < 3000, Redshift.LOCAL_FLOW)
    stale = flags.new(n)
    flags.set_where(stale, np.arange(n) == 100, Method.OUTLIER)  # a stale bit from an earlier run
    mu_z = grid.mu(z)
    mu[10] += 3.0
    mu[100] = mu_z[100]                                          # on the Hubble flow
    fp = mu + 0.05 + np.random.default_rng(2).normal(0, 0.1, n)
    fp[10] -= 3.0                                                # FP fine where TF is off
    cols = {"z_cmb": z, "z_cmb_err": np.full(n, 1e-4), "mu_z": mu_z, "mu_z_err": np.full(n, 0.05),
            "z_flags": z_flags, "tf_mu": mu, "tf_mu_err": err, "tf_mu_err_sys": np.zeros(n), "tf_flags": stale,
            "fp_mu": fp, "fp_mu_err": err, "fp_mu_err_sys": np.zeros(n), "fp_flags": flags.new(n)}
    # any prefix, registered or not (fp is not yet); a method without columns (sbf) is skipped
    out, summary = crosscheck(cols, grid, methods=("tf", "sbf", "fp"))
    for m in ("tf", "fp"):
        for c in ("dmu", "logd_ratio", "vpec", "vpec_err", "vpec_lr", "vpec_lr_err", "flags"):
            assert len(out[f"{m}_{c}"]) == n
    assert "sbf_dmu" not in out
    assert flags.has(out["tf_flags"][:5], Method.LOCAL_FLOW).all()
    assert not flags.has(out["tf_flags"][5:], Method.LOCAL_FLOW).any()
    assert flags.has(out["tf_flags"][10], Method.OUTLIER)
    assert not flags.has(out["tf_flags"][100], Method.OUTLIER)   # stale bit cleared
    assert not flags.has(cols["tf_flags"][10], Method.OUTLIER)  # inputs untouched
    assert set(summary["methods"]) == {"tf", "fp"} and set(summary["pairs"]) == {"tf-fp"}
    assert summary["pairs"]["tf-fp"]["median"] == pytest.approx(-0.05, abs=0.03)
    assert summary["pairs"]["tf-fp"]["n_clipped"] >= 1                 # row 10 at least
    assert sum(summary["best"].values()) == n
    assert out["best_method"][0].as_py() == "tf+fp"  # LOCAL_FLOW does not disqualify a distance
    assert out["best_method"][10].as_py() == "tf+fp"  # nor does a Hubble-flow outlier (flagged, kept)
    json.dumps(summary, allow_nan=False)
