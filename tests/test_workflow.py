"""End-to-end runs of the workflow on the demo survey and on a user catalog.

The demo survey is generated forward through the shipped calibrations, extinction
law and templates (galdist.demo), so the pipeline must recover a zero-point offset
consistent with zero: that is a closure test of the whole chain, not a check
against published numbers (those live in the per-module tests).
"""

from __future__ import annotations

import json
import re

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import open_in_browser, run_snakemake, small_catalog

pytestmark = pytest.mark.slow
DEMO = ("--config", "demo={n_galaxies: 1500}", "shard_rows=500")


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    from conftest import copy_workflow

    wf = copy_workflow(tmp_path_factory.mktemp("demo"))
    result = run_snakemake(wf, *DEMO)
    assert result.returncode == 0, result.stderr[-3000:]
    return wf


def test_every_row_in_every_product(demo_run):
    run = demo_run / "results" / "demo"
    ingest = json.loads((run / "ingest_summary.json").read_text())
    assert ingest["rows_in"] == ingest["rows_out"] == 1500
    assert ingest["shards"] == 3
    product = pq.read_table(run / "distances.parquet")
    source = pq.read_table(demo_run / "results" / "demo-input" / "corvid_reach_survey.parquet")
    assert product.column("galaxy_id").to_pylist() == source.column("galaxy_id").to_pylist()  # input order
    for stage in ("extinction", "kcorr", "redshift"):
        files = sorted((run / "shards" / stage).glob("part-*.parquet"))
        assert sum(pq.read_metadata(f).num_rows for f in files) == 1500, stage
    summary = json.loads((run / "summary.json").read_text())
    assert summary["rows_in"] == summary["rows_out"] == 1500


def test_zero_point_consistent_with_zero(demo_run):
    stats = json.loads((demo_run / "results" / "demo" / "summary.json").read_text())["statistics"]
    assert set(stats["methods"]) == {"tf", "sbf", "fp"}  # the demo's config runs every method
    for method in ("tf", "sbf", "fp"):
        s = stats["methods"][method]
        assert s["n_used"] > 100, method
        assert abs(s["wmean"]) < 3 * s["wmean_err"], (method, s["wmean"], s["wmean_err"])
        # implied H0 = 70 * 10^(-0.2 <dmu>): consistent with the assumed 70 within 3 sigma
        assert abs(s["h0_implied"] - 70.0) < 3 * s["h0_implied_err_stat"]
    # whether an implied H0 is a measurement follows the calibration's zero point: the shipped
    # FP plane's assumes H0 (its file's zero_point_h0), the demo's TF and SBF files do not
    assert stats["methods"]["fp"]["h0_implied_independent"] is False
    assert "not independent" in stats["methods"]["fp"]["h0_implied_note"]
    assert stats["methods"]["tf"]["h0_implied_independent"] is True


def test_product_metadata(demo_run):
    path = demo_run / "results" / "demo" / "distances.parquet"
    schema = pq.read_schema(path)
    prov = json.loads(schema.metadata[b"galdist.provenance"])
    assert prov["config"]["run"] == "demo"
    for method, cal in prov["calibrations"].items():
        assert len(cal["sha256"]) == 64 and cal["text"] and cal["reference"], method
    assert len(prov["inputs"][0]["sha256"]) == 64
    assert prov["packages"]["numpy"] and prov["created_utc"]
    assert any("face-on" in c for c in prov["cautions"])
    units = {f.name: f.metadata[b"unit"].decode() for f in schema if f.metadata and b"unit" in f.metadata}
    assert units["ra"] == "deg" and units["tf_d_mpc"] == "Mpc" and units["tf_vpec"] == "km / s"
    assert units["mu_z"] == "mag" and units["A_V"] == "mag"


def test_product_describes_itself(demo_run, tmp_path):
    """The demo product as a user outside galdist reads it: astropy gives every column of
    the run's column dictionary its unit and description without a warning, COLUMNS.md
    lists every column, best_method says 'none' as summary.json does, cz_cmb_kms is c
    z_cmb, and a FITS export keeps units (TUNIT) and descriptions (TCOMM)."""
    import warnings

    import astropy.units as u
    from astropy.io import fits
    from astropy.table import Table

    from galdist import dictionary, export
    from galdist.redshift import C_KMS

    run = demo_run / "results" / "demo"
    path = run / "distances.parquet"
    config = json.loads(pq.read_schema(path).metadata[b"galdist.provenance"])["config"]
    entries = dictionary.by_name(dictionary.for_run(list(config["bands"]), config["methods"]))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        t = Table.read(path)
    assert set(t.colnames) <= set(entries)
    for name in t.colnames:
        e = entries[name]
        assert t[name].description == e.description, name
        if e.dtype.startswith("float"):
            assert t[name].unit == u.Unit(e.unit), name
    assert t["tf_d_mpc"].quantity.unit == u.Mpc
    columns_md = (run / "COLUMNS.md").read_text(encoding="utf-8")
    assert all(f"| `{n}` |" in columns_md for n in t.colnames)
    summary = json.loads((run / "summary.json").read_text())
    labels = pq.read_table(path, columns=["best_method"]).column(0).to_pylist()
    assert "" not in labels and labels.count("none") == summary["best_method"]["none"] > 0
    # cz_cmb_kms is stored as float32 (dictionary.PRECISION_NOTE), z_cmb in full: one rounding, 2^-24
    np.testing.assert_allclose(np.asarray(t["cz_cmb_kms"]), C_KMS * np.asarray(t["z_cmb"]), rtol=2.0**-24)
    export.export(path, tmp_path / "d.fits", "fits", ["galaxy_id", "cz_cmb_kms", "tf_mu", "tf_flags"])
    header = fits.getheader(tmp_path / "d.fits", 1)
    assert (header["TUNIT2"], header["TUNIT3"]) == ("km s-1", "mag")
    assert header["TCOMM3"].startswith("Tully-Fisher distance modulus")


def test_interpolated_values_match_their_direct_computation(demo_run):
    """mu_z, A_<band> and the K(z) tables in the demo product against their direct
    computation, through the factories the rules use (galdist.stages). Tolerances are
    galdist's own requirements: mu(z) grid within 1e-4 mag of astropy's distmod
    (galdist.redshift docstring), K(z) tables within 1e-3 mag (the benchmark's target),
    A exact to rounding."""
    from galdist import filters, kcorr, redshift, stages

    run = demo_run / "results" / "demo"
    path = run / "distances.parquet"
    config = json.loads(pq.read_schema(path).metadata[b"galdist.provenance"])["config"]
    bands = list(config["bands"])
    t = pq.read_table(path, columns=["z_helio", "z_cmb", "mu_z", "ebv_used", *(f"A_{b}" for b in bands)])
    col = {c: t.column(c).to_numpy(zero_copy_only=False) for c in t.column_names}
    # mu_z: the interpolation grid against astropy at z_cmb
    ok = np.isfinite(col["mu_z"]) & (col["z_cmb"] > 0)
    exact = redshift.make_cosmology(**config["redshift"]["cosmology"]).distmod(col["z_cmb"][ok]).value
    assert ok.sum() > 1000 and np.max(np.abs(col["mu_z"][ok] - exact)) < 1e-4
    # A_<band>: R of the configured law through each band's curve, times E(B-V)
    r = stages.extinction_coefficients(config).per_true_ebv()
    for b in bands:
        # both stored as float32 (dictionary.PRECISION_NOTE): two roundings of at most 2^-24 each
        np.testing.assert_allclose(col[f"A_{b}"], r[b] * col["ebv_used"].astype(float), rtol=2.0**-23 * 1.01,
                                   atol=0, err_msg=b)
    # K(z): the grid's tables, linear in z, against direct synthetic photometry at the
    # galaxies' redshifts, for every template (tests the grid, not the template matching)
    grid = kcorr.KGrid.from_file(run / "grids" / "kcorr_grid.npz")
    templates = kcorr.load_templates(config["kcorr"]["templates"])
    curves = filters.load_bands(config["bands"])
    z = col["z_helio"][np.isfinite(col["z_helio"])][:200]
    for b in bands:
        direct = kcorr.k_correction(curves[b], templates.wave, templates.flux_lambda, z)  # (templates, z)
        for i, name in enumerate(templates.names):
            table = grid.k[b][grid.index(name)]
            assert np.max(np.abs(np.interp(z, grid.z, table) - direct[i])) < 1e-3, (b, name)


def test_plots_and_report(demo_run):
    plots = demo_run / "results" / "demo" / "plots"
    names = ["hubble_diagram", "tf_relation", "sbf_relation", "fp_relation", "dmu_histograms", "dmu_cz",
             "dmu_predictor", "method_comparison", "vpec_sky"]
    assert sorted(p.stem for p in plots.glob("*.png")) == sorted(names)
    for name in names:
        assert (plots / f"{name}.png").stat().st_size > 10_000, name
    # the run's own report shows every plot with its caption
    page = (demo_run / "results" / "demo" / "report.html").read_text()
    for name in names:
        assert f"<figure id='{name}'>" in page, name
    assert "Fundamental Plane seen edge-on" in page and "selection (Malmquist-type) bias" in page
    result = run_snakemake(demo_run, *DEMO, "--report", "report.html")
    assert result.returncode == 0, result.stderr[-3000:]
    html = (demo_run / "report.html").read_text(errors="replace")
    assert "hubble_diagram.png" in html and "Peculiar velocities" in html


def test_run_report_opens_in_a_browser(demo_run, tmp_path):
    """results/<run>/report.html, built by the workflow: the key numbers of summary.json
    appear as text in what Chromium renders, every image decodes, the file stays small."""
    run = demo_run / "results" / "demo"
    page = run / "report.html"
    assert page.stat().st_size < 3_000_000
    stats = json.loads((run / "summary.json").read_text())["statistics"]["methods"]
    dom, shot = open_in_browser(page, tmp_path)
    assert "IMAGES LOADED" in dom
    assert dom.count("<img") == len(list((run / "plots").glob("*.png")))
    for s in stats.values():
        assert f"<b>{s['n_used']}</b> galaxies used" in dom
        assert f"implied H0 = {s['h0_implied']:.1f} ± {s['h0_implied_err_stat']:.1f}" in dom
    assert shot.stat().st_size > 10_000


def _jobs(dry_run_output: str) -> dict:
    """Job counts per rule from the table a dry run prints."""
    counts = {}
    for line in dry_run_output.splitlines():
        m = re.match(r"^(\w+)\s+(\d+)$", line.strip())
        if m and m.group(1) != "total":
            counts[m.group(1)] = int(m.group(2))
    return counts


@pytest.mark.parametrize("method,override", [
    ("tully_fisher", "tully_fisher={calibration: tf_ks_masters_2008, band: Ks}"),
    ("tully_fisher", "tully_fisher={min_inclination_deg: 50}"),
    ("sbf", "sbf={calibration: sbf_tonry1997_cousins_i, mc_draws: 20}"),
    ("fp", "fp={mc_draws: 20}"),
])
def test_calibration_change_reruns_only_that_method(demo_run, method, override):
    result = run_snakemake(demo_run, *DEMO, override, "-n")
    out = result.stdout + result.stderr
    assert result.returncode == 0, out[-2000:]
    jobs = _jobs(out)
    # one distance job per shard, all of them the changed method's
    assert jobs == {"distance": 3, "crosscheck_statistics": 1, "groups": 1, "assemble_part": 3, "assemble": 1,
                    "plots": 1, "run_report": 1, "all": 1}, jobs
    # per-shard stage outputs (the groups job's one folder of member columns and the product's
    # parts aside: they gather every stage of a shard)
    planned = [line.split("output:")[1] for line in out.splitlines()
               if line.strip().startswith("output:") and "/shards/" in line
               and "/shards/groups" not in line and "/shards/assembly" not in line]
    assert len(planned) == 3 and all(f"/shards/{method}/" in p for p in planned), planned


def test_other_calibration_writes_beside_not_over(demo_run):
    override = "tully_fisher={calibration: tf_ks_masters_2008, band: Ks}"
    result = run_snakemake(demo_run, *DEMO, override, "-n")
    assert "shards/tully_fisher/tf_ks_masters_2008/part-00000.parquet" in result.stdout + result.stderr


def test_user_catalog_by_name_on_the_command_line(workflow_copy):
    cols = small_catalog(25)
    cols["survey_objid"] = np.arange(25, dtype=np.int64) + 2**59 + 7  # beyond float64's exact integers
    cols["stellar_mass"] = np.linspace(9.0, 11.0, 25)
    pq.write_table(pa.table(cols), workflow_copy / "my.parquet")
    result = run_snakemake(workflow_copy, "--config", "catalog=my.parquet", "run=mine",
                           "keep_columns=[survey_objid, stellar_mass]")
    assert result.returncode == 0, result.stderr[-3000:]
    product = pq.read_table(workflow_copy / "results" / "mine" / "distances.parquet")
    assert product.num_rows == 25
    assert np.isfinite(product.column("mu_z").to_numpy()).all()
    # the kept columns, prefixed, as they were in the catalog
    assert product.column("user_survey_objid").to_pylist() == cols["survey_objid"].tolist()
    assert product.column("user_stellar_mass").to_pylist() == cols["stellar_mass"].tolist()
    assert "user_survey_objid" in (workflow_copy / "results" / "mine" / "COLUMNS.md").read_text()
    # a name the catalog lacks stops before any job, named
    result = run_snakemake(workflow_copy, "--config", "catalog=my.parquet", "run=mine2",
                           "keep_columns=[stellar_mas]", "-n")
    out = result.stdout + result.stderr
    assert result.returncode != 0 and "keep_columns" in out and "'stellar_mas'" in out, out[-2000:]


def test_dry_run_shows_the_dag(workflow_copy):
    result = run_snakemake(workflow_copy, "-n")
    out = result.stdout + result.stderr
    assert result.returncode == 0, out[-2000:]
    assert "demo_catalog" in out and "ingest" in out


def test_product_in_parts_is_the_same_table(workflow_copy):
    """product_layout parts: a folder of per-shard parts that reads as the one file would;
    switching the layout replaces the other one (never both beside each other)."""
    from galdist import export

    cols = small_catalog(250)
    pq.write_table(pa.table(cols), workflow_copy / "my.parquet")
    args = ("--config", "catalog=my.parquet", "run=parts", "shard_rows=100")
    result = run_snakemake(workflow_copy, *args, "product_layout=parts")
    assert result.returncode == 0, result.stderr[-3000:]
    run = workflow_copy / "results" / "parts"
    parts = sorted((run / "distances").glob("part-*.parquet"))
    assert [p.name for p in parts] == ["part-00000.parquet", "part-00001.parquet", "part-00002.parquet"]
    assert sorted(p.name for p in (run / "eta_likelihoods").glob("*.parquet")) == [p.name for p in parts]
    assert not (run / "distances.parquet").exists()
    dataset = pq.read_table(run / "distances")  # pyarrow reads the folder as one table
    assert dataset.column("galaxy_id").to_pylist() == list(cols["galaxy_id"])  # input order
    summary = json.loads((run / "summary.json").read_text())
    assert summary["product"] == {"layout": "parts", "path": "distances/", "parts": 3}
    assert summary["rows_out"] == 250
    fits_out = workflow_copy / "from_parts.fits"
    assert export.export(run / "distances", fits_out, "fits")["rows"] == 250

    result = run_snakemake(workflow_copy, *args, "product_layout=file")
    assert result.returncode == 0, result.stderr[-3000:]
    assert not (run / "distances").exists() and not (run / "eta_likelihoods").exists()
    one = pq.read_table(run / "distances.parquet")
    assert one.num_rows == 250 and one.schema.names == dataset.schema.names
    import pandas as pd

    pd.testing.assert_frame_equal(one.to_pandas(), dataset.to_pandas())  # the same values, row for row
    assert pq.read_table(run / "eta_likelihoods.parquet").num_rows == 250
    # the parts were temporary: joined into the one file, then removed
    assert not list((run / "shards" / "assembly").glob("part-*.parquet"))
