"""Clipped statistics of a sample too large for memory, read chunk by chunk.

A sample is any re-iterable of ``RECORD`` arrays (value, error, z, flags, sys): a list of
per-shard arrays, or chunks read back from disk by ``io.RecordSpill``. Every statistic
is computed pass by pass over those chunks, so memory is one chunk whatever the sample's
size: means and variances merged chunk by chunk (Chan, Golub & LeVeque 1983), the
median exactly by a radix selection on the float32 bit patterns, iterative clipping
about the median (common practice), weighted mean, scatter and chi^2. Nothing here
knows a distance method; ``galdist.crosscheck`` builds its Hubble-flow and
method-pair statistics on it.
"""

from __future__ import annotations

import numpy as np

from . import flags as _flags
from .redshift import C_KMS


def json_float(x) -> float | None:
    """JSON-ready float: None for NaN/inf."""
    x = float(x)
    return x if np.isfinite(x) else None


#: one sample record: dmu (or mu_a - mu_b), its random error, z_cmb (NaN for a pair),
#: the method flags (for a pair, the OR of both methods' flags) and its systematic error
#: (the calibration's, common to the sample: it never weights, it is reported once)
RECORD = np.dtype([("value", "<f4"), ("error", "<f4"), ("z", "<f4"), ("flags", "<u4"), ("sys", "<f4")])


def records(value, error, z, flags, sys=0.0) -> np.ndarray:
    """Pack per-row arrays into sample records (float32: 1e-7 mag is far below any error)."""
    out = np.empty(np.shape(value), dtype=RECORD)
    out["value"], out["error"], out["z"], out["flags"], out["sys"] = value, error, z, flags, sys
    return out


class Rows:
    """Which rows of a sample count: candidates have a finite value (and c z >= min_cz
    unless min_cz is None); usable ones also a finite positive error and none of the
    ``exclude`` flags; a clipping window (centre, half-width) keeps |value - centre| <= half."""

    def __init__(self, exclude: int, min_cz: float | None):
        self.exclude, self.min_cz = _flags.FLAG_DTYPE(exclude), min_cz

    def candidate(self, rec) -> np.ndarray:
        ok = np.isfinite(rec["value"])
        if self.min_cz is not None:
            ok &= C_KMS * np.nan_to_num(rec["z"].astype(float), nan=-np.inf) >= float(self.min_cz)
        return ok

    def usable(self, rec) -> np.ndarray:
        e = rec["error"]
        return self.candidate(rec) & np.isfinite(e) & (e > 0) & ((rec["flags"] & self.exclude) == 0)

    def picker(self, window):
        """A function of a chunk: its usable rows inside ``window`` (all usable rows for None)."""
        if window is None:
            return self.usable
        centre, half = window
        return lambda rec: self.usable(rec) & (np.abs(rec["value"].astype(float) - centre) <= half)


def moments(chunks, pick, other=None) -> tuple[int, float, float, int]:
    """(n, mean, sum of squared deviations) of the picked values, merged chunk by chunk
    (the pairwise update of Chan, Golub & LeVeque 1983), and how many rows ``other``
    picks differently (0 when ``other`` is None)."""
    n, mean, m2, changed = 0, 0.0, 0.0, 0
    for rec in chunks:
        sel = pick(rec)
        if other is not None:
            changed += int(np.count_nonzero(sel != other(rec)))
        x = rec["value"][sel].astype(float)
        if x.size == 0:
            continue
        k, mk = x.size, float(x.mean())
        delta, total = mk - mean, n + x.size
        m2 += float(np.sum((x - mk) ** 2)) + delta**2 * n * k / total
        mean += delta * k / total
        n = total
    return n, mean, m2, changed


def sortable_keys(values) -> np.ndarray:
    """uint32 keys that sort like the float32 values: positives get the sign bit set,
    negatives have every bit flipped."""
    u = np.ascontiguousarray(values, dtype=np.float32).view(np.uint32)
    return np.where(u >> 31 == 1, ~u, u | np.uint32(0x80000000))


def key_value(key: int) -> float:
    u = np.array([key], dtype=np.uint32)
    u = u & np.uint32(0x7FFFFFFF) if key >> 31 else ~u
    return float(u.view(np.float32)[0])


def median(chunks, pick, n: int) -> float:
    """Exact median of the n picked values (mean of the middle two for even n, as
    numpy.median): a radix selection in two passes, on the high then the low 16 bits
    of the sortable keys, with 65536-bin histograms."""
    if n == 0:
        return np.nan
    high = np.zeros(1 << 16, dtype=np.int64)
    for rec in chunks:
        high += np.bincount(sortable_keys(rec["value"][pick(rec)]) >> 16, minlength=1 << 16)
    cum = np.cumsum(high)
    wanted = []  # (high 16 bits, rank within that bucket) of the two middle ranks
    for rank in ((n - 1) // 2, n // 2):
        bucket = int(np.searchsorted(cum, rank, side="right"))
        wanted.append((bucket, rank - (int(cum[bucket - 1]) if bucket else 0)))
    low = {bucket: np.zeros(1 << 16, dtype=np.int64) for bucket, _ in wanted}
    for rec in chunks:
        keys = sortable_keys(rec["value"][pick(rec)])
        for bucket, counts in low.items():
            counts += np.bincount(keys[keys >> 16 == bucket] & 0xFFFF, minlength=1 << 16)
    values = [key_value(bucket << 16 | int(np.searchsorted(np.cumsum(low[bucket]), rank, side="right")))
              for bucket, rank in wanted]
    return 0.5 * (values[0] + values[1])


def clip(chunks, rows: Rows, clip_sigma: float, max_iter: int):
    """Iterative clipping about the median at clip_sigma x the sample standard
    deviation (common practice); rejected points may re-enter. Returns the final
    window (None: every usable row), its row count, centre, scale and iterations."""
    window = None
    n, _, m2, _ = moments(chunks, rows.picker(window))
    center = scale = np.nan
    it = 0
    for it in range(1, max_iter + 1):
        if n < 3:
            break
        center = median(chunks, rows.picker(window), n)
        scale = float(np.sqrt(m2 / (n - 1)))
        new = (center, clip_sigma * scale)
        n_new, _, m2_new, changed = moments(chunks, rows.picker(new), rows.picker(window))
        if changed == 0:
            break
        window, n, m2 = new, n_new, m2_new
    if n >= 1:
        center = median(chunks, rows.picker(window), n)
        scale = float(np.sqrt(m2 / (n - 1))) if n > 1 else np.nan
    return window, n, center, scale, it


def summary(chunks, pick, n: int, median: float, std: float) -> dict:
    """Median, weighted mean, scatter and chi2 of the picked values and their random
    errors (``median`` and ``std`` are the clipping's final ones, of the same rows), and
    the systematic error of the weighted mean, ``wmean_err_sys``: the weighted mean of the
    rows' systematic errors, which move together (exact for a zero point common to all;
    for a slope term an upper bound, by the triangle inequality)."""
    out = {"n_used": n}
    if n == 0:
        return out | dict.fromkeys(["median", "median_err", "wmean", "wmean_err", "wmean_err_sys",
                                    "wmean_err_formal", "std", "rms_expected_err",
                                    "excess_scatter", "chi2_nu"])
    sw = swx = se2 = sws = 0.0
    for rec in chunks:
        sel = pick(rec)
        x, e = rec["value"][sel].astype(float), rec["error"][sel].astype(float)
        sys = np.nan_to_num(rec["sys"][sel].astype(float), nan=0.0)
        sw, swx, se2 = sw + np.sum(1.0 / e**2), swx + np.sum(x / e**2), se2 + np.sum(e**2)
        sws += np.sum(sys / e**2)
    wmean = float(swx / sw)
    chi2 = 0.0
    for rec in chunks:
        sel = pick(rec)
        chi2 += float(np.sum(((rec["value"][sel].astype(float) - wmean) / rec["error"][sel].astype(float)) ** 2))
    formal = float(1.0 / np.sqrt(sw))
    chi2_nu = chi2 / (n - 1) if n > 1 else np.nan
    rms_exp = float(np.sqrt(se2 / n))
    inflate = np.sqrt(max(1.0, chi2_nu)) if np.isfinite(chi2_nu) else 1.0
    return out | {
        "median": json_float(median),
        # asymptotic error of a Gaussian sample's median: sqrt(pi/2) s / sqrt(n) (common practice)
        "median_err": json_float(np.sqrt(np.pi / 2.0) * std / np.sqrt(n)) if n > 1 else None,
        "wmean": json_float(wmean),
        # formal error scaled by sqrt(chi2_nu) when the scatter exceeds the errors (common practice)
        "wmean_err": json_float(formal * inflate),
        "wmean_err_sys": json_float(sws / sw),
        "wmean_err_formal": json_float(formal),
        "std": json_float(std),
        "rms_expected_err": json_float(rms_exp),
        "excess_scatter": json_float(np.sqrt(max(0.0, std**2 - rms_exp**2))) if np.isfinite(std) else None,
        "chi2_nu": json_float(chi2_nu),
    }


def checked_clip_sigma(value: float) -> float:
    if not (np.isfinite(value) and value > 0):
        raise ValueError(f"crosscheck.clip_sigma must be > 0, got {value}")
    return float(value)


def count(chunks, pick) -> int:
    return sum(int(np.count_nonzero(pick(rec))) for rec in chunks)
