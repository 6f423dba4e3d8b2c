"""The column dictionary (galdist.dictionary): every product column has one entry, the
product's metadata makes astropy give every column its documented unit and description,
the exports keep values, units and descriptions, and the README's table is the
dictionary's."""

from __future__ import annotations

import dataclasses
import json
import warnings

import astropy.units as u
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from astropy.table import Table

from conftest import BANDS, REPO
from galdist import crosscheck, dictionary, export, flags, methods, product, stages
from galdist.methods import REGISTRY
from galdist.redshift import MuGrid, make_cosmology

N = 23
KEEP = {"user_objid": {"source": "objid", "type": "int64", "unit": None},
        "user_notes": {"source": "notes", "type": "string", "unit": None}}


def _entries(bands=BANDS, methods_=None, keep=KEEP):
    return dictionary.by_name(dictionary.for_run(bands, methods_, keep))


def _values(e: dictionary.Entry, rng) -> pa.Array:
    """Values of the entry's storage type, with the awkward cases: NaN, null text, the
    top bit of a flag, an integer above 2^53."""
    if e.dtype == "string":
        words = ["alpha", "", None, "gamma, with comma", 'q"uote', "ünï"]
        return pa.array([words[i % len(words)] for i in range(N)], type=pa.string())
    if e.dtype.startswith("uint"):  # a flag column in its narrowest type, its top bit set
        return pa.array(np.array([0, 1, 37, np.iinfo(e.dtype).max // 2 + 5] * N, dtype=e.dtype)[:N])
    if e.dtype == "bool":
        return pa.array(np.arange(N) % 3 == 0)
    if e.dtype.startswith("int"):  # int64: above 2^53
        return pa.array(np.arange(N, dtype=e.dtype) + (2**60 + 1 if e.dtype == "int64" else 2**30 + 1))
    v = (rng.normal(size=N) * 10.0 ** rng.integers(-6, 6)).astype(e.dtype)
    v[3] = np.nan
    return pa.array(v)


@pytest.fixture(scope="module")
def synthetic_product(tmp_path_factory):
    """A product of every column the dictionary knows (every method, three bands, two
    kept columns), written with the schema the assembly writes (product.product_schema)."""
    entries = _entries()
    rng = np.random.default_rng(3)
    names = product.ordered(list(entries))
    table = pa.Table.from_arrays([_values(entries[n], rng) for n in names], names=names)
    lengths = product.longest_texts([])  # no shards: lengths measured here
    for n in names:
        if entries[n].dtype == "string":
            lengths[n] = max(len(v) for v in table.column(n).to_pylist() if v is not None)
    path = tmp_path_factory.mktemp("product") / "distances.parquet"
    pq.write_table(table.cast(product.product_schema(table, entries, {"run": "test"}, lengths)), path)
    return path, table, entries


# --------------------------------------------------------------------------- coverage

def test_every_declared_column_has_an_entry():
    """Each method's columns, each stage's, the cross-check's per-galaxy columns (computed,
    not listed) and the assembly's: an entry each, with a description, for any subset of
    methods."""
    for name, spec in REGISTRY.items():
        entries = _entries(methods_=[name], keep=None)
        for col in spec.output_units():
            assert col in entries and entries[col].description, col
            assert entries[col].unit == spec.output_units()[col], col
        for stage in ("extinction", "kcorr", "redshift"):
            for col, unit in stages.output_units(stage, BANDS).items():
                assert entries[col].unit == unit and entries[col].description, col
    grid = MuGrid.build(make_cosmology())
    n = 4
    cols = {"z_cmb": np.full(n, 0.02), "z_cmb_err": np.full(n, 1e-4), "mu_z": np.full(n, 35.0),
            "z_flags": flags.new(n)}
    for spec in REGISTRY.values():
        cols |= {f"{spec.prefix}_mu": np.full(n, 35.1), f"{spec.prefix}_mu_err": np.full(n, 0.3),
                 f"{spec.prefix}_mu_err_sys": np.full(n, 0.07), f"{spec.prefix}_flags": flags.new(n)}
    out = crosscheck.galaxy_columns(cols, grid, {"methods": {}}, methods=[s.prefix for s in REGISTRY.values()])
    entries = _entries(keep=None)
    assert set(out) <= set(entries), sorted(set(out) - set(entries))
    assert {"cz_cmb_kms", "mu_best", "mu_best_err_sys", "best_method"} <= set(entries)


def test_a_column_without_a_description_stops_the_product(monkeypatch):
    with pytest.raises(KeyError, match="mystery_column"):
        product.ordered_entries(["galaxy_id", "mystery_column"], _entries())
    spec = REGISTRY["sbf"]
    monkeypatch.setitem(REGISTRY, "sbf", dataclasses.replace(spec, outputs={**spec.outputs, "new_thing": "mag"}))
    with pytest.raises(KeyError, match="sbf_new_thing"):
        dictionary.for_run(BANDS, ["sbf"])


def test_names_never_clash_and_units_are_astropy_units():
    entries = dictionary.templates()
    names = [e.name for e in entries]
    assert len(names) == len(set(names))
    assert [n for n in names if n.startswith(dictionary.KEEP_PREFIX)] == ["user_<name>"]
    for e in entries:
        u.Unit(e.unit)  # raises on a unit astropy cannot read
        assert e.description and e.dtype, e.name
        assert e.dtype.startswith("uint") == bool(e.flags) == e.name.endswith("flags"), e.name
        if e.flags:  # the narrowest unsigned integer that holds the column's bits
            top = max(d["value"] for d in e.bits())
            narrower = {"uint16": "uint8", "uint32": "uint16"}.get(e.dtype)
            assert top <= np.iinfo(e.dtype).max and (narrower is None or top > np.iinfo(narrower).max), e.name
    # a description for every common column, the ones not yet written included
    assert set(methods.COMMON_OUTPUTS) <= set(methods.COMMON_DESCRIPTIONS)


def test_readme_column_table_is_the_dictionary():
    import subprocess
    import sys

    readme = (REPO / "README.md").read_text(encoding="utf-8")
    assert dictionary.readme_section().strip() in readme
    result = subprocess.run([sys.executable, str(REPO / "scripts" / "sync_flag_table.py"), "--check"])
    assert result.returncode == 0, "README tables are stale: run python scripts/sync_flag_table.py"


# --------------------------------------------------------------------------- reading

def test_astropy_reads_every_unit_and_description(synthetic_product):
    """Table.read over the whole dictionary, warnings as errors: a measured value has its
    documented unit (dimensionless where it has none), text, flags and booleans none;
    every description; a flag column's bits."""
    path, table, entries = synthetic_product
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        t = Table.read(path)
    assert t.colnames == table.column_names
    for name in t.colnames:
        e = entries[name]
        if e.dtype.startswith("float"):
            assert t[name].unit == u.Unit(e.unit), name
            assert t[name].quantity.unit == u.Unit(e.unit)
        else:
            assert t[name].unit is None, name
        assert t[name].description == e.description, name
        if e.flags:
            assert t[name].meta["flag_bits"] == {m.name: int(m.value) for m in flags.ALL[e.flags]}, name
    assert t["user_objid"][0] == 2**60 + 1  # kept integers stay exact
    assert t["user_notes"][5] == "ünï"


def test_parquet_field_metadata_and_pandas(synthetic_product):
    path, table, entries = synthetic_product
    schema = pq.read_schema(path)
    for f in schema:
        e = entries[f.name]
        assert f.metadata[b"description"].decode() == e.description
        assert f.metadata.get(b"unit", b"").decode() == e.unit
        assert product.dtype_name(f.type) == e.dtype
    df = pd.read_parquet(path)
    assert list(df.columns) == table.column_names and len(df) == N


# --------------------------------------------------------------------------- exports

def _same(a, b, name):
    a = np.asarray(a, dtype=object) if a.dtype.kind in "OSU" else a
    if a.dtype.kind == "f":
        # read back in the stored type (a float32's shortest text is exact as float32); NaN == NaN here
        np.testing.assert_array_equal(np.asarray(b, dtype=float).astype(a.dtype), a, err_msg=name)
    elif a.dtype == object:
        got = [v.decode() if isinstance(v, bytes) else ("" if v is None or v is np.ma.masked else str(v))
               for v in b]
        assert got == [v or "" for v in a], name
    else:
        assert np.array_equal(np.asarray(b).astype(a.dtype), a), name


@pytest.mark.parametrize("fmt", export.FORMATS)
def test_export_round_trip(synthetic_product, tmp_path, monkeypatch, fmt):
    """Every value (NaN, null text, commas and quotes, the top bit of uint32, integers
    above 2^53) and every unit and description back, over several batches."""
    monkeypatch.setattr(export, "BATCH_ROWS", 5)  # N = 23 rows: five batches
    path, table, entries = synthetic_product
    out = tmp_path / f"x.{fmt}"
    done = export.export(path, out, fmt)
    assert done["rows"] == N and done["columns"] == table.num_columns
    if fmt == "csv":
        got = pd.read_csv(out, keep_default_na=False, na_values=["nan"])
        side = json.loads((tmp_path / "x.csv.columns.json").read_text())
        meta = {c["name"]: c for c in side["columns"]}
        for name in table.column_names:
            assert meta[name]["unit"] == entries[name].unit and meta[name]["description"].startswith(
                entries[name].description), name
            _same(table.column(name).to_numpy(zero_copy_only=False), got[name].to_numpy(), name)
        return
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", u.UnitsWarning)  # FITS cannot spell dex(...): TUNIT as astropy writes it
        t = Table.read(out)
    for name in table.column_names:
        e = entries[name]
        col = t[name]
        values = col.filled("") if col.dtype.kind in "SU" and hasattr(col, "filled") else col
        _same(table.column(name).to_numpy(zero_copy_only=False), np.asarray(values), name)
        if e.dtype.startswith("float") and e.unit:
            assert u.Unit(str(col.unit)) == u.Unit(e.unit), name
        want = e.description.replace("–", "-") if fmt == "fits" else e.description  # FITS headers are ASCII
        assert col.description.startswith(want), name
        if e.flags:
            assert col.meta["flag_bits"] == {m.name: int(m.value) for m in flags.ALL[e.flags]}
    if fmt == "fits":
        from astropy.io import fits

        header = fits.getheader(out, 1)
        i = t.colnames.index("cz_cmb_kms") + 1
        assert header[f"TUNIT{i}"] == "km s-1" and header[f"TCOMM{i}"].startswith("c z_cmb")


def test_export_chosen_columns_and_unknown_ones(synthetic_product, tmp_path):
    path, table, _ = synthetic_product
    export.export(path, tmp_path / "x.ecsv", "ecsv", ["tf_mu", "galaxy_id"])
    t = Table.read(tmp_path / "x.ecsv")
    assert t.colnames == ["tf_mu", "galaxy_id"] and t["tf_mu"].unit == u.mag
    with pytest.raises(ValueError, match="'nope'"):
        export.export(path, tmp_path / "y.fits", "fits", ["tf_mu", "nope"])
    assert not (tmp_path / "y.fits").exists()


# --------------------------------------------------------------------------- flags, no method

def test_flag_values_decode_to_names():
    M = flags.Method
    value = int(M.MISSING_INPUT | M.LOW_INCLINATION | M.OUTLIER)
    assert value == 37  # bits 0, 2, 5 (galdist.flags)
    assert flags.decode("tf_flags", value) == ["MISSING_INPUT", "LOW_INCLINATION", "OUTLIER"]
    assert flags.decode("quality_flags", 1 << 20) == ["BIT20"]
    got = flags.decoded("z_flags", np.array([0, 2, 3], dtype=np.uint32))
    assert got.tolist() == ["", "LOCAL_FLOW", "NO_REDSHIFT|LOCAL_FLOW"]


def test_no_method_is_spelled_once():
    n = 3
    out = crosscheck.best_distance({"tf": (np.full(n, np.nan), np.full(n, 0.3), flags.new(n))})
    assert out["best_method"].to_pylist() == [crosscheck.NO_METHOD] * n == ["none"] * n
    assert crosscheck.count_labels(out["best_method"]) == {"none": n}
