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
    values = arr.flatten().to_numpy().reshape(30, len(grid))
    np.testing.assert_allclose(values, likelihood.gaussian_eta(mu, np.full(30, 0.3), mu + 0.1, grid), rtol=1e-6)
    np.testing.assert_allclose(summ["tf_eta_mean"], 0.02, atol=1e-4)


def test_bad_grid_refused():
    with pytest.raises(ValueError, match="eta_min < eta_max"):
        likelihood.eta_grid(0.5, -0.5, 0.005)
