"""The galdist command: init, check, run, summary, flags.

- init reads a CSV, a FITS file and a Parquet directory whose columns have foreign
  names and units (cz as 'vhel' in km/s, RA in hours or radians, widths in m/s, b/a in
  per cent, 'Imag', 'KMAG', 'galaxy_name', ...) and writes a commented config that
  ``galdist check`` accepts; a catalog no shipped calibration fits gets a TODO that
  check refuses; a log width is never taken for w50.
- run works from a folder outside the checkout, puts every input row in
  <tmp>/galdist-results/<run>/distances.parquet, refuses while another galdist run
  holds the run's lock (exit 2) or while a live Snakemake works in the folder, and
  after SIGKILLs of the whole driver process group (after ingest, among the per-shard
  jobs, during assembly) the same command finishes with the clean run's products.

Catalog values are invented (conftest.small_catalog); nothing depends on published values.
"""

from __future__ import annotations

import fcntl
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml

from conftest import REPO, file_bytes, small_catalog, start_and_kill
from galdist import cli, propose
from test_determinism import assert_same_products

C_KMS = 299792.458
N_ROWS = 300
RUN = "survey"


def galdist(*args: str, cwd: Path, timeout: float = 600) -> subprocess.CompletedProcess:
    env = dict(os.environ)
    env.pop("SNAKEMAKE_PROFILE", None)
    return subprocess.run([sys.executable, "-m", "galdist.cli", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=timeout)


# --- catalogs with foreign column names and units ----------------------------------------

def write_csv(folder: Path) -> Path:
    """cz in km/s as 'vhel', RA in hours, widths in m/s, Cousins magnitudes 'Imag'/'Vmag', SBF, E(B-V),
    Fundamental-Plane columns 'sigma', 'Re', 'mue_J' (J-band <mu_e>), 'aperture'."""
    c = small_catalog(N_ROWS, seed=11)
    df = pd.DataFrame({
        "galaxy_name": c["galaxy_id"], "RAJ2000": c["ra"] / 15.0, "DEJ2000": c["dec"],
        "vhel": c["z_helio"] * C_KMS, "e_vhel": c["z_helio_err"] * C_KMS,
        "W50": c["w50"] * 1000.0, "e_W50": c["w50_err"] * 1000.0, "logW": np.log10(c["w50"]),
        "ba": c["axis_ratio"], "e_ba": c["axis_ratio_err"],
        "Imag": c["mag_I"], "e_Imag": c["mag_I_err"], "Vmag": c["mag_V"], "e_Vmag": c["mag_V_err"],
        "mbar": c["sbf_mag"], "e_mbar": c["sbf_mag_err"], "V-I": c["sbf_color"], "e_V-I": c["sbf_color_err"],
        "E(B-V)": c["ebv"], "e_E(B-V)": c["ebv_err"], "Type": c["galaxy_class"], "remark": ["ok"] * N_ROWS,
        "sigma": c["fp_sigma"], "e_sigma": c["fp_sigma_err"], "aperture": c["fp_aperture_arcsec"],
        "Re": c["fp_re_arcsec"], "e_Re": c["fp_re_err"], "mue_J": c["fp_mu_e"], "e_mue_J": c["fp_mu_e_err"]})
    path = folder / "survey.csv"
    df.to_csv(path, index=False)
    return path


def write_fits(folder: Path) -> Path:
    """Upper-case FITS names, RA/Dec in radians, b/a in per cent, 2MASS J and Ks, no SBF."""
    from astropy.table import Table
    c = small_catalog(N_ROWS, seed=12)
    t = Table({"NAME": c["galaxy_id"].astype(str), "RA": np.radians(c["ra"]), "DEC": np.radians(c["dec"]),
               "CZ": c["z_helio"] * C_KMS, "CZ_ERR": c["z_helio_err"] * C_KMS,
               "W50_HI": c["w50"], "W50_HI_ERR": c["w50_err"],
               "AXIS_RATIO": 100 * c["axis_ratio"], "E_AXIS_RATIO": 100 * c["axis_ratio_err"],
               "KMAG": c["mag_Ks"], "E_KMAG": c["mag_Ks_err"], "JMAG": c["mag_Ks"] + 1.0, "E_JMAG": c["mag_Ks_err"],
               "EBV": c["ebv"], "EBV_ERR": c["ebv_err"]})
    path = folder / "survey.fits"
    t.write(path)
    return path


def write_parquet_dir(folder: Path) -> Path:
    """A two-file Parquet dataset: PGC numbers as ids, 'cz', 'whi', 'q', SDSS g with Cousins I, 'sbf_I', 'v_i'."""
    c = small_catalog(N_ROWS, seed=13)
    t = pa.table({"pgc": np.arange(1000, 1000 + N_ROWS), "RA": c["ra"], "Dec": c["dec"],
                  "cz": c["z_helio"] * C_KMS, "cz_err": c["z_helio_err"] * C_KMS,
                  "whi": c["w50"], "whi_err": c["w50_err"], "q": c["axis_ratio"], "q_err": c["axis_ratio_err"],
                  "gmag": c["mag_V"], "gmag_err": c["mag_V_err"], "Imag": c["mag_I"], "Imag_err": c["mag_I_err"],
                  "sbf_I": c["sbf_mag"], "sbf_I_err": c["sbf_mag_err"], "v_i": c["sbf_color"],
                  "v_i_err": c["sbf_color_err"], "ebv": c["ebv"]})
    path = folder / "survey_pq"
    path.mkdir()
    pq.write_table(t.slice(0, 150), path / "part-0.parquet")
    pq.write_table(t.slice(150), path / "part-1.parquet")
    return path


# expected proposals: columns, units, methods, calibrations
EXPECTED = {
    "csv": (write_csv,
            {"galaxy_id": "galaxy_name", "ra": "RAJ2000", "z_helio": "vhel", "z_helio_err": "e_vhel", "w50": "W50",
             "w50_err": "e_W50", "axis_ratio": "ba", "mag_I": "Imag", "mag_V_err": "e_Vmag", "sbf_mag": "mbar",
             "sbf_color": "V-I", "sbf_color_err": "e_V-I", "ebv": "E(B-V)", "ebv_err": "e_E(B-V)",
             "fp_sigma": "sigma", "fp_sigma_err": "e_sigma", "fp_aperture_arcsec": "aperture", "fp_re_arcsec": "Re",
             "fp_re_err": "e_Re", "fp_mu_e": "mue_J", "fp_mu_e_err": "e_mue_J"},
            {"z_helio": "km/s", "z_helio_err": "km/s", "ra": "hourangle", "w50": "m/s", "w50_err": "m/s"},
            ["tully_fisher", "sbf", "fp"], {"tully_fisher": "tf_i_tully_courtois_2012", "sbf": "sbf_tonry1997_cousins_i",
                                            "fp": "fp_j_magoulas_2012"}),
    "fits": (write_fits,
             {"galaxy_id": "NAME", "ra": "RA", "dec": "DEC", "z_helio": "CZ", "w50": "W50_HI",
              "w50_err": "W50_HI_ERR", "axis_ratio": "AXIS_RATIO", "mag_Ks": "KMAG", "mag_Ks_err": "E_KMAG"},
             {"ra": "rad", "dec": "rad", "z_helio": "km/s", "z_helio_err": "km/s", "axis_ratio": "percent",
              "axis_ratio_err": "percent"},
             ["tully_fisher"], {"tully_fisher": "tf_ks_masters_2008"}),
    "parquet": (write_parquet_dir,
                {"galaxy_id": "pgc", "ra": "RA", "dec": "Dec", "z_helio": "cz", "w50": "whi", "axis_ratio": "q",
                 "mag_g": "gmag", "mag_I": "Imag", "sbf_mag": "sbf_I", "sbf_color": "v_i"},
                {"z_helio": "km/s", "z_helio_err": "km/s"},
                ["tully_fisher", "sbf"], {"tully_fisher": "tf_i_tully_courtois_2012",
                                          "sbf": "sbf_tonry1997_cousins_i"}),
}


@pytest.mark.parametrize("kind", list(EXPECTED))
def test_init_proposes_a_config_that_check_accepts(tmp_path, kind):
    write, columns, units, methods, calibrations = EXPECTED[kind]
    catalog = write(tmp_path)
    init = galdist("init", catalog.name, "-o", "run.yaml", cwd=tmp_path)
    assert init.returncode == 0, init.stderr
    text = (tmp_path / "run.yaml").read_text()
    cfg = yaml.safe_load(text)
    for canonical, source in columns.items():
        assert cfg["columns"].get(canonical) == source, (canonical, cfg["columns"])
    assert cfg["units"] == units
    assert cfg["methods"] == methods
    for method, name in calibrations.items():
        assert cfg[method]["calibration"] == name
    assert cfg["extinction"]["source"] == "catalog"
    assert cfg["output_dir"] == "galdist-results"
    # every key line carries its reason
    for key in ("galaxy_id", "z_helio", "ra", "calibration", "colour_pair", "methods"):
        line = next(ln for ln in text.splitlines() if ln.strip().startswith(f"{key}:"))
        assert "#" in line, line
    check = galdist("check", "run.yaml", cwd=tmp_path)
    assert check.returncode == 0, check.stdout + check.stderr
    assert "✗" not in check.stdout and "catalog structure" in check.stdout


def test_init_details_of_the_csv_proposal(tmp_path, monkeypatch):
    """Bands with their filter curves and AB offsets; a log width is not w50; refuses to overwrite."""
    write_csv(tmp_path)
    monkeypatch.chdir(tmp_path)
    assert cli.main(["init", "survey.csv", "--run", RUN]) == 0
    text = Path("run.yaml").read_text()
    cfg = yaml.safe_load(text)
    assert cfg["run"] == RUN
    assert cfg["catalog"] == {"paths": ["survey.csv"], "format": "csv"}
    assert cfg["bands"] == {"V": {"filter": "bessell-V", "system": "Vega", "ab_minus_vega": 0.02},
                            "I": {"filter": "bessell-I", "system": "Vega", "ab_minus_vega": 0.45},
                            "J": {"filter": "twomass-J", "system": "Vega", "ab_minus_vega": 0.91}}
    assert cfg["kcorr"]["colour_pair"] == ["V", "I"]
    assert cfg["sbf"]["color_bands"] == ["V", "I"] and cfg["sbf"]["band"] == "I"
    # the Fundamental Plane's band from the surface brightness's name: J, a filter curve only
    assert cfg["fp"] == {"calibration": "fp_j_magoulas_2012", "band": "J"}
    assert "mue_J' reads as the mean surface brightness within R_e in J" in text
    assert "logW" not in cfg["columns"].values()
    assert "logW: a logarithm" in text
    assert "Blanton & Roweis 2007" in text
    assert cli.main(["init", "survey.csv"]) == 1  # run.yaml exists
    assert cli.main(["init", "survey.csv", "--force"]) == 0


def test_init_leaves_todos_that_check_refuses(tmp_path):
    """SDSS-only magnitudes: no shipped Tully-Fisher calibration fits; no E(B-V): a map is needed;
    an a/b column is mapped with a TODO, since galdist has no a/b unit."""
    c = small_catalog(200, seed=5)
    pd.DataFrame({"name": c["galaxy_id"], "ra": c["ra"], "dec": c["dec"], "z": c["z_helio"],
                  "zerr": c["z_helio_err"], "w50": c["w50"], "w50_err": c["w50_err"],
                  "a_b": 1 / c["axis_ratio"], "a_b_err": c["axis_ratio_err"],
                  "gmag": c["mag_V"], "gmag_err": c["mag_V_err"], "rmag": c["mag_I"],
                  "rmag_err": c["mag_I_err"]}).to_csv(tmp_path / "sdss.csv", index=False)
    init = galdist("init", "sdss.csv", cwd=tmp_path)
    assert init.returncode == 0, init.stderr
    text = (tmp_path / "run.yaml").read_text()
    cfg = yaml.safe_load(text)
    assert cfg["bands"]["g"] == {"filter": "sdss2010-g", "system": "AB", "ab_minus_vega": None}
    assert cfg["tully_fisher"]["band"] == "r"
    assert "TODO" in next(ln for ln in text.splitlines() if "calibration:" in ln)
    assert cfg["extinction"]["source"] == "healpix" and cfg["extinction"]["map_file"] is None
    assert "holds a/b" in text and "units" in cfg and "axis_ratio" not in cfg["units"]
    check = galdist("check", "run.yaml", cwd=tmp_path)
    assert check.returncode == 1
    out = check.stdout
    assert "✗" in out and "tully_fisher.calibration" in out and "extinction.map_file" in out


def test_init_takes_a_w20_width_and_says_so(tmp_path):
    c = small_catalog(50, seed=6)
    pd.DataFrame({"id": c["galaxy_id"], "ra": c["ra"], "dec": c["dec"], "z": c["z_helio"], "e_z": c["z_helio_err"],
                  "W20": c["w50"] + 20, "e_W20": c["w50_err"], "ba": c["axis_ratio"], "e_ba": c["axis_ratio_err"],
                  "Ks": c["mag_Ks"], "e_Ks": c["mag_Ks_err"]}).to_csv(tmp_path / "w20.csv", index=False)
    p = propose.propose(str(tmp_path / "w20.csv"))
    assert p.columns["w50"].value == "W20" and p.columns["w50_err"].value == "e_W20"
    cfg = yaml.safe_load(propose.render(p))
    assert cfg["tully_fisher"] == {"calibration": "tf_ks_masters_2008", "band": "Ks", "width_definition": "w20"}
    assert cfg["kcorr"]["colour_pair"] is None  # one band: no colour


def test_init_proposes_the_fundamental_plane_from_its_columns(tmp_path):
    """An early-type catalog with SDSS r surface brightnesses and no aperture column: fp with
    the r-band calibration, the band a filter curve, and a TODO naming the aperture."""
    c = small_catalog(60, seed=9)
    pd.DataFrame({"objid": c["galaxy_id"], "ra": c["ra"], "dec": c["dec"], "z": c["z_helio"], "zerr": c["z_helio_err"],
                  "veldisp": c["fp_sigma"], "veldisp_err": c["fp_sigma_err"], "r_e": c["fp_re_arcsec"],
                  "r_e_err": c["fp_re_err"], "mu_e_r": c["fp_mu_e"], "mu_e_r_err": c["fp_mu_e_err"],
                  "ebv": c["ebv"], "ebv_err": c["ebv_err"]}).to_csv(tmp_path / "early.csv", index=False)
    p = propose.propose(str(tmp_path / "early.csv"))
    assert p.methods == ["fp"]
    assert {k: p.columns[k].value for k in ("fp_sigma", "fp_sigma_err", "fp_re_arcsec", "fp_re_err", "fp_mu_e",
                                            "fp_mu_e_err")} == {
        "fp_sigma": "veldisp", "fp_sigma_err": "veldisp_err", "fp_re_arcsec": "r_e", "fp_re_err": "r_e_err",
        "fp_mu_e": "mu_e_r", "fp_mu_e_err": "mu_e_r_err"}
    cfg = yaml.safe_load(propose.render(p))
    assert cfg["fp"] == {"calibration": "fp_r_bernardi_2003", "band": "r"}
    assert cfg["bands"] == {"r": {"filter": "sdss2010-r", "system": "AB", "ab_minus_vega": None}}
    assert any("fp_aperture_arcsec" in t and "apply_aperture_correction" in t for t in p.todo)


@pytest.mark.parametrize("name, role", [
    ("PGC", "galaxy_id"), ("_RAJ2000", "ra"), ("DEJ2000", "dec"), ("decl", "dec"),
    ("vhel", "z_helio"), ("V_helio", "z_helio"), ("cz", "z_helio"), ("W50", "w50"), ("wHI", "w50"),
    ("b/a", "axis_ratio"), ("gmag", "mag_g"), ("mag_g", "mag_g"), ("g_mag", "mag_g"), ("Imag", "mag_I"),
    ("imag", "mag_i"), ("Ks", "mag_Ks"), ("kmag", "mag_Ks"), ("Kmag", "mag_Ks"), ("m_bar", "sbf_mag"),
    ("V-I", "sbf_color"), ("g_z", "sbf_color"), ("E(B-V)", "ebv"), ("logW", None), ("logW50", None),
    ("flux", None), ("vdisp", "fp_sigma"), ("sigma0", "fp_sigma"), ("R_e", "fp_re_arcsec"), ("Reff", "fp_re_arcsec"),
    ("mu_e", "fp_mu_e"), ("mue_r", "fp_mu_e"), ("aperture", "fp_aperture_arcsec"), ("logsigma", None)])
def test_column_names(name, role):
    m = propose.match_name(name)
    assert (m.role if m else None) == role


@pytest.mark.parametrize("name, role", [("e_vhel", "z_helio_err"), ("W50_err", "w50_err"),
                                        ("sigma_ba", "axis_ratio_err"), ("e_Imag", "mag_I_err"),
                                        ("Imag_error", "mag_I_err"), ("eVmag", "mag_V_err"), ("zerr", "z_helio_err"),
                                        ("e_V-I", "sbf_color_err"), ("err_mbar", "sbf_mag_err"),
                                        ("e_sigma", "fp_sigma_err"), ("Re_err", "fp_re_err"),
                                        ("e_mue_J", "fp_mu_e_err")])
def test_error_column_names(name, role):
    assert propose.match_name(name) is None
    assert propose.match_error(name)[1] == role


def test_check_names_a_bad_key_and_exits_1(tmp_path):
    write_csv(tmp_path)
    assert galdist("init", "survey.csv", cwd=tmp_path).returncode == 0
    cfg = (tmp_path / "run.yaml").read_text().replace("methods:", "method:")
    (tmp_path / "bad.yaml").write_text(cfg)
    check = galdist("check", "bad.yaml", cwd=tmp_path)
    assert check.returncode == 1
    assert "config" in check.stdout and "'method'" in check.stdout and "✗" in check.stdout


# --- flags -------------------------------------------------------------------------------

def test_flags_decodes_bits():
    out = galdist("flags", "5", "--column", "tf_flags", cwd=REPO)
    assert out.returncode == 0, out.stderr
    lines = out.stdout.splitlines()
    assert any("bit 0" in ln and "MISSING_INPUT" in ln for ln in lines)
    assert any("bit 2" in ln and "LOW_INCLINATION" in ln for ln in lines)
    assert not any("bit 1" in ln for ln in lines)
    assert "what to do" in out.stdout


def test_flags_unknown_column_and_undefined_bit(capsys):
    assert cli.main(["flags", "3", "--column", "nope"]) == 1
    err = capsys.readouterr().err
    assert all(c in err for c in ("quality_flags", "ext_flags", "kcorr_flags", "z_flags", "tf_flags", "sbf_flags"))
    assert cli.main(["flags", str(1 << 20 | 1), "--column", "z_flags"]) == 1
    out = capsys.readouterr().out
    assert "NO_REDSHIFT" in out and "bit 20" in out and "not defined for z_flags" in out
    assert cli.main(["flags", "0x2"]) == 0  # every column
    out = capsys.readouterr().out
    assert "REDSHIFT_INVALID" in out and "LOCAL_FLOW" in out and "OUT_OF_RANGE" in out


# --- export without a run ----------------------------------------------------------------

def test_export_writes_the_asked_columns_and_names_unknown_ones(tmp_path, capsys):
    from galdist import dictionary, product

    entries = dictionary.by_name(dictionary.for_run(["I"], ["tully_fisher"]))
    table = pa.table({"galaxy_id": ["a", "bb"], "tf_mu": [33.1, float("nan")],
                      "tf_flags": pa.array([0, 5], type=pa.uint32())})
    pq.write_table(table.cast(product.product_schema(table, entries, {}, {"galaxy_id": 2})),
                   tmp_path / "distances.parquet")
    assert cli.main(["export", str(tmp_path), "--format", "csv", "--columns", "galaxy_id,tf_mu"]) == 0
    assert "2 rows x 2 columns" in capsys.readouterr().out
    assert (tmp_path / "distances.csv").read_text().splitlines() == ["galaxy_id,tf_mu", '"a",33.1', '"bb",nan']
    side = json.loads((tmp_path / "distances.csv.columns.json").read_text())
    assert side["columns"][1]["unit"] == "mag"
    assert cli.main(["export", str(tmp_path), "--format", "fits", "--columns", "tf_mu", "tf_flagz"]) == 1
    assert "'tf_flagz'" in capsys.readouterr().err and not (tmp_path / "distances.fits").exists()
    assert cli.main(["export", str(tmp_path / "nowhere"), "--format", "ecsv"]) == 1
    assert "no distances.parquet" in capsys.readouterr().err


# --- summary without a run ---------------------------------------------------------------

def test_summary_of_a_single_method_run_with_missing_keys(tmp_path, capsys):
    (tmp_path / "summary.json").write_text(json.dumps({
        "rows_in": 10, "rows_out": 10, "methods": ["sbf"],
        "statistics": {"methods": {"sbf": {"n_used": 4, "wmean": 0.1, "wmean_err": None}}, "pairs": {}}}))
    assert cli.main(["summary", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "10 in, 10 out" in out and "galaxies used       4" in out
    assert "+0.100 ± –" in out and "implied H0          – ± –" in out


def test_summary_without_summary_json(tmp_path):
    out = galdist("summary", str(tmp_path), cwd=tmp_path)
    assert out.returncode == 1 and "no summary.json" in out.stderr


# --- run -----------------------------------------------------------------------------------

def test_snakemake_command_line(tmp_path):
    cmd = cli.snakemake_command(tmp_path / "run.yaml", tmp_path, cli.profile_dir("slurm"), cores=3,
                                output_dir="galdist-results", targets=["summary.json"])
    assert cmd[1:4] == ["-m", "snakemake", "summary.json"]  # targets before --config, which takes every word after it
    assert cmd[-2:] == ["--config", "output_dir=galdist-results"]
    assert cmd[cmd.index("--workflow-profile") + 1] == str(REPO / "profiles" / "slurm")
    assert cmd[cmd.index("-s") + 1] == str(REPO / "Snakefile")
    assert cmd[cmd.index("--directory") + 1] == str(tmp_path)
    assert cmd[cmd.index("--cores") + 1] == "3"


def prepare(folder: Path) -> Path:
    """The CSV catalog and its proposed config, with small shards."""
    folder.mkdir(parents=True, exist_ok=True)
    write_csv(folder)
    init = galdist("init", "survey.csv", "--run", RUN, cwd=folder)
    assert init.returncode == 0, init.stderr
    with open(folder / "run.yaml", "a") as fh:
        fh.write("shard_rows: 100\n")
    return folder


RUN_ARGS = ("run", "run.yaml", "--cores", "2")


@pytest.fixture(scope="module")
def clean(tmp_path_factory):
    """A clean `galdist run` in a folder outside the checkout."""
    folder = prepare(tmp_path_factory.mktemp("clean"))
    assert not folder.is_relative_to(REPO)
    result = galdist(*RUN_ARGS, cwd=folder)
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-3000:]
    return folder, result


def test_run_puts_every_row_in_the_product(clean):
    folder, result = clean
    run = folder / "galdist-results" / RUN
    table = pq.read_table(run / "distances.parquet", columns=["galaxy_id"])
    source = pd.read_csv(folder / "survey.csv")
    assert table.column("galaxy_id").to_pylist() == source["galaxy_name"].tolist()
    assert not (REPO / "galdist-results" / RUN).exists()
    out = result.stdout
    assert "[ingest] done" in out and "[distance] 9/9 jobs" in out and "[assemble] done" in out  # 3 methods x 3 shards
    assert "distances.parquet" in out.split("products in", 1)[1]
    log = (run / "logs" / "galdist-run.log").read_text()
    assert "Finished jobid" in log and "Rule: assemble" in log


def test_summary_of_the_run(clean):
    folder, _ = clean
    run = folder / "galdist-results" / RUN
    stats = json.loads((run / "summary.json").read_text())["statistics"]["methods"]
    out = galdist("summary", str(run), cwd=folder)
    assert out.returncode == 0, out.stderr
    assert f"{N_ROWS} in, {N_ROWS} out" in out.stdout
    for method, label in (("tf", "tully_fisher"), ("sbf", "sbf")):
        assert f"\n{label}" in out.stdout
        assert f"galaxies used       {stats[method]['n_used']} " in out.stdout


def test_run_refuses_while_another_holds_the_lock(clean):
    folder, _ = clean
    lock = folder / "galdist-results" / RUN / ".galdist-run.lock"
    with open(lock, "a") as fh:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        out = galdist(*RUN_ARGS, cwd=folder)
    assert out.returncode == 2
    assert "another galdist run is working on" in out.stderr
    assert "Finished jobid" not in out.stdout


def test_run_refuses_to_clear_the_lock_of_a_live_snakemake(clean, tmp_path):
    folder, _ = clean
    locks = folder / ".snakemake" / "locks"
    locks.mkdir(parents=True, exist_ok=True)
    (locks / "0.input.lock").write_text("")
    # a process that says 'snakemake' on its command line and works in this folder
    busy = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)", "snakemake"], cwd=folder)
    try:
        assert busy.pid in cli.live_snakemake_in(folder)
        assert busy.pid not in cli.live_snakemake_in(tmp_path)
        out = galdist(*RUN_ARGS, cwd=folder)
    finally:
        busy.kill()
        busy.wait()
        (locks / "0.input.lock").unlink()
    assert out.returncode == 2, out.stdout + out.stderr
    assert f"pid {busy.pid}" in out.stderr and "will not remove" in out.stderr


# --- SIGKILL and resume ------------------------------------------------------------------

def _start_and_kill(folder: Path, when, log: Path, timeout: float = 300) -> bool:
    """`galdist run` SIGKILLed (its whole process group) once ``when()`` holds; False if
    the run ended by itself first."""
    env = {k: v for k, v in os.environ.items() if k != "SNAKEMAKE_PROFILE"}
    killed, _ = start_and_kill([sys.executable, "-m", "galdist.cli", *RUN_ARGS], folder, env, when, log,
                               timeout, poll=0.005)
    return killed


def _files(run: Path) -> dict[str, bytes]:
    """Every product file (not logs, benchmarks, hidden temporary or lock files) and its
    bytes, as conftest.file_bytes compares them."""
    out = {}
    for p in sorted(run.rglob("*")):
        rel = p.relative_to(run)
        if p.is_file() and rel.parts[0] not in ("logs", "benchmarks") and not any(
                part.startswith(".") for part in rel.parts):
            out[str(rel)] = file_bytes(p)
    return out


@pytest.mark.slow
def test_sigkill_at_three_points_then_the_same_command_finishes(clean, tmp_path_factory):
    folder = prepare(tmp_path_factory.mktemp("killed"))
    run = folder / "galdist-results" / RUN
    logs = tmp_path_factory.mktemp("killed-logs")
    method_files = lambda: list((run / "shards").glob("tully_fisher/*/part-*.parquet")) + list(  # noqa: E731
        (run / "shards").glob("sbf/*/part-*.parquet"))
    phases = [
        ("after ingest", lambda: (run / "ingest_summary.json").exists(),
         lambda: not (run / "distances.parquet").exists()),
        ("per-shard jobs", lambda: len(method_files()) >= 1, lambda: len(method_files()) < 6),
        ("assembly", lambda: (run / "logs" / "assemble.log").exists(),
         lambda: not (run / "distances.parquet").exists()),
    ]
    outputs = []
    for i, (name, when, unfinished) in enumerate(phases):
        assert _start_and_kill(folder, when, logs / f"{i}.log"), f"the run ended before the {name} point"
        outputs.append((logs / f"{i}.log").read_text())
        assert unfinished(), f"the kill {name} landed too late"
    final = galdist(*RUN_ARGS, cwd=folder)
    assert final.returncode == 0, final.stdout[-3000:] + final.stderr[-3000:]
    # the killed runs left Snakemake's lock; the next start cleared it by itself
    assert any("clearing it" in out for out in outputs[1:] + [final.stdout])
    assert "[plots] done" in final.stdout
    clean_run = clean[0] / "galdist-results" / RUN
    assert_same_products(clean_run, run)
    ref, got = _files(clean_run), _files(run)
    assert sorted(ref) == sorted(got)
    differ = [k for k in ref if k not in ("distances.parquet", "summary.json") and ref[k] != got[k]]
    assert differ == []
    again = galdist(*RUN_ARGS, cwd=folder)
    assert again.returncode == 0 and "nothing to do" in again.stdout
