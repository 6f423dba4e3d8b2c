"""Per-galaxy eta likelihoods on a grid (galdist.likelihood)."""
import numpy as np
import pytest
from scipy import stats

from galdist import likelihood

LN10 = np.log(10.0)


def test_gaussian_in_mu_is_the_log_normal_transform():
    """A modulus mu +- sigma (Gaussian) makes the distance d = 10^((mu - 25)/5) Mpc log-normal, with
    shape s = sigma ln10 / 5 (e.g. Strauss & Willick 1995, Phys. Rep. 261, 271, Sec. 6; from memory).
    With eta = log10(d_z / d), d = d_z 10^-eta and the change of variables p(eta) = p(d) |dd/deta| =
    p(d) d ln10 (transformation of densities; common practice). The grid likelihood must equal it."""
    grid = likelihood.eta_grid(-0.5, 0.5, 0.005)
    mu, sigma, mu_z = np.array([34.0, 33.2]), np.array([0.4, 0.1]), np.array([34.1, 33.0])
    like = likelihood.gaussian_eta(mu, sigma, mu_z, grid)
    for i in range(2):
        d, d_z = 10 ** ((mu[i] - 25) / 5), 10 ** ((mu_z[i] - 25) / 5)
        law = stats.lognorm(s=sigma[i] * LN10 / 5, scale=d)
        d_of_eta = d_z * 10.0 ** -grid
        np.testing.assert_allclose(like[i], law.pdf(d_of_eta) * d_of_eta * LN10, rtol=1e-9, atol=1e-12)
        # percentiles: eta decreases with d, so eta's 16th percentile is d's 84th
        s = likelihood.summarize(like[i:i + 1], grid)
        assert s["eta_p16"][0] == pytest.approx(np.log10(d_z / law.ppf(0.84)), abs=2e-4)
        assert s["eta_p84"][0] == pytest.approx(np.log10(d_z / law.ppf(0.16)), abs=2e-4)
        # mode and mean of a Gaussian in eta: its centre (mu_z - mu) / 5, the mode to the grid step
        assert s["eta_mean"][0] == pytest.approx((mu_z[i] - mu[i]) / 5, abs=1e-6)
        assert s["eta_mode"][0] == pytest.approx((mu_z[i] - mu[i]) / 5, abs=0.0025)
        # the summaries the product carries for a Gaussian are exact (the grid's ends lie > 6 widths away)
        g = likelihood.gaussian_summaries(mu[i:i + 1], sigma[i:i + 1], mu_z[i:i + 1], grid)
        assert g["eta_p16"][0] == pytest.approx(np.log10(d_z / law.ppf(0.84)), abs=1e-9)
        assert g["eta_p84"][0] == pytest.approx(np.log10(d_z / law.ppf(0.16)), abs=1e-9)
        assert g["eta_mode"][0] == pytest.approx((mu_z[i] - mu[i]) / 5, abs=1e-12)
        assert g["eta_mean"][0] == pytest.approx((mu_z[i] - mu[i]) / 5, abs=1e-9)


def test_gaussian_summaries_near_a_grid_end_are_the_truncated_normal():
    """Near a grid end the gridded curve is a normal truncated to the grid's range; its mean and
    percentiles are the truncated normal's (scipy.stats.truncnorm, the textbook distribution)."""
    grid = likelihood.eta_grid()
    mu_z, mu, sigma = np.array([34.0]), np.array([34.0 - 5 * 0.46]), np.array([5 * 0.02])  # eta0 0.46, s 0.02
    g = likelihood.gaussian_summaries(mu, sigma, mu_z, grid)
    law = stats.truncnorm((grid[0] - 0.46) / 0.02, (grid[-1] - 0.46) / 0.02, loc=0.46, scale=0.02)
    assert g["eta_mean"][0] == pytest.approx(law.mean(), abs=1e-9)
    assert g["eta_p16"][0] == pytest.approx(law.ppf(0.16), abs=1e-9)
    assert g["eta_p84"][0] == pytest.approx(law.ppf(0.84), abs=1e-9)
    # the gridded summary of the same curve agrees to the grid's resolution
    s = likelihood.summarize(likelihood.gaussian_eta(mu, sigma, mu_z, grid), grid)
    assert s["eta_p84"][0] == pytest.approx(law.ppf(0.84), abs=5e-4)
    # less than MIN_MASS on the grid: no summaries
    far = likelihood.gaussian_summaries(np.array([34.0 - 5 * 0.49]), sigma, mu_z, grid)
    assert all(np.isnan(v).all() for v in far.values())


def test_missing_and_off_grid_rows():
    grid = likelihood.eta_grid()
    like = likelihood.gaussian_eta([np.nan, 34.0, 30.0], [0.4, 0.0, 0.3], [34.0, 34.0, 34.0], grid)
    assert np.isnan(like[:2]).all()
    s = likelihood.summarize(like, grid)
    # eta = 0.8 lies beyond the grid's 0.5: the summaries say nothing rather than something wrong
    assert all(np.isnan(v).all() for v in s.values())


def test_columns_are_fixed_size_lists_in_blocks(monkeypatch):
    monkeypatch.setattr(likelihood, "BLOCK_ROWS", 7)  # several blocks
    grid = likelihood.eta_grid(-0.5, 0.5, 0.01)
    rng = np.random.default_rng(3)
    mu = rng.uniform(33, 35, 30)
    lists, summ = likelihood.likelihood_columns({"tf": (mu, np.full(30, 0.3))}, mu + 0.1, grid)
    arr = lists["tf"]
    assert arr.type.list_size == len(grid) == 101 and len(arr) == 30
    # a Gaussian's curve is not stored (it is in the product's mu and mu_err): null lists,
    # which dense_curves rebuilds
    assert arr.null_count == 30
    kinds = np.full(30, likelihood.GAUSSIAN)
    dense = likelihood.dense_curves(arr, kinds, mu, np.full(30, 0.3), mu + 0.1, grid)
    np.testing.assert_allclose(dense, likelihood.gaussian_eta(mu, np.full(30, 0.3), mu + 0.1, grid), rtol=1e-12)
    # eta0 = (mu_z - mu) / 5 = 0.02 exactly, far from the grid's ends (the change of variables above)
    np.testing.assert_allclose(summ["tf_eta_mean"], 0.02, atol=1e-12)


def test_bad_grid_refused():
    with pytest.raises(ValueError, match="eta_min < eta_max"):
        likelihood.eta_grid(0.5, -0.5, 0.005)


# ------------------------------------------------------------------ non-Gaussian error models

def _quantile_of_curve(like, grid, q):
    """q-quantile of a gridded density, by the trapezoid cumulative (written here, not the module's)."""
    cum = np.concatenate([[0.0], np.cumsum(0.5 * (like[1:] + like[:-1]) * np.diff(grid))])
    return float(np.interp(q * cum[-1], cum, grid))


def test_skewed_draws_use_the_draws_and_keep_their_quantiles():
    """A constructed skewed draw set: eta = 0.1 - 0.05 (X - 2) / 2, X ~ chi2(2 dof) (skewness
    2 sqrt(2), excess kurtosis 6 for chi2 with 2 dof: the chi-squared moments, common practice),
    600 draws. The test must flag it and the smoothed histogram's percentiles must be the draws'
    own quantiles to a tenth of their spread (Silverman's kernel widens by ~4 % at 600 draws)."""
    rng = np.random.default_rng(11)
    grid = likelihood.eta_grid()
    x = rng.chisquare(2, size=(3, 600))
    skewed = 0.1 - 0.05 * (x - 2.0) / 2.0
    gaussian = rng.normal(-0.05, 0.05, size=(40, 600))
    flag = likelihood.non_gaussian(np.vstack([skewed, gaussian]), np.full(43, 0.05))
    assert flag[:3].all()
    # Gaussian draws of the analytic width: each test at 3 standard errors, three of them:
    # about 1 % false alarms per row (0.27 % each, from memory)
    assert flag[3:].sum() <= 2
    like = likelihood.from_draws(skewed, grid)
    s = likelihood.summarize(like, grid)
    for r in range(3):
        q16, q84 = np.quantile(skewed[r], [0.16, 0.84])
        spread = q84 - q16
        assert s["eta_p16"][r] == pytest.approx(q16, abs=0.1 * spread)
        assert s["eta_p84"][r] == pytest.approx(q84, abs=0.1 * spread)
        assert s["eta_mean"][r] == pytest.approx(skewed[r].mean(), abs=0.01 * spread)
    # mass: every draw lies on the grid, the kernel leaks nothing at 0.1 dex from its ends
    np.testing.assert_allclose(np.trapezoid(like, grid, axis=1), 1.0, atol=2e-3)


def test_draws_beyond_the_grid_carry_their_mass_away():
    grid = likelihood.eta_grid(-0.5, 0.5, 0.01)
    rng = np.random.default_rng(2)
    draws = np.concatenate([rng.normal(0.0, 0.05, 150), np.full(50, 0.8)])[None, :]
    like = likelihood.from_draws(draws, grid)
    assert np.trapezoid(like[0], grid) == pytest.approx(0.75, abs=0.01)   # a quarter of the draws are off the grid
    assert np.isnan(likelihood.summarize(like, grid)["eta_mean"]).all()   # below MIN_MASS: no summary


def test_tully_fisher_near_the_inclination_limit_uses_its_draws():
    """A disc seen near face-on (axis ratio 0.86-0.9 +- 0.04, i ~ 26-31 deg): the deprojection
    1/sin i makes the width's error, and so mu's, skewed (Tully & Fisher 1977 deprojection; the
    reason of the LOW_INCLINATION caution, common practice). The method job's likelihood is then
    the draws', and its percentiles are the draws' quantiles; an edge-on-ish disc stays Gaussian."""
    from test_methods import _config, _rows, _setup

    from galdist import methods

    spec = methods.REGISTRY["tully_fisher"]
    config = _config(spec, mc_draws=400, mc_seed=3)
    cal, st = _setup(spec, mc_draws=400, mc_seed=3)
    inp = _rows(spec, 4)
    inp["axis_ratio"] = np.array([0.4, 0.5, 0.86, 0.9])
    inp["axis_ratio_err"] = np.full(4, 0.04)
    draws = []
    out = spec.distances(inp, cal, st, config, draws)
    mu_z = out["tf_mu"] + 0.2
    grid = likelihood.eta_grid()
    parts = list(spec.likelihood_parts(config["tully_fisher"], inp, cal, st, out, mu_z, draws, grid))
    rows = np.concatenate([p[0] for p in parts])
    assert rows.tolist() == [2, 3] and all(p[2] == likelihood.DRAWS for p in parts)
    curves = np.vstack([p[1] for p in parts])
    eta_draws = (mu_z[rows, None] - draws[0][1][rows]) / 5.0
    for k in range(2):
        d = eta_draws[k][np.isfinite(eta_draws[k])]
        q16, q84 = np.quantile(d, [0.16, 0.84])
        assert _quantile_of_curve(curves[k], grid, 0.16) == pytest.approx(q16, abs=0.1 * (q84 - q16))
        assert _quantile_of_curve(curves[k], grid, 0.84) == pytest.approx(q84, abs=0.1 * (q84 - q16))


# ------------------------------------------------------------------ the FP posterior

def test_fp_gaussian_estimator_likelihood_is_its_posterior():
    """With the FP gaussian estimator (and a selection), the method job's likelihood is fp's own
    posterior: its mean is fp_eta moved from angular-diameter to luminosity distances by
    2 log10((1 + z_cmb) / (1 + z_helio)) (D_L = (1 + z)^2 D_A, Etherington's relation; common
    practice), its mode fp_eta_post_mode likewise, and its 16/84 percentiles are those of the
    posterior fp computes on a fine grid of its own."""
    from test_fp import H0_RUN, _plane_cal, _select, _simulate

    from galdist import fp, methods

    inputs, _ = _simulate(400, seed=21)
    sub, _ = _select(inputs, 2.05, 13.4)
    n = len(sub["fp_sigma"])
    cal = _plane_cal()
    st = fp.FPSettings(estimator="gaussian", mc_draws=0, hubble_constant=H0_RUN,
                       selection_log_sigma_min=2.05, selection_mag_limit=13.4)
    out = fp.fp_distance(sub, cal, st)
    grid = likelihood.eta_grid()
    spec = methods.REGISTRY["fp"]
    parts = list(spec.likelihood_parts({"estimator": "gaussian"}, sub, cal, st, out, sub["mu_z"], [], grid))
    rows = np.concatenate([p[0] for p in parts])
    curves = np.vstack([p[1] for p in parts])
    assert all(p[2] == likelihood.POSTERIOR for p in parts)
    assert rows.tolist() == np.flatnonzero(np.isfinite(out["fp_mu"])).tolist() and rows.size > 0.9 * n
    shift = 2 * np.log10((1 + sub["z_cmb"][rows]) / (1 + sub["z_helio"][rows]))
    s = likelihood.summarize(curves, grid)
    # the rows whose posterior lies on the grid: the others, whose selection term 1 / f(eta)
    # lifts a tail to +-0.5 dex, are cut there, and their summaries describe the part on the
    # grid, by design
    ok = np.trapezoid(curves, grid, axis=1) > 0.999
    assert ok.sum() > 100
    # fp's own summary integrates over +-7 widths of the unselected posterior: the tail the
    # selection lifts beyond that weighs a few 1e-4 dex in the mean
    np.testing.assert_allclose(s["eta_mean"][ok], out["fp_eta"][rows][ok] + shift[ok], atol=1e-3)
    np.testing.assert_allclose(s["eta_mode"][ok], out["fp_eta_post_mode"][rows][ok] + shift[ok], atol=0.0026)
    # the product's eta of the same rows: (mu_z - fp_mu) / 5 is that posterior mean
    np.testing.assert_allclose(s["eta_mean"][ok], ((sub["mu_z"] - out["fp_mu"]) / 5)[rows][ok], atol=1e-3)
    # fp's posterior on a ten times finer grid over the same range (far beyond, 1 / f(eta) of a
    # flat prior makes it grow again: improper, so no wider range)
    fine = np.arange(-0.5, 0.5 + 1e-9, 0.0005)
    post = np.exp(fp.eta_posterior({k: (v[rows] if np.ndim(v) else v) for k, v in sub.items()}, cal, st,
                                   eta_grid=fine)["log_posterior"])
    for q, name in ((0.16, "eta_p16"), (0.84, "eta_p84")):
        expected = np.array([_quantile_of_curve(post[k], fine, q) for k in range(rows.size)]) + shift
        np.testing.assert_allclose(s[name][ok], expected[ok], atol=5e-4)


# ------------------------------------------------------------------ the combined distance

def test_product_of_gaussians_is_the_gaussian_of_mu_best():
    """The likelihood of mu_best is the normalised product of the methods' likelihoods; for
    Gaussians in eta the product is the Gaussian of the inverse-variance mean with error
    1 / sqrt(sum 1 / sigma^2) (product of Gaussian densities; common practice). Forced through
    the product path: the TF curves come as a method job's part, the zero-point tie applied."""
    from galdist import crosscheck
    from galdist import flags as F

    grid = likelihood.eta_grid()
    rng = np.random.default_rng(5)
    n = 50
    mu_z = rng.uniform(33, 36, n)
    tf, tf_err = mu_z + rng.normal(0, 0.3, n), rng.uniform(0.3, 0.5, n)
    sbf, sbf_err = mu_z + rng.normal(0, 0.1, n), rng.uniform(0.08, 0.15, n)
    sbf[:5] = np.nan                                             # TF alone there
    fl = F.new(n)
    fl[5:10] = int(F.Method.LOW_INCLINATION)                     # TF not in mu_best there
    zp = {"applied": True, "fitted": ["sbf"], "covariance": [[1e-4]],
          "offsets": {"tf": {"offset": 0.0}, "sbf": {"offset": 0.037}}}
    best = crosscheck.best_distance({"tf": (tf, tf_err, fl), "sbf": (sbf, sbf_err, F.new(n))}, zero_point=zp)
    usable = {"tf": crosscheck.best_usable(tf, tf_err, fl), "sbf": crosscheck.best_usable(sbf, sbf_err, F.new(n))}
    tf_curves = likelihood.gaussian_eta(tf, tf_err, mu_z, grid)

    def part(a, b):
        return np.arange(b - a), tf_curves[a:b], likelihood.DRAWS

    dists = {"tf": (tf, tf_err), "sbf": (sbf, sbf_err), "best": (best["mu_best"], best["mu_best_err"])}
    blocks = list(likelihood.likelihood_blocks(dists, mu_z, grid, parts={"tf": part}, usable=usable,
                                               offsets={"tf": 0.0, "sbf": 0.037}))
    (_, _, lists, summ, kinds), = blocks
    got = likelihood.dense_curves(lists["best"], kinds["best"], best["mu_best"], best["mu_best_err"], mu_z, grid)
    expected = likelihood.gaussian_eta(best["mu_best"], best["mu_best_err"], mu_z, grid)
    # a product where the TF part enters mu_best; elsewhere (TF flagged) the analytic Gaussian
    assert kinds["best"].tolist() == np.where(usable["tf"], likelihood.PRODUCT, likelihood.GAUSSIAN).tolist()
    # linear interpolation of the SBF curve moved by 0.037 / 5 dex: ~(step / sigma)^2 / 8 relative
    np.testing.assert_allclose(got, expected, rtol=0, atol=2e-3 * expected.max())
    # the product's summaries from its curve on the grid; the Gaussians' exact (gaussian_summaries)
    prod = usable["tf"]
    ref = likelihood.summarize(expected, grid)
    exact = likelihood.gaussian_summaries(best["mu_best"], best["mu_best_err"], mu_z, grid)
    for k in ("eta_mean", "eta_p16", "eta_p84"):
        np.testing.assert_allclose(summ[f"best_{k}"][prod], ref[k][prod], atol=2e-4)
        np.testing.assert_array_equal(summ[f"best_{k}"][~prod], exact[k][~prod])


def test_part_file_round_trip_in_blocks(tmp_path, monkeypatch):
    monkeypatch.setattr(likelihood, "BLOCK_ROWS", 4)
    grid = likelihood.eta_grid(-0.5, 0.5, 0.05)
    rows = np.array([1, 2, 7, 8, 9, 15])
    curves = np.arange(rows.size * len(grid), dtype=float).reshape(rows.size, len(grid))
    path = tmp_path / "eta-like-00000.parquet"
    blocks = [(rows[:2], curves[:2], likelihood.DRAWS), (rows[2:2], curves[2:2], likelihood.DRAWS),
              (rows[2:], curves[2:], likelihood.POSTERIOR)]
    assert likelihood.write_part(path, iter(blocks), grid, {b"galdist.shard_fingerprint": b"abc"}) == 6
    np.testing.assert_allclose(likelihood.part_grid(path), grid)
    reader = likelihood.PartReader(path, batch_rows=2)
    seen = {}
    for a in range(0, 20, 3):
        idx, got, kind = reader.take(a, a + 3)
        for i, c, k in zip(idx, got, kind):
            seen[a + int(i)] = (c, int(k))
    assert sorted(seen) == rows.tolist()
    np.testing.assert_allclose(np.vstack([seen[r][0] for r in rows.tolist()]), curves)
    assert [seen[r][1] for r in rows.tolist()] == [likelihood.DRAWS] * 2 + [likelihood.POSTERIOR] * 4


def test_grid_reaches_a_method_job_only_where_it_computes_likelihoods():
    """used_config is what re-runs a method job: the grid is in it only where the job computes
    likelihoods (Monte Carlo draws, or the FP gaussian estimator's posterior), never when
    likelihoods.write is false."""
    import copy

    from galdist import methods
    from galdist.config import DEFAULT_CONFIG, load, validate

    config = validate(load(DEFAULT_CONFIG))
    tf, fp_spec = methods.REGISTRY["tully_fisher"], methods.REGISTRY["fp"]
    assert "likelihoods" in tf.used_config(config)                      # mc_draws > 0 by default
    no_mc = copy.deepcopy(config)
    no_mc["tully_fisher"]["mc_draws"] = no_mc["fp"]["mc_draws"] = 0
    assert "likelihoods" not in tf.used_config(no_mc)
    assert "redshift" not in tf.job_stage_columns(no_mc)
    no_mc["fp"]["estimator"] = "gaussian"
    assert "likelihoods" in fp_spec.used_config(no_mc)
    off = copy.deepcopy(config)
    off["likelihoods"]["write"] = False
    assert all("likelihoods" not in s.used_config(off) for s in methods.REGISTRY.values())
    assert tf.job_stage_columns(config)["redshift"] == ["mu_z"]


@pytest.mark.slow
def test_end_to_end_kinds_and_the_off_switch(tmp_path):
    """A run with the FP gaussian estimator: every FP row with a distance has its posterior as
    likelihood, mu_best's is a product where FP enters it, and the summaries agree with the
    distances. The same run with likelihoods.write false: no companion file (the earlier one
    removed) and no summary columns."""
    import json
    import os
    import subprocess
    import sys

    import pyarrow as pa
    import pyarrow.parquet as pq

    from conftest import small_catalog

    cols = small_catalog(200, seed=8)
    pq.write_table(pa.table(cols), tmp_path / "cat.parquet")
    env = {k: v for k, v in os.environ.items() if k != "SNAKEMAKE_PROFILE"}

    def run(extra):
        conf = {"catalog": "cat.parquet", "run": "lk", "shard_rows": 100, "fp": {"estimator": "gaussian"}} | extra
        (tmp_path / "run.yaml").write_text(json.dumps(conf))
        result = subprocess.run([sys.executable, "-m", "galdist.cli", "run", "run.yaml", "--cores", "2"],
                                cwd=tmp_path, env=env, capture_output=True, text=True, timeout=900)
        assert result.returncode == 0, (result.stdout + result.stderr)[-4000:]
        return tmp_path / "galdist-results" / "lk"

    out = run({})
    product = pq.read_table(out / "distances.parquet").to_pandas()
    lk = pq.read_table(out / "eta_likelihoods.parquet").to_pandas()
    assert list(lk["galaxy_id"]) == list(product["galaxy_id"])
    has_fp = np.isfinite(product["fp_mu"].to_numpy())
    assert has_fp.sum() > 20
    assert (lk["fp_eta_like_kind"].to_numpy() == np.where(has_fp, likelihood.POSTERIOR, likelihood.NONE)).all()
    assert set(lk["tf_eta_like_kind"]) <= {likelihood.NONE, likelihood.GAUSSIAN, likelihood.DRAWS}
    in_best = product["best_method"].str.contains("fp").to_numpy()
    assert (lk["best_eta_like_kind"].to_numpy()[in_best] == likelihood.PRODUCT).all()
    shown = np.isfinite(product["fp_eta_mean"].to_numpy())
    assert shown.sum() > 0.5 * has_fp.sum()
    # the posterior's mean is fp_mu's eta, (mu_z - fp_mu) / 5 (tests above: to 1e-3 dex), where
    # the grid's ends (+-0.5 dex) do not cut it (the invented catalog's eta spreads to +-0.3)
    eta = ((product["mu_z"] - product["fp_mu"]) / 5).to_numpy()
    near = shown & (np.abs(eta) < 0.15)
    assert near.sum() > 10
    np.testing.assert_allclose(product["fp_eta_mean"].to_numpy()[near], eta[near], atol=1e-3)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["eta_likelihoods"]["kinds"]["fp"]["posterior"] == has_fp.sum()

    out = run({"likelihoods": {"write": False}})
    assert not (out / "eta_likelihoods.parquet").exists()
    names = pq.read_schema(out / "distances.parquet").names
    assert not [n for n in names if "_eta_mode" in n or "_eta_p16" in n]
    assert json.loads((out / "summary.json").read_text())["eta_likelihoods"] is None


def test_product_off_the_grid_is_zero_or_cut_never_missing():
    """A product whose mass lies beyond the grid is all zeros where its values underflow, or
    normalised on the grid and marked cut (no summaries) where they do not; never NaN: NaN
    means no distance."""
    grid = likelihood.eta_grid()
    mu, err, mu_z = [20.0, 30.0, 34.0], [0.1, 0.1, 0.4], [34.0, 34.0, 34.0]   # eta = 2.8, 0.8, 0
    a = likelihood.gaussian_eta(mu, err, mu_z, grid)
    use = np.array([True, True, True])
    prod, cut = likelihood.combine([a, a], [use, np.array([True, True, False])], grid)
    assert (prod[0] == 0).all() and not cut[0]
    assert cut[1] and not cut[2] and np.isfinite(prod).all()
    np.testing.assert_allclose(prod[2], a[2] / np.trapezoid(a[2], grid))
    s = likelihood.summarize(prod, grid, ~cut)
    assert np.isnan(s["eta_mean"][:2]).all() and np.isfinite(s["eta_mean"][2])
    nan_prod, _ = likelihood.combine([np.full((1, len(grid)), np.nan)], [np.array([True])], grid)
    assert np.isnan(nan_prod).all()
