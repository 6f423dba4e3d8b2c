"""Cross-check of method distances against the Hubble flow, and between methods.

Per method M (a column prefix of ``galdist.methods.REGISTRY``: "tf", "sbf"; nothing
here is specific to one method):

* dmu = mu_M - mu_z and the log-distance ratio eta = log10(d_z / d_M) = -dmu/5
  (both luminosity distances);
* peculiar velocities, two ways:
  (a) exact: z_cos from inverting d_L(z) at the method's distance, then
      (1 + z_cmb) = (1 + z_cos)(1 + z_pec), v = c z_pec (Davis & Scrimgeour
      2014, MNRAS 442, 1117, Eq. 1 form);
  (b) the log-ratio estimator of Watkins & Feldman 2015 (MNRAS 450, 1868),
      see ``peculiar_velocity_log_ratio`` for its form, the derivation of which
      distance it takes, and how it differs from (a);
* sample statistics with iterative clipping (zero point, implied H0, scatter,
  outlier flags), method-pair offsets, and the inverse-variance best distance.

Sample statistics are plain dicts of JSON-ready values (float, int, str, or
None where a value is undefined) for summary.json.
"""

from __future__ import annotations

import itertools
from collections.abc import Iterable, Mapping, Sequence

import numpy as np
import pyarrow as pa

from . import flags as _flags
from . import clipped_stats as cs
from .clipped_stats import json_float, records
from .flags import Method
from .methods import prefixes
from .redshift import C_KMS, MuGrid

LN10 = np.log(10.0)

#: methods tried, in this order, by ``crosscheck`` (those without a <M>_mu column are skipped)
DEFAULT_METHODS = tuple(prefixes())


def _bits(names: Iterable[str | Method] | int | None, key: str = "crosscheck.best_ignore_flags") -> int:
    """An integer mask of Method bits from names (or members, or an int); ``key``
    names the config entry in the error message."""
    if names is None:
        return 0
    if isinstance(names, (int, np.integer)):
        return int(names)
    out = 0
    for n in names:
        if isinstance(n, Method):
            out |= int(n)
        elif n in Method.__members__:
            out |= int(Method[n])
        else:
            raise ValueError(f"{key}: unknown method flag {n!r}; allowed: "
                             f"{', '.join(Method.__members__)}")
    return out


ALL_METHOD_BITS = _bits(list(Method))


# --------------------------------------------------------------------------- per galaxy

def delta_mu(mu, mu_z) -> np.ndarray:
    """dmu = mu_method - mu_z (mag)."""
    return np.asarray(mu, dtype=float) - np.asarray(mu_z, dtype=float)


def log_distance_ratio(mu, mu_z) -> np.ndarray:
    """eta = log10(d_z / d) = (mu_z - mu) / 5, both luminosity distances."""
    return -0.2 * delta_mu(mu, mu_z)


def inherit_local_flow(method_flags, z_flags) -> np.ndarray:
    """Copy of ``method_flags`` with Method.LOCAL_FLOW where z_flags has Redshift.LOCAL_FLOW."""
    out = np.array(method_flags, dtype=_flags.FLAG_DTYPE, copy=True)
    _flags.set_where(out, _flags.has(z_flags, _flags.Redshift.LOCAL_FLOW), Method.LOCAL_FLOW)
    return out


def peculiar_velocity_exact(mu, mu_err, z_cmb, z_cmb_err, grid: MuGrid):
    """Peculiar velocity (km/s) from (1 + z_cmb) = (1 + z_cos)(1 + z_pec), v = c z_pec.

    z_cos is the redshift whose luminosity distance is the method's distance,
    found by inverting the grid's d_L(z) (Davis & Scrimgeour 2014, MNRAS 442,
    1117). First-order error from sigma_mu and sigma_z_cmb:
    dz_pec/dz_cmb = 1/(1 + z_cos), dz_pec/dmu = -(1 + z_cmb)/(1 + z_cos)^2 dz_cos/dmu.
    Returns (v, v_err); NaN where mu or z_cmb is missing or beyond the grid.
    """
    mu = np.asarray(mu, dtype=float)
    z = np.asarray(z_cmb, dtype=float)
    z_cos = grid.z_from_mu(mu)
    one_c = 1.0 + z_cos
    v = C_KMS * ((1.0 + z) / one_c - 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        dz_dmu = 1.0 / grid.dmu_dz(z_cos)
    d_mu = -(1.0 + z) / one_c**2 * dz_dmu
    d_z = 1.0 / one_c
    s_mu = np.nan_to_num(np.asarray(mu_err, dtype=float), nan=0.0)
    s_z = np.nan_to_num(np.asarray(z_cmb_err, dtype=float), nan=0.0)
    err = C_KMS * np.sqrt((d_mu * s_mu) ** 2 + (d_z * s_z) ** 2)
    return v, np.where(np.isfinite(v), err, np.nan)


def modified_redshift(z, q0: float, j0: float) -> np.ndarray:
    """z_mod = z [1 + (1 - q0) z / 2 - (1 - q0 - 3 q0^2 + j0) z^2 / 6].

    Watkins & Feldman 2015, MNRAS 450, 1868 (form quoted from a secondary copy;
    the j0 term should be checked against the paper). It is the third-order
    Taylor series of the flat-space luminosity distance, H0 d_L / c (Visser 2004,
    Class. Quantum Grav. 21, 2603, from memory); tests/test_crosscheck.py checks
    numerically that c z_mod / H0 - d_L(z) is O(z^4) for flat LCDM.
    """
    z = np.asarray(z, dtype=float)
    return z * (1.0 + 0.5 * (1.0 - q0) * z - (1.0 - q0 - 3.0 * q0**2 + j0) * z**2 / 6.0)


def peculiar_velocity_log_ratio(mu, mu_err, z_cmb, z_cmb_err, h0: float, q0: float, j0: float):
    """Log-ratio peculiar-velocity estimator of Watkins & Feldman 2015 (MNRAS 450, 1868):

        v = c z_mod / (1 + z_mod) * ln(c z_mod / (H0 d)),  z_mod from ``modified_redshift``.

    Which distance d: with no peculiar velocity the estimator must give v = 0,
    i.e. c z_mod(z) = H0 d(z). z_mod matches term by term the expansion
    H0 d_L / c = z + (1 - q0) z^2 / 2 - (1 - q0 - 3 q0^2 + j0) z^3 / 6 + O(z^4)
    of the luminosity distance, whereas the comoving distance has
    z - (1 + q0) z^2 / 2 + ..., which would leave v = c z ln(1 + z) / (1 + z) at
    zero peculiar velocity. So d is the luminosity distance, d = 10^((mu - 25)/5)
    Mpc, as every galdist distance is. (Derived here, not read in the paper.)

    How it differs from the exact form (``peculiar_velocity_exact``): for
    v << c z, writing z_c for z_cos, ln(z_mod(z)/z_mod(z_c)) ~ z_mod'(z) dz / z_mod
    with dz = (1 + z_c) v / c, so v_lr / v_exact -> z_mod'(z)(1 + z)/(1 + z_mod)
    = 1 + (1 - q0) z - (2 - 2 q0 - 3 q0^2 + j0) z^2 / 2 + O(z^3): about +1.6% at
    z = 0.01 and +14% at z = 0.1 for q0 = -0.55, j0 = 1; in addition the
    logarithm adds a relative term ~ v / (2 c z). The estimator's virtue is that
    its error is Gaussian when the error of mu is (W&F 2015), not that it equals
    c z_pec.

    Error (first order): dv/dmu = -A ln10 / 5 with A = c z_mod / (1 + z_mod);
    dv/dz = c z_mod' / (1 + z_mod)^2 * L + A z_mod' / z_mod, L the logarithm.
    NaN where z_cmb <= 0 or inputs are missing.
    """
    mu = np.asarray(mu, dtype=float)
    z = np.asarray(z_cmb, dtype=float)
    zm = modified_redshift(z, q0, j0)
    dzm = 1.0 + (1.0 - q0) * z - 0.5 * (1.0 - q0 - 3.0 * q0**2 + j0) * z**2
    d_mpc = 10.0 ** (0.2 * (mu - 25.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        ok = zm > 0
        L = np.where(ok, np.log(np.where(ok, C_KMS * zm / (float(h0) * d_mpc), 1.0)), np.nan)
        A = C_KMS * zm / (1.0 + zm)
        v = A * L
        d_mu = -A * LN10 / 5.0
        d_z = C_KMS * dzm / (1.0 + zm) ** 2 * L + A * dzm / zm
    s_mu = np.nan_to_num(np.asarray(mu_err, dtype=float), nan=0.0)
    s_z = np.nan_to_num(np.asarray(z_cmb_err, dtype=float), nan=0.0)
    err = np.sqrt((d_mu * s_mu) ** 2 + (d_z * s_z) ** 2)
    return v, np.where(np.isfinite(v), err, np.nan)


def hubble_sample_statistics(chunks, h0_assumed: float, *, min_cz: float = 3000.0, clip_sigma: float = 3.5,
                             max_iter: int = 20, exclude_flags=None) -> dict:
    """Zero point, implied H0 and scatter of one method against the Hubble flow, over
    a sample of ``clipped_stats.RECORD`` chunks (value dmu, error sqrt(sigma_mu^2 +
    sigma_mu_z^2) of the random errors, sys the method's systematic error).

    Every statistic weighs and tests with the random errors (weighted mean, chi^2,
    excess scatter); the systematic part is reported once, beside them
    (``wmean_err_sys``; implied H0: ``h0_implied_err_stat`` and ``h0_implied_err_sys``).

    Sample: finite dmu with a positive error, c z_cmb >= ``min_cz`` and none of
    ``exclude_flags`` set (default: every Method bit except OUTLIER, which is
    recomputed here). Clipped iteratively at ``clip_sigma`` (see ``clipped_stats.clip``).
    Outliers: every candidate (finite dmu, c z_cmb >= min_cz, flagged or not)
    whose |dmu - centre| exceeds clip_sigma x the final clipped scatter.

    Implied H0: mu_method ~ 5 log10(c z / H0_true) + 25 and mu_z the same with
    H0_assumed, so dmu = 5 log10(H0_assumed / H0_true) and
    H0_true = H0_assumed 10^(-0.2 <dmu>) (exact at all z when only H0 differs,
    since d_L scales as 1/H0).
    """
    clip_sigma = cs.checked_clip_sigma(clip_sigma)
    exclude = ((ALL_METHOD_BITS & ~int(Method.OUTLIER)) if exclude_flags is None
               else _bits(exclude_flags, "crosscheck.exclude_flags"))
    rows = cs.Rows(exclude, min_cz)
    window, n, center, scale, iters = cs.clip(chunks, rows, clip_sigma, int(max_iter))
    n_usable = cs.count(chunks, rows.usable)
    final = {"clip_center": json_float(center), "clip_scale": json_float(scale)}
    stats = {"n_rows": sum(len(rec) for rec in chunks), "n_candidates": cs.count(chunks, rows.candidate),
             "n_usable": n_usable, "n_clipped": n_usable - n,
             "n_outliers": cs.count(chunks, lambda rec: _outliers(rec["value"], rec["z"], final, min_cz, clip_sigma)),
             "clip_sigma": clip_sigma, "clip_iterations": int(iters), "min_cz": float(min_cz)} | final
    stats |= cs.summary(chunks, rows.picker(window), n, center, scale)
    wm, wm_err = stats["wmean"], stats["wmean_err"]
    h0 = float(h0_assumed)
    stats["h0_assumed"] = h0
    if wm is None:
        stats["h0_implied"] = stats["h0_implied_err_stat"] = stats["h0_implied_err_sys"] = None
    else:
        h = h0 * 10.0 ** (-0.2 * wm)  # dH/d<dmu> = -H ln10 / 5
        stats["h0_implied"] = json_float(h)
        stats["h0_implied_err_stat"] = json_float(h * 0.2 * LN10 * wm_err) if wm_err is not None else None
        stats["h0_implied_err_sys"] = json_float(h * 0.2 * LN10 * stats["wmean_err_sys"])
    return stats


def hubble_statistics(dmu, dmu_err, method_flags, z_cmb, h0_assumed: float, *,
                      min_cz: float = 3000.0, clip_sigma: float = 3.5, max_iter: int = 20,
                      exclude_flags=None, dmu_err_sys=0.0):
    """``hubble_sample_statistics`` of per-row arrays; returns (stats, outlier mask)."""
    sample = [records(dmu, dmu_err, z_cmb, method_flags, dmu_err_sys)]
    stats = hubble_sample_statistics(sample, h0_assumed, min_cz=min_cz, clip_sigma=clip_sigma,
                                     max_iter=max_iter, exclude_flags=exclude_flags)
    return stats, _outliers(sample[0]["value"], sample[0]["z"], stats, min_cz, clip_sigma)


def pair_sample_statistics(chunks, *, clip_sigma: float = 3.5, max_iter: int = 20,
                           exclude_flags=None) -> dict:
    """Offset mu_a - mu_b and its scatter over a sample of ``clipped_stats.RECORD`` chunks (value
    mu_a - mu_b, error sqrt(sigma_a^2 + sigma_b^2), flags of both OR-ed).

    Rows need a finite value and error and none of ``exclude_flags`` in either method
    (default: every Method bit except OUTLIER and LOCAL_FLOW — a Hubble outlier or a
    nearby galaxy still has a valid distance to compare). Clipped like the Hubble
    statistics.
    """
    clip_sigma = cs.checked_clip_sigma(clip_sigma)
    exclude = (ALL_METHOD_BITS & ~int(Method.OUTLIER | Method.LOCAL_FLOW)
               if exclude_flags is None else _bits(exclude_flags, "crosscheck.pair_exclude_flags"))
    rows = cs.Rows(exclude, None)
    window, n, center, scale, iters = cs.clip(chunks, rows, clip_sigma, int(max_iter))
    n_usable = cs.count(chunks, rows.usable)
    return {"n_both": cs.count(chunks, rows.candidate), "n_usable": n_usable, "n_clipped": n_usable - n,
            "clip_sigma": clip_sigma, "clip_iterations": int(iters)} | cs.summary(
        chunks, rows.picker(window), n, center, scale)


def _pair_records(mu_a, mu_a_err, flags_a, mu_b, mu_b_err, flags_b, sys_a=0.0, sys_b=0.0) -> np.ndarray:
    """Records of mu_a - mu_b: random errors and (independent calibrations) systematic
    errors each added in quadrature."""
    a, b = np.asarray(mu_a, dtype=float), np.asarray(mu_b, dtype=float)
    err = np.hypot(np.asarray(mu_a_err, dtype=float), np.asarray(mu_b_err, dtype=float))
    sys = np.hypot(np.asarray(sys_a, dtype=float), np.asarray(sys_b, dtype=float))
    fl = np.asarray(flags_a, dtype=_flags.FLAG_DTYPE) | np.asarray(flags_b, dtype=_flags.FLAG_DTYPE)
    return records(a - b, err, np.nan, fl, sys)


def pair_statistics(mu_a, mu_a_err, flags_a, mu_b, mu_b_err, flags_b, *,
                    clip_sigma: float = 3.5, max_iter: int = 20, exclude_flags=None,
                    sys_a=0.0, sys_b=0.0) -> dict:
    """``pair_sample_statistics`` of per-row arrays of the two methods."""
    return pair_sample_statistics([_pair_records(mu_a, mu_a_err, flags_a, mu_b, mu_b_err, flags_b, sys_a, sys_b)],
                                  clip_sigma=clip_sigma, max_iter=max_iter, exclude_flags=exclude_flags)


#: ``best_method`` of a galaxy no method measured usably: one spelling in the product and
#: in summary.json (a word, not "": an empty string vanishes in CSV and reads as missing)
NO_METHOD = "none"

def tie(zero_point: dict | None, prefixes: Sequence[str]) -> tuple[dict, np.ndarray]:
    """(offsets {prefix: delta}, covariance over ``prefixes``) of an applied zero-point fit;
    zeros where it is not applied (None or ``applied`` false) or a method has no offset."""
    k = len(prefixes)
    cov = np.zeros((k, k))
    if not zero_point or not zero_point.get("applied"):
        return {p: 0.0 for p in prefixes}, cov
    offsets = {p: float(zero_point["offsets"].get(p, {}).get("offset") or 0.0) for p in prefixes}
    fitted = zero_point.get("fitted", [])
    c = np.asarray(zero_point.get("covariance", []), dtype=float).reshape(len(fitted), len(fitted))
    idx = [list(prefixes).index(p) for p in fitted]
    if idx:
        cov[np.ix_(idx, idx)] = c
    return offsets, cov


def tie_variance(weights: Mapping[str, np.ndarray], prefixes: Sequence[str], cov: np.ndarray) -> np.ndarray:
    """a^T C a per row, a_m = w_m / sum w: the zero-point tie's variance of a combined modulus."""
    if not np.any(cov):
        return np.zeros(np.shape(next(iter(weights.values()))))
    a = np.stack([np.asarray(weights.get(p, 0.0), dtype=float) for p in prefixes], axis=-1)
    total = a.sum(axis=-1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        a = np.where(total > 0, a / np.where(total > 0, total, 1.0), 0.0)
    return np.einsum("...m,mn,...n->...", a, cov, a)


#: flags that leave a distance usable for mu_best: a nearby galaxy (LOCAL_FLOW) or a
#: Hubble-flow outlier (OUTLIER: a large peculiar velocity is science, not a bad distance)
BEST_IGNORE_FLAGS = ("LOCAL_FLOW", "OUTLIER")


def best_usable(mu, err, fl, ignore_flags=BEST_IGNORE_FLAGS) -> np.ndarray:
    """Rows where a method's distance enters mu_best: mu and mu_err finite, mu_err > 0, and
    no flag besides ``ignore_flags`` (``best_distance``)."""
    keep = _flags.FLAG_DTYPE(ALL_METHOD_BITS & ~_bits(ignore_flags, "crosscheck.best_ignore_flags"))
    mu, err = np.asarray(mu, dtype=float), np.asarray(err, dtype=float)
    return (np.isfinite(mu) & np.isfinite(err) & (err > 0)
            & ((np.asarray(fl, dtype=_flags.FLAG_DTYPE) & keep) == 0))


def best_distance(methods: Mapping[str, tuple], *, ignore_flags=BEST_IGNORE_FLAGS,
                  zero_point: dict | None = None) -> dict:
    """Inverse-variance mean of the usable methods per galaxy.

    ``methods`` maps a prefix to (mu, mu_err, flags[, mu_err_sys]), mu_err the random
    error. A method is usable for a row when mu is finite, mu_err finite and > 0, and no
    flag other than ``ignore_flags`` is set (default ``BEST_IGNORE_FLAGS``: the flag stays
    on the method's column, the distance is kept). Returns mu_best, mu_best_err
    (random, 1/sqrt(sum w)), mu_best_err_sys (sqrt(sum (w_m sys_m)^2) / sum w: the
    methods' calibrations are independent) and best_method: the usable prefixes joined
    by '+' in the order given, NO_METHOD when none, as a pyarrow string array (built per row
    from a dictionary of the 2^k subsets, which is what keeps it cheap at survey scale).
    ``zero_point``: an applied zero-point tie (``groups.fit_zero_points`` with "applied"
    true): each method's offset is subtracted, and the offsets' covariance joins
    mu_best_err_sys (``tie_variance``).
    """
    offsets, cov = tie(zero_point, list(methods))
    weights = {}
    names = list(methods)
    if not names:
        raise ValueError("crosscheck: no method columns to combine")
    sw = swx = sws2 = code = None
    for bit, (mu, err, fl, *sys) in enumerate(methods.values()):
        mu = np.asarray(mu, dtype=float)
        err = np.asarray(err, dtype=float)
        sys = np.nan_to_num(np.asarray(sys[0] if sys else 0.0, dtype=float), nan=0.0)
        use = best_usable(mu, err, fl, ignore_flags)
        w = np.where(use, 1.0 / np.where(use, err, 1.0) ** 2, 0.0)
        if sw is None:
            sw, swx, sws2 = np.zeros(mu.shape), np.zeros(mu.shape), np.zeros(mu.shape)
            code = np.zeros(mu.shape, dtype=np.int32)
        weights[names[bit]] = w
        sw += w
        swx += np.where(use, w * np.where(use, mu - offsets[names[bit]], 0.0), 0.0)
        sws2 += (w * sys) ** 2
        code |= use.astype(np.int32) << bit
    has = sw > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        mu_best = np.where(has, swx / np.where(has, sw, 1.0), np.nan)
        mu_best_err = np.where(has, 1.0 / np.sqrt(np.where(has, sw, 1.0)), np.nan)
        mu_best_err_sys = np.where(has, np.sqrt(sws2 / np.where(has, sw, 1.0) ** 2
                                                + tie_variance(weights, names, cov)), np.nan)
    # the label of each subset of methods, indexed by its bit mask: built once, then
    # looked up per row as a dictionary (a per-row Python string would cost ~2 us/row)
    labels = pa.array(["+".join(n for i, n in enumerate(names) if c >> i & 1) or NO_METHOD
                       for c in range(1 << len(names))], type=pa.string())
    label = pa.DictionaryArray.from_arrays(pa.array(code.ravel()), labels).cast(pa.string())
    return {"mu_best": mu_best, "mu_best_err": mu_best_err, "mu_best_err_sys": mu_best_err_sys,
            "best_method": label}


def count_labels(labels: pa.Array) -> dict[str, int]:
    """Counts of each ``best_method`` label."""
    return {(str(v) or NO_METHOD): int(c) for v, c in
            ((item["values"].as_py(), item["counts"].as_py()) for item in labels.value_counts())}


# --------------------------------------------------------------------------- driver
#
# Two passes, so a catalog never has to be in memory whole: ``method_sample``
# keeps, shard by shard, only what the sample statistics need (rows with a finite
# dmu); ``sample_statistics`` computes them once over all shards; and
# ``galaxy_columns`` then derives every per-galaxy column of a shard, outlier bits
# included, from those statistics. ``crosscheck`` chains the three on one table.

def _method_flags(columns, m, z_flags) -> np.ndarray:
    """M_flags with LOCAL_FLOW inherited and any stale OUTLIER bit cleared."""
    fl = inherit_local_flow(columns[f"{m}_flags"], z_flags)
    return fl & _flags.FLAG_DTYPE(~int(Method.OUTLIER) & 0xFFFFFFFF)


def method_sample(columns: Mapping[str, Sequence], methods: Sequence[str] = DEFAULT_METHODS) -> dict:
    """What the sample statistics need from one shard: ``clipped_stats.RECORD`` arrays of the measured rows.

    Returns {"methods": {M: records of dmu}, "pairs": {"A-B": records of mu_A - mu_B}},
    20 bytes per measured row, for one method or for galaxies measured by both.
    """
    def col(name):
        return np.asarray(columns[name], dtype=float)

    z_flags = np.asarray(columns["z_flags"], dtype=_flags.FLAG_DTYPE)
    present = [m for m in methods if f"{m}_mu" in columns]
    out: dict = {"methods": {}, "pairs": {}}
    for m in present:
        keep = np.isfinite(col(f"{m}_mu"))
        dmu_err = np.sqrt(col(f"{m}_mu_err")[keep] ** 2 + col("mu_z_err")[keep] ** 2)
        out["methods"][m] = records(delta_mu(col(f"{m}_mu")[keep], col("mu_z")[keep]), dmu_err,
                                    col("z_cmb")[keep], _method_flags(columns, m, z_flags)[keep],
                                    col(f"{m}_mu_err_sys")[keep])
    for a, b in itertools.combinations(present, 2):
        both = np.isfinite(col(f"{a}_mu")) & np.isfinite(col(f"{b}_mu"))
        out["pairs"][f"{a}-{b}"] = _pair_records(
            col(f"{a}_mu")[both], col(f"{a}_mu_err")[both], _method_flags(columns, a, z_flags)[both],
            col(f"{b}_mu")[both], col(f"{b}_mu_err")[both], _method_flags(columns, b, z_flags)[both],
            col(f"{a}_mu_err_sys")[both], col(f"{b}_mu_err_sys")[both])
    return out


def collect_samples(samples: Sequence[dict]) -> dict:
    """The ``method_sample`` results of all shards, as one sample: per method and pair,
    the list of its per-shard record arrays (the chunks the statistics pass over)."""
    out: dict = {"methods": {}, "pairs": {}}
    for part in samples:
        for group, items in part.items():
            for name, recs in items.items():
                out[group].setdefault(name, []).append(recs)
    return out


def sample_statistics(sample: dict, n_rows: int, h0_assumed: float, *, min_cz: float = 3000.0,
                      clip_sigma: float = 3.5, max_iter: int = 20,
                      methods: Sequence[str] | None = None) -> dict:
    """Per-method Hubble statistics and per-pair offsets of a sample.

    ``sample`` is shaped like ``collect_samples``'s result; each method or pair
    maps to any re-iterable of ``clipped_stats.RECORD`` arrays (a list, or chunks read from disk);
    a missing group or name is an empty sample. ``methods`` (prefixes) fixes which
    methods get statistics, and so which pairs: every one of them gets an entry,
    measured or not, and "pairs" is an empty mapping when fewer than two ran
    (default: the methods and pairs the sample holds).
    The pair statistics ignore OUTLIER and LOCAL_FLOW (``pair_sample_statistics``'s
    default): a Hubble outlier or a nearby galaxy still has a valid distance to compare.
    """
    have_methods, have_pairs = sample.get("methods", {}), sample.get("pairs", {})
    if methods is None:
        names, pairs = list(have_methods), list(have_pairs)
    else:
        names = list(methods)
        pairs = [f"{a}-{b}" for a, b in itertools.combinations(names, 2)]
    summary: dict = {"methods": {}, "pairs": {}}
    for m in names:
        stats = hubble_sample_statistics(have_methods.get(m, []), h0_assumed, min_cz=min_cz,
                                         clip_sigma=clip_sigma, max_iter=max_iter)
        stats["n_measured"] = stats["n_rows"]
        stats["n_rows"] = int(n_rows)
        summary["methods"][m] = stats
    for name in pairs:
        summary["pairs"][name] = pair_sample_statistics(have_pairs.get(name, []), clip_sigma=clip_sigma,
                                                        max_iter=max_iter)
    return summary


def _outliers(dmu, z_cmb, stats: dict, min_cz: float, clip_sigma: float) -> np.ndarray:
    """The outlier rule of ``hubble_statistics``, applied with its final centre and scale."""
    center, scale = stats.get("clip_center"), stats.get("clip_scale")
    dmu = np.asarray(dmu, dtype=float)
    if center is None or scale is None:
        return np.zeros(dmu.shape, dtype=bool)
    cz = C_KMS * np.nan_to_num(np.asarray(z_cmb, dtype=float), nan=-np.inf)
    with np.errstate(invalid="ignore"):
        return np.isfinite(dmu) & (cz >= float(min_cz)) & (np.abs(dmu - center) > clip_sigma * scale)


def galaxy_columns(columns: Mapping[str, Sequence], grid: MuGrid, statistics: dict, *,
                   methods: Sequence[str] = DEFAULT_METHODS, min_cz: float = 3000.0,
                   clip_sigma: float = 3.5, best_ignore_flags=BEST_IGNORE_FLAGS,
                   zero_point: dict | None = None) -> dict:
    """Per-galaxy cross-check columns of one shard, given the sample ``statistics``
    (``zero_point``: an applied tie for mu_best, see ``best_distance``).

    Per method M present: M_dmu, M_logd_ratio, M_vpec, M_vpec_err, M_vpec_lr,
    M_vpec_lr_err and M_flags (input flags + LOCAL_FLOW inherited from z_flags +
    OUTLIER from the statistics' clipping); then mu_best, mu_best_err, mu_best_err_sys,
    best_method.
    """
    def col(name):
        return np.asarray(columns[name], dtype=float)

    z, z_err, mu_z = col("z_cmb"), col("z_cmb_err"), col("mu_z")
    z_flags = np.asarray(columns["z_flags"], dtype=_flags.FLAG_DTYPE)
    present = [m for m in methods if f"{m}_mu" in columns]
    out: dict[str, np.ndarray] = {}
    for m in present:
        mu, mu_err = col(f"{m}_mu"), col(f"{m}_mu_err")
        fl = _method_flags(columns, m, z_flags)
        dmu = delta_mu(mu, mu_z)
        _flags.set_where(fl, _outliers(dmu, z, statistics["methods"].get(m, {}), min_cz, clip_sigma),
                         Method.OUTLIER)
        v, v_err = peculiar_velocity_exact(mu, mu_err, z, z_err, grid)
        v_lr, v_lr_err = peculiar_velocity_log_ratio(mu, mu_err, z, z_err, grid.h0, grid.q0, grid.j0)
        out |= {f"{m}_dmu": dmu, f"{m}_logd_ratio": log_distance_ratio(mu, mu_z),
                f"{m}_vpec": v, f"{m}_vpec_err": v_err,
                f"{m}_vpec_lr": v_lr, f"{m}_vpec_lr_err": v_lr_err, f"{m}_flags": fl}
    if present:
        out |= best_distance({m: (col(f"{m}_mu"), col(f"{m}_mu_err"), out[f"{m}_flags"], col(f"{m}_mu_err_sys"))
                              for m in present}, ignore_flags=best_ignore_flags, zero_point=zero_point)
    else:
        n = z.shape[0]
        out |= {"mu_best": np.full(n, np.nan), "mu_best_err": np.full(n, np.nan),
                "mu_best_err_sys": np.full(n, np.nan),
                "best_method": pa.array([NO_METHOD] * n, type=pa.string())}
    return out


def crosscheck(columns: Mapping[str, Sequence], grid: MuGrid, *,
               methods: Sequence[str] = DEFAULT_METHODS, min_cz: float = 3000.0,
               clip_sigma: float = 3.5, max_iter: int = 20, best_ignore_flags=BEST_IGNORE_FLAGS):
    """Cross-check every method present in ``columns`` (a dict or DataFrame) in one go.

    Needs z_cmb, z_cmb_err, mu_z, mu_z_err, z_flags and, per method M present
    (M_mu exists), M_mu, M_mu_err, M_mu_err_sys, M_flags. Returns (new columns, summary) as
    ``galaxy_columns`` and ``sample_statistics`` give them, plus summary["best"]:
    counts of best_method. H0, q0, j0 are the grid's.
    """
    n = len(np.asarray(columns["z_cmb"]))
    sample = collect_samples([method_sample(columns, methods)])
    summary = sample_statistics(sample, n, grid.h0, min_cz=min_cz, clip_sigma=clip_sigma, max_iter=max_iter)
    out = galaxy_columns(columns, grid, summary, methods=methods, min_cz=min_cz, clip_sigma=clip_sigma,
                         best_ignore_flags=best_ignore_flags)
    summary["best"] = dict(sorted(count_labels(out["best_method"]).items()))
    return out, summary
