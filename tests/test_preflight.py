"""Checks before any job (galdist.preflight): config layering, passbands and systems
against the calibrations, method settings, and whole-column unit mistakes.

Each case is a catalog or config shaped like a real user's (one method only, their
own bands, AB magnitudes, velocities instead of redshifts). The AB - Vega offsets
used are Blanton & Roweis 2007, AJ 133, 734, Table 1 (secondary copy).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml

from conftest import REPO, copy_workflow, run_snakemake, small_catalog
from galdist import config as gconfig
from galdist import preflight

SDSS = {"g": {"filter": "sdss2010-g", "system": "AB"}, "i": {"filter": "sdss2010-i", "system": "AB"}}
JC = {"V": {"filter": "bessell-V", "system": "Vega", "ab_minus_vega": 0.02},
      "I": {"filter": "bessell-I", "system": "Vega", "ab_minus_vega": 0.45}}


def write(cols: dict, path, drop=(), rename=None) -> str:
    cols = {(rename or {}).get(k, k): v for k, v in cols.items() if k not in drop}
    pq.write_table(pa.table(cols), path)
    return str(path)


def errors(result, check=None):
    return [f.message for f in result.errors if check is None or f.check == check]


def sdss_catalog(tmp_path, n=40):
    cols = small_catalog(n)
    for b in ("V", "I", "Ks"):
        del cols[f"mag_{b}"], cols[f"mag_{b}_err"]
    cols |= {"mag_g": np.full(n, 15.0), "mag_g_err": np.full(n, 0.03),
             "mag_i": np.full(n, 14.0), "mag_i_err": np.full(n, 0.03)}
    return write(cols, tmp_path / "sdss.parquet")


# --- config layering --------------------------------------------------------------------

def test_user_bands_replace_the_default_bands(tmp_path):
    """A g/i catalog: the default V, I, Ks must not be merged in and asked for."""
    user = {"catalog": sdss_catalog(tmp_path), "bands": SDSS, "methods": ["tully_fisher"],
            "tully_fisher": {"band": "i", "accept_passband_mismatch": True},
            "kcorr": {"colour_pair": ["g", "i"]}}
    user["bands"] = {k: v | {"ab_minus_vega": 0.37 if k == "i" else 0.08} for k, v in SDSS.items()}
    result = preflight.check(user)
    assert list(result.config["bands"]) == ["g", "i"]
    assert result.errors == []
    # the override is visible, not silent
    warnings = [f.message for f in result.findings if f.level == "warning"]
    assert any("tully_fisher.band" in w and "SDSS i" in w and "Cousins I" in w for w in warnings)


def test_sections_still_merge_key_by_key():
    out = gconfig.layered({"tully_fisher": {"q0": 0.15}}, {"tully_fisher": {"q0": 0.2, "band": "I"}})
    assert out["tully_fisher"] == {"q0": 0.15, "band": "I"}
    assert gconfig.layered({"bands": {"g": {}}}, {"bands": {"V": {}, "I": {}}})["bands"] == {"g": {}}


def test_only_bands_a_stage_reads_need_magnitude_columns(tmp_path):
    """SBF-only catalog with no Ks and no TF columns: Ks is configured but nothing reads it."""
    cols = small_catalog(40)
    path = write(cols, tmp_path / "sbf.parquet", drop=("mag_Ks", "mag_Ks_err", "w50", "w50_err",
                                                      "axis_ratio", "axis_ratio_err"))
    result = preflight.check({"catalog": path, "methods": ["sbf"]})
    assert result.errors == [], errors(result)
    # the K-correction colour pair reads V and I: without them the message says why
    path = write(cols, tmp_path / "nov.parquet", drop=("mag_V", "mag_V_err", "mag_Ks", "mag_Ks_err"))
    result = preflight.check({"catalog": path, "methods": ["sbf"]})
    (msg,) = {m for m in errors(result, "catalog structure") if "'mag_V'" in m}
    assert "kcorr.colour_pair" in msg


def test_shipped_calibrations_by_name_from_any_folder(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    path = write(small_catalog(20), tmp_path / "cat.parquet")
    result = preflight.check({"catalog": path, "tully_fisher": {"calibration": "tf_ks_masters_2008", "band": "Ks"}})
    assert result.errors == [], errors(result)
    assert result.calibrations["tully_fisher"].name == "tf_ks_masters_2008"
    result = preflight.check({"catalog": path, "tully_fisher": {"calibration": "tf_no_such_relation"}})
    (msg,) = errors(result, "calibrations and stages")
    assert "tully_fisher.calibration" in msg and "tf_i_tully_courtois_2012" in msg  # lists what ships


# --- passbands and photometric systems ----------------------------------------------------

def test_sdss_i_against_the_cousins_i_calibration_is_refused(tmp_path):
    """The measured case: a g/i (AB) catalog against the Cousins-I Vega relation of
    Tully & Courtois 2012 (ApJ 749, 78) gave a +0.36 mag bias with no warning."""
    user = {"catalog": sdss_catalog(tmp_path), "bands": SDSS, "methods": ["tully_fisher"],
            "tully_fisher": {"band": "i"}, "kcorr": {"colour_pair": None}}
    msgs = errors(preflight.check(user), "passbands and systems")
    assert any("'tully_fisher.band'" in m and "SDSS i" in m and "Cousins I" in m for m in msgs), msgs
    assert any("'bands.i.ab_minus_vega'" in m and "AB" in m and "Vega" in m for m in msgs), msgs


def test_acs_sbf_calibration_on_v_minus_i_data_is_refused(tmp_path):
    """Blakeslee et al. 2009 (ApJ 694, 556) is ACS z850 vs (g475 - z850): not V - I."""
    path = write(small_catalog(20), tmp_path / "cat.parquet")
    user = {"catalog": path, "methods": ["sbf"], "sbf": {"calibration": "sbf_blakeslee2009_acs_z850"}}
    msgs = errors(preflight.check(user), "passbands and systems")
    assert any("'sbf.band'" in m and "ACS/WFC F850LP" in m for m in msgs), msgs
    assert any("sbf.color_bands (blue)" in m and "ACS/WFC F475W" in m and "Johnson-Cousins V" in m for m in msgs)


def test_reversed_colour_bands_are_named(tmp_path):
    path = write(small_catalog(20), tmp_path / "cat.parquet")
    user = {"catalog": path, "methods": ["sbf"], "sbf": {"color_bands": ["I", "V"]}}
    (msg,) = errors(preflight.check(user), "passbands and systems")
    assert "reversed" in msg and "[V, I]" in msg


def test_filter_file_needs_its_passband(tmp_path):
    curve = tmp_path / "myI.ecsv"
    wave = np.linspace(7000, 9500, 30)
    from astropy.table import Table
    Table({"wavelength": wave, "throughput": np.exp(-0.5 * ((wave - 8100) / 500) ** 2)}).write(curve)
    path = write(small_catalog(20), tmp_path / "cat.parquet")
    bands = JC | {"I": {"filter": str(curve), "system": "Vega", "ab_minus_vega": 0.45}}
    methods = ["tully_fisher", "sbf"]  # the default's fp would need its J band
    msgs = errors(preflight.check({"catalog": path, "bands": bands, "methods": methods}), "passbands and systems")
    assert any("bands.I.passband" in m for m in msgs), msgs
    bands["I"]["passband"] = "Cousins I"
    assert preflight.check({"catalog": path, "bands": bands, "methods": methods}).errors == []


def test_vega_colour_band_needs_an_offset(tmp_path):
    path = write(small_catalog(20), tmp_path / "cat.parquet")
    bands = JC | {"V": {"filter": "bessell-V", "system": "Vega"}}
    msgs = errors(preflight.check({"catalog": path, "bands": bands, "methods": ["tully_fisher"]}))
    assert any("bands.V.ab_minus_vega" in m and "kcorr.colour_pair" in m for m in msgs), msgs


# --- method settings up front -------------------------------------------------------------

def test_baryonic_settings_are_checked_before_any_job(tmp_path):
    """Lelli et al. 2019 (MNRAS 484, 3267) BTFR needs a mass-to-light ratio and M_sun."""
    path = write(small_catalog(20) | {"hi_flux": np.full(20, 5.0)}, tmp_path / "cat.parquet")
    user = {"catalog": path, "methods": ["tully_fisher"], "tully_fisher": {"calibration": "tf_btfr_lelli_2019"}}
    (msg,) = errors(preflight.check(user), "method settings")
    assert "mass_to_light" in msg and "abs_mag_sun" in msg


def test_gamma_for_a_band_without_a_default(tmp_path):
    text = (REPO / "workflow/galdist/data/calibrations/tf_i_tully_courtois_2012.yaml").read_text()
    cal = tmp_path / "tf_sdss_i.yaml"
    cal.write_text(text.replace("band: Cousins I", "band: SDSS i").replace("system: Vega", "system: AB")
                   .replace("name: tf_i_tully_courtois_2012", "name: tf_sdss_i_test"))
    user = {"catalog": sdss_catalog(tmp_path), "bands": SDSS, "methods": ["tully_fisher"],
            "tully_fisher": {"band": "i", "calibration": str(cal)}, "kcorr": {"colour_pair": None}}
    result = preflight.check(user)
    (msg,) = errors(result, "method settings")
    assert "gamma0/gamma1" in msg
    user["tully_fisher"] |= {"gamma0": 0.9, "gamma1": 1.6}
    assert preflight.check(user).errors == []


# --- whole-column unit mistakes -------------------------------------------------------------

@pytest.mark.parametrize("column, factor, unit, expect", [
    ("z_helio", 299792.458, "km/s", "set units: {z_helio: km/s}"),
    ("w50", 1000.0, "m/s", "set units: {w50: m/s}"),
    ("axis_ratio", 100.0, "percent", "units: {axis_ratio: percent}"),
])
def test_column_in_another_unit_stops(tmp_path, column, factor, unit, expect):
    cols = small_catalog(50)
    cols[column] = cols[column] * factor
    path = write(cols, tmp_path / "cat.parquet")
    (msg,) = errors(preflight.check({"catalog": path}), "column values")
    assert expect in msg and f"({column})" in msg
    # declared: converted and accepted
    assert preflight.check({"catalog": path, "units": {column: unit}}).errors == []


def test_ra_in_radians_or_hours(tmp_path):
    cols = small_catalog(50)
    rad = cols | {"ra": np.radians(cols["ra"]), "dec": np.radians(cols["dec"])}
    (msg,) = errors(preflight.check({"catalog": write(rad, tmp_path / "r.parquet")}), "column values")
    assert "radians" in msg
    hours = cols | {"ra": cols["ra"] / 15.0}
    path = write(hours, tmp_path / "h.parquet")
    (msg,) = errors(preflight.check({"catalog": path}), "column values")
    assert "units: {ra: hourangle}" in msg
    assert preflight.check({"catalog": path, "units": {"ra": "hourangle"}}).errors == []


def test_mistake_stops_snakemake_before_any_job(tmp_path):
    """Direct snakemake use gets the same checks: nothing runs, the message names the key."""
    wf = copy_workflow(tmp_path)
    cols = small_catalog(40)
    cols["z_helio"] = cols["z_helio"] * 299792.458
    write(cols, wf / "cz.parquet")
    conf = {"catalog": "cz.parquet", "run": "cz"}
    (wf / "mine.yaml").write_text(yaml.safe_dump(conf))
    result = run_snakemake(wf, "--configfile", "mine.yaml")
    assert result.returncode != 0
    assert "set units: {z_helio: km/s}" in result.stderr
    assert not (wf / "results" / "cz").exists()


def test_old_name_of_the_k_correction_section_names_the_new_one(tmp_path):
    path = write(small_catalog(20), tmp_path / "cat.parquet")
    (msg,) = errors(preflight.check({"catalog": path, "kcorrect": {"colour_pair": None}}), "config")
    assert "'kcorrect' is now 'kcorr'" in msg


def test_zero_point_reference_must_be_a_configured_method(tmp_path):
    path = write(small_catalog(20), tmp_path / "cat.parquet")
    user = {"catalog": path, "methods": ["tully_fisher"], "zero_point": {"reference": "sbf"}}
    (msg,) = errors(preflight.check(user), "calibrations and stages")
    assert "zero_point.reference" in msg and "tully_fisher" in msg
    user["zero_point"]["reference"] = "nonsense"
    assert any("zero_point" in m for m in errors(preflight.check(user), "config"))


def test_eta_grid_must_run_upwards(tmp_path):
    path = write(small_catalog(20), tmp_path / "cat.parquet")
    user = {"catalog": path, "methods": ["tully_fisher"], "likelihoods": {"eta_min": 0.5, "eta_max": -0.5}}
    (msg,) = errors(preflight.check(user), "calibrations and stages")
    assert "likelihoods.eta_min" in msg
