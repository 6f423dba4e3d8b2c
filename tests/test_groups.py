"""Groups (combined distance, outlier rejection) and the zero-point tie between methods."""
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from galdist import groups, io, likelihood
from galdist.redshift import C_KMS, MuGrid, make_cosmology


@pytest.fixture(scope="module")
def grid():
    return MuGrid.build(make_cosmology())  # flat LCDM, H0 = 70, Om0 = 0.3 (galdist's default)


def simulated(seed, n_groups=40, size=8, err=0.4, n_outliers=6, shift=3.0, sigma_v=0.0):
    """Groups of ``size`` members at a common modulus, errors ``err`` (a TF-like 0.4 mag: common
    practice), ``n_outliers`` members moved by ``shift`` mag."""
    rng = np.random.default_rng(seed)
    true = rng.uniform(33.0, 36.0, n_groups)
    gid = np.repeat(np.arange(n_groups), size)
    mu = true[gid] + rng.normal(0.0, err, gid.size)
    bad = rng.choice(gid.size, n_outliers, replace=False)
    mu[bad] += shift
    z = (10 ** ((true - 25.0) / 5.0)) * 70.0 / C_KMS  # Hubble law, close enough at these distances
    cols = {"galaxy_id": pa.array([f"g{i}" for i in range(gid.size)]),
            "group_id": pa.array([f"grp{g}" for g in gid]),
            "z_cmb": z[gid], "z_cmb_err": np.full(gid.size, 1e-4),
            "tf_mu": mu, "tf_mu_err": np.full(gid.size, err), "tf_mu_err_sys": np.full(gid.size, 0.05),
            "tf_flags": np.zeros(gid.size, dtype=np.uint32)}
    return cols, true, gid, bad


def test_group_modulus_recovered_and_outliers_flagged(grid):
    cols, true, gid, bad = simulated(1)
    g, m = groups.reduce_partition(groups.member_table(cols, ["tf"], 0, 0), ["tf"], grid, clip_sigma=3.0)
    order = np.argsort(m.column("row").to_numpy())
    rejected = m.column("group_rejected").to_numpy(zero_copy_only=False)[order]
    assert set(bad) <= set(np.flatnonzero(rejected))  # 3 mag outliers at 0.4 mag errors (7.5 sigma): all caught
    # false rejections at 3 sigma: two-sided Gaussian tail 0.27 % of 320 members, ~1 expected
    assert len(set(np.flatnonzero(rejected)) - set(bad)) <= 4
    names = g.column("group_id").to_pylist()
    truth = true[[int(n[3:]) for n in names]]
    pull = (g.column("mu").to_numpy() - truth) / g.column("mu_err").to_numpy()
    assert np.mean(np.abs(pull) < 2) > 0.85  # within the group's own error (95 % expected at 2 sigma)
    # 7 used members of 0.4 mag: error 0.4 / sqrt(7) where one was rejected
    n_used = g.column("n_used").to_numpy()
    np.testing.assert_allclose(g.column("mu_err").to_numpy(), 0.4 / np.sqrt(n_used))
    # systematic error: one calibration common to the members, not averaged down
    np.testing.assert_allclose(g.column("mu_err_sys").to_numpy(), 0.05)
    assert (g.column("n_members").to_numpy() == 8).all()
    assert n_used.sum() == 8 * 40 - rejected.sum()


def test_no_group_id_is_a_group_of_one(grid):
    cols, *_ = simulated(2, n_groups=3, size=2, n_outliers=0)
    cols["group_id"] = pa.array([None, "", "a", "a", None, "b"])
    g, m = groups.reduce_partition(groups.member_table(cols, ["tf"], 0, 0), ["tf"], grid)
    m = m.take(pa.array(np.argsort(m.column("row").to_numpy())))
    assert m.column("group_n_members").to_pylist() == [1, 1, 2, 2, 1, 1]
    np.testing.assert_allclose(m.column("group_mu").to_numpy()[[0, 1, 4, 5]], cols["tf_mu"][[0, 1, 4, 5]])
    assert sorted(g.column("group_id").to_pylist()) == ["a", "b", "g0", "g1", "g4"]
    assert g.column("from_catalog").to_pylist().count(True) == 2


def test_two_members_never_rejected(grid):
    cols, *_ = simulated(3, n_groups=1, size=2, n_outliers=1, shift=5.0)
    g, _ = groups.reduce_partition(groups.member_table(cols, ["tf"], 0, 0), ["tf"], grid)
    assert g.column("n_rejected").to_pylist() == [0]  # with two, neither can be told the outlier


def two_methods(seed, offset, n=300, overlap=0.3):
    """Galaxies measured by tf (0.4 mag) and some also by sbf (0.15 mag: SBF-like, common practice),
    sbf moved by ``offset``."""
    rng = np.random.default_rng(seed)
    true = rng.uniform(32.0, 35.0, n)
    both = rng.uniform(size=n) < overlap
    tf = true + rng.normal(0, 0.4, n)
    sbf = np.where(both, true + offset + rng.normal(0, 0.15, n), np.nan)
    return {"galaxy_id": pa.array([f"x{i}" for i in range(n)]), "group_id": pa.nulls(n, pa.string()),
            "z_cmb": np.full(n, 0.01), "z_cmb_err": np.full(n, 1e-4),
            "tf_mu": tf, "tf_mu_err": np.full(n, 0.4), "tf_mu_err_sys": np.full(n, 0.1),
            "tf_flags": np.zeros(n, np.uint32), "sbf_mu": sbf, "sbf_mu_err": np.full(n, 0.15),
            "sbf_mu_err_sys": np.full(n, 0.05), "sbf_flags": np.zeros(n, np.uint32)}, both


def test_zero_point_offset_coverage():
    """Injected offset 0.2 mag recovered within 2 sigma: coverage over 40 seeds near the Gaussian 95.4 %."""
    hits, pulls = 0, []
    for seed in range(40):
        cols, both = two_methods(seed, 0.2)
        t = groups.member_table(cols, ["tf", "sbf"], 0, 0)
        fit = groups.fit_zero_points(groups.zero_point_sums(t, ["tf", "sbf"]), ["tf", "sbf"], reference="tf")
        o = fit["offsets"]["sbf"]
        assert o["n_overlap"] == both.sum() == fit["n_overlap_objects"] == fit["n_overlap_galaxies"]
        # the analytic error of a mean difference: 1 / sqrt(sum 1 / (0.4^2 + 0.15^2))
        assert o["err"] == pytest.approx(np.sqrt(0.4**2 + 0.15**2) / np.sqrt(both.sum()))
        pulls.append((o["offset"] - 0.2) / o["err"])
        hits += abs(pulls[-1]) < 2
    assert hits / 40 >= 0.85  # 95.4 % expected; P(< 35 of 40) < 2 % (binomial)
    assert 0.7 < np.std(pulls) < 1.3


def test_zero_point_reference_and_tie(grid):
    cols, _ = two_methods(7, 0.3)
    t = groups.member_table(cols, ["tf", "sbf"], 0, 0)
    sums = groups.zero_point_sums(t, ["tf", "sbf"])
    fit = groups.fit_zero_points(sums, ["tf", "sbf"], zero_point_errors={"tf": 0.1, "sbf": 0.05})
    assert fit["reference"] == "sbf" and fit["offsets"]["tf"]["offset"] == pytest.approx(-0.3, abs=0.1)
    fit["applied"] = True
    g, m = groups.reduce_partition(t, ["tf", "sbf"], grid, zero_point=fit)
    only_tf = ~np.isfinite(cols["sbf_mu"])
    row = m.column("row").to_numpy()
    # a TF-only galaxy moves by exactly -offset(tf); its systematic error gains the offset's error
    tied = dict(zip(row, m.column("group_mu").to_numpy()))
    sys = dict(zip(row, m.column("group_mu_err_sys").to_numpy()))
    i = int(np.flatnonzero(only_tf)[0])
    off = fit["offsets"]["tf"]
    assert tied[i] == pytest.approx(cols["tf_mu"][i] - off["offset"])
    assert sys[i] == pytest.approx(np.hypot(0.1, off["err"]))


def test_reduce_shards_bounded_partitions(grid, tmp_path):
    """Three shards, partitions by key hash: the same groups as one partition in memory, and every
    member's group columns back in its shard's row order."""
    cols, true, gid, bad = simulated(4, n_groups=25, size=6, n_outliers=5)
    n = len(gid)
    perm = np.random.default_rng(0).permutation(n)  # members of a group spread over shards
    shards = []
    for s, idx in enumerate(np.array_split(perm, 3)):
        fp = f"fp{s}"
        base = tmp_path / f"shard{s}.parquet"
        io.write_stage_columns({"galaxy_id": cols["galaxy_id"].take(pa.array(idx)),
                                "group_id": cols["group_id"].take(pa.array(idx))}, base, fp)
        io.write_stage_columns({k: cols[k][idx] for k in ("z_cmb", "z_cmb_err")}, tmp_path / f"z{s}.parquet", fp)
        io.write_stage_columns({k: cols[k][idx] for k in cols if k.startswith("tf_")}, tmp_path / f"tf{s}.parquet",
                               fp)
        shards.append({"shard": base, "redshift": tmp_path / f"z{s}.parquet", "tf": tmp_path / f"tf{s}.parquet"})
    out = [tmp_path / f"grp{s}.parquet" for s in range(3)]
    summary = groups.reduce_shards(shards, ["tf"], grid, tmp_path / "groups.parquet", out)
    assert summary["groups"]["n_groups"] == 25 and summary["groups"]["n_members_rejected"] >= len(bad)
    g_disk = pq.read_table(tmp_path / "groups.parquet")
    g_mem, _ = groups.reduce_partition(groups.member_table(cols, ["tf"], 0, 0), ["tf"], grid)
    a = dict(zip(g_disk.column("group_id").to_pylist(), g_disk.column("mu").to_pylist()))
    b = dict(zip(g_mem.column("group_id").to_pylist(), g_mem.column("mu").to_pylist()))
    assert a.keys() == b.keys() and all(a[k] == pytest.approx(b[k]) for k in a)
    for s, idx in enumerate(np.array_split(perm, 3)):
        m = pq.read_table(out[s])
        assert io.read_fingerprint(out[s]) == f"fp{s}"
        assert m.column("group_mu").to_pylist() == pytest.approx([a[f"grp{gid[i]}"] for i in idx])
        rej = m.column("group_rejected").to_numpy(zero_copy_only=False)
        assert rej[np.isin(idx, bad)].all()


@pytest.mark.slow
def test_end_to_end_with_group_catalog(tmp_path):
    """A catalog with the user's group column (named 'grp' there, mapped in config) and the tie applied:
    every row in the product, one groups.parquet row per group, members sharing their group's values."""
    import json
    import os
    import subprocess
    import sys

    from conftest import small_catalog

    n = 250
    cols = small_catalog(n, seed=5)
    cols["grp"] = np.array([f"G{i // 6}" if i < 60 else None for i in range(n)], dtype=object)  # 10 of 6
    pq.write_table(pa.table(cols), tmp_path / "cat.parquet")
    conf = {"catalog": "cat.parquet", "run": "grp", "shard_rows": 100, "columns": {"group_id": "grp"},
            "zero_point": {"apply": True, "reference": "tully_fisher"}}
    (tmp_path / "run.yaml").write_text(json.dumps(conf))
    env = {k: v for k, v in os.environ.items() if k != "SNAKEMAKE_PROFILE"}
    result = subprocess.run([sys.executable, "-m", "galdist.cli", "run", "run.yaml", "--cores", "2"],
                            cwd=tmp_path, env=env, capture_output=True, text=True, timeout=900)
    assert result.returncode == 0, (result.stdout + result.stderr)[-4000:]
    run = tmp_path / "galdist-results" / "grp"
    product = pq.read_table(run / "distances.parquet").to_pandas()
    assert list(product["galaxy_id"]) == list(cols["galaxy_id"])
    g = pq.read_table(run / "groups.parquet").to_pandas()
    assert len(g) == 10 + 190 and g["from_catalog"].sum() == 10
    assert (g.loc[g["from_catalog"], "n_members"] == 6).all()
    named = product.iloc[:60]
    assert (named.groupby("group_id")["group_mu"].nunique(dropna=False) == 1).all()
    assert (named["group_n_members"] == 6).all() and (product.iloc[60:]["group_n_members"] == 1).all()
    summary = json.loads((run / "summary.json").read_text())
    assert summary["zero_point"]["applied"] and summary["zero_point"]["reference"] == "tf"
    assert summary["groups"]["n_groups"] == 200
    meta = pq.read_schema(run / "distances.parquet").field("group_mu").metadata
    assert meta[b"unit"] == b"mag"
    # the eta likelihoods: row for row with the product, their summaries in it
    lk = pq.read_table(run / "eta_likelihoods.parquet")
    assert lk.column("galaxy_id").to_pylist() == list(product["galaxy_id"])
    grid = json.loads(lk.schema.metadata[b"galdist.eta_grid"])
    eta = np.linspace(grid["min"], grid["max"], grid["n"])
    # TF's are analytic Gaussians: not stored, rebuilt from the product's tf_mu, tf_mu_err and mu_z
    kinds = lk.column("tf_eta_like_kind").to_numpy()
    assert lk.column("tf_eta_like").null_count == len(kinds) and set(kinds) <= {likelihood.NONE, likelihood.GAUSSIAN}
    like = likelihood.dense_curves(lk.column("tf_eta_like"), kinds, product["tf_mu"], product["tf_mu_err"],
                                   product["mu_z"], eta)
    has = np.isfinite(product["tf_eta_mode"].to_numpy())
    assert has.sum() > 50
    # the exact mode (eta0) against the grid's highest node: half a step apart at most
    np.testing.assert_allclose(eta[np.argmax(like[has], axis=1)], product["tf_eta_mode"].to_numpy()[has],
                               atol=grid["step"] / 2 + 1e-6)
    assert {"best_eta_like", "sbf_eta_like"} <= set(lk.column_names)
