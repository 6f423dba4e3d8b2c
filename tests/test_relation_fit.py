"""Tests of galdist.relation_fit: maximum-likelihood relation fits to grouped samples.

Every sample here is simulated in the test with known coefficients (invented values of
a Tully-Fisher-like relation, M = a0 + a1 (log W - 2.5)); the checks are statistical
properties derived in each test's docstring, with their source beside them.
"""

from __future__ import annotations

import numpy as np
import pytest

from galdist import relation_fit as rf

A0, A1, SCATTER = -21.0, -8.0, 0.35  # invented truth
PIVOT = 2.5


def simulate(seed, *, n_groups=14, per_group=40, y_limit=11.5, n_ref=4, y_err=0.05, x_sd=0.2,
             ref_err=0.05, scatter=SCATTER):
    """A grouped sample: each group at its own modulus, widths ~ N(2.45, x_sd), magnitudes
    from the relation plus intrinsic scatter and measurement error, cut at apparent
    magnitude ``y_limit`` (None: no limit); the first ``n_ref`` groups have a reference
    modulus with error ``ref_err``."""
    rng = np.random.default_rng(seed)
    mu_true = rng.uniform(30.5, 33.0, n_groups)
    x = rng.normal(2.45, x_sd, (n_groups, per_group))
    y = (A0 + A1 * (x - PIVOT) + rng.normal(0.0, scatter, x.shape) + mu_true[:, None]
         + rng.normal(0.0, y_err, x.shape))
    group = np.repeat(np.arange(n_groups), per_group)
    x, y = x.ravel(), y.ravel()
    keep = np.ones(x.size, bool) if y_limit is None else y < y_limit
    ref_mu = np.full(n_groups, np.nan)
    errs = np.full(n_groups, np.nan)
    ref_mu[:n_ref] = mu_true[:n_ref] + rng.normal(0.0, ref_err, n_ref) if ref_err else mu_true[:n_ref]
    errs[:n_ref] = ref_err
    n = int(keep.sum())
    sample = rf.Sample(x[keep], y[keep], np.zeros(n), np.full(n, y_err), np.zeros(n), group[keep], ref_mu, errs,
                       y_limit=None if y_limit is None else np.full(n, y_limit))
    return sample, mu_true


def test_selection_aware_fit_covers_the_truth_and_naive_fit_is_biased():
    """Magnitude-limited groups, 20 seeds.

    Expectation stated before measuring: at a fixed width only galaxies brighter than the
    limit survive, and the cut bites hardest where galaxies are faint, i.e. at small
    widths (a1 < 0). The naive forward fit therefore sees the faint end too bright: its
    slope is shallower than the truth (a1_naive - a1 > 0), its zero point brighter
    (a0_naive - a0 < 0) and its scatter too small (the faint tail is cut). Classic
    calibration Malmquist bias (Teerikorpi 1997, ARA&A 35, 101, from memory). The
    truncated likelihood should cover each true value within 2 reported sigma in about
    95% of seeds (Gaussian asymptotics of ML, common practice): at least 17 of 20 (a
    binomial(20, 0.954) falls below 17 with ~1% probability).
    """
    truth = np.array([A0, A1, SCATTER])
    cover = np.zeros(3, int)
    aware, naive, sizes = [], [], []
    for seed in range(20):
        sample, _ = simulate(seed)
        sizes.append(sample.x.size)
        model = rf.Model("forward", pivot=PIVOT)
        fit = rf.fit(sample, model)
        nf = rf.fit(sample, rf.naive(model))
        est = np.append(fit.coefficients, fit.scatter)
        err = np.append(fit.coefficient_errors, fit.scatter_err)
        cover += np.abs(est - truth) < 2.0 * err
        aware.append(est - truth)
        naive.append(np.append(nf.coefficients, nf.scatter) - truth)
    aware, naive = np.array(aware), np.array(naive)
    assert np.all(cover >= 17), f"coverage of (a0, a1, scatter) within 2 sigma: {cover}/20"
    # selection-aware: mean error of a0, a1 consistent with zero (3 standard errors of the
    # mean); the ML scatter is low by the Neyman-Scott factor of a variance with P fitted
    # parameters, s^2 (1 - P/N), i.e. s P / (2N) (Neyman & Scott 1948, Econometrica 16, 1,
    # from memory), P = 2 coefficients + 14 group moduli + the scatter
    sem = aware.std(axis=0, ddof=1) / np.sqrt(len(aware))
    assert np.all(np.abs(aware.mean(axis=0)[:2]) < 3.0 * sem[:2]), (aware.mean(axis=0), sem)
    expected_scatter_bias = -SCATTER * 17 / (2 * np.mean(sizes))
    assert abs(aware.mean(axis=0)[2] - expected_scatter_bias) < 3.0 * sem[2], (aware.mean(axis=0), sem)
    # naive: the signs stated above, each beyond 5 standard errors of the mean
    mean, sem_n = naive.mean(axis=0), naive.std(axis=0, ddof=1) / np.sqrt(len(naive))
    assert mean[1] > 5 * sem_n[1], "naive slope should be shallower (less negative)"
    assert mean[0] < -5 * sem_n[0], "naive zero point should be brighter"
    assert mean[2] < -5 * sem_n[2], "naive scatter should be smaller"


def test_forward_unbiased_and_inverse_slope_diluted_without_selection():
    """No limit, scatter in magnitude only (x exact), one large sample.

    The forward ML fit of y on x is least squares with a free intercept per group, so
    unbiased for a1. The inverse fit regresses x on y: its slope is cov(x, y) / var(y)
    = a1 var_x / (a1^2 var_x + s^2). Written as a magnitude slope, 1 / b1 = a1 / R with
    R = a1^2 var_x / (a1^2 var_x + s^2), the regression-dilution (reliability) factor
    (derived here; e.g. Fuller 1987, Measurement Error Models, section 1.1, from memory).
    With a1 = -8, sd_x = 0.2, s_y = sqrt(0.35^2 + 0.05^2): R = 2.56 / (2.56 + 0.125) = 0.9534.
    """
    sample, _ = simulate(7, n_groups=10, per_group=400, y_limit=None, ref_err=0.0)
    fwd = rf.fit(sample, rf.Model("forward", pivot=PIVOT))
    assert abs(fwd.coefficients[1] - A1) < 3 * fwd.coefficient_errors[1]
    inv = rf.fit(sample, rf.Model("inverse", pivot=PIVOT, magnitude_pivot=-21.0))
    s2 = SCATTER ** 2 + 0.05 ** 2
    reliability = A1 ** 2 * 0.2 ** 2 / (A1 ** 2 * 0.2 ** 2 + s2)
    assert reliability == pytest.approx(0.9534, abs=1e-4)
    b1, b1_err = inv.coefficients[1], inv.coefficient_errors[1]
    expected_b1 = A1 * 0.2 ** 2 / (A1 ** 2 * 0.2 ** 2 + s2)  # = reliability / a1
    assert abs(b1 - expected_b1) < 3 * b1_err
    # the dilution is resolved: 1/b1 is steeper than a1 by about 1/R (5%, ~8 sigma of b1 here)
    assert abs(1.0 / b1) > abs(A1) * (1 + 0.5 * (1 / reliability - 1))
    assert abs(b1 - 1.0 / A1) > 5 * b1_err


def test_bivariate_equals_orthogonal_regression_closed_form():
    """One group at a fixed reference modulus, no measurement errors: the bivariate
    (orthogonal) ML line minimises the sum of squared perpendicular distances, so its
    slope is the major-axis slope b = [S_yy - S_xx + sqrt((S_yy - S_xx)^2 + 4 S_xy^2)]
    / (2 S_xy), it passes through the centroid, and the perpendicular scatter^2 is the
    smaller eigenvalue of the (1/N) covariance matrix (Pearson 1901, Phil. Mag. 2, 559,
    from memory). Equal, constant errors in x and y give the same line (the measurement
    term is then the same for every galaxy)."""
    rng = np.random.default_rng(3)
    n = 200
    x = rng.normal(2.4, 0.25, n)
    y = 30.0 - 21.0 - 3.0 * (x - PIVOT) + rng.normal(0.0, 0.3, n)
    zeros = np.zeros(n)
    for err in (0.0, 0.05):
        sample = rf.Sample(x, y, np.full(n, err), np.full(n, err), zeros, np.zeros(n, int),
                           np.array([30.0]), np.array([0.0]))
        fit = rf.fit(sample, rf.Model("bivariate", pivot=PIVOT))
        sxx, syy = np.var(x), np.var(y)
        sxy = np.mean((x - x.mean()) * (y - y.mean()))
        b = (syy - sxx + np.sqrt((syy - sxx) ** 2 + 4 * sxy ** 2)) / (2 * sxy)
        a0 = (y.mean() - 30.0) - b * (x.mean() - PIVOT)
        assert fit.coefficients == pytest.approx([a0, b], abs=2e-5)
        if err == 0.0:
            lam = np.linalg.eigvalsh(np.cov(np.stack([x, y]), bias=True))[0]
            assert fit.scatter_native == pytest.approx(np.sqrt(lam), rel=1e-4)
    # and it is not the forward line (which would be the OLS slope S_xy / S_xx)
    assert abs(b - sxy / sxx) > 0.05


def test_inverse_fit_with_width_cut_needs_the_truncation():
    """A lower cut on the predictor biases the inverse fit (it conditions on magnitude)
    and not the forward fit (common practice; Schechter 1980, AJ 85, 801, from memory).
    Expectation: cutting small widths removes the galaxies below the line in x at faint
    magnitudes, so the naive inverse slope |b1| comes out too small; the truncated one
    recovers b1 = reliability / a1 within its errors."""
    sample, _ = simulate(11, n_groups=10, per_group=300, y_limit=None, ref_err=0.0)
    keep = sample.x > 2.35
    n = int(keep.sum())
    cut = rf.Sample(sample.x[keep], sample.y[keep], sample.x_err[keep], sample.y_err[keep], sample.xy_cov[keep],
                    sample.group[keep], sample.ref_mu, sample.ref_err, x_limit=np.full(n, 2.35))
    model = rf.Model("inverse", pivot=PIVOT, magnitude_pivot=-21.0)
    aware, naive = rf.fit(cut, model), rf.fit(cut, rf.naive(model))
    s2 = SCATTER ** 2 + 0.05 ** 2
    expected_b1 = A1 * 0.2 ** 2 / (A1 ** 2 * 0.2 ** 2 + s2)
    assert abs(aware.coefficients[1] - expected_b1) < 3 * aware.coefficient_errors[1]
    assert abs(naive.coefficients[1]) < abs(expected_b1) - 3 * naive.coefficient_errors[1]


def test_bootstrap_over_groups_is_seeded_and_agrees_with_hessian():
    """Bootstrap spread over groups is of the order of the Hessian error (factor 2:
    few groups), and the same seed gives the same draws."""
    sample, _ = simulate(5)
    model = rf.Model("forward", pivot=PIVOT)
    best = rf.fit(sample, model)
    one = rf.bootstrap(sample, model, 15, seed=9, best=best)
    two = rf.bootstrap(sample, model, 15, seed=9, best=best)
    np.testing.assert_array_equal(one, two)
    ratio = one[:, 1].std(ddof=1) / best.coefficient_errors[1]
    assert 0.5 < ratio < 2.0


def test_curvature_and_polynomial_degree():
    """A quadratic term above a break and a cubic polynomial are recovered from exact
    data (zero scatter floor aside): the relation evaluates as written."""
    rng = np.random.default_rng(1)
    n = 400
    x = rng.uniform(2.0, 2.9, n)
    truth = -21.0 - 8.0 * (x - PIVOT) + 4.0 * np.maximum(x - 2.6, 0.0) ** 2
    y = truth + 30.0 + rng.normal(0, 0.02, n)
    sample = rf.Sample(x, y, np.zeros(n), np.full(n, 0.02), np.zeros(n), np.zeros(n, int),
                       np.array([30.0]), np.array([0.0]))
    fit = rf.fit(sample, rf.Model("forward", pivot=PIVOT, curvature_break=2.6))
    assert fit.coefficients == pytest.approx([-21.0, -8.0, 4.0], abs=5 * fit.coefficient_errors.max())
    c = rng.uniform(0.9, 1.5, n)
    y = -2.0 + 1.4 * (c - 1.3) + 2.6 * (c - 1.3) ** 2 + 3.7 * (c - 1.3) ** 3 + 31.0 + rng.normal(0, 0.02, n)
    sample = rf.Sample(c, y, np.zeros(n), np.full(n, 0.02), np.zeros(n), np.zeros(n, int),
                       np.array([31.0]), np.array([0.0]))
    fit = rf.fit(sample, rf.Model("forward", degree=3, pivot=1.3))
    assert np.all(np.abs(fit.coefficients - [-2.0, 1.4, 2.6, 3.7]) < 4 * fit.coefficient_errors)


def test_no_reference_modulus_refuses():
    sample, _ = simulate(2, n_ref=0)
    with pytest.raises(ValueError, match="reference distance modulus"):
        rf.fit(sample, rf.Model("forward", pivot=PIVOT))


def test_bivariate_normal_cdf_from_owens_t():
    """ln Phi2 by Owen's T against scipy's numerical integration of the bivariate normal
    (scipy.stats.multivariate_normal.cdf, Genz's method) at points on both sides of 0."""
    from scipy.stats import multivariate_normal

    h = np.array([-1.0, 0.5, 2.0, -0.3, 0.0, -2.5])
    k = np.array([0.3, -1.2, 2.5, -0.7, 0.4, 1.0])
    rho = np.array([0.5, -0.3, 0.8, 0.0, 0.6, -0.9])
    got = np.exp(rf.log_bivariate_normal_cdf(h, k, rho))
    ref = [multivariate_normal([0, 0], [[1, r], [r, 1]]).cdf([a, b]) for a, b, r in zip(h, k, rho)]
    np.testing.assert_allclose(got, ref, rtol=1e-5, atol=1e-8)


def simulate_hi(seed, rho=0.6, mag_limit=None, s_limit=15.3):
    """Groups selected by HI flux: s = -2.5 log10 S = mu - 17 - 5 (x - 2.5) + e_s, the HI
    and luminosity scatters correlated (rho; invented values), kept where s < s_limit."""
    rng = np.random.default_rng(seed)
    n_groups, per = 14, 50
    mu = rng.uniform(30.5, 33.0, n_groups)
    x = rng.normal(2.45, 0.2, (n_groups, per))
    cov = [[SCATTER ** 2, rho * SCATTER * 0.4], [rho * SCATTER * 0.4, 0.4 ** 2]]
    e = rng.multivariate_normal([0, 0], cov, (n_groups, per))
    y = A0 + A1 * (x - PIVOT) + e[..., 0] + mu[:, None] + rng.normal(0, 0.05, x.shape)
    s = mu[:, None] - 17.0 - 5.0 * (x - PIVOT) + e[..., 1] + rng.normal(0, 0.05, x.shape)
    keep = s < s_limit
    if mag_limit is not None:
        keep &= y < mag_limit
    group = np.repeat(np.arange(n_groups), per).reshape(n_groups, per)
    ref, err = np.full(n_groups, np.nan), np.full(n_groups, np.nan)
    ref[:4], err[:4] = mu[:4] + rng.normal(0, 0.05, 4), 0.05
    n = int(keep.sum())
    return rf.Sample(x[keep], y[keep], np.zeros(n), np.full(n, 0.05), np.zeros(n), group[keep], ref, err,
                     y_limit=None if mag_limit is None else np.full(n, mag_limit), s=s[keep],
                     s_err=np.full(n, 0.05), s_limit=np.full(n, s_limit))


def test_hi_flux_limit_is_modelled():
    """An HI-flux limit selects on a variable correlated with luminosity (rho = 0.6 here).
    Expectation stated first: at a fixed width the flux limit keeps HI-rich galaxies,
    hence (rho > 0) the over-luminous ones, and most so at small widths where the HI
    relation is faint; so the naive forward slope is shallower than the truth, as for a
    magnitude limit. The model of the flux selection recovers a0, a1 within 2 sigma in
    at least 8 of 10 seeds (binomial(10, 0.954) falls below 8 with ~1% probability) and
    the correlation within 3 sigma."""
    cover = np.zeros(2, int)
    naive_slope = []
    for seed in range(10):
        sample = simulate_hi(seed)
        model = rf.Model("forward", pivot=PIVOT, hi_flux=True)
        fit, plain = rf.fit(sample, model), rf.fit(sample, rf.naive(model))
        cover += np.abs(fit.coefficients - [A0, A1]) < 2 * fit.coefficient_errors
        naive_slope.append(plain.coefficients[1] - A1)
        assert abs(fit.hi_relation["correlation"] - 0.6) < 3 * fit.hi_relation["correlation_err"]
    assert np.all(cover >= 8), cover
    naive_slope = np.array(naive_slope)
    assert naive_slope.mean() > 5 * naive_slope.std(ddof=1) / np.sqrt(naive_slope.size)
    # both limits at once: the bivariate normal CDF normalises each galaxy
    sample = simulate_hi(3, mag_limit=11.8)
    fit = rf.fit(sample, rf.Model("forward", pivot=PIVOT, hi_flux=True))
    assert np.all(np.abs(fit.coefficients - [A0, A1]) < 3 * fit.coefficient_errors)
