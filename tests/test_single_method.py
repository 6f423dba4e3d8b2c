"""End-to-end runs with one distance method: a Tully-Fisher-only HI survey (no SBF or FP
columns, no Ks magnitudes in the catalog), an SBF-only and a Fundamental-Plane-only
early-type sample (no other method's columns and no broadband magnitudes at all), each
through `galdist run` from a folder outside the code checkout, with the default bands
(V, I, J, Ks) still configured.

Every input row must reach distances.parquet in input order, the absent method must
leave no columns, jobs, statistics or plots behind, summary.json must say plainly that
no method pair ran (an empty ``pairs`` mapping), and mu_best must be the one method's
distance wherever that method is usable.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import small_catalog
from galdist import flags
from galdist.columns import method_columns

pytestmark = pytest.mark.slow

N_ROWS = 300
PREFIX = {"tully_fisher": "tf", "sbf": "sbf", "fp": "fp"}
OTHERS = {m: [o for o in PREFIX if o != m] for m in PREFIX}


def _catalog(method: str) -> pa.Table:
    """small_catalog without the other method's columns, rows shuffled so that input
    order is not the sorted order of galaxy_id."""
    cols = small_catalog(N_ROWS, seed=11)
    for other in OTHERS[method]:
        for c in method_columns(other):
            cols.pop(c.name, None)
    # bands no stage reads need no magnitude columns: Ks never, V and I only for the
    # K-correction colour (the SBF- and FP-only runs set kcorr.colour_pair: null)
    unused = ("Ks",) if method == "tully_fisher" else ("V", "I", "Ks")
    for b in unused:
        del cols[f"mag_{b}"], cols[f"mag_{b}_err"]
    order = np.random.default_rng(4).permutation(N_ROWS)
    return pa.table({k: np.asarray(v)[order] for k, v in cols.items()})


@pytest.fixture(scope="module", params=["tully_fisher", "sbf", "fp"])
def single_run(request, tmp_path_factory):
    method = request.param
    folder = tmp_path_factory.mktemp(f"only-{method}")  # the user's own folder, not the checkout
    catalog = _catalog(method)
    pq.write_table(catalog, folder / "cat.parquet")
    conf = {"catalog": "cat.parquet", "run": "single", "methods": [method], "shard_rows": 100}
    if method != "tully_fisher":
        conf["kcorr"] = {"colour_pair": None}
    (folder / "run.yaml").write_text(json.dumps(conf))
    env = {k: v for k, v in os.environ.items() if k != "SNAKEMAKE_PROFILE"}
    result = subprocess.run([sys.executable, "-m", "galdist.cli", "run", "run.yaml", "--cores", "2"],
                            cwd=folder, env=env, capture_output=True, text=True, timeout=900)
    assert result.returncode == 0, (result.stdout + result.stderr)[-4000:]
    return method, folder / "galdist-results" / "single", catalog


def test_every_row_in_input_order_without_the_other_method(single_run):
    method, run, catalog = single_run
    product = pq.read_table(run / "distances.parquet")
    assert product.column("galaxy_id").to_pylist() == catalog.column("galaxy_id").to_pylist()
    p = PREFIX[method]
    names = product.column_names
    for other in OTHERS[method]:
        assert not [n for n in names if n.startswith(f"{PREFIX[other]}_")], other
        assert not {c.name for c in method_columns(other)} & set(names), other
    for c in ("mu", "mu_err", "flags", "dmu", "vpec", "vpec_lr"):
        assert f"{p}_{c}" in names, c
    assert np.isfinite(product.column(f"{p}_mu").to_numpy(zero_copy_only=False)).sum() > 0
    # no job of an absent method ran
    assert not any((run / "shards" / other).exists() for other in OTHERS[method])
    assert len(list((run / "shards" / method).glob("*/part-*.parquet"))) == 3


def test_mu_best_is_the_one_method(single_run):
    method, run, _ = single_run
    p = PREFIX[method]
    t = pq.read_table(run / "distances.parquet").to_pandas()
    mu, err, fl = t[f"{p}_mu"].to_numpy(), t[f"{p}_mu_err"].to_numpy(), t[f"{p}_flags"].to_numpy()
    usable = (np.isfinite(mu) & np.isfinite(err) & (err > 0)
              & ((fl & ~np.uint32(flags.Method.LOCAL_FLOW)) == 0))
    assert 0 < usable.sum() < len(t)
    assert (t["best_method"].to_numpy() == np.where(usable, p, "none")).all()  # one spelling, as summary.json
    # (sum w mu) / (sum w) of one term: equal to rounding
    np.testing.assert_allclose(t["mu_best"].to_numpy()[usable], mu[usable], rtol=1e-14)
    np.testing.assert_allclose(t["mu_best_err"].to_numpy()[usable], err[usable], rtol=1e-14)
    assert np.isnan(t["mu_best"].to_numpy()[~usable]).all()
    summary = json.loads((run / "summary.json").read_text())
    assert summary["best_method"] == {"none": int((~usable).sum()), p: int(usable.sum())}


def test_summary_has_the_one_method_and_no_pairs(single_run):
    method, run, _ = single_run
    p = PREFIX[method]
    summary = json.loads((run / "summary.json").read_text())
    assert summary["rows_in"] == summary["rows_out"] == N_ROWS
    assert summary["methods"] == [method]
    stats = summary["statistics"]
    assert stats["pairs"] == {}
    assert list(stats["methods"]) == [p]
    s = stats["methods"][p]
    product = pq.read_table(run / "distances.parquet", columns=[f"{p}_mu", f"{p}_flags"])
    assert s["n_rows"] == N_ROWS
    assert s["n_measured"] == int(np.isfinite(product.column(f"{p}_mu").to_numpy(zero_copy_only=False)).sum())
    assert s["n_used"] > 10 and np.isfinite(s["wmean"]) and s["h0_implied"] > 0
    outliers = flags.has(product.column(f"{p}_flags").to_numpy(), flags.Method.OUTLIER)
    assert summary["flag_counts"][f"{p}_flags"]["OUTLIER"] == int(outliers.sum()) == s["n_outliers"]
    assert not any(f"{PREFIX[other]}_flags" in summary["flag_counts"] for other in OTHERS[method])
    assert list(summary["calibrations"]) == [method]


def test_plots_are_those_of_the_method(single_run):
    method, run, _ = single_run
    # no method-against-method plot: there is no second method
    expected = {"hubble_diagram", f"{PREFIX[method]}_relation", "dmu_histograms", "dmu_cz", "dmu_predictor",
                "vpec_sky"}
    pngs = list((run / "plots").iterdir())
    assert {p.name for p in pngs} == {f"{n}.png" for n in expected}
    for png in pngs:
        data = png.read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 10_000, png.name
