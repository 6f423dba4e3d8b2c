"""Shared error helpers: quadrature, the seeded Monte Carlo and its row subsample."""

import numpy as np

from galdist import uncertainty as U


def test_quadrature_ignores_nan_terms():
    np.testing.assert_allclose(U.quadrature(np.array([3.0, np.nan]), np.array([4.0, 4.0])), [5.0, 4.0])


def test_monte_carlo_of_a_linear_function_gives_the_propagated_error():
    # For f = 2x + 3y with independent Gaussian errors, sigma_f = sqrt(4 sx^2 + 9 sy^2)
    # exactly (linear propagation, common practice); 4000 draws give ~1% precision.
    x, y = np.array([1.0, 2.0]), np.array([0.5, -1.0])
    sx, sy = np.array([0.1, 0.2]), np.array([0.3, 0.1])
    mean, std = U.monte_carlo(lambda x, y: 2 * x + 3 * y, {"x": x, "y": y}, {"x": sx, "y": sy},
                              n_draws=4000, seed=7)
    np.testing.assert_allclose(std, np.sqrt(4 * sx**2 + 9 * sy**2), rtol=0.04)
    np.testing.assert_allclose(mean, 2 * x + 3 * y, atol=0.02)
    again = U.monte_carlo(lambda x, y: 2 * x + 3 * y, {"x": x, "y": y}, {"x": sx, "y": sy},
                          n_draws=4000, seed=7)
    np.testing.assert_array_equal(again[1], std)  # seeded: identical on re-run


def test_spread_rows_is_an_even_ordered_subset():
    measured = np.zeros(1000, dtype=bool)
    measured[::3] = True
    rows = U.spread_rows(measured, 50)
    assert rows.size == 50 and measured[rows].all() and np.all(np.diff(rows) > 0)
    assert rows[0] == 0 and rows[-1] == np.flatnonzero(measured)[-1]
    assert U.spread_rows(measured, 10_000).size == measured.sum()


def test_monte_carlo_on_subsample_fills_only_the_chosen_rows():
    x = np.arange(10.0)
    x[4] = np.nan

    def method(inputs, mc):
        out = {"mu": inputs["x"] * 2, "mc": inputs["x"] + 100 if mc else np.full(len(inputs["x"]), np.nan)}
        assert inputs["scale"] == 3.0  # scalars pass through untouched
        return out

    out = U.monte_carlo_on_subsample(method, {"x": x, "scale": 3.0}, "mu", "mc", max_rows=4)
    chosen = np.flatnonzero(np.isfinite(out["mc"]))
    assert chosen.size == 4 and 4 not in chosen
    np.testing.assert_array_equal(out["mc"][chosen], x[chosen] + 100)
    np.testing.assert_array_equal(out["mu"], x * 2)
