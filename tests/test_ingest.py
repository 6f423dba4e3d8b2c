"""Ingest: column mapping, units, every quality flag, formats, structural errors.

Flag thresholds are galdist's own documented conventions (galdist.flags.Quality);
the physical limits behind them are common practice (|dec| <= 90, 0 < b/a <= 1).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from astropy.table import Table

from conftest import BANDS, small_catalog
from galdist import flags as F
from galdist import ingest
from galdist.io import fingerprint, read_fingerprint

METHODS = ["tully_fisher", "sbf"]


def write_parquet(cols, path):
    pq.write_table(pa.table(cols), path)
    return str(path)


def run_ingest(tmp_path, paths, fmt="auto", mapping=None, units=None, shard_rows=1000,
               methods=METHODS, batch_rows=262_144):
    p = ingest.plan(paths, fmt, mapping or {}, units or {}, BANDS, methods)
    summary = ingest.run(p, tmp_path / "shards", tmp_path / "summary.json", shard_rows, batch_rows)
    table = pa.concat_tables([pq.read_table(f) for f in sorted((tmp_path / "shards").glob("part-*.parquet"))])
    return table, summary


def test_mapping_and_units(tmp_path):
    cols = small_catalog(10)
    renamed = {("survey_label" if k == "galaxy_id" else "CZ" if k == "z_helio" else "W50_HI" if k == "w50" else k): v
               for k, v in cols.items()}
    renamed["CZ"] = cols["z_helio"] * 299792.458  # a velocity column, km/s
    renamed["ra"] = np.radians(cols["ra"])
    path = write_parquet(renamed, tmp_path / "cat.parquet")
    table, _ = run_ingest(tmp_path, [path], mapping={"galaxy_id": "survey_label", "z_helio": "CZ", "w50": "W50_HI"},
                          units={"z_helio": "km/s", "ra": "rad"})
    assert table.column("galaxy_id").to_pylist() == list(cols["galaxy_id"])
    np.testing.assert_allclose(table.column("z_helio").to_numpy(), cols["z_helio"], rtol=1e-12)
    np.testing.assert_allclose(table.column("ra").to_numpy(), cols["ra"], rtol=1e-12)
    # stored as float32 (galdist.io.stored_float), read back as float64 by galdist.io
    np.testing.assert_array_equal(table.column("w50").to_numpy(), cols["w50"].astype(np.float32))
    assert table.schema.field("ra").metadata[b"unit"] == b"deg"
    assert table.schema.field("w50").metadata[b"unit"] == b"km / s"


BAD_CASES = [
    # column, bad value, bit expected (galdist.flags.Quality)
    ("ra", np.nan, F.Quality.POSITION_INVALID),
    ("ra", 360.0, F.Quality.POSITION_INVALID),
    ("dec", 90.5, F.Quality.POSITION_INVALID),
    ("dec", -np.inf, F.Quality.POSITION_INVALID),
    ("z_helio", -0.006, F.Quality.REDSHIFT_INVALID),  # below cz = -1500 km/s (galdist's lower limit)
    ("z_helio", 1.2, F.Quality.REDSHIFT_INVALID),
    ("z_helio", np.nan, F.Quality.REDSHIFT_INVALID),
    ("z_helio_err", -1e-5, F.Quality.REDSHIFT_ERR_INVALID),
    ("mag_I", np.inf, F.Quality.MAG_INVALID),
    ("mag_I", 55.0, F.Quality.MAG_INVALID),
    ("mag_V_err", -0.01, F.Quality.MAG_ERR_INVALID),
    ("w50", 0.0, F.Quality.WIDTH_INVALID),
    ("w50", -20.0, F.Quality.WIDTH_INVALID),
    ("w50", 5000.0, F.Quality.WIDTH_INVALID),
    ("w50_err", -3.0, F.Quality.WIDTH_ERR_INVALID),
    ("axis_ratio", 0.0, F.Quality.AXIS_RATIO_INVALID),
    ("axis_ratio", 1.01, F.Quality.AXIS_RATIO_INVALID),
    ("axis_ratio_err", np.nan, F.Quality.AXIS_RATIO_ERR_INVALID),
    ("sbf_mag", np.inf, F.Quality.SBF_MAG_INVALID),
    ("sbf_color", 7.0, F.Quality.SBF_COLOR_INVALID),
    ("sbf_color_err", -0.1, F.Quality.SBF_ERR_INVALID),
    ("sbf_mag_err", np.nan, F.Quality.SBF_ERR_INVALID),
    ("ebv", -0.02, F.Quality.EBV_INVALID),
    ("ebv_err", -0.001, F.Quality.EBV_INVALID),
]


@pytest.mark.parametrize("column,value,bit", BAD_CASES)
def test_each_flag(tmp_path, column, value, bit):
    cols = small_catalog(5)
    cols[column][2] = value
    table, summary = run_ingest(tmp_path, [write_parquet(cols, tmp_path / "c.parquet")])
    q = table.column("quality_flags").to_numpy()
    assert table.num_rows == 5
    assert F.has(q, bit)[2]
    assert not F.has(q, bit)[[0, 1, 3, 4]].any()
    assert np.isnan(table.column(column).to_numpy()[2])  # the bad value is never used later
    assert summary["flag_counts"][bit.name] == 1


def test_not_observed_groups_set_no_flag(tmp_path):
    cols = small_catalog(4)
    for name in ("w50", "w50_err", "axis_ratio", "axis_ratio_err"):
        cols[name][0] = np.nan  # an early type: no HI at all
    for name in ("sbf_mag", "sbf_mag_err", "sbf_color", "sbf_color_err"):
        cols[name][1] = np.nan  # a disc: no SBF
    cols["mag_Ks"][3] = np.nan
    cols["mag_Ks_err"][3] = np.nan  # not observed in Ks
    table, _ = run_ingest(tmp_path, [write_parquet(cols, tmp_path / "c.parquet")])
    assert (table.column("quality_flags").to_numpy() == 0).all()


def test_optional_columns_absent_are_nan(tmp_path):
    cols = small_catalog(4)
    del cols["ebv"], cols["ebv_err"], cols["galaxy_class"]
    table, summary = run_ingest(tmp_path, [write_parquet(cols, tmp_path / "c.parquet")])
    assert np.isnan(table.column("ebv").to_numpy()).all()
    assert table.column("galaxy_class").null_count == 4
    assert "ebv" in summary["absent_optional_columns"]


def test_sharding_keeps_order_and_count(tmp_path):
    cols = small_catalog(2500)
    table, summary = run_ingest(tmp_path, [write_parquet(cols, tmp_path / "c.parquet")],
                                shard_rows=1000, batch_rows=300)
    files = sorted((tmp_path / "shards").glob("part-*.parquet"))
    assert [pq.read_metadata(f).num_rows for f in files] == [1000, 1000, 500]
    assert table.column("galaxy_id").to_pylist() == list(cols["galaxy_id"])
    assert summary["rows_in"] == summary["rows_out"] == 2500
    # the fingerprint is of the shard's whole content, whatever batches fed it
    assert read_fingerprint(files[0]) == fingerprint(pq.read_table(files[0]))
    assert read_fingerprint(files[2]) == fingerprint(pq.read_table(files[2]))
    assert len({read_fingerprint(f) for f in files}) == 3


def test_fingerprint_sees_content_not_only_ids(tmp_path):
    """Same IDs, one redshift changed: another fingerprint (a stale stage file from the
    old catalog can then never be joined to the new shard)."""
    cols = small_catalog(50)
    old, _ = run_ingest(tmp_path / "a", [write_parquet(cols, tmp_path / "a.parquet")])
    cols["z_helio"] = cols["z_helio"].copy()
    cols["z_helio"][17] *= 1.1
    new, _ = run_ingest(tmp_path / "b", [write_parquet(cols, tmp_path / "b.parquet")])
    fa, fb = (read_fingerprint(next((tmp_path / d / "shards").glob("part-*.parquet"))) for d in "ab")
    assert old.column("galaxy_id").equals(new.column("galaxy_id")) and fa != fb


def test_empty_catalog_gives_one_empty_shard(tmp_path):
    cols = {k: v[:0] for k, v in small_catalog(3).items()}
    table, summary = run_ingest(tmp_path, [write_parquet(cols, tmp_path / "c.parquet")])
    assert table.num_rows == 0 and summary["shards"] == 1


def _write_formats(cols, tmp_path):
    t = Table({k: v for k, v in cols.items()})
    t["galaxy_id"] = t["galaxy_id"].astype(str)
    t["galaxy_class"] = t["galaxy_class"].astype(str)
    paths = {}
    paths["parquet"] = write_parquet(cols, tmp_path / "c.parquet")
    t.write(tmp_path / "c.fits")
    paths["fits"] = str(tmp_path / "c.fits")
    t.write(tmp_path / "c.csv", format="ascii.csv")
    paths["csv"] = str(tmp_path / "c.csv")
    t.write(tmp_path / "c.ecsv", format="ascii.ecsv")
    paths["ecsv"] = str(tmp_path / "c.ecsv")
    t.write(tmp_path / "c.xml", format="votable")
    paths["votable"] = str(tmp_path / "c.xml")
    return paths


def test_every_format_gives_identical_shards(tmp_path):
    cols = small_catalog(30)
    cols["w50"][3] = -5.0  # a flagged row travels identically too
    cols["mag_V"][4] = np.nan
    cols["mag_V_err"][4] = np.nan
    paths = _write_formats(cols, tmp_path)
    tables = {}
    for fmt, path in paths.items():
        out = tmp_path / fmt
        out.mkdir()
        tables[fmt], _ = run_ingest(out, [path])
    ref = tables["parquet"]
    for fmt, table in tables.items():
        assert table.column_names == ref.column_names, fmt
        for name in ref.column_names:
            a, b = ref.column(name), table.column(name)
            if pa.types.is_floating(a.type):
                np.testing.assert_allclose(b.to_numpy(), a.to_numpy(), rtol=1e-14, err_msg=f"{fmt}:{name}")
            else:
                assert b.to_pylist() == a.to_pylist(), f"{fmt}:{name}"


def test_directory_dataset(tmp_path):
    cols = small_catalog(20)
    d = tmp_path / "dataset"
    d.mkdir()
    write_parquet({k: v[:12] for k, v in cols.items()}, d / "a.parquet")
    write_parquet({k: v[12:] for k, v in cols.items()}, d / "b.parquet")
    table, _ = run_ingest(tmp_path, [str(d)])
    assert table.column("galaxy_id").to_pylist() == list(cols["galaxy_id"])


# --- structural errors ----------------------------------------------------------------

def test_missing_column_names_it_and_the_config_key(tmp_path):
    cols = small_catalog(3)
    del cols["w50"]
    path = write_parquet(cols, tmp_path / "c.parquet")
    with pytest.raises(ingest.IngestError, match=r"missing column 'w50'.*tully_fisher.*columns: \{w50"):
        ingest.plan([path], "auto", {}, {}, BANDS, METHODS)
    # not needed when the method is off
    ingest.plan([path], "auto", {}, {}, BANDS, ["sbf"])


def test_mapped_column_absent(tmp_path):
    path = write_parquet(small_catalog(3), tmp_path / "c.parquet")
    with pytest.raises(ingest.IngestError, match="config 'columns.w50' names 'HIW'"):
        ingest.plan([path], "auto", {"w50": "HIW"}, {}, BANDS, METHODS)


def test_wrong_type_in_parquet_is_caught_before_reading(tmp_path):
    cols = small_catalog(3)
    cols["w50"] = np.array(["1", "2", "x"], dtype=object)
    path = write_parquet(cols, tmp_path / "c.parquet")
    with pytest.raises(ingest.IngestError, match="column 'w50' .* must be numeric"):
        ingest.plan([path], "auto", {}, {}, BANDS, METHODS)


def test_text_in_numeric_csv_column_names_rows(tmp_path):
    cols = small_catalog(6)
    path = _write_formats(cols, tmp_path)["csv"]
    text = open(path).read().splitlines()
    header = text[0].split(",")
    i = header.index("w50")
    row = text[4].split(",")
    row[i] = "broad"
    text[4] = ",".join(row)
    open(path, "w").write("\n".join(text) + "\n")
    with pytest.raises(ingest.IngestError, match=r"column 'w50' must be numeric.*row 4: 'broad'"):
        run_ingest(tmp_path, [path])


def test_duplicate_ids_are_named(tmp_path):
    cols = small_catalog(8)
    cols["galaxy_id"][5] = cols["galaxy_id"][1]
    with pytest.raises(ingest.IngestError, match=r"not unique.*'T-0001' x2"):
        run_ingest(tmp_path, [write_parquet(cols, tmp_path / "c.parquet")], shard_rows=1000)
    assert not (tmp_path / "shards").exists()  # nothing half-written is left behind


def test_duplicate_ids_found_across_shards_and_batches(tmp_path):
    # the hashes of every ID go to disk in buckets; a repeat far apart, in another
    # shard and another read batch, must still be found, and nothing left on disk
    cols = small_catalog(3000)
    cols["galaxy_id"][2999] = cols["galaxy_id"][7]
    with pytest.raises(ingest.IngestError, match=r"not unique: 1 IDs repeat \('T-0007' x2\)"):
        run_ingest(tmp_path, [write_parquet(cols, tmp_path / "c.parquet")], shard_rows=500, batch_rows=128)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["c.parquet"]
    cols["galaxy_id"][2999] = "T-unique"
    table, summary = run_ingest(tmp_path, [write_parquet(cols, tmp_path / "c.parquet")], shard_rows=500,
                                batch_rows=128)
    assert summary["shards"] == 6 and table.num_rows == 3000
    assert sorted(p.name for p in tmp_path.iterdir()) == ["c.parquet", "shards", "summary.json"]


def test_empty_id_is_structural(tmp_path):
    cols = small_catalog(4)
    cols["galaxy_id"][2] = ""
    with pytest.raises(ingest.IngestError, match=r"c.parquet: .*empty in 1 rows \(first data rows: 3;"):
        run_ingest(tmp_path, [write_parquet(cols, tmp_path / "c.parquet")])


def test_bad_unit_names_the_key(tmp_path):
    path = write_parquet(small_catalog(3), tmp_path / "c.parquet")
    with pytest.raises(ingest.IngestError, match="config key 'units.w50'"):
        ingest.plan([path], "auto", {}, {"w50": "kg"}, BANDS, METHODS)


def test_unknown_canonical_name_in_mapping(tmp_path):
    path = write_parquet(small_catalog(3), tmp_path / "c.parquet")
    with pytest.raises(ingest.IngestError, match="config key 'columns': unknown canonical name"):
        ingest.plan([path], "auto", {"width": "w50"}, {}, BANDS, METHODS)


def test_corrupt_parquet_names_the_file(tmp_path):
    path = write_parquet(small_catalog(50), tmp_path / "c.parquet")
    data = open(path, "rb").read()
    open(path, "wb").write(data[: len(data) // 2])
    with pytest.raises(ingest.CatalogError, match="c.parquet"):
        ingest.plan([path], "auto", {}, {}, BANDS, METHODS)


def test_truncated_fits_names_the_file(tmp_path):
    path = _write_formats(small_catalog(200), tmp_path)["fits"]
    data = open(path, "rb").read()
    open(path, "wb").write(data[:4000])
    with pytest.raises(ingest.CatalogError, match="c.fits"):
        p = ingest.plan([path], "auto", {}, {}, BANDS, METHODS)
        ingest.run(p, tmp_path / "s", tmp_path / "s.json", 1000)


def test_kept_columns_pass_through_as_read(tmp_path):
    """config keep_columns: the user's columns arrive as user_<name>, Parquet types kept
    (an integer above 2^53 stays exact), text as text, CSV as the text written."""
    cols = small_catalog(6)
    cols["objid"] = np.arange(6, dtype=np.int64) + 2**60 + 1
    cols["notes"] = np.array(["a", None, "c, d", "", "e", "f"], dtype=object)
    path = write_parquet(cols, tmp_path / "cat.parquet")
    p = ingest.plan([path], "auto", {}, {}, BANDS, METHODS, keep=["objid", "notes"])
    summary = ingest.run(p, tmp_path / "shards", tmp_path / "summary.json", 4)
    table = pa.concat_tables([pq.read_table(f) for f in sorted((tmp_path / "shards").glob("part-*.parquet"))])
    assert table.column("user_objid").type == pa.int64()
    assert table.column("user_objid").to_pylist() == cols["objid"].tolist()
    assert table.column("user_notes").to_pylist() == ["a", None, "c, d", "", "e", "f"]
    assert summary["kept_columns"]["user_objid"] == {"source": "objid", "type": "int64", "unit": None}
    csv = tmp_path / "cat.csv"
    pd.DataFrame({k: v for k, v in cols.items()}).to_csv(csv, index=False)
    p = ingest.plan([str(csv)], "auto", {}, {}, BANDS, METHODS, keep=["objid"])
    assert p.keep == {"user_objid": ("objid", pa.string(), None)}


def test_an_unknown_kept_column_is_named_before_any_job(tmp_path):
    path = write_parquet(small_catalog(3), tmp_path / "cat.parquet")
    with pytest.raises(ingest.IngestError, match="keep_columns.*'stellar_mass'"):
        ingest.plan([path], "auto", {}, {}, BANDS, METHODS, keep=["stellar_mass"])
