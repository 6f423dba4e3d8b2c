"""Error propagation shared by the distance methods.

Two independent routes, cross-tested: analytic first-order propagation (each
method writes its own partial derivatives) and a seeded Monte Carlo that redraws
every Gaussian input and re-runs the method's own vectorised function.
The Monte Carlo streams over draws (Welford's running mean and variance), so
memory is a few arrays of the shard's length whatever the number of draws, unless
the draws are kept (``recording_draws``: rows x draws, for the eta likelihoods of the
rows whose error is not Gaussian, ``galdist.likelihood``).
"""

from __future__ import annotations

import contextlib
import contextvars
from collections.abc import Callable, Mapping

import numpy as np

_RECORDING: contextvars.ContextVar = contextvars.ContextVar("galdist_mc_draws", default=None)


@contextlib.contextmanager
def recording_draws():
    """Within the block, every ``monte_carlo`` call appends its draws, (rows, n_draws)
    float64 (NaN where a draw failed), to the list this yields."""
    store: list = []
    token = _RECORDING.set(store)
    try:
        yield store
    finally:
        _RECORDING.reset(token)


def quadrature(*terms: np.ndarray) -> np.ndarray:
    """sqrt(sum of squares) of the terms, treating NaN terms as zero."""
    total = np.zeros(np.broadcast(*terms).shape) if terms else np.zeros(())
    for t in terms:
        total = total + np.nan_to_num(np.asarray(t, dtype=float) ** 2, nan=0.0)
    return np.sqrt(total)


def monte_carlo(func: Callable[..., np.ndarray],
                values: Mapping[str, np.ndarray],
                sigmas: Mapping[str, np.ndarray],
                n_draws: int = 200,
                seed: int = 12345,
                fixed: Mapping[str, object] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Mean and standard deviation of ``func(**inputs)`` under Gaussian input errors.

    ``values`` and ``sigmas`` share keys (missing or NaN sigmas are treated as
    exact); ``fixed`` passes through unchanged. Each draw perturbs every input
    independently; ``func`` must be vectorised over rows. Draws whose result is
    non-finite are ignored row by row. Deterministic for a given ``seed``.
    """
    rng = np.random.default_rng(seed)
    fixed = dict(fixed or {})
    record = _RECORDING.get()
    kept = None
    mean = None
    m2 = None
    count = None
    for k in range(n_draws):
        drawn = {}
        for key, val in values.items():
            val = np.asarray(val, dtype=float)
            sig = np.nan_to_num(np.asarray(sigmas.get(key, 0.0), dtype=float), nan=0.0)
            drawn[key] = val + sig * rng.standard_normal(np.shape(val) or None) if np.any(sig) else val
        out = np.asarray(func(**drawn, **fixed), dtype=float)
        if mean is None:
            mean = np.zeros(out.shape)
            m2 = np.zeros(out.shape)
            count = np.zeros(out.shape)
            if record is not None:
                kept = np.full(out.shape + (n_draws,), np.nan)
        if kept is not None:
            kept[..., k] = out
        ok = np.isfinite(out)
        count += ok
        delta = np.where(ok, out - mean, 0.0)
        mean += np.where(ok, delta / np.maximum(count, 1), 0.0)
        m2 += np.where(ok, delta * (out - mean), 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        std = np.sqrt(m2 / (count - 1))
    mean = np.where(count > 0, mean, np.nan)
    std = np.where(count > 1, std, np.nan)
    if kept is not None:
        record.append(kept)
    return mean, std


def spread_rows(measured: np.ndarray, max_rows: int) -> np.ndarray:
    """Indices of at most ``max_rows`` of the ``measured`` rows, evenly spread, in order."""
    idx = np.flatnonzero(measured)
    if idx.size > max_rows:
        idx = idx[np.linspace(0, idx.size - 1, max_rows).round().astype(np.intp)]
    return idx


def monte_carlo_on_subsample(method: Callable[[dict, bool], dict], inputs: Mapping[str, object],
                             mu_key: str, mc_key: str, max_rows: int, draws: list | None = None) -> dict:
    """Run ``method(inputs, monte_carlo)`` on every row without the Monte Carlo, then
    with it on at most ``max_rows`` measured rows, evenly spread over the shard.

    The Monte Carlo error is a check on the analytic one; drawing it for every row of a
    10^7-row catalog would cost minutes of CPU per method for no extra information.
    Rows outside the subsample keep NaN in ``mc_key``. Per-row inputs are the arrays
    whose first axis has the shard's length; everything else passes through. With a list
    ``draws``, (subsample rows, their draws of ``mu_key`` (rows, n_draws)) is appended to
    it where the method drew mu in one ``monte_carlo`` call of the subsample's rows.
    """
    full = method(dict(inputs), False)
    n = len(full[mu_key])
    rows = spread_rows(np.isfinite(full[mu_key]), max_rows)
    if rows.size == 0:
        return full
    sub = {k: (v[rows] if isinstance(v, np.ndarray) and v.ndim and v.shape[0] == n else v)
           for k, v in inputs.items()}
    full[mc_key] = np.full(n, np.nan)
    if draws is None:
        full[mc_key][rows] = method(sub, True)[mc_key]
        return full
    with recording_draws() as store:
        full[mc_key][rows] = method(sub, True)[mc_key]
    if len(store) == 1 and store[0].ndim == 2 and store[0].shape[0] == rows.size:
        draws.append((rows, store[0]))
    return full
