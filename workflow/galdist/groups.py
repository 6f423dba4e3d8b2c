"""Groups of galaxies at one distance, and the zero-point tie between methods.

A group is the galaxies sharing a catalog ``group_id``; a galaxy without one is a group
of one (its own ``galaxy_id`` names it). Per group:

* the combined distance modulus: the inverse-variance mean over members and methods of
  every usable measurement (the ``mu_best`` rule, ``crosscheck.best_distance``), weights
  from the random errors; its random error 1/sqrt(sum w); its systematic error
  sqrt(sum_m (sum_i w_im sys_im)^2) / sum w (a method's calibration error is common to
  all its members, the methods' calibrations independent), plus the zero-point tie's
  term a^T C a (a_m: method m's share of the weight, C the offsets' covariance) where
  the tie is applied;
* iterative outlier rejection: a member whose modulus lies more than ``clip_sigma``
  from the mean of the group's other members (in units of the two errors in quadrature)
  is rejected, the worst one per group per pass, while at least three members remain
  (with two, neither can be told the outlier); rejected members are kept and marked
  (``group_rejected``), never dropped;
* the group's CMB redshift: the plain mean of the members' c z_cmb (all members with a
  redshift, rejected ones too: membership, not the distance, puts a galaxy at the
  group's redshift; an unweighted mean because the redshift errors are small beside
  the members' orbital velocities), its error the members' errors in quadrature over n;
* from these, the group's dmu, eta = log10(d_z / d) and peculiar velocity
  (``crosscheck.peculiar_velocity_exact``).

The zero-point tie: the objects (groups, singletons included) measured by two or more
methods fit offsets delta_m of each method relative to a reference by maximum
likelihood, mu_om = mu_o + delta_m + random error: with every mu_o profiled out the
likelihood is quadratic in delta, so the normal equations A delta = b are sums over
objects (``zero_point_sums``) and the covariance is A^-1 (the inverse Fisher matrix).
Only the random errors weigh; the offsets' errors become systematic terms of the tied
distances.

Memory is bounded by a partition: the members go to disk in ``n_parts`` partitions by
a hash of the group key (every member of a group in one partition), each partition is
reduced in memory (sorted by key with Arrow), and the per-member results go back to
disk by shard (``GroupSpill``).
"""

from __future__ import annotations

import shutil
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from . import crosscheck
from .crosscheck import tie, tie_variance
from . import flags as _flags
from .redshift import C_KMS

#: the per-galaxy columns the groups add to the product: (unit, description, storage type)
GROUP_COLUMNS = {
    "group_n_members": ("", "members of the galaxy's group (1: no group_id, or alone in its group)", "int64"),
    "group_n_used": ("", "members whose distance enters group_mu (measured usably, not rejected)", "int64"),
    "group_rejected": ("", "this galaxy's distance was rejected from its group's mean as an outlier "
                           "(groups.clip_sigma); its own distances stay in the product", "bool"),
    "group_mu": ("mag", "the group's distance modulus: inverse-variance mean over the used members and their "
                        "usable methods (the mu_best rule), with the zero-point tie where applied", "float64"),
    "group_mu_err": ("mag", "random error of group_mu, 1 / sqrt(sum of the weights)", "float64"),
    "group_mu_err_sys": ("mag", "systematic error of group_mu: the methods' calibration errors (each common to "
                                "its members) and, where applied, the zero-point offsets' errors", "float64"),
    "group_cz_cmb_kms": ("km / s", "the group's CMB-frame velocity: plain mean of its members' c z_cmb",
                         "float64"),
    "group_dmu": ("mag", "group_mu - mu_z at the group's redshift", "float64"),
    "group_logd_ratio": ("dex", "eta = log10(d_z / d) of the group, -group_dmu / 5", "float64"),
    "group_vpec": ("km / s", "the group's peculiar velocity (as *_vpec, from group_mu and group_cz_cmb_kms)",
                   "float64"),
    "group_vpec_err": ("km / s", "error of group_vpec", "float64"),
}
#: the group summary's own columns in groups.parquet, besides the GROUP_COLUMNS without "group_"
GROUP_TABLE_COLUMNS = ("group_id", "from_catalog", "n_members", "n_used", "n_rejected", "mu", "mu_err",
                       "mu_err_sys", "cz_cmb_kms", "cz_cmb_err_kms", "dmu", "logd_ratio", "vpec", "vpec_err",
                       "methods")
#: key prefix of a galaxy without group_id (a byte no catalog text starts with)
#: partitions per shard: a partition (every member of its groups) is in memory at a time; at
#: one per shard the groups job peaked at 0.96 GB on 10^6-row shards (the benchmark)
PARTS_PER_SHARD = 4
SINGLE = "\x00"


def usable_weights(mu, err, method_flags, ignore_flags=crosscheck.BEST_IGNORE_FLAGS) -> np.ndarray:
    """1/err^2 where a method's distance is usable (the ``crosscheck.best_distance`` rule), else 0."""
    keep = _flags.FLAG_DTYPE(crosscheck.ALL_METHOD_BITS
                             & ~crosscheck._bits(ignore_flags, "crosscheck.best_ignore_flags"))
    mu, err = np.asarray(mu, dtype=float), np.asarray(err, dtype=float)
    use = (np.isfinite(mu) & np.isfinite(err) & (err > 0)
           & ((np.asarray(method_flags, dtype=_flags.FLAG_DTYPE) & keep) == 0))
    return np.where(use, 1.0 / np.where(use, err, 1.0) ** 2, 0.0)


def group_keys(group_id: pa.Array, galaxy_id: pa.Array) -> pa.Array:
    """The key of each row's group: its group_id, or SINGLE + galaxy_id where that is null or empty."""
    group_id = pa.array(group_id, type=pa.string()) if not isinstance(group_id, pa.Array) else group_id
    galaxy_id = pa.array(galaxy_id, type=pa.string()) if not isinstance(galaxy_id, pa.Array) else galaxy_id
    named = pc.fill_null(pc.greater(pc.utf8_length(group_id.cast(pa.string())), 0), False)
    single = pc.binary_join_element_wise(SINGLE, galaxy_id.cast(pa.string()), "")
    return pc.if_else(named, group_id.cast(pa.string()), single)


def member_table(columns: Mapping, prefixes: Sequence[str], shard: int, row0: int) -> pa.Table:
    """One batch's member records: group key, shard and row, c z_cmb and its error, and per
    method m the modulus ``m_mu``, its weight ``m_w`` (0: not usable) and ``m_sys``."""
    def col(name):
        return np.asarray(columns[name], dtype=float)

    n = len(col("z_cmb"))
    group_id = columns.get("group_id")
    if group_id is None:
        group_id = pa.nulls(n, pa.string())
    out = {"key": group_keys(group_id, columns["galaxy_id"]),
           "shard": pa.array(np.full(n, shard, dtype=np.int32)),
           "row": pa.array(np.arange(row0, row0 + n, dtype=np.int64)),
           "cz": pa.array(C_KMS * col("z_cmb")), "cz_err": pa.array(C_KMS * col("z_cmb_err"))}
    for p in prefixes:
        if f"{p}_mu" not in columns:
            continue
        out[f"{p}_mu"] = pa.array(col(f"{p}_mu"))
        out[f"{p}_w"] = pa.array(usable_weights(col(f"{p}_mu"), col(f"{p}_mu_err"), columns[f"{p}_flags"]))
        out[f"{p}_sys"] = pa.array(np.nan_to_num(col(f"{p}_mu_err_sys"), nan=0.0))
    return pa.table(out)


def partition_of(keys: pa.Array, n_parts: int) -> np.ndarray:
    """Partition index of each key: a stable 64-bit hash of the text, modulo ``n_parts``."""
    import pandas as pd

    h = pd.util.hash_array(keys.to_numpy(zero_copy_only=False).astype(object), categorize=False)
    return (h % np.uint64(max(int(n_parts), 1))).astype(np.int64)


# --------------------------------------------------------------------------- one partition

def _sorted(table: pa.Table):
    """(table sorted by key then shard and row, group index per row, start of each group)."""
    table = table.take(pc.sort_indices(table, [("key", "ascending"), ("shard", "ascending"),
                                               ("row", "ascending")]))
    n = table.num_rows
    new = np.ones(n, dtype=bool)
    if n > 1:
        keys = table.column("key").combine_chunks()
        new[1:] = pc.not_equal(keys.slice(1), keys.slice(0, n - 1)).to_numpy(zero_copy_only=False)
    gidx = np.cumsum(new) - 1
    return table, gidx, np.flatnonzero(new)


def _method_arrays(table: pa.Table, prefixes):
    present = [p for p in prefixes if f"{p}_w" in table.column_names]
    mu = {p: np.nan_to_num(table.column(f"{p}_mu").to_numpy(), nan=0.0) for p in present}
    w = {p: table.column(f"{p}_w").to_numpy() for p in present}
    sys = {p: table.column(f"{p}_sys").to_numpy() for p in present}
    return present, mu, w, sys


def zero_point_sums(table: pa.Table, prefixes: Sequence[str]) -> dict:
    """This partition's terms of the zero-point normal equations (module docstring): per
    object o (group) and method m, W_om = sum of the members' weights and S_om = sum of
    w mu; over the objects with two or more methods, A_mn = sum_o (W_om [m = n] - W_om W_on / W_o)
    and b_m = sum_o (S_om - W_om S_o / W_o). Also the counts: n_objects[m, n] of such objects
    measured by m and n, n_multi of them all, n_galaxies measured by two or more methods."""
    k = len(prefixes)
    out = {"A": np.zeros((k, k)), "b": np.zeros(k), "n_objects": np.zeros((k, k), dtype=np.int64),
           "n_galaxies": 0, "n_multi": 0}
    if table.num_rows == 0:
        return out
    table, gidx, starts = _sorted(table)
    present, mu, w, _ = _method_arrays(table, prefixes)
    n_groups = len(starts)
    Wm = np.zeros((n_groups, k))
    Sm = np.zeros((n_groups, k))
    n_methods_row = np.zeros(table.num_rows, dtype=int)
    for j, p in enumerate(prefixes):
        if p in present:
            Wm[:, j] = np.bincount(gidx, w[p], n_groups)
            Sm[:, j] = np.bincount(gidx, w[p] * mu[p], n_groups)
            n_methods_row += w[p] > 0
    has = Wm > 0
    multi = has.sum(axis=1) >= 2
    Wm, Sm = Wm[multi], Sm[multi]
    W, S = Wm.sum(axis=1), Sm.sum(axis=1)
    out["A"] = np.diag(Wm.sum(axis=0)) - Wm.T @ (Wm / W[:, None])
    out["b"] = Sm.sum(axis=0) - Wm.T @ (S / W)
    out["n_objects"] = has[multi].T.astype(np.int64) @ has[multi].astype(np.int64)
    out["n_galaxies"] = int((n_methods_row >= 2).sum())
    out["n_multi"] = int(multi.sum())
    return out


def add_sums(total: dict | None, part: dict) -> dict:
    """The sum of two ``zero_point_sums`` results."""
    if total is None:
        return {k: (v.copy() if isinstance(v, np.ndarray) else v) for k, v in part.items()}
    return {k: total[k] + part[k] for k in total}


def fit_zero_points(sums: dict, prefixes: Sequence[str], reference: str | None = None,
                    zero_point_errors: Mapping[str, float] | None = None) -> dict:
    """Offsets of each method relative to ``reference`` (a prefix; None: the method with the
    smallest calibration zero-point error in ``zero_point_errors``, else the first) from the
    normal equations ``sums``: delta = A_ff^-1 b_f over the other methods, covariance A_ff^-1.

    A method with no object in common with the others gets no offset (null). Returns JSON-ready
    values: reference, offsets {prefix: {offset, err, n_overlap: its objects measured by another
    method too}}, covariance (the fitted methods, in ``fitted`` order), n_overlap_objects,
    n_overlap_galaxies.
    """
    prefixes = list(prefixes)
    if reference is None:
        zpe = zero_point_errors or {}
        reference = min(prefixes, key=lambda p: (zpe.get(p, np.inf), prefixes.index(p)))
    if reference not in prefixes:
        raise ValueError(f"zero_point.reference: {reference!r} is not one of the run's methods {prefixes}")
    A, b, n_obj = sums["A"], sums["b"], sums["n_objects"]
    r = prefixes.index(reference)
    free = [j for j in range(len(prefixes)) if j != r and n_obj[j, j] > 0]
    offsets = {p: {"offset": 0.0 if p == reference else None, "err": 0.0 if p == reference else None,
                   "n_overlap": int(n_obj[j, j])} for j, p in enumerate(prefixes)}
    cov = np.zeros((0, 0))
    if free:
        Aff = A[np.ix_(free, free)]
        try:
            cov = np.linalg.inv(Aff)
            delta = cov @ b[free]
        except np.linalg.LinAlgError:
            free, cov, delta = [], np.zeros((0, 0)), np.zeros(0)
        for i, j in enumerate(free):
            offsets[prefixes[j]] |= {"offset": float(delta[i]), "err": float(np.sqrt(cov[i, i]))}
    return {"reference": reference, "offsets": offsets, "fitted": [prefixes[j] for j in free],
            "covariance": cov.tolist(),
            "n_overlap_objects": int(sums["n_multi"]),
            "n_overlap_galaxies": int(sums["n_galaxies"])}


def reduce_partition(table: pa.Table, prefixes: Sequence[str], grid, *, clip_sigma: float = 3.0,
                     max_iter: int = 10, zero_point: dict | None = None) -> tuple[pa.Table, pa.Table]:
    """Groups of one partition (every member of each group in ``table``, a ``member_table``
    concatenation). Returns (groups: one row per group, ``GROUP_TABLE_COLUMNS``; members:
    shard, row and the ``GROUP_COLUMNS`` of each member)."""
    table, gidx, starts = _sorted(table)
    n, G = table.num_rows, len(starts)
    if n == 0:
        starts = np.zeros(0, dtype=np.int64)
    present, mu, w, sys = _method_arrays(table, prefixes)
    offsets, cov = tie(zero_point, prefixes)
    W = np.zeros(n)
    S = np.zeros(n)
    for p in present:
        W += w[p]
        S += w[p] * (mu[p] - offsets[p])
    with np.errstate(divide="ignore", invalid="ignore"):
        mu_i = np.where(W > 0, S / np.where(W > 0, W, 1.0), np.nan)
    active = W > 0
    rejected = np.zeros(n, dtype=bool)
    for _ in range(int(max_iter) if n else 0):
        Wg = np.bincount(gidx, W * active, G)
        Sg = np.bincount(gidx, S * active, G)
        ng = np.bincount(gidx, active, G)
        Wo, So = Wg[gidx] - W, Sg[gidx] - S
        valid = active & (ng[gidx] >= 3) & (Wo > 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            chi = np.where(valid, np.abs(mu_i - So / np.where(valid, Wo, 1.0))
                           / np.sqrt(1.0 / np.where(valid, W, 1.0) + 1.0 / np.where(valid, Wo, 1.0)), 0.0)
        worst = np.maximum.reduceat(chi, starts)
        cand = valid & (chi > clip_sigma) & (chi == worst[gidx])
        if not cand.any():
            break
        # one per group per pass: the first of equal worst ones
        idx = np.flatnonzero(cand)
        first = idx[np.r_[True, gidx[idx][1:] != gidx[idx][:-1]]]
        active[first] = False
        rejected[first] = True
    Wmg = {p: np.bincount(gidx, w[p] * active, G) for p in present}
    Smg = {p: np.bincount(gidx, w[p] * (mu[p] - offsets[p]) * active, G) for p in present}
    Ymg = {p: np.bincount(gidx, w[p] * sys[p] * active, G) for p in present}
    Wg = sum(Wmg.values()) if present else np.zeros(G)
    Sg = sum(Smg.values()) if present else np.zeros(G)
    has = Wg > 0
    safe = np.where(has, Wg, 1.0)
    g_mu = np.where(has, Sg / safe, np.nan)
    g_err = np.where(has, 1.0 / np.sqrt(safe), np.nan)
    var_sys = sum(Y**2 for Y in Ymg.values()) / safe**2 if present else np.zeros(G)
    var_sys = var_sys + tie_variance(Wmg, prefixes, cov) if present else var_sys
    g_sys = np.where(has, np.sqrt(var_sys), np.nan)
    cz, cz_err = table.column("cz").to_numpy(), table.column("cz_err").to_numpy()
    zok = np.isfinite(cz)
    nz = np.bincount(gidx, zok, G)
    with np.errstate(divide="ignore", invalid="ignore"):
        g_cz = np.where(nz > 0, np.bincount(gidx, np.where(zok, cz, 0.0), G) / nz, np.nan)
        g_cz_err = np.where(nz > 0, np.sqrt(np.bincount(gidx, np.where(zok, np.nan_to_num(cz_err), 0.0) ** 2, G))
                            / nz, np.nan)
    z = g_cz / C_KMS
    mu_z = grid.mu(z)
    dmu = crosscheck.delta_mu(g_mu, mu_z)
    v, v_err = crosscheck.peculiar_velocity_exact(g_mu, g_err, z, g_cz_err / C_KMS, grid)
    n_members = np.diff(np.r_[starts, n])
    n_used = np.bincount(gidx, active, G).astype(np.int64)
    n_rej = np.bincount(gidx, rejected, G).astype(np.int64)
    keys = table.column("key").combine_chunks().take(pa.array(starts))
    from_catalog = pc.invert(pc.starts_with(keys, SINGLE))
    names = pc.if_else(from_catalog, keys, pc.utf8_slice_codeunits(keys, len(SINGLE)))
    code = np.zeros(G, dtype=np.int32)
    for i, p in enumerate(present):
        code |= (Wmg[p] > 0).astype(np.int32) << i
    labels = pa.array(["+".join(p for i, p in enumerate(present) if c >> i & 1) or crosscheck.NO_METHOD
                       for c in range(1 << len(present))], type=pa.string())
    methods = pa.DictionaryArray.from_arrays(pa.array(code), labels).cast(pa.string())
    groups = pa.table({"group_id": names, "from_catalog": from_catalog, "n_members": n_members.astype(np.int64),
                       "n_used": n_used, "n_rejected": n_rej, "mu": g_mu, "mu_err": g_err, "mu_err_sys": g_sys,
                       "cz_cmb_kms": g_cz, "cz_cmb_err_kms": g_cz_err, "dmu": dmu,
                       "logd_ratio": crosscheck.log_distance_ratio(g_mu, mu_z), "vpec": v, "vpec_err": v_err,
                       "methods": methods})
    members = pa.table({"shard": table.column("shard"), "row": table.column("row"),
                        "group_n_members": n_members[gidx].astype(np.int64), "group_n_used": n_used[gidx],
                        "group_rejected": rejected, "group_mu": g_mu[gidx], "group_mu_err": g_err[gidx],
                        "group_mu_err_sys": g_sys[gidx], "group_cz_cmb_kms": g_cz[gidx],
                        "group_dmu": dmu[gidx], "group_logd_ratio": -0.2 * dmu[gidx],
                        "group_vpec": v[gidx], "group_vpec_err": v_err[gidx]})
    return groups, members


# --------------------------------------------------------------------------- on disk

class GroupSpill:
    """Arrow IPC files of records in a temporary directory beside ``near``, one per
    partition (or shard): ``add(i, table)`` appends, ``read(i)`` gives partition i whole.
    The directory is removed on close, a left-over one when the next spill opens."""

    def __init__(self, near: str | Path, name: str):
        near = Path(near)
        self.dir = near.parent / f".{near.name}.{name}.spill"
        shutil.rmtree(self.dir, ignore_errors=True)
        self.dir.mkdir(parents=True)
        self._writers: dict[int, tuple] = {}
        self._schema = None

    def add(self, part: int, table: pa.Table) -> None:
        if table.num_rows == 0:
            return
        if part not in self._writers:
            sink = pa.OSFile(str(self.dir / f"{part}.arrow"), "wb")
            self._writers[part] = (sink, pa.ipc.new_stream(sink, table.schema))
            self._schema = self._schema or table.schema
        self._writers[part][1].write_table(table)

    def finish(self) -> None:
        for sink, writer in self._writers.values():
            writer.close()
            sink.close()
        self._writers.clear()

    def read(self, part: int) -> pa.Table | None:
        path = self.dir / f"{part}.arrow"
        if not path.exists():
            return None
        with pa.OSFile(str(path), "rb") as src:
            return pa.ipc.open_stream(src).read_all()

    def close(self) -> None:
        self.finish()
        shutil.rmtree(self.dir, ignore_errors=True)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False


def split_by(table: pa.Table, index: np.ndarray, n: int):
    """(i, rows of ``table`` whose ``index`` is i) for each i present."""
    order = np.argsort(index, kind="stable")
    counts = np.bincount(index, minlength=n)
    bounds = np.r_[0, np.cumsum(counts)]
    taken = table.take(pa.array(order))
    for i in np.flatnonzero(counts):
        yield int(i), taken.slice(bounds[i], counts[i])


def reduce_shards(shards: list[dict], prefixes: Sequence[str], grid, groups_path, member_paths: list, *,
                  clip_sigma: float = 3.0, max_iter: int = 10, reference: str | None = None,
                  apply: bool = False, zero_point_errors: Mapping[str, float] | None = None, log=None) -> dict:
    """Groups and the zero-point tie of a run, a partition in memory at a time.

    ``shards``: one dict per shard, in order, mapping "shard" to the ingest shard and
    "redshift" and each method prefix to its stage file. Writes ``groups_path`` (one row
    per group, ``GROUP_TABLE_COLUMNS``, partition by partition, each sorted by key) and, per
    shard, ``member_paths[i]``: the ``GROUP_COLUMNS`` in the shard's row order, stamped with
    its fingerprint. Returns the summary: {"groups": counts, "zero_point": the fit (with
    "applied")}.
    """
    from .io import AtomicParquetWriter, iter_shard, read_fingerprint, write_parquet, write_stage_columns

    prefixes = list(prefixes)
    n_parts = max(PARTS_PER_SHARD * len(shards), 1)
    want = ["galaxy_id", "group_id", "z_cmb", "z_cmb_err"] + [f"{p}_{c}" for p in prefixes
                                                              for c in ("mu", "mu_err", "mu_err_sys", "flags")]
    rows_of = []
    with GroupSpill(groups_path, "parts") as parts, GroupSpill(groups_path, "members") as back:
        for s, files in enumerate(shards):
            row0 = 0
            for cols, _ in iter_shard(files["shard"], {k: v for k, v in files.items() if k != "shard"}):
                cols = {k: v for k, v in cols.items() if k in want}
                t = member_table(cols, prefixes, s, row0)
                for i, piece in split_by(t, partition_of(t.column("key"), n_parts), n_parts):
                    parts.add(i, piece)
                row0 += t.num_rows
            rows_of.append(row0)
        parts.finish()
        sums = None
        for i in range(n_parts):
            t = parts.read(i)
            if t is not None:
                sums = add_sums(sums, zero_point_sums(t, prefixes))
        if len(prefixes) >= 2 and sums is not None:
            zero_point = fit_zero_points(sums, prefixes, reference, zero_point_errors) | {"applied": bool(apply)}
        else:
            zero_point = {"reference": prefixes[0] if prefixes else None, "applied": False,
                          "offsets": {}, "fitted": [], "covariance": [], "n_overlap_objects": 0,
                          "n_overlap_galaxies": 0}
        counts = {"n_groups": 0, "n_catalog_groups": 0, "n_singletons": 0, "n_members_rejected": 0,
                  "n_groups_measured": 0, "largest_group": 0, "clip_sigma": float(clip_sigma)}
        writer = None
        try:
            for i in range(n_parts):
                t = parts.read(i)
                if t is None:
                    continue
                g, m = reduce_partition(t, prefixes, grid, clip_sigma=clip_sigma, max_iter=max_iter,
                                        zero_point=zero_point)
                if writer is None:
                    writer = AtomicParquetWriter(groups_path, _group_schema(g.schema))
                writer.write(g.cast(writer.writer.schema))
                counts["n_groups"] += g.num_rows
                cat = g.column("from_catalog").to_numpy(zero_copy_only=False)
                counts["n_catalog_groups"] += int(cat.sum())
                counts["n_singletons"] += int((g.column("n_members").to_numpy() == 1).sum())
                counts["n_members_rejected"] += int(pc.sum(g.column("n_rejected")).as_py() or 0)
                counts["n_groups_measured"] += int((g.column("n_used").to_numpy() > 0).sum())
                counts["largest_group"] = max(counts["largest_group"], int(pc.max(g.column("n_members")).as_py()))
                for s, piece in split_by(m, m.column("shard").to_numpy(), len(shards)):
                    back.add(s, piece)
                if log:
                    log.info("partition %d/%d: %d groups", i + 1, n_parts, g.num_rows)
        except BaseException:
            if writer is not None:
                writer.__exit__(RuntimeError, None, None)
            raise
        if writer is not None:
            writer.__exit__(None, None, None)
        else:  # no rows at all: an empty table of the same columns
            empty = member_table({"galaxy_id": pa.array([], pa.string()), "z_cmb": [], "z_cmb_err": []}, [], 0, 0)
            write_parquet(reduce_partition(empty, [], grid)[0], groups_path)
        back.finish()
        for s, files in enumerate(shards):
            m = back.read(s)
            m = m.take(pc.sort_indices(m, [("row", "ascending")])) if m is not None else None
            if m is None or m.num_rows != rows_of[s] or not np.array_equal(m.column("row").to_numpy(),
                                                                           np.arange(rows_of[s])):
                raise RuntimeError(f"groups: shard {s} lost members on the way ({rows_of[s]} rows in)")
            cols = {name: m.column(name).combine_chunks() for name in GROUP_COLUMNS}
            write_stage_columns(cols, member_paths[s], read_fingerprint(files["shard"]),
                                {k: v[0] for k, v in GROUP_COLUMNS.items() if v[0]})
    return {"groups": counts, "zero_point": zero_point}


def _group_schema(schema: pa.Schema) -> pa.Schema:
    """groups.parquet's schema: units and descriptions in the field metadata."""
    units = {"mu": "mag", "mu_err": "mag", "mu_err_sys": "mag", "cz_cmb_kms": "km / s",
             "cz_cmb_err_kms": "km / s", "dmu": "mag", "logd_ratio": "dex", "vpec": "km / s",
             "vpec_err": "km / s"}
    texts = {k: v[1] for k, v in GROUP_COLUMNS.items()} | {
        "group_id": "the catalog's group_id; for a galaxy without one (from_catalog false), its galaxy_id",
        "from_catalog": "true: a group of the catalog's group_id; false: a galaxy without group_id",
        "n_rejected": "members rejected as outliers", "cz_cmb_err_kms": "error of cz_cmb_kms (members' c z_cmb "
        "errors in quadrature, over n)", "methods": "prefixes of the methods group mu combines, joined by '+'"}
    fields = []
    for f in schema:
        meta = {b"description": texts.get(f.name, texts.get(f"group_{f.name}", "")).encode()}
        if f.name in units:
            meta[b"unit"] = units[f.name].encode()
        fields.append(pa.field(f.name, f.type, metadata=meta))
    return pa.schema(fields)
