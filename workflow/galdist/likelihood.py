"""Per-galaxy likelihoods of eta = log10(d_z / d) on a fixed grid.

eta is the log-distance ratio of ``crosscheck.log_distance_ratio``: with mu = mu_z - 5 eta
(both luminosity distances), a galaxy's likelihood of its modulus, L(mu), becomes a
likelihood of eta by the change of variables p_eta(eta) = p_mu(mu_z - 5 eta) |dmu/deta| =
5 p_mu(mu_z - 5 eta) (the transformation rule of densities; common practice). A Gaussian
error in mu (every method's analytic random error) is therefore a Gaussian in eta, centre
eta0 = (mu_z - mu) / 5 and width sigma_mu / 5; the distance itself is log-normal
(Strauss & Willick 1995, Phys. Rep. 261, 271, Sec. 6: log-normal distance errors of
distance indicators; from memory). No method keeps its Monte Carlo draws per galaxy
today, so every likelihood here is this analytic transform of the random error
(``<prefix>_mu_err``); the redshift's error is not in it (a flow model treats the
redshift itself).

The likelihood is stored as a density in dex^-1 on the grid (integral 1 over the whole
line), float32, one fixed-size list per galaxy and method (NaN where the galaxy has no
distance); its mode, mean and 16th/84th percentiles are computed from the gridded values
(trapezoid rule), so they describe the likelihood on the grid's range (a galaxy near
an end is truncated there), and are NaN where less than ``MIN_MASS`` of the probability
lies on the grid (the galaxy's eta is beyond the grid's range).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

#: the least probability on the grid for the summaries to be given
MIN_MASS = 0.95
#: the summary columns, per distance: (suffix, description)
SUMMARIES = {
    "eta_mode": "mode of the eta likelihood on the grid",
    "eta_mean": "mean of eta under its likelihood (trapezoid rule on the grid)",
    "eta_p16": "16th percentile of eta under its likelihood",
    "eta_p84": "84th percentile of eta under its likelihood",
}
#: rows computed at once: (rows x grid) float64 arrays stay below ~30 MB
BLOCK_ROWS = 16_384


def eta_grid(eta_min: float = -0.5, eta_max: float = 0.5, step: float = 0.005) -> np.ndarray:
    """The fixed grid, eta_min to eta_max inclusive in ``step`` (dex)."""
    if not (np.isfinite(eta_min) and np.isfinite(eta_max) and step > 0 and eta_max > eta_min):
        raise ValueError(f"likelihoods: need eta_min < eta_max and step > 0 (got {eta_min}, {eta_max}, {step})")
    n = int(round((eta_max - eta_min) / step)) + 1
    return np.linspace(eta_min, eta_min + (n - 1) * step, n)


def gaussian_eta(mu, mu_err, mu_z, grid: np.ndarray) -> np.ndarray:
    """The eta likelihood (density, dex^-1) of a Gaussian modulus mu +- mu_err at mu_z, per row on
    ``grid``: (rows, len(grid)) float64, NaN rows where mu, mu_err (> 0) or mu_z is missing."""
    mu, err, mu_z = (np.asarray(a, dtype=float)[:, None] for a in (mu, mu_err, mu_z))
    ok = np.isfinite(mu) & np.isfinite(mu_z) & np.isfinite(err) & (err > 0)
    eta0 = np.where(ok, (mu_z - mu) / 5.0, 0.0)
    s = np.where(ok, err / 5.0, 1.0)
    dens = np.exp(-0.5 * ((grid[None, :] - eta0) / s) ** 2) / (s * np.sqrt(2.0 * np.pi))
    return np.where(ok, dens, np.nan)


def summarize(like: np.ndarray, grid: np.ndarray) -> dict[str, np.ndarray]:
    """Mode, mean and 16/84 percentiles of gridded likelihoods (rows); NaN where a row is NaN or
    holds less than MIN_MASS of its probability."""
    like = np.asarray(like, dtype=float)
    dx = np.diff(grid)
    cum = np.concatenate([np.zeros((like.shape[0], 1)),
                          np.cumsum(0.5 * (like[:, 1:] + like[:, :-1]) * dx, axis=1)], axis=1)
    mass = cum[:, -1]
    ok = np.isfinite(mass) & (mass >= MIN_MASS)
    safe = np.where(ok, mass, 1.0)[:, None]
    cdf = np.where(ok[:, None], cum / safe, 0.0)
    out = {"eta_mode": grid[np.argmax(np.where(ok[:, None], like, -np.inf), axis=1)]}
    weights = np.where(ok[:, None], like, 0.0)
    out["eta_mean"] = np.trapezoid(weights * grid[None, :], grid, axis=1) / safe[:, 0]
    rows = np.arange(like.shape[0])
    for q, name in ((0.16, "eta_p16"), (0.84, "eta_p84")):
        hi = np.clip((cdf < q).sum(axis=1), 1, len(grid) - 1)
        c0, c1 = cdf[rows, hi - 1], cdf[rows, hi]
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.where(c1 > c0, (q - c0) / (c1 - c0), 0.0)
        out[name] = grid[hi - 1] + t * (grid[hi] - grid[hi - 1])
    return {k: np.where(ok, v, np.nan) for k, v in out.items()}


def likelihood_blocks(distances: dict[str, tuple], mu_z, grid: np.ndarray):
    """For each block of ``BLOCK_ROWS`` rows: (first row, end row, lists, summaries), where for
    each distance name -> (mu, mu_err) ``lists[name]`` is the block's gridded likelihoods as a
    fixed-size float32 list array and ``summaries`` holds ``<name>_eta_mode`` ... of the block.
    A block at a time, so the memory is a block's, whatever the batch."""
    n = len(np.asarray(mu_z))
    for a in range(0, n, BLOCK_ROWS):
        b = min(n, a + BLOCK_ROWS)
        lists, summaries = {}, {}
        for name, (mu, err) in distances.items():
            like = gaussian_eta(np.asarray(mu)[a:b], np.asarray(err)[a:b], np.asarray(mu_z)[a:b], grid)
            summaries |= {f"{name}_{k}": v for k, v in summarize(like, grid).items()}
            lists[name] = pa.FixedSizeListArray.from_arrays(pa.array(like.astype(np.float32).ravel()), len(grid))
        yield a, b, lists, summaries


def likelihood_columns(distances: dict[str, tuple], mu_z, grid: np.ndarray) -> tuple[dict, dict]:
    """``likelihood_blocks`` of all rows joined: (name -> list array, summary columns)."""
    parts = list(likelihood_blocks(distances, mu_z, grid))
    lists = {name: pa.concat_arrays([p[2][name] for p in parts]) for name in distances} if parts else {}
    summaries = {k: np.concatenate([p[3][k] for p in parts]) for k in parts[0][3]} if parts else {}
    return lists, summaries


def schema_metadata(grid: np.ndarray) -> dict[bytes, bytes]:
    """The companion file's schema metadata: the grid, so a reader needs nothing else."""
    import json

    step = round(float(grid[1] - grid[0]), 12) if len(grid) > 1 else 0.0
    return {b"galdist.eta_grid": json.dumps({"min": float(grid[0]), "max": float(grid[-1]), "step": step,
                                             "n": int(len(grid)), "unit": "dex",
                                             "values": "density in 1/dex, integral 1 over all eta"}).encode()}
