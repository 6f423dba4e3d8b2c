"""Per-galaxy likelihoods of eta = log10(d_z / d) on a fixed grid.

eta is the log-distance ratio of ``crosscheck.log_distance_ratio``: with mu = mu_z - 5 eta
(both luminosity distances), a galaxy's likelihood of its modulus, L(mu), becomes a
likelihood of eta by the change of variables p_eta(eta) = p_mu(mu_z - 5 eta) |dmu/deta| =
5 p_mu(mu_z - 5 eta) (the transformation rule of densities; common practice). A Gaussian
error in mu (every method's analytic random error) is therefore a Gaussian in eta, centre
eta0 = (mu_z - mu) / 5 and width sigma_mu / 5; the distance itself is log-normal
(Strauss & Willick 1995, Phys. Rep. 261, 271, Sec. 6: log-normal distance errors of
distance indicators; from memory). The redshift's error is not in it (a flow model
treats the redshift itself).

Where a galaxy's own error model is not that Gaussian, its likelihood comes from it:

* a method with a posterior in eta (the Fundamental Plane's gaussian estimator,
  ``fp.eta_likelihood``): that curve, selection included (kind ``POSTERIOR``);
* a method's Monte Carlo draws of mu (the rows of its ``mc_max_rows`` subsample), where
  they show the error is not Gaussian in eta (``non_gaussian``: a skewness, kurtosis or
  width test, each at 3 standard errors of a Gaussian sample): a histogram of the draws'
  eta on the grid smoothed with a Gaussian kernel (``from_draws``; kind ``DRAWS``).

The method's per-shard job computes these (it has the inputs and the draws) and writes
them to a part file beside its shard file (``write_part``: only those rows); the
assembly takes every other row's analytic Gaussian and overlays the parts
(``likelihood_blocks``), a block of rows at a time. The combined distance's likelihood
is the normalised product of the likelihoods of the methods that enter mu_best
(``combine``), each moved by its zero-point offset where the tie is applied; where all
of them are analytic Gaussians this product is the Gaussian of mu_best, which is then
used directly (kind ``GAUSSIAN``; else ``PRODUCT``).

The likelihood is stored as a density in dex^-1 on the grid (integral 1 over the whole
line, so a galaxy near a grid end keeps only its mass on the grid), float32, one
fixed-size list per galaxy and distance, null where there is no distance or it is the
analytic Gaussian (already in the product as mu, mu_err and mu_z: ``dense_curves``
rebuilds it), so the file holds only the curves that are news; its mode, mean and
16th/84th percentiles describe the likelihood on the grid's range: exact for a Gaussian
(``gaussian_summaries``), from the gridded values otherwise (``summarize``, trapezoid
rule); NaN where less than ``MIN_MASS`` of the probability lies on the grid (the
galaxy's eta is beyond the grid's range) or, for a product, where the product is cut by
a grid end (``EDGE``).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

#: the least probability on the grid for the summaries to be given
MIN_MASS = 0.95
#: a product of likelihoods (normalised on the grid) whose density at a grid end exceeds this
#: fraction of its peak is cut by the grid: its summaries are not given (a Gaussian so cut
#: has about 1 % of its mass beyond the end)
EDGE = 0.05
#: the summary columns, per distance: (suffix, description)
SUMMARIES = {
    "eta_mode": "mode of the eta likelihood on the grid's range",
    "eta_mean": "mean of eta under its likelihood on the grid's range (exact for a Gaussian, else the trapezoid rule)",
    "eta_p16": "16th percentile of eta under its likelihood",
    "eta_p84": "84th percentile of eta under its likelihood",
}
#: rows computed at once: (rows x grid) float64 arrays of ~7 MB; the assembly holds several at
#: once per distance (16384-row blocks took its peak from 0.75 to 1.15 GB at 10^6-row shards)
BLOCK_ROWS = 4_096
#: where each likelihood came from (the companion file's ``<name>_eta_like_kind``, uint8)
NONE, GAUSSIAN, POSTERIOR, DRAWS, PRODUCT = 0, 1, 2, 3, 4
KINDS = {NONE: "no distance", GAUSSIAN: "analytic Gaussian of mu, mu_err (log-normal distance)",
         POSTERIOR: "the method's posterior in eta (Fundamental Plane, gaussian estimator)",
         DRAWS: "the method's Monte Carlo draws (their error is not Gaussian in eta)",
         PRODUCT: "normalised product of the likelihoods of the methods in mu_best"}
#: their short names (summary.json's counts)
KIND_NAMES = {NONE: "none", GAUSSIAN: "gaussian", POSTERIOR: "posterior", DRAWS: "draws", PRODUCT: "product"}
#: draws a row needs for its draws to be tested or used
MIN_DRAWS = 20
#: the non-Gaussian tests' threshold, in standard errors of a Gaussian sample
Z_LIMIT = 3.0


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


def non_gaussian(eta_draws, sigma_eta) -> np.ndarray:
    """Rows whose Monte Carlo draws of eta (rows, draws; NaN draws ignored) are not the
    Gaussian of width ``sigma_eta`` (the analytic error / 5): any of

    * |skewness| > 3 sqrt(6 / n) or |excess kurtosis| > 3 sqrt(24 / n), n finite draws: the
      large-sample standard errors of the two moments of a Gaussian sample (D'Agostino &
      Stephens 1986, Goodness-of-Fit Techniques, ch. 7; from memory);
    * |w / sigma_eta - 1| > 3 x 0.964 / sqrt(n), w = (q84 - q16) / 2 of the draws: the
      large-sample variance of sample quantiles, var q_p = p (1 - p) / (n phi(z_p)^2), with
      their covariance, gives 0.964 sigma / sqrt(n) for w (common practice);
    and at least ``MIN_DRAWS`` finite draws. The width test catches an analytic (first
    order) error that the draws contradict even where their shape is Gaussian."""
    d = np.asarray(eta_draws, dtype=float)
    sigma = np.asarray(sigma_eta, dtype=float)
    ok = np.isfinite(d)
    n = ok.sum(axis=1)
    out = np.zeros(d.shape[0], dtype=bool)
    use = n >= MIN_DRAWS
    if not use.any():
        return out
    d, n, sigma = d[use], n[use], sigma[use]
    with np.errstate(invalid="ignore", divide="ignore"):
        c = d - np.nanmean(d, axis=1, keepdims=True)
        m2 = np.nanmean(c ** 2, axis=1)
        skew = np.nanmean(c ** 3, axis=1) / m2 ** 1.5
        kurt = np.nanmean(c ** 4, axis=1) / m2 ** 2 - 3.0
        q16, q84 = np.nanquantile(d, [0.16, 0.84], axis=1)
        width = 0.5 * (q84 - q16) / sigma
    flag = ((np.abs(skew) > Z_LIMIT * np.sqrt(6.0 / n)) | (np.abs(kurt) > Z_LIMIT * np.sqrt(24.0 / n))
            | (np.abs(width - 1.0) > Z_LIMIT * 0.964 / np.sqrt(n)))
    out[use] = np.where(np.isfinite(width) & (m2 > 0), flag, False)
    return out


def from_draws(eta_draws, grid: np.ndarray, chunk: int = 64) -> np.ndarray:
    """Density (dex^-1) on ``grid`` of each row's draws of eta (rows, draws; NaN ignored):
    the draws linearly binned onto the grid's nodes (a histogram whose bins are the grid
    steps), smoothed with a Gaussian kernel of Silverman's bandwidth h = 0.9 min(s,
    IQR / 1.34) n^(-1/5), at least one grid step (Silverman 1986, Density Estimation,
    eq. 3.31; from memory). A Gaussian kernel because the draws' own error is smooth and
    the kernel adds only h^2 to the variance (about 10 % of it at 100 draws); the rule's
    bandwidth because it is the one for a near-Gaussian shape and robust to a tail. The
    binning and kernel are over the whole grid: draws beyond it carry their share of the
    mass away (as the analytic Gaussian does). NaN rows where fewer than ``MIN_DRAWS``
    draws are finite. ``chunk`` rows at a time ((chunk, grid, grid) kernel)."""
    d = np.asarray(eta_draws, dtype=float)
    rows, m = d.shape[0], len(grid)
    out = np.full((rows, m), np.nan)
    step = float(grid[1] - grid[0])
    ok = np.isfinite(d)
    n = ok.sum(axis=1)
    pos = np.where(ok, (d - grid[0]) / step, -1.0)
    inside = ok & (pos >= 0) & (pos <= m - 1)
    j = np.clip(np.floor(pos), 0, m - 2).astype(np.intp)
    f = np.where(inside, pos - j, 0.0)
    r = np.broadcast_to(np.arange(rows)[:, None], d.shape)
    counts = (np.bincount((r * m + j)[inside], (1.0 - f)[inside], rows * m)
              + np.bincount((r * m + j + 1)[inside], f[inside], rows * m)).astype(float).reshape(rows, m)
    with np.errstate(invalid="ignore", divide="ignore"):
        counts /= np.maximum(n, 1)[:, None]
        sd = np.nanstd(d, axis=1, ddof=1)
        q25, q75 = np.nanquantile(np.where(ok, d, np.nan), [0.25, 0.75], axis=1) if rows else (sd, sd)
        spread = np.fmin(sd, (q75 - q25) / 1.34)
        h = np.maximum(0.9 * spread * np.maximum(n, 1) ** -0.2, step)
    good = (n >= MIN_DRAWS) & np.isfinite(h)
    diff = grid[None, :] - grid[:, None]                       # (from node, to node)
    for lo in range(0, rows, chunk):
        sl = slice(lo, min(rows, lo + chunk))
        hh = np.where(good[sl], h[sl], 1.0)[:, None, None]
        kernel = np.exp(-0.5 * (diff[None] / hh) ** 2) / (hh * np.sqrt(2.0 * np.pi))
        out[sl] = np.einsum("rj,rjk->rk", counts[sl], kernel)
    out[~good] = np.nan
    return out


def shifted(like: np.ndarray, grid: np.ndarray, delta: float) -> np.ndarray:
    """Curves on ``grid`` moved by ``delta`` in eta, L(eta - delta): the log of each curve
    interpolated by the parabola through the three nearest nodes (exact for a Gaussian,
    whose log is a parabola), linearly where a node is zero; 0 beyond the grid."""
    if delta == 0:
        return like
    m = len(grid)
    pos = (grid - delta - grid[0]) / (grid[1] - grid[0])
    inside = (pos >= 0) & (pos <= m - 1)
    j = np.clip(np.floor(pos), 0, m - 2).astype(np.intp)
    f = pos - j
    linear = (1.0 - f) * like[:, j] + f * like[:, j + 1]
    c = np.clip(np.rint(pos), 1, m - 2).astype(np.intp)
    t = pos - c
    with np.errstate(divide="ignore", invalid="ignore"):
        y0, ym, yp = np.log(like[:, c]), np.log(like[:, c - 1]), np.log(like[:, c + 1])
        parabola = np.exp(y0 + 0.5 * t * (yp - ym) + 0.5 * t * t * (yp - 2.0 * y0 + ym))
    return np.where(inside, np.where(np.isfinite(parabola), parabola, linear), 0.0)


def combine(likes: list, uses: list, grid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The normalised product of the curves ``likes`` (each (rows, grid)) over the ones each
    row uses (``uses``: bool (rows,) per curve): (density on the grid, integral 1 over it;
    cut) where ``cut`` marks rows whose product reaches a grid end (above ``EDGE`` of its
    peak). NaN rows where no curve is used or a used one is NaN; zero where the product
    vanishes on the grid (its mass lies beyond it)."""
    rows = len(uses[0]) if uses else 0
    logsum = np.zeros((rows, len(grid)))
    count = np.zeros(rows, dtype=int)
    missing = np.zeros(rows, dtype=bool)
    with np.errstate(divide="ignore", invalid="ignore"):
        for like, use in zip(likes, uses):
            logsum += np.where(use[:, None], np.log(like), 0.0)
            count += use
            missing |= use & ~np.isfinite(like).all(axis=1)
        peak = np.max(logsum, axis=1, keepdims=True)
        p = np.exp(logsum - peak)
        area = np.trapezoid(p, grid, axis=1)
        ok = (count > 0) & np.isfinite(area) & (area > 0) & np.isfinite(peak[:, 0])
        out = np.where(ok[:, None], p / np.where(ok, area, 1.0)[:, None], np.nan)
    out[(count > 0) & ~missing & ~ok] = 0.0
    cut = ok & ((p[:, 0] > EDGE) | (p[:, -1] > EDGE))
    return out, cut


def summarize(like: np.ndarray, grid: np.ndarray, valid=None) -> dict[str, np.ndarray]:
    """Mode, mean and 16/84 percentiles of gridded likelihoods (rows); NaN where a row is NaN,
    holds less than MIN_MASS of its probability or is not ``valid``."""
    like = np.asarray(like, dtype=float)
    dx = np.diff(grid)
    cum = np.concatenate([np.zeros((like.shape[0], 1)),
                          np.cumsum(0.5 * (like[:, 1:] + like[:, :-1]) * dx, axis=1)], axis=1)
    mass = cum[:, -1]
    ok = np.isfinite(mass) & (mass >= MIN_MASS)
    if valid is not None:
        ok &= np.asarray(valid, dtype=bool)
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


def gaussian_summaries(mu, mu_err, mu_z, grid: np.ndarray) -> dict[str, np.ndarray]:
    """``summarize`` of the analytic Gaussians, exact: the normal N(eta0, s), eta0 = (mu_z -
    mu) / 5, s = mu_err / 5, truncated to the grid's range [g0, g1] as the gridded curve is
    (alpha, beta = (g0 - eta0) / s, (g1 - eta0) / s; mass Z = Phi(beta) - Phi(alpha)): mode
    eta0, mean eta0 + s (phi(alpha) - phi(beta)) / Z, percentile q at eta0 + s
    Phi^-1(Phi(alpha) + q Z) (the truncated normal; Johnson, Kotz & Balakrishnan 1994,
    Continuous Univariate Distributions 1, ch. 13.10; from memory). NaN where the modulus or
    its error (> 0) is missing or Z < MIN_MASS."""
    from scipy.special import ndtr, ndtri

    mu, err, mu_z = (np.asarray(a, dtype=float) for a in (mu, mu_err, mu_z))
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        eta0, s = (mu_z - mu) / 5.0, err / 5.0
        lo, hi = (grid[0] - eta0) / s, (grid[-1] - eta0) / s
        p_lo, mass = ndtr(lo), ndtr(hi) - ndtr(lo)
        ok = np.isfinite(eta0) & np.isfinite(s) & (s > 0) & (mass >= MIN_MASS)
        density = (np.exp(-0.5 * lo ** 2) - np.exp(-0.5 * hi ** 2)) / np.sqrt(2.0 * np.pi)
        out = {"eta_mode": eta0, "eta_mean": eta0 + s * density / mass,
               "eta_p16": eta0 + s * ndtri(p_lo + 0.16 * mass), "eta_p84": eta0 + s * ndtri(p_lo + 0.84 * mass)}
    return {k: np.where(ok, v, np.nan) for k, v in out.items()}


def likelihood_blocks(distances: dict[str, tuple], mu_z, grid: np.ndarray, *, parts: dict | None = None,
                      usable: dict | None = None, offsets: dict | None = None):
    """For each block of ``BLOCK_ROWS`` rows: (first row, end row, lists, summaries, kinds).

    ``distances``: name -> (mu, mu_err), each method's by its prefix and "best" for mu_best.
    ``parts``: prefix -> ``take(first, end)`` giving the block's rows (indices in the block)
    and curves a method's job wrote (``PartReader.take``; kind ``POSTERIOR`` or ``DRAWS``);
    every other row with a distance is its analytic Gaussian. ``usable``: prefix -> bool
    (rows) of the methods entering mu_best (``crosscheck.best_usable``), ``offsets``:
    prefix -> the zero-point offset subtracted in mu_best (mag): where a used method's
    curve came from a part, the best one is their ``combine``d product. ``lists[name]`` is
    the block's curves as a fixed-size float32 list array, null where the likelihood is the
    analytic Gaussian or there is none (``kinds[name]``, uint8, says which: ``gaussian``
    rebuilds a Gaussian from the product's columns), so the file holds only curves that
    are not already in the product; ``summaries`` holds ``<name>_eta_mode`` ... of the
    block (``gaussian_summaries`` for the Gaussians, ``summarize`` for the curves). A block
    at a time, so the memory is a block's, whatever the batch."""
    parts, usable, offsets = parts or {}, usable or {}, offsets or {}
    mu_z = np.asarray(mu_z, dtype=float)
    n, m = len(mu_z), len(grid)
    for a in range(0, n, BLOCK_ROWS):
        b = min(n, a + BLOCK_ROWS)
        got, special = {}, np.zeros(b - a, dtype=bool)
        for name, take in parts.items():
            if name in distances:
                got[name] = take(a, b)
                if name in usable:
                    hit = np.zeros(b - a, dtype=bool)
                    hit[got[name][0]] = True
                    special |= hit & np.asarray(usable[name])[a:b]
        lists, summaries, kinds = {}, {}, {}
        for name, (mu, err) in distances.items():
            mu_b, err_b = np.asarray(mu, dtype=float)[a:b], np.asarray(err, dtype=float)[a:b]
            kind = np.where(np.isfinite(mu_b) & np.isfinite(err_b) & (err_b > 0) & np.isfinite(mu_z[a:b]),
                            GAUSSIAN, NONE).astype(np.uint8)
            summ = gaussian_summaries(mu_b, err_b, mu_z[a:b], grid)
            curve = np.full((b - a, m), np.nan)
            if name in got:
                idx, curves, got_kind = got[name]
                curve[idx], kind[idx] = curves, got_kind
                for k, v in summarize(curves, grid).items():
                    summ[k][idx] = v
            if special.any() and name in usable:
                fill = special & (kind == GAUSSIAN)  # a Gaussian that enters a product: its curve
                curve[fill] = gaussian_eta(mu_b[fill], err_b[fill], mu_z[a:b][fill], grid)
            kinds[name], summaries[name], lists[name] = kind, summ, curve
        if "best" in distances and special.any():
            names = [p for p in usable if p in lists]
            prod, cut = combine([shifted(lists[p][special], grid, offsets.get(p, 0.0) / 5.0) for p in names],
                                [np.asarray(usable[p])[a:b][special] for p in names], grid)
            lists["best"][special] = prod
            kinds["best"][special] = np.where(np.isfinite(prod[:, 0]), PRODUCT, NONE)
            for k, v in summarize(prod, grid, ~cut).items():
                summaries["best"][k][special] = v
        out_lists, out_summaries = {}, {}
        for name, curve in lists.items():
            keep = (kinds[name] != GAUSSIAN) & (kinds[name] != NONE)  # curves the product does not hold
            values = np.where(keep[:, None], curve, 0.0).astype(np.float32).ravel()
            out_lists[name] = pa.FixedSizeListArray.from_arrays(pa.array(values), m, mask=pa.array(~keep))
            out_summaries |= {f"{name}_{k}": v for k, v in summaries[name].items()}
        yield a, b, out_lists, out_summaries, kinds


def dense_curves(lists: pa.Array, kinds, mu, mu_err, mu_z, grid: np.ndarray) -> np.ndarray:
    """Every row's curve on ``grid`` (rows, grid), float64: the stored curve where there is
    one, the analytic Gaussian of (mu, mu_err) at mu_z where its kind is ``GAUSSIAN``, NaN
    where there is no distance. ``lists``: a companion file's ``<name>_eta_like`` column;
    ``mu``, ``mu_err``, ``mu_z``: the product's ``<name>_mu``, ``<name>_mu_err`` (for
    ``best``: ``mu_best``, ``mu_best_err``) and ``mu_z`` of the same rows."""
    lists = lists.combine_chunks() if isinstance(lists, pa.ChunkedArray) else lists
    kinds = np.asarray(kinds)
    out = np.full((len(lists), len(grid)), np.nan)
    valid = ~lists.is_null().to_numpy(zero_copy_only=False)
    out[valid] = lists.flatten().to_numpy(zero_copy_only=False).astype(float).reshape(-1, len(grid))
    gauss = kinds == GAUSSIAN
    out[gauss] = gaussian_eta(np.asarray(mu)[gauss], np.asarray(mu_err)[gauss], np.asarray(mu_z)[gauss], grid)
    return out


def likelihood_columns(distances: dict[str, tuple], mu_z, grid: np.ndarray, **kw) -> tuple[dict, dict]:
    """``likelihood_blocks`` of all rows joined: (name -> list array, summary columns)."""
    parts = list(likelihood_blocks(distances, mu_z, grid, **kw))
    lists = {name: pa.concat_arrays([p[2][name] for p in parts]) for name in distances} if parts else {}
    summaries = {k: np.concatenate([p[3][k] for p in parts]) for k in parts[0][3]} if parts else {}
    return lists, summaries


# ------------------------------------------------------------------ a method job's part file

PART_SCHEMA_KEY = b"galdist.eta_grid"


def write_part(path, blocks, grid: np.ndarray, metadata: dict) -> int:
    """A method job's part file: for the rows whose likelihood is not the analytic Gaussian,
    their row in the shard (``row``, uint32, increasing), the curve (``eta_like``, float32
    list on ``grid``) and where it came from (``kind``); ``blocks`` yields (rows, curves (k,
    grid), kind) in row order, a block at a time; ``metadata``: the stamps (shard
    fingerprint, calibration). The grid goes into the schema metadata. Returns the rows."""
    from .io import AtomicParquetWriter, INTERMEDIATE_COMPRESSION

    schema = pa.schema([("row", pa.uint32()), ("eta_like", pa.list_(pa.float32(), len(grid))),
                        ("kind", pa.uint8())], metadata=schema_metadata(grid) | metadata)
    count = 0
    with AtomicParquetWriter(path, schema, compression=INTERMEDIATE_COMPRESSION) as writer:
        for rows, curves, kind in blocks:
            if len(rows):
                arr = pa.FixedSizeListArray.from_arrays(pa.array(np.asarray(curves, dtype=np.float32).ravel()),
                                                        len(grid))
                writer.write(pa.table({"row": pa.array(np.asarray(rows, dtype=np.uint32)), "eta_like": arr,
                                       "kind": pa.array(np.full(len(rows), kind, dtype=np.uint8))}, schema=schema))
                count += len(rows)
    return count


def part_grid(path) -> np.ndarray:
    """The grid a part file (or the companion file) was written on."""
    import json

    import pyarrow.parquet as pq

    g = json.loads(pq.read_schema(path).metadata[PART_SCHEMA_KEY])
    return np.linspace(g["min"], g["max"], g["n"])


def part_rows(path) -> int:
    """The rows a part file holds."""
    import pyarrow.parquet as pq

    return pq.read_metadata(path).num_rows


class PartReader:
    """A part file read forward, a Parquet batch at a time: ``take(first, end)`` gives the
    rows of [first, end) of the shard that it holds (indices from ``first``), their curves
    (float64) and kinds. Calls must go forward; memory is a batch of the file."""

    def __init__(self, path, batch_rows: int = BLOCK_ROWS):
        import pyarrow.parquet as pq

        from .io import iter_rows

        pf = pq.ParquetFile(path)
        # a row group at a time (ParquetFile.iter_batches keeps what it has read until it ends)
        self._batches = iter_rows(path, None, batch_rows)
        self._rows = np.zeros(0, dtype=np.int64)
        self._curves = np.zeros((0, pf.schema_arrow.field("eta_like").type.list_size))
        self._kinds = np.zeros(0, dtype=np.uint8)
        self._done = False

    def _fill(self, end: int) -> None:
        while not self._done and (self._rows.size == 0 or self._rows[-1] < end):
            try:
                batch = next(self._batches)
            except StopIteration:
                self._done = True
                break
            col = batch.column("eta_like").combine_chunks()
            curves = col.flatten().to_numpy(zero_copy_only=False).astype(float).reshape(len(batch), col.type.list_size)
            self._rows = np.concatenate([self._rows, batch.column("row").to_numpy().astype(np.int64)])
            self._curves = np.concatenate([self._curves, curves])
            self._kinds = np.concatenate([self._kinds, batch.column("kind").to_numpy()])

    def take(self, first: int, end: int):
        self._fill(end)
        k = int(np.searchsorted(self._rows, end))
        lo = int(np.searchsorted(self._rows[:k], first))
        out = (self._rows[lo:k] - first, self._curves[lo:k], self._kinds[lo:k])
        self._rows, self._curves, self._kinds = self._rows[k:], self._curves[k:], self._kinds[k:]
        return out


def schema_metadata(grid: np.ndarray) -> dict[bytes, bytes]:
    """The companion file's schema metadata: the grid, so a reader needs nothing else."""
    import json

    step = round(float(grid[1] - grid[0]), 12) if len(grid) > 1 else 0.0
    return {b"galdist.eta_grid": json.dumps({"min": float(grid[0]), "max": float(grid[-1]), "step": step,
                                             "n": int(len(grid)), "unit": "dex",
                                             "values": "density in 1/dex, integral 1 over all eta"}).encode()}
