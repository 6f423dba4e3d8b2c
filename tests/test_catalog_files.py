"""Catalog files one by one: units and structure per file, FITS nulls and text, absurd values.

Regressions of an adversarial pass. Each test writes the reproducer (the files as a user
would have them) and runs the real ``ingest.plan`` / ``ingest.run`` (or the pre-flight
column check) on it. Unit factors are written out here independently of the code:
z = v / c with c = 299792.458 km/s (SI definition), 1 rad = 180/pi deg.
The value bounds are galdist's documented conventions (galdist.flags.Quality, common
practice); the thermal floor of w50 is kinetic theory (FWHM = 2.355 sqrt(kT/m_H),
2.1 km/s at 100 K).
"""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from astropy.io import fits
from astropy.table import MaskedColumn, Table

from conftest import BANDS, small_catalog
from galdist import flags as F
from galdist import ingest, preflight
from galdist.columns import method_columns
from galdist.errors import CatalogError, ConfigError

METHODS = ["tully_fisher", "sbf"]
C_KMS = 299792.458
Q = F.Quality


def write_parquet(cols: dict, path, units: dict | None = None, masks: dict | None = None) -> str:
    """A Parquet file whose fields carry a ``unit`` in their metadata where given."""
    units, masks = units or {}, masks or {}
    fields, arrays = [], []
    for name, values in cols.items():
        arr = pa.array(values, mask=masks.get(name))
        fields.append(pa.field(name, arr.type, metadata={"unit": units[name]} if name in units else None))
        arrays.append(arr)
    pq.write_table(pa.Table.from_arrays(arrays, schema=pa.schema(fields)), path)
    return str(path)


def ingest_table(tmp_path, paths, units=None, mapping=None, methods=METHODS, batch_rows=262_144):
    p = ingest.plan([str(x) for x in paths], "auto", mapping or {}, units or {}, BANDS, methods)
    out = tmp_path / "out"
    summary = ingest.run(p, out / "shards", out / "summary.json", 1000, batch_rows)
    files = sorted((out / "shards").glob("part-*.parquet"))
    return pa.concat_tables([pq.read_table(f) for f in files]), summary


def relabel(cols: dict, prefix: str) -> dict:
    cols = dict(cols)
    cols["galaxy_id"] = np.array([f"{prefix}{i}" for i in range(len(cols["ra"]))], dtype=object)
    return cols


# --- 1. units and structure per file ------------------------------------------------------

def test_list_of_files_each_converted_with_its_own_declared_units(tmp_path):
    """Reproducer: file 1 declares z in km/s, file 2 plain z (one invalid 1.5) and RA in
    radians. Before: file 1's km/s applied to both (0.0435 -> 1.45e-7, 1.5 -> a valid
    5e-6, no flag) and file 2's RA read as degrees."""
    a, b = relabel(small_catalog(4, seed=1), "A"), relabel(small_catalog(4, seed=2), "B")
    b["z_helio"][1] = 0.0435
    b["z_helio"][2] = 1.5
    a_file = dict(a, z_helio=a["z_helio"] * C_KMS, z_helio_err=a["z_helio_err"] * C_KMS)
    b_file = dict(b, ra=np.radians(b["ra"]))
    pa_ = write_parquet(a_file, tmp_path / "a.parquet", {"z_helio": "km/s", "z_helio_err": "km / s"})
    pb = write_parquet(b_file, tmp_path / "b.parquet", {"ra": "rad"})
    table, summary = ingest_table(tmp_path, [pa_, pb])
    z = table.column("z_helio").to_numpy()
    q = table.column("quality_flags").to_numpy()
    np.testing.assert_allclose(z[:4], a["z_helio"], rtol=1e-12)
    assert z[5] == 0.0435 and np.isnan(z[6])
    assert F.has(q, Q.REDSHIFT_INVALID)[6] and not F.has(q, Q.REDSHIFT_INVALID)[[0, 1, 2, 3, 4, 5, 7]].any()
    # z_helio_err is stored as float32 (galdist.io.stored_float): the converted value, rounded once
    np.testing.assert_allclose(table.column("z_helio_err").to_numpy(),
                               np.r_[a["z_helio_err"], b["z_helio_err"]].astype(np.float32), rtol=2.0**-24)
    np.testing.assert_allclose(table.column("ra").to_numpy(), np.r_[a["ra"], b["ra"]], rtol=1e-12)
    # the summary says which file was read in which unit
    files = [f for i in summary["inputs"] for f in i["files"]]
    assert files[0]["units"] == {"z_helio": "km/s", "z_helio_err": "km / s"} and files[1]["units"] == {"ra": "rad"}
    assert summary["columns"]["z_helio"]["unit"].startswith("differs between files")


def test_fits_list_each_converted_with_its_own_tunit(tmp_path):
    """TUNIT m/s in one file, the FITS spelling 'km.s-1' in the other."""
    a, b = relabel(small_catalog(3, seed=3), "A"), relabel(small_catalog(3, seed=4), "B")
    for cols, name, unit in ((a, "a.fits", "m/s"), (b, "b.fits", "km.s-1")):
        t = Table({k: (v.astype(str) if v.dtype == object else v) for k, v in cols.items()})
        t.write(tmp_path / name)
        with fits.open(tmp_path / name, mode="update") as hdul:
            if unit == "m/s":
                hdul[1].data["w50"] = cols["w50"] * 1000.0
            i = hdul[1].columns.names.index("w50") + 1
            hdul[1].header[f"TUNIT{i}"] = unit
    table, _ = ingest_table(tmp_path, [tmp_path / "a.fits", tmp_path / "b.fits"])
    np.testing.assert_allclose(table.column("w50").to_numpy(), np.r_[a["w50"], b["w50"]].astype(np.float32),
                               rtol=2.0**-24)  # stored as float32, rounded once


def test_config_units_apply_to_every_file_over_the_files_own(tmp_path):
    """config ``units`` is the user's word: it wins over what a file declares."""
    a, b = relabel(small_catalog(3, seed=5), "A"), relabel(small_catalog(3, seed=6), "B")
    pa_ = write_parquet(dict(a, w50=a["w50"] * 1000), tmp_path / "a.parquet")
    pb = write_parquet(dict(b, w50=b["w50"] * 1000), tmp_path / "b.parquet", {"w50": "km/s"})  # wrongly labelled
    table, _ = ingest_table(tmp_path, [pa_, pb], units={"w50": "m/s"})
    np.testing.assert_allclose(table.column("w50").to_numpy(), np.r_[a["w50"], b["w50"]].astype(np.float32),
                               rtol=2.0**-24)  # stored as float32, rounded once


def test_parquet_directory_second_file_in_another_unit(tmp_path):
    cols = small_catalog(10)
    d = tmp_path / "survey"
    d.mkdir()
    first = {k: v[:6] for k, v in cols.items()}
    second = {k: v[6:] for k, v in cols.items()}
    write_parquet(first, d / "part-0.parquet")
    write_parquet(dict(second, z_helio=second["z_helio"] * C_KMS), d / "part-1.parquet", {"z_helio": "km/s"})
    table, _ = ingest_table(tmp_path, [d])
    np.testing.assert_allclose(table.column("z_helio").to_numpy(), cols["z_helio"], rtol=1e-12)
    assert not table.column("quality_flags").to_numpy().any()
    assert table.column("galaxy_id").to_pylist() == list(cols["galaxy_id"])


def _dataset(tmp_path, second: dict) -> tuple:
    d = tmp_path / "survey"
    d.mkdir()
    cols = small_catalog(8)
    write_parquet({k: v[:4] for k, v in cols.items()}, d / "part-0.parquet")
    write_parquet(second, d / "part-1.parquet")
    return d, {k: v[4:] for k, v in cols.items()}


def test_parquet_directory_second_file_missing_a_column_names_file_and_column(tmp_path):
    """Before: 'reading failed (KeyError ...); the file may be corrupt', naming only the directory."""
    d, rest = _dataset(tmp_path, {})
    del rest["w50"]
    write_parquet(rest, d / "part-1.parquet")
    with pytest.raises(ingest.IngestError, match=r"part-1\.parquet: missing column 'w50'.*tully_fisher"):
        ingest.plan([str(d)], "auto", {}, {}, BANDS, METHODS)


def test_a_column_only_some_files_have_stops_the_run(tmp_path):
    d, rest = _dataset(tmp_path, {})
    write_parquet(dict(rest, hi_flux=np.full(4, 3.0)), d / "part-1.parquet")  # optional, in one file only
    with pytest.raises(ingest.IngestError, match=r"part-0\.parquet: missing column 'hi_flux'.*part-1\.parquet"):
        ingest.plan([str(d)], "auto", {}, {}, BANDS, METHODS)


def test_parquet_directory_second_file_with_a_boolean_width(tmp_path):
    """Before: the boolean read as 1 km/s."""
    d, rest = _dataset(tmp_path, {})
    write_parquet(dict(rest, w50=np.array([True, False, True, True])), d / "part-1.parquet")
    with pytest.raises(ingest.IngestError, match=r"part-1\.parquet: column 'w50' \(w50\) is boolean"):
        ingest.plan([str(d)], "auto", {}, {}, BANDS, METHODS)


@pytest.mark.parametrize("kind", ["text", "list"])
def test_parquet_directory_second_file_with_another_type(tmp_path, kind):
    d, rest = _dataset(tmp_path, {})
    bad = (np.array(["1", "2", "3", "x"], dtype=object) if kind == "text" else [[1.0, 2.0]] * 4)
    write_parquet(dict(rest, sbf_mag=bad), d / "part-1.parquet")
    with pytest.raises(ingest.IngestError, match=r"part-1\.parquet: column 'sbf_mag' \(sbf_mag\)"):
        ingest.plan([str(d)], "auto", {}, {}, BANDS, METHODS)


def test_file_unit_that_cannot_be_converted_names_file_and_column_and_config_overrides_it(tmp_path):
    a, b = relabel(small_catalog(3, seed=5), "A"), relabel(small_catalog(3, seed=6), "B")
    pa_ = write_parquet(a, tmp_path / "a.parquet")
    pb = write_parquet(b, tmp_path / "b.parquet", {"w50": "kg"})
    with pytest.raises(ingest.IngestError, match=r"b\.parquet: column 'w50' \(w50\) declares unit 'kg'.*units"):
        ingest.plan([pa_, pb], "auto", {}, {}, BANDS, METHODS)
    table, _ = ingest_table(tmp_path, [pa_, pb], units={"w50": "km/s"})
    np.testing.assert_allclose(table.column("w50").to_numpy(), np.r_[a["w50"], b["w50"]])


def test_problems_of_several_files_are_each_named(tmp_path):
    a, b = relabel(small_catalog(3, seed=5), "A"), relabel(small_catalog(3, seed=6), "B")
    del a["ra"], b["dec"]
    pa_, pb = write_parquet(a, tmp_path / "a.parquet"), write_parquet(b, tmp_path / "b.parquet")
    with pytest.raises(ingest.IngestError) as info:
        ingest.plan([pa_, pb], "auto", {}, {}, BANDS, METHODS)
    msg = str(info.value)
    assert f"catalog {pa_}: missing column 'ra'" in msg and f"catalog {pb}: missing column 'dec'" in msg


def test_preflight_lines_name_the_file_and_the_column(tmp_path):
    """The checks before any job show one line per problem: each must name its file."""
    d, rest = _dataset(tmp_path, {})
    del rest["sbf_mag"]
    write_parquet(dict(rest, w50=np.array([True, False, True, True])), d / "part-1.parquet")
    result = preflight.check({"catalog": str(d)}, sample_rows=False)
    lines = [f.message for f in result.errors if f.check == "catalog structure"]
    assert len(lines) == 2, lines
    assert all(f"catalog {d / 'part-1.parquet'}: " in line for line in lines), lines
    assert "'w50' (w50) is boolean" in lines[0] + lines[1] and "missing column 'sbf_mag'" in lines[0] + lines[1]


def test_hidden_files_and_folders_of_a_dataset_are_ignored(tmp_path):
    cols = small_catalog(10)
    d = tmp_path / "survey"
    (d / ".staging").mkdir(parents=True)
    (d / "_temporary" / "0").mkdir(parents=True)
    write_parquet({k: v[:5] for k, v in cols.items()}, d / "a.parquet")
    write_parquet({k: v[5:] for k, v in cols.items()}, d / "b.parquet")
    junk = {"galaxy_id": np.array(["half-written"], dtype=object), "w50": np.array([True])}
    write_parquet(junk, d / ".staging" / "c.parquet")
    write_parquet(junk, d / "_temporary" / "0" / "d.parquet")
    write_parquet(junk, d / "_e.parquet")
    write_parquet(junk, d / ".f.parquet")
    table, summary = ingest_table(tmp_path, [d])
    assert table.column("galaxy_id").to_pylist() == list(cols["galaxy_id"])
    assert [f["path"] for f in summary["inputs"][0]["files"]] == [str(d / "a.parquet"), str(d / "b.parquet")]


def test_column_sanity_checks_every_file_of_a_dataset(tmp_path):
    """The pre-flight unit check reads each file in its own units: an undeclared km/s
    column in the second file of a directory is found, a declared one is not."""
    cols = small_catalog(40)
    d = tmp_path / "survey"
    d.mkdir()
    write_parquet({k: v[:20] for k, v in cols.items()}, d / "a.parquet")
    second = {k: v[20:] for k, v in cols.items()}
    write_parquet(dict(second, z_helio=second["z_helio"] * C_KMS), d / "b.parquet")
    p = ingest.plan([str(d)], "auto", {}, {}, BANDS, METHODS)
    with pytest.raises(ConfigError, match=r"b\.parquet: 100% .*km/s"):
        preflight._column_sanity(p, {})
    write_parquet(dict(second, z_helio=second["z_helio"] * C_KMS), d / "b.parquet", {"z_helio": "km/s"})
    p = ingest.plan([str(d)], "auto", {}, {}, BANDS, METHODS)
    preflight._column_sanity(p, {})


def test_a_batch_without_its_file_is_refused_when_units_differ(tmp_path):
    a, b = relabel(small_catalog(3, seed=5), "A"), relabel(small_catalog(3, seed=6), "B")
    pa_ = write_parquet(a, tmp_path / "a.parquet")
    pb = write_parquet(dict(b, w50=b["w50"] * 1000), tmp_path / "b.parquet", {"w50": "m/s"})
    p = ingest.plan([pa_, pb], "auto", {}, {}, BANDS, METHODS)
    raw = {c: pa.array(v) for c, v in b.items()}
    with pytest.raises(ValueError, match="differ in units"):
        ingest.canonical_batch(raw, p, 0)


# --- 2. FITS nulls, text and vectors; NaN identifiers ---------------------------------------

def _fits_columns(cols: dict, override: dict) -> list:
    out = []
    for name, values in cols.items():
        if name in override:
            out.append(override[name])
        elif values.dtype == object:
            out.append(fits.Column(name=name, format="20A", array=np.array([str(v) for v in values])))
        else:
            out.append(fits.Column(name=name, format="D", array=values))
    return out


def test_fits_tnull_integers_are_missing_values(tmp_path):
    """Reproducer: integer columns with TNULL sentinels were read as data, w50_err = 999999,
    hi_flux = 999999, mag_I_err = 16959, quality_flags = 0."""
    cols = small_catalog(4)
    w50_err = np.array([6, 999999, 7, 5], dtype=np.int32)
    hi_flux = np.array([5, 999999, 3, 4], dtype=np.int32)
    mag_i_err = np.array([1, 2, 16959, 1], dtype=np.int16)
    # an unsigned column (TZERO = 32768): TNULL applies to the stored integer, 32767 -> 65535
    w50_res = np.array([10, 12, 65535, 8], dtype=np.uint16)
    hdu = fits.BinTableHDU.from_columns(_fits_columns(cols, {
        "w50_err": fits.Column(name="w50_err", format="J", null=999999, unit="km/s", array=w50_err),
        "mag_I_err": fits.Column(name="mag_I_err", format="I", null=16959, array=mag_i_err)}) + [
        fits.Column(name="hi_flux", format="J", null=999999, array=hi_flux),
        fits.Column(name="w50_resolution", format="I", bzero=32768, null=32767, array=w50_res)])
    hdu.writeto(tmp_path / "c.fits")
    table, summary = ingest_table(tmp_path, [tmp_path / "c.fits"])
    q = table.column("quality_flags").to_numpy()
    np.testing.assert_array_equal(table.column("w50_err").to_numpy(), [6, np.nan, 7, 5])
    np.testing.assert_array_equal(table.column("hi_flux").to_numpy(), [5, np.nan, 3, 4])
    np.testing.assert_array_equal(table.column("mag_I_err").to_numpy(), [1, 2, np.nan, 1])
    np.testing.assert_array_equal(table.column("w50_resolution").to_numpy(), [10, 12, np.nan, 8])
    # the usual missing-value handling: an error missing beside its value is flagged,
    # a missing optional column is "not observed"
    assert list(F.has(q, Q.WIDTH_ERR_INVALID)) == [False, True, False, False]
    assert list(F.has(q, Q.MAG_ERR_INVALID)) == [False, False, True, False]
    assert not F.has(q, Q.OPTIONAL_INVALID).any()
    assert summary["flag_counts"]["WIDTH_ERR_INVALID"] == 1


def test_fits_tnull_in_an_integer_id_is_a_missing_id(tmp_path):
    cols = small_catalog(3)
    ids = fits.Column(name="galaxy_id", format="K", null=-1, array=np.array([10, -1, 12], dtype=np.int64))
    fits.BinTableHDU.from_columns(_fits_columns(cols, {"galaxy_id": ids})).writeto(tmp_path / "c.fits")
    with pytest.raises(ingest.IngestError, match=r"c\.fits: column 'galaxy_id' .*empty in 1 rows \(first data rows: 2;"):
        ingest_table(tmp_path, [tmp_path / "c.fits"])


def test_votable_masked_integers_are_missing_values(tmp_path):
    cols = small_catalog(3)
    t = Table({k: (v.astype(str) if v.dtype == object else v) for k, v in cols.items()})
    t["w50"] = MaskedColumn(np.array([200, 0, 300]), mask=[False, True, False])
    t.write(tmp_path / "c.xml", format="votable")
    table, _ = ingest_table(tmp_path, [tmp_path / "c.xml"])
    np.testing.assert_array_equal(table.column("w50").to_numpy(), [200, np.nan, 300])
    assert list(F.has(table.column("quality_flags").to_numpy(), Q.WIDTH_INVALID)) == [False, True, False]


def test_fits_utf8_identifiers_are_read(tmp_path):
    """Reproducer: a UTF-8 ID in a FITS text column failed as 'may be corrupt'."""
    cols = small_catalog(4)
    names = ["Gäl-1", "☃ 2", "NGC 3", "Ωmega-4"]
    ids = fits.Column(name="galaxy_id", format="24A", array=np.array([n.encode("utf-8") for n in names]))
    fits.BinTableHDU.from_columns(_fits_columns(cols, {"galaxy_id": ids})).writeto(tmp_path / "c.fits")
    table, _ = ingest_table(tmp_path, [tmp_path / "c.fits"], batch_rows=3)
    assert table.column("galaxy_id").to_pylist() == names


def test_fits_text_that_is_not_utf8_names_column_and_row(tmp_path):
    cols = small_catalog(3)
    ids = fits.Column(name="galaxy_id", format="8A", array=np.array([b"A", b"caf\xe9", b"C"]))  # Latin-1
    fits.BinTableHDU.from_columns(_fits_columns(cols, {"galaxy_id": ids})).writeto(tmp_path / "c.fits")
    with pytest.raises(CatalogError, match=r"c\.fits: column 'galaxy_id' row 2 holds bytes that are not UTF-8"):
        ingest_table(tmp_path, [tmp_path / "c.fits"])


def test_fits_vector_column_is_named(tmp_path):
    """Reproducer: a '3E' column mapped onto w50 gave a raw traceback."""
    cols = small_catalog(4)
    vec = fits.Column(name="W50_ALL", format="3E", array=np.tile(cols["w50"][:, None], 3))
    fits.BinTableHDU.from_columns(_fits_columns(cols, {}) + [vec]).writeto(tmp_path / "c.fits")
    with pytest.raises(ingest.IngestError,
                       match=r"c\.fits: column 'W50_ALL' \(w50\) is a vector \(3 values per row, FITS format '3E'\)"):
        ingest.plan([str(tmp_path / "c.fits")], "auto", {"w50": "W50_ALL"}, {}, BANDS, METHODS)


def test_fits_logical_column_where_a_number_is_needed(tmp_path):
    cols = small_catalog(3)
    flag = fits.Column(name="w50", format="L", array=np.array([True, False, True]))
    fits.BinTableHDU.from_columns(_fits_columns(cols, {"w50": flag})).writeto(tmp_path / "c.fits")
    with pytest.raises(ingest.IngestError, match=r"column 'w50' \(w50\) is boolean"):
        ingest.plan([str(tmp_path / "c.fits")], "auto", {}, {}, BANDS, METHODS)


@pytest.mark.parametrize("fmt", ["parquet", "fits", "ecsv"])
def test_nan_in_a_float_id_column_is_a_missing_id(tmp_path, fmt):
    """Reproducer: a float ID column's NaN became the ID 'nan'."""
    cols = small_catalog(4)
    cols["galaxy_id"] = np.array([101.0, 102.0, np.nan, 104.0])
    cols["galaxy_class"] = cols["galaxy_class"].astype(str)
    path = tmp_path / f"c.{fmt}"
    if fmt == "parquet":
        write_parquet(cols, path)
    else:
        Table(cols).write(path)
    with pytest.raises(ingest.IngestError, match=r"galaxy_id.*empty in 1 rows \(first data rows: 3;"):
        ingest_table(tmp_path, [path])


def test_csv_text_id_nan_is_still_a_name(tmp_path):
    """CSV declares no types: 'nan' in an ID column stays a name (see test_fuzz)."""
    cols = small_catalog(3)
    cols["galaxy_id"] = np.array(["nan", "a", "b"])
    cols["galaxy_class"] = cols["galaxy_class"].astype(str)
    Table(cols).write(tmp_path / "c.csv", format="ascii.csv")
    table, _ = ingest_table(tmp_path, [tmp_path / "c.csv"])
    assert table.column("galaxy_id").to_pylist() == ["nan", "a", "b"]


# --- 3. allowed by type, absurd by physics -------------------------------------------------

ABSURD = [
    # column, absurd value, a value just inside the bound, bit
    ("ebv", 1e308, 9.5, Q.EBV_INVALID),
    ("ebv_err", 50.0, 9.5, Q.EBV_INVALID),
    ("axis_ratio", 1e-300, 0.011, Q.AXIS_RATIO_INVALID),
    ("axis_ratio_err", 1.5, 0.99, Q.AXIS_RATIO_ERR_INVALID),
    ("z_helio_err", 2.0, 0.9, Q.REDSHIFT_ERR_INVALID),
    ("mag_I_err", 11.0, 9.0, Q.MAG_ERR_INVALID),
    ("w50", 0.5, 1.5, Q.WIDTH_INVALID),
    ("w50_err", 2500.0, 1900.0, Q.WIDTH_ERR_INVALID),
    ("sbf_mag_err", 1e10, 9.0, Q.SBF_ERR_INVALID),
    ("sbf_color_err", 12.0, 9.0, Q.SBF_ERR_INVALID),
    ("hi_flux", 1e9, 2e6, Q.OPTIONAL_INVALID),
    ("w50_resolution", 1e4, 400.0, Q.OPTIONAL_INVALID),
]


@pytest.mark.parametrize("column,absurd,inside,bit", ABSURD)
def test_absurd_values_are_flagged_and_nan(tmp_path, column, absurd, inside, bit):
    """Reproducer: ebv = 1e308 gave A = inf and mu = -1.5e308 downstream; axis_ratio =
    1e-300 gave tf_mu = -220; neither was flagged."""
    cols = small_catalog(5)
    cols["hi_flux"] = np.full(5, 20.0)
    cols["w50_resolution"] = np.full(5, 10.0)
    cols[column][1] = absurd
    cols[column][3] = inside
    table, summary = ingest_table(tmp_path, [write_parquet(cols, tmp_path / "c.parquet")])
    q = table.column("quality_flags").to_numpy()
    values = table.column(column).to_numpy()
    assert list(F.has(q, bit)) == [False, True, False, False, False]
    assert np.isnan(values[1]) and values[3] == inside
    assert not q[[0, 2, 3, 4]].any()
    assert summary["flag_counts"][bit.name] == 1
    for name in table.column_names:  # nothing infinite or astronomically large reaches a stage
        if pa.types.is_floating(table.schema.field(name).type):
            v = table.column(name).to_numpy()
            assert np.all(np.abs(v[np.isfinite(v)]) < 1e8) and not np.isinf(v).any(), name


def test_flag_texts_state_the_bounds():
    """The README table (from galdist.flags) tells the user the same bounds ingest applies."""
    text = json.dumps(Q.describe())
    for words in ("> 10 mag", "[0.01, 1]", "> 1e7 Jy km/s", "w50_resolution > 500 km/s", "z_helio_err missing, "
                  "non-finite, negative or > 1", "w50_err negative, > 2000 km/s", "w50 < 1 km/s"):
        assert words in text, words
    bounds = {c.name: c.valid for c in method_columns("tully_fisher")}  # its registry entry's
    assert (ingest.EBV_MAX, bounds["axis_ratio"][0], ingest.HI_FLUX_MAX, ingest.W50_RESOLUTION_MAX,
            bounds["w50"][0]) == (10.0, 0.01, 1e7, 500.0, 1.0)
