"""Bad input: hypothesis fuzzing of catalogs, corrupt files, config and calibration files.

Every fuzzed catalog has one of two outcomes, never a traceback:
- a clean ingest: every row kept, in order, IDs intact, each bad value NaN with its
  quality bit set and every untouched row unflagged and unchanged; or
- a structural error (IngestError / CatalogError) that names the column, the ID or the
  file. Problems visible in the file's header (a missing column, text declared in a
  numeric column) are found by ``ingest.plan`` before any row is read; problems only the
  rows show (text in a CSV number column, empty or duplicate IDs) by ``ingest.run``,
  which then leaves no shards behind.

Which value is invalid for which column, and which bit it sets, is galdist's documented
convention: the Quality table in README.md (galdist.flags.Quality); the physical limits
behind it (|dec| <= 90, 0 < b/a <= 1) are common practice.

Config and calibration files are fuzzed the same way: every mutation that breaks the
schema (unknown key, wrong type, non-finite number, missing or malformed entry) must
raise ConfigError / CalibrationError naming the key (and the file).

Most cases run at library level (fast, ``derandomize=True`` so CI is deterministic); a
few fuzzed catalogs go through snakemake itself.
"""

from __future__ import annotations

import copy
import json
import math
import tempfile
from pathlib import Path

import astropy.units as u
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml
from astropy.table import Table
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from conftest import BANDS, REPO, run_snakemake, small_catalog
from galdist import calibration as gcal
from galdist import config as gconfig
from galdist import schema as gschema
from galdist import flags as F
from galdist import ingest, io

Q = F.Quality
METHODS = ["tully_fisher", "sbf"]
EXTRA_REQUIRED = ["ebv"]  # the default config's extinction.source = catalog needs the ebv column
FUZZ = settings(deadline=None, derandomize=True, database=None, print_blob=True,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                       HealthCheck.filter_too_much, HealthCheck.large_base_example])
N_CATALOGS, N_CORRUPT, N_CONFIGS, N_CALIBRATIONS = 200, 50, 120, 120

# --- what the README's Quality table says about each column ------------------------------

BIT = {"ra": Q.POSITION_INVALID, "dec": Q.POSITION_INVALID, "z_helio": Q.REDSHIFT_INVALID,
       "z_helio_err": Q.REDSHIFT_ERR_INVALID, "w50": Q.WIDTH_INVALID, "w50_err": Q.WIDTH_ERR_INVALID,
       "axis_ratio": Q.AXIS_RATIO_INVALID, "axis_ratio_err": Q.AXIS_RATIO_ERR_INVALID,
       "sbf_mag": Q.SBF_MAG_INVALID, "sbf_color": Q.SBF_COLOR_INVALID, "sbf_mag_err": Q.SBF_ERR_INVALID,
       "sbf_color_err": Q.SBF_ERR_INVALID, "ebv": Q.EBV_INVALID, "ebv_err": Q.EBV_INVALID,
       "hi_flux": Q.OPTIONAL_INVALID, "w50_resolution": Q.OPTIONAL_INVALID}
GROUPS = {"tf": ["w50", "w50_err", "axis_ratio", "axis_ratio_err"],
          "sbf": ["sbf_mag", "sbf_mag_err", "sbf_color", "sbf_color_err"]}
for _b in BANDS:
    BIT[f"mag_{_b}"], BIT[f"mag_{_b}_err"] = Q.MAG_INVALID, Q.MAG_ERR_INVALID
    GROUPS[_b] = [f"mag_{_b}", f"mag_{_b}_err"]
GROUP_OF = {c: g for g in GROUPS.values() for c in g}
ALWAYS_NEEDED = {"ra", "dec", "z_helio", "z_helio_err"}  # missing = invalid (README)
NUMERIC = list(BIT)
OPTIONAL_NUMERIC = ["ebv_err", "hi_flux", "w50_resolution"]

VALUES = {"nan": math.nan, "inf": math.inf, "-inf": -math.inf, "negative": -1.5, "huge": 1e30, "-huge": -1e30}
# -1.5 is valid where the README's range admits it: dec in [-90, 90], magnitudes in [-10, 40],
# sbf_mag in [-10, 50], sbf_color in [-2, 5]
NEGATIVE_OK = {"dec", "sbf_mag", "sbf_color", *(f"mag_{b}" for b in BANDS)}
# 1e30 is beyond every bound the README states: errors, ebv, hi_flux and w50_resolution
# have upper bounds too (an absurd value is flagged like any other bad one)
HUGE_OK: set[str] = set()

NOT_NUMBERS = ["broad", "12,5", "~300", "1.2.3", "abc def", "√2", "0x1F", "<5"]
SPECIAL_IDS = ["NA", "null", "nan", "None", "N/A", "#N/A", "0", "1e5", "-", "true", "NULL", "inf"]
EXTRA_NAMES = ["notes", "EXTRA COL", "quality_flags", "flag", "x" * 60, "zz_ünïcödé"]
REQUIRED_DROPPABLE = ["ra", "z_helio_err", "mag_Ks", "w50_err", "sbf_color", "ebv"]
INTABLE = ["w50", "ra", "dec", "mag_V", "w50_err"]
FORMATS = ["parquet", "parquet_dir", "fits", "csv", "ecsv", "votable"]
TEXT_FORMATS = {"csv", "ecsv", "votable"}  # floats travel as decimal text

UNICODE = st.characters(exclude_categories=("Cc", "Cs", "Cn", "Zl", "Zp"))
ASCII = st.characters(min_codepoint=32, max_codepoint=126)


# --- the fuzzed catalog -----------------------------------------------------------------

def rare(k: int):
    """True about once in k draws (hypothesis favours 0 for integers, not positions in a list)."""
    return st.sampled_from([False] * (k - 1) + [True])


@st.composite
def catalog_cases(draw):
    fmt = draw(st.sampled_from(FORMATS))
    n = draw(st.sampled_from(range(31)))  # 0 (empty) and 1 row included
    cols = small_catalog(n, seed=draw(st.integers(0, 10_000)))
    alphabet = ASCII if fmt == "fits" else UNICODE  # FITS tables hold ASCII text only
    case = {"fmt": fmt, "n": n, "plan_errors": [], "run_errors": [], "int_ids": False}

    # identifiers: short, ~300 characters, words a reader may take for "missing", or integers
    style = draw(st.sampled_from(["short", "long", "special", "int"]))
    if style == "short":
        cores = draw(st.lists(st.text(alphabet, max_size=8), min_size=n, max_size=n))
        ids = [f"G{c}#{i}" for i, c in enumerate(cores)]
    elif style == "long":
        core = draw(st.text(alphabet, min_size=280, max_size=300))
        ids = [f"G{core}#{i}" for i in range(n)]
    elif style == "special":
        ids = [SPECIAL_IDS[i] if i < len(SPECIAL_IDS) else f"G#{i}" for i in range(n)]
        ids = draw(st.permutations(ids))
    else:
        ids = [10**12 + 7 * i for i in range(n)]
        case["int_ids"] = True
    ids = list(ids)
    if n >= 2 and draw(rare(10)):
        i, j = draw(st.lists(st.integers(0, n - 1), min_size=2, max_size=2, unique=True))
        ids[j] = ids[i]
        case["run_errors"].append(("not unique", ids[i]))
    if n >= 1 and style != "int" and draw(rare(15)):
        ids[draw(st.integers(0, n - 1))] = draw(st.sampled_from(["", "   "]))
        case["run_errors"].append(("empty", "galaxy_id"))
    cols["galaxy_id"] = np.array(ids, dtype=np.int64) if case["int_ids"] else np.array(ids, dtype=object)
    classes = draw(st.lists(st.one_of(st.none(), st.text(alphabet, max_size=12)), min_size=n, max_size=n))
    cols["galaxy_class"] = np.array(classes, dtype=object)

    # optional columns: some dropped, some added
    for name in draw(st.sets(st.sampled_from(["ebv_err", "galaxy_class", "hi_flux", "w50_resolution"]))):
        if name in cols:
            del cols[name]
        else:
            cols[name] = np.full(n, 2.5)
    if draw(rare(12)):
        dropped = draw(st.sampled_from(REQUIRED_DROPPABLE))
        del cols[dropped]
        case["plan_errors"].append(dropped)

    # bad values: (row, column) -> kind
    present = [c for c in NUMERIC if c in cols]
    injections = {}
    if n:
        for row, col, kind in draw(st.lists(st.tuples(st.integers(0, n - 1), st.sampled_from(present),
                                                      st.sampled_from(list(VALUES))), max_size=12)):
            injections[(row, col)] = kind
    for (row, col), kind in injections.items():
        cols[col][row] = VALUES[kind]
    case["injections"] = injections
    case["input"] = {k: (v.copy() if isinstance(v, np.ndarray) else v) for k, v in cols.items()}

    # acceptable other dtypes: whole numbers stored as integers
    touched = {c for _, c in injections}
    intable = [c for c in INTABLE if c in cols and c not in touched]
    for name in (draw(st.sets(st.sampled_from(intable))) if intable else ()):
        cols[name] = np.round(cols[name]).astype(np.int64)
        case["input"][name] = cols[name].astype(float)
    # a wrong dtype: text in a numeric column
    floats = [c for c in present if cols[c].dtype.kind == "f"]
    if n and floats and draw(rare(8)):
        name = draw(st.sampled_from(floats))
        text = np.array([repr(float(v)) for v in cols[name]], dtype=object)
        text[draw(st.integers(0, n - 1))] = draw(st.sampled_from(NOT_NUMBERS))
        cols[name] = text
        if fmt == "csv":  # CSV declares no types: the rows show it
            case["run_errors"].append(("numeric", name))
        else:
            case["plan_errors"].append(name)

    # extra columns the catalog happens to carry
    for name in draw(st.sets(st.sampled_from(EXTRA_NAMES), max_size=3)):
        if fmt == "fits" and not name.isascii():
            continue
        kind = draw(st.sampled_from(["float", "int", "bool", "str"] + (["list"] if fmt.startswith("parquet") else [])))
        cols[name] = {"float": lambda: np.linspace(-1e300, 1e300, n), "int": lambda: np.arange(n),
                      "bool": lambda: np.arange(n) % 2 == 0, "str": lambda: np.array(["x y"] * n, dtype=object),
                      "list": lambda: [[1, 2]] * n}[kind]()
    case["cols"] = cols
    case["ids"] = [str(i) for i in ids]
    return case


def _astropy_table(cols: dict) -> Table:
    t = Table()
    for name, values in cols.items():
        if isinstance(values, np.ndarray) and values.dtype == object:
            values = np.array(["" if v is None else str(v) for v in values], dtype=str)
        t[name] = values
    return t


def write_catalog(case: dict, directory: Path) -> str:
    cols, fmt = case["cols"], case["fmt"]
    if fmt.startswith("parquet"):
        table = pa.table({k: (pa.array(list(v), type=pa.list_(pa.int64())) if isinstance(v, list) else v)
                          for k, v in cols.items()})
        if fmt == "parquet":
            pq.write_table(table, directory / "cat.parquet")
            return str(directory / "cat.parquet")
        (directory / "cat").mkdir()
        half = table.num_rows // 2
        pq.write_table(table.slice(0, half), directory / "cat" / "a.parquet")
        pq.write_table(table.slice(half), directory / "cat" / "b.parquet")
        return str(directory / "cat")
    suffix, astropy_format = {"fits": (".fits", "fits"), "csv": (".csv", "ascii.csv"),
                              "ecsv": (".ecsv", "ascii.ecsv"), "votable": (".xml", "votable")}[fmt]
    path = directory / f"cat{suffix}"
    _astropy_table(cols).write(path, format=astropy_format)
    return str(path)


def run_ingest(path: str, directory: Path, shard_rows: int = 1000):
    """('plan' | 'run', error) or ('ok', (table, summary))."""
    try:
        p = ingest.plan([path], "auto", {}, {}, BANDS, METHODS, EXTRA_REQUIRED)
    except (ingest.IngestError, ingest.CatalogError) as exc:
        return "plan", exc
    try:
        summary = ingest.run(p, directory / "shards", directory / "summary.json", shard_rows, batch_rows=7)
    except (ingest.IngestError, ingest.CatalogError) as exc:
        assert not (directory / "shards").exists(), "a failed ingest left shards behind"
        return "run", exc
    files = sorted((directory / "shards").glob("part-*.parquet"))
    return "ok", (pa.concat_tables([pq.read_table(f) for f in files]), summary)


def _must_flag(case: dict, row: int, col: str, kind: str):
    """Whether the README's Quality table makes this injected value invalid: True, False or None (moot)."""
    inp = case["input"]
    if kind == "nan":
        group = GROUP_OF.get(col)
        if col in ALWAYS_NEEDED:
            must = True
        elif group is not None:  # missing while another input of its group is given
            must = any(not np.isnan(inp[c][row]) for c in group if c != col and c in inp)
        else:  # ebv, ebv_err, optional columns: a missing value is "not observed"
            must = None
    elif kind == "negative":
        must = col not in NEGATIVE_OK
    elif kind == "huge":
        must = col not in HUGE_OK
    else:  # +-inf, -1e30: invalid everywhere
        must = True
    return must


def _bit_expected(case: dict, row: int, col: str, kind: str):
    """Must this injection set its Quality bit: True, False or None (moot, either is fine)."""
    must = _must_flag(case, row, col, kind)
    if col == "ebv_err" and must and np.isnan(case["input"]["ebv"][row]):
        return None  # an error bar of a missing E(B-V) is moot
    return must


def expected_bits(case: dict) -> tuple[np.ndarray, np.ndarray]:
    """(bits that must be set, bits that may be set) per row."""
    required = np.zeros(case["n"], dtype=np.uint32)
    allowed = np.zeros(case["n"], dtype=np.uint32)
    for (row, col), kind in case["injections"].items():
        must, bit = _bit_expected(case, row, col, kind), np.uint32(BIT[col])
        if must:
            required[row] |= bit
        if must is not False:
            allowed[row] |= bit
    return required, allowed


def _as_stored(column: str, values) -> np.ndarray:
    """``values`` as the ingest shard stores ``column``: float32 but positions and redshifts
    (galdist.io.stored_float)."""
    return np.asarray(values, dtype=float).astype(io.stored_float(column).to_pandas_dtype())


def _stored_rtol(column: str, rtol: float) -> float:
    """Text formats parse to within ``rtol``; a float32 column may then round to a neighbour (2^-24)."""
    return rtol if rtol == 0 or column in io.FULL_PRECISION else 2.0**-23


def check_clean_ingest(case: dict, table: pa.Table, summary: dict) -> None:
    n, inp = case["n"], case["input"]
    assert table.num_rows == n and summary["rows_in"] == summary["rows_out"] == n
    assert table.column("galaxy_id").to_pylist() == case["ids"]  # order and content kept
    q = table.column("quality_flags").to_numpy()
    required, allowed = expected_bits(case)
    assert np.all(q & required == required), (q, required)
    assert np.all(q & ~allowed == 0), (q, allowed)
    out = {c: table.column(c).to_numpy() for c in NUMERIC}
    for c in NUMERIC:
        assert not np.isinf(out[c]).any(), c  # an infinite value never reaches a later stage
    injected_rows = {row for row, _ in case["injections"]}
    position_bad = set(np.flatnonzero(F.has(q, Q.POSITION_INVALID)))
    rtol = 1e-15 if case["fmt"] in TEXT_FORMATS else 0.0
    for (row, col), kind in case["injections"].items():
        if kind == "nan" or _must_flag(case, row, col, kind):
            assert np.isnan(out[col][row]), (col, kind)  # a flagged value is never used later
        elif not (col in ("ra", "dec") and row in position_bad):
            np.testing.assert_allclose(out[col][row], _as_stored(col, VALUES[kind]), rtol=_stored_rtol(col, rtol),
                                       err_msg=f"{col} {kind}")
    clean = np.array([i not in injected_rows for i in range(n)], dtype=bool)
    assert not q[clean].any()
    for c in NUMERIC:
        if c in inp:
            np.testing.assert_allclose(out[c][clean], _as_stored(c, inp[c])[clean], rtol=_stored_rtol(c, rtol),
                                       atol=0, err_msg=c)
        else:
            assert np.isnan(out[c]).all(), c  # an absent optional column is NaN throughout


@settings(FUZZ, max_examples=N_CATALOGS)
@given(case=catalog_cases())
def test_fuzzed_catalog_ingests_cleanly_or_fails_structurally(case):
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        path = write_catalog(case, tmp)
        stage, result = run_ingest(path, tmp)
    event(f"format {case['fmt']}: {stage} {[e[0] for e in case['run_errors']]}")
    if case["plan_errors"]:
        assert stage == "plan", f"expected a structural error naming {case['plan_errors']}, got {stage}"
        msg = str(result)
        assert Path(path).name in msg
        for name in case["plan_errors"]:
            assert f"'{name}'" in msg, (name, msg)
    elif case["run_errors"]:
        assert stage == "run", f"expected an error naming {case['run_errors']} from ingest, got {stage}: {result}"
        msg = str(result)
        named = []
        for what, detail in case["run_errors"]:
            if what == "not unique":
                named.append("not unique" in msg and repr(detail if not case["int_ids"] else str(detail)) in msg)
            elif what == "empty":
                named.append("galaxy_id" in msg and "empty" in msg)
            else:  # text in a numeric CSV column
                named.append(f"column '{detail}' must be numeric" in msg)
        assert any(named), (case["run_errors"], msg)
    else:
        assert stage == "ok", f"a valid catalog was refused at {stage}: {result}"
        check_clean_ingest(case, *result)


# --- corrupt and truncated files ------------------------------------------------------

def _fits_data_end(path: Path) -> int:
    from astropy.io import fits
    with fits.open(path) as hdul:
        info = hdul.fileinfo(1)
        h = hdul[1].header
        return info["datLoc"] + h["NAXIS1"] * h["NAXIS2"] + h.get("PCOUNT", 0)


@settings(FUZZ, max_examples=N_CORRUPT)
@given(fmt=st.sampled_from(["parquet", "fits"]), n=st.integers(1, 300), cut=st.floats(0.0, 1.0),
       damage=st.sampled_from(["truncate", "garbage-start", "garbage-end"]))
def test_corrupt_or_truncated_file_is_named(fmt, n, cut, damage):
    """Parquet and FITS damaged anywhere: a CatalogError naming the file, never wrong or missing rows."""
    # without the FP columns small_catalog gained: with them, garbage in a FITS file's last
    # 64 bytes can land in the last row's float data, which FITS (no checksum here) cannot
    # tell from values: a known gap of the FITS reader, not what this test covers
    cols = {k: v for k, v in small_catalog(n).items() if not k.startswith("fp_")}
    case = {"fmt": fmt, "cols": cols}
    for k in ("galaxy_id", "galaxy_class"):
        cols[k] = cols[k].astype(str)
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        path = Path(write_catalog(case, tmp))
        data = path.read_bytes()
        intact_end = _fits_data_end(path) if fmt == "fits" else len(data)
        size = int(cut * (len(data) - 1))
        if damage == "truncate":
            path.write_bytes(data[:size])
            harmless = size >= intact_end  # only FITS block padding was cut
        else:
            span = min(64, len(data))
            at = 0 if damage == "garbage-start" else len(data) - span
            path.write_bytes(data[:at] + bytes((b + 101) % 256 for b in data[at:at + span]) + data[at + span:])
            harmless = at >= intact_end  # FITS block padding after the table
        stage, result = run_ingest(str(path), tmp)
    event(f"{fmt} {damage}: {stage}")
    if harmless:
        assert stage == "ok"
        assert result[0].column("galaxy_id").to_pylist() == list(cols["galaxy_id"])
    else:
        assert stage in ("plan", "run"), f"damaged {fmt} was read without complaint"
        assert isinstance(result, ingest.CatalogError) and path.name in str(result), result


# --- multi-file catalogs: units, schemas and masks file by file ---------------------------

N_MULTI = 150
MULTI_FORMATS = ["parquet", "parquet_dir", "fits", "ecsv"]  # the formats that declare units and types
C_KMS = 299792.458
# units a file may declare, with the factor to the canonical unit, written out here apart
# from galdist: z = v/c (c = 299792.458 km/s, SI), 1 rad = 180/pi deg, 1 h of RA = 15 deg
FILE_UNITS = {"z_helio": [("km/s", 1 / C_KMS), ("m/s", 1e-3 / C_KMS)], "z_helio_err": [("km / s", 1 / C_KMS)],
              "ra": [("rad", 180 / math.pi), ("hourangle", 15.0)], "w50": [("m/s", 1e-3)],
              "axis_ratio": [("percent", 0.01)]}
# masked cells; FITS stores these columns as integers with TNULL (whole numbers stay valid)
MASKABLE = ["w50", "w50_err", "hi_flux", "mag_V", "mag_I", "sbf_mag"]
FITS_NULL = 999999
FILE_PROBLEMS = ["missing_required", "missing_optional", "boolean", "text", "bad_unit"]
RETYPABLE = ["w50", "sbf_mag", "mag_V", "z_helio", "axis_ratio_err"]


@st.composite
def multi_file_cases(draw):
    """2-3 files of one format, each with its own declared units, masked cells, and at
    most one file that does not fit the others (a structural error naming it)."""
    fmt = draw(st.sampled_from(MULTI_FORMATS))
    sizes = draw(st.lists(st.integers(0, 6), min_size=2, max_size=3))
    n = sum(sizes)
    canon = small_catalog(n, seed=draw(st.integers(0, 10_000)))
    canon["galaxy_id"] = np.array([f"G-ü{i}" if i % 2 else f"G{i}" for i in range(n)], dtype=object)
    del canon["galaxy_class"]
    if draw(st.booleans()):
        canon["hi_flux"] = np.full(n, 2.0)
    config_units = {"w50": "m/s"} if draw(rare(4)) else {}
    case = {"fmt": fmt, "n": n, "config_units": config_units, "files": [], "injections": {},
            "ids": list(canon["galaxy_id"]), "problem": None}
    expected = {c: np.full(n, np.nan) for c in NUMERIC if c in canon}
    start = 0
    for j, size in enumerate(sizes):
        cols = {c: v[start:start + size].copy() for c, v in canon.items()}
        units, factors, masks = {}, {}, {}
        for name, choices in FILE_UNITS.items():
            choice = draw(st.sampled_from([None, *choices])) if name not in config_units else None
            if choice:
                units[name], factors[name] = choice
        if "w50" in config_units:  # every file holds m/s; a file may label it wrongly, config wins
            factors["w50"] = 1e-3
            if draw(st.booleans()):
                units["w50"] = "km/s"
        for name, factor in factors.items():
            cols[name] = cols[name] / factor
        if fmt == "fits":
            for name in MASKABLE:
                if name in cols:
                    cols[name] = np.round(cols[name])
        for name in (draw(st.sets(st.sampled_from([c for c in MASKABLE if c in cols]), max_size=2)) if size else ()):
            mask = np.zeros(size, dtype=bool)
            mask[draw(st.integers(0, size - 1))] = True
            masks[name] = mask
            for row in np.flatnonzero(mask):
                case["injections"][(start + int(row), name)] = "nan"
        for name in expected:
            value = cols[name] * factors.get(name, 1.0)
            expected[name][start:start + size] = np.where(masks.get(name, np.zeros(size, bool)), np.nan, value)
        case["files"].append({"cols": cols, "units": units, "masks": masks,
                              "declared": {**{k: v for k, v in units.items() if k not in config_units},
                                           **config_units}})
        start += size
    if draw(rare(3)):
        j = draw(st.integers(0, len(sizes) - 1))
        spec = case["files"][j]
        kind = draw(st.sampled_from(FILE_PROBLEMS if "hi_flux" in canon else FILE_PROBLEMS[:1] + FILE_PROBLEMS[2:]))
        if kind == "missing_required":
            name = draw(st.sampled_from(REQUIRED_DROPPABLE))
            del spec["cols"][name]
        elif kind == "missing_optional":
            name = "hi_flux"
            del spec["cols"][name]
        elif kind == "bad_unit":
            name = draw(st.sampled_from([c for c in ("w50", "z_helio", "sbf_mag", "ra") if c not in config_units]))
            spec["units"][name] = "kg"
        else:
            name = draw(st.sampled_from(RETYPABLE))
            size = len(spec["cols"]["ra"])
            spec["cols"][name] = (np.arange(size) % 2 == 0) if kind == "boolean" else \
                np.array([f"{v:.3f}" for v in spec["cols"][name]], dtype=object)
        spec["masks"].pop(name, None)
        if kind != "bad_unit":
            spec["units"].pop(name, None)
        case["problem"] = (j, name, kind)
    case["input"] = expected
    return case


def _write_multi_fits(spec: dict, path: Path) -> None:
    from astropy.io import fits
    columns = []
    for name, values in spec["cols"].items():
        unit = spec["units"].get(name)
        mask = spec["masks"].get(name)
        if values.dtype == object:
            data = np.array([str(v).encode("utf-8") for v in values], dtype=bytes)
            width = max([1] + [len(b) for b in data])
            columns.append(fits.Column(name=name, format=f"{width}A", array=data.astype(f"S{width}"), unit=unit))
        elif values.dtype == bool:
            columns.append(fits.Column(name=name, format="L", array=values))
        elif name in MASKABLE:
            data = values.astype(np.int64)
            if mask is not None:
                data[mask] = FITS_NULL
            columns.append(fits.Column(name=name, format="K", null=FITS_NULL, array=data, unit=unit))
        else:
            columns.append(fits.Column(name=name, format="D", array=values, unit=unit))
    fits.BinTableHDU.from_columns(columns).writeto(path)


def _write_multi_parquet(spec: dict, path: Path) -> None:
    fields, arrays = [], []
    for name, values in spec["cols"].items():
        arr = pa.array(values, mask=spec["masks"].get(name))
        unit = spec["units"].get(name)
        fields.append(pa.field(name, arr.type, metadata={"unit": unit} if unit else None))
        arrays.append(arr)
    pq.write_table(pa.Table.from_arrays(arrays, schema=pa.schema(fields)), path)


def _write_multi_ecsv(spec: dict, path: Path) -> None:
    from astropy.table import MaskedColumn
    t = Table()
    for name, values in spec["cols"].items():
        data = values.astype(str) if values.dtype == object else values
        mask = spec["masks"].get(name)
        t[name] = MaskedColumn(data, mask=mask) if mask is not None else data
        if spec["units"].get(name):
            t[name].unit = spec["units"][name]
    t.write(path, format="ascii.ecsv")


def write_multi(case: dict, directory: Path) -> tuple[list[str], list[Path]]:
    """The catalog paths for config, and the file of each spec in order."""
    fmt = case["fmt"]
    if fmt == "parquet_dir":
        root = directory / "cat"
        (root / ".staging").mkdir(parents=True)
        files = [root / f"part-{j}.parquet" for j in range(len(case["files"]))]
        junk = pa.table({"galaxy_id": ["half-written"], "w50": [True]})  # never part of the dataset
        pq.write_table(junk, root / ".staging" / "part-9.parquet")
        pq.write_table(junk, root / "_part-8.parquet")
        paths = [str(root)]
    else:
        suffix = {"parquet": "parquet", "fits": "fits", "ecsv": "ecsv"}[fmt]
        files = [directory / f"cat-{j}.{suffix}" for j in range(len(case["files"]))]
        paths = [str(f) for f in files]
    writer = {"parquet": _write_multi_parquet, "parquet_dir": _write_multi_parquet, "fits": _write_multi_fits,
              "ecsv": _write_multi_ecsv}[fmt]
    for spec, path in zip(case["files"], files):
        writer(spec, path)
    return paths, files


@settings(FUZZ, max_examples=N_MULTI)
@given(case=multi_file_cases())
def test_fuzzed_multi_file_catalog(case):
    """Each file is read in its own units; one file that does not fit stops ``plan``
    naming that file and the column; masked cells (nulls, TNULL, ECSV blanks) are NaN."""
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        paths, files = write_multi(case, tmp)
        try:
            p = ingest.plan(paths, "auto", {}, case["config_units"], BANDS, METHODS, EXTRA_REQUIRED)
        except (ingest.IngestError, ingest.CatalogError) as exc:
            assert case["problem"], f"a valid multi-file catalog was refused: {exc}"
            j, name, kind = case["problem"]
            event(f"multi {case['fmt']}: plan refused {kind}")
            msg = str(exc)
            assert f"{files[j]}:" in msg and f"'{name}'" in msg, (case["problem"], msg)
            return
        assert not case["problem"], f"{case['problem']} was not found before reading"
        event(f"multi {case['fmt']}: ok")
        summary = ingest.run(p, tmp / "shards", tmp / "summary.json", 5, batch_rows=4)
        table = pa.concat_tables([pq.read_table(f) for f in sorted((tmp / "shards").glob("part-*.parquet"))])
    assert table.column("galaxy_id").to_pylist() == case["ids"]
    read_in = [f["units"] for i in summary["inputs"] for f in i["files"]]  # ECSV writes '%' for percent
    assert [{k: u.Unit(v) for k, v in f.items()} for f in read_in] == \
        [{k: u.Unit(v) for k, v in s["declared"].items()} for s in case["files"]]
    for name, want in case["input"].items():
        np.testing.assert_allclose(table.column(name).to_numpy(), _as_stored(name, want),
                                   rtol=_stored_rtol(name, 1e-12), atol=0, err_msg=name)
    q = table.column("quality_flags").to_numpy()
    required, allowed = expected_bits(case)
    assert np.all(q & required == required) and np.all(q & ~allowed == 0), (q, required, allowed)
    injected = {row for row, _ in case["injections"]}
    assert not q[[i for i in range(case["n"]) if i not in injected]].any()


# --- explicit regressions the fuzzing found -------------------------------------------

def test_csv_ids_that_look_like_missing_values_are_kept(tmp_path):
    """'NA', 'null', 'nan' are galaxy names in a text column, not missing values."""
    cols = small_catalog(len(SPECIAL_IDS))
    cols["galaxy_id"] = np.array(SPECIAL_IDS, dtype=str)
    cols["galaxy_class"] = np.array(["NA"] * len(SPECIAL_IDS), dtype=str)
    cols["w50"] = np.array(["n/a", "NaN", "", "-nan", "NULL", "#N/A", "nan", "NA", "N/A", "null", "1.5e2", "-"],
                           dtype=str)
    path = tmp_path / "c.csv"
    _astropy_table(cols).write(path, format="ascii.csv")
    stage, result = run_ingest(str(path), tmp_path)
    assert stage == "ok", result
    table, _ = result
    assert table.column("galaxy_id").to_pylist() == SPECIAL_IDS
    assert table.column("galaxy_class").to_pylist() == ["NA"] * len(SPECIAL_IDS)
    w50 = table.column("w50").to_numpy()
    assert np.isnan(w50[:10]).all() and w50[10] == 150.0 and np.isnan(w50[11])


def test_ecsv_object_columns_are_read_or_refused_by_name(tmp_path):
    """astropy writes object (e.g. pandas) string columns as JSON (subtype json) in ECSV."""
    cols = small_catalog(4)  # galaxy_id and galaxy_class are object arrays
    path = tmp_path / "c.ecsv"
    Table(cols).write(path, format="ascii.ecsv")
    assert "subtype: json" in path.read_text()
    stage, result = run_ingest(str(path), tmp_path)
    if stage == "ok":
        assert result[0].column("galaxy_id").to_pylist() == list(cols["galaxy_id"])
    else:
        assert stage == "plan" and "'galaxy_id'" in str(result) and "json" in str(result), result


# --- config fuzzing -------------------------------------------------------------------

SCHEMA = gschema.config_schema()
BASE_CONFIG = gconfig.validate(gconfig.load(REPO / "config" / "config.yaml"))


def _subschema(schema: dict, value):
    """The schema branch that describes ``value`` (for oneOf: the one whose type fits)."""
    if "oneOf" in schema:
        kinds = {dict: "object", list: "array", str: "string", type(None): "null"}
        for alt in schema["oneOf"]:
            if alt.get("type") == kinds.get(type(value)):
                return alt
    return schema


def _leaves(config, schema, path=()):
    """(path, schema) of every value in the config, objects included (schema before any oneOf choice)."""
    yield path, schema
    schema = _subschema(schema, config)
    if isinstance(config, dict):
        for k, v in config.items():
            sub = schema.get("properties", {}).get(k)
            if sub is None and isinstance(schema.get("additionalProperties"), dict):
                sub = schema["additionalProperties"]
            if sub is not None:
                yield from _leaves(v, sub, (*path, k))


def _get(config, path):
    for k in path:
        config = config[k]
    return config


CONFIG_LEAVES = [(p, s) for p, s in _leaves(BASE_CONFIG, SCHEMA) if p]
CLOSED_OBJECTS = [p for p, s in _leaves(BASE_CONFIG, SCHEMA)
                  if _subschema(s, _get(BASE_CONFIG, p)).get("additionalProperties") is False]


def _types(schema: dict) -> set:
    if "enum" in schema:
        return {"enum"}
    t = schema.get("type")
    if t is None and "oneOf" in schema:
        return set().union(*(_types(a) for a in schema["oneOf"]))
    return set(t) if isinstance(t, list) else {t}


def _wrong_values(schema: dict) -> list:
    """Values no branch of ``schema`` accepts (command-line strings that parse as numbers aside)."""
    types = _types(schema)
    out = []
    if not types & {"string", "enum"}:
        out += ["many", "ünïcode"]
    if "enum" in types:
        out.append("definitely-not-allowed")
    if not types & {"number", "integer"}:
        out += [12.5, -3]
    if "integer" in types and "number" not in types:
        out.append(2.5)
    if types & {"number", "integer"}:
        out += [math.nan, math.inf, -math.inf]
    if "array" not in types:
        out.append([1, "two"])
    if "object" not in types:
        out.append({"nested": 1})
    if "boolean" not in types and types & {"number", "integer"} == set():
        out.append(True)
    return out


def _set(config, path, value):
    target = config
    for k in path[:-1]:
        target = target[k]
    target[path[-1]] = value


@st.composite
def config_mutations(draw):
    config = copy.deepcopy(BASE_CONFIG)
    if draw(st.booleans()):
        where = draw(st.sampled_from(CLOSED_OBJECTS))
        key = draw(st.sampled_from(["bogus", "shardrows", "Run", "tully-fisher", "extra_key", "ünknown"]))
        target = config
        for k in where:
            target = target[k]
        if key in target:
            key += "_x"
        target[key] = draw(st.sampled_from([1, "x", None, [1], {"a": 1}]))
        return config, "unknown", where, key
    path, schema = draw(st.sampled_from(CONFIG_LEAVES))
    value = draw(st.sampled_from(_wrong_values(schema)))
    _set(config, path, value)
    return config, "wrong", path, value


@settings(FUZZ, max_examples=N_CONFIGS)
@given(mutation=config_mutations(), via_file=st.booleans())
def test_fuzzed_config_errors_name_the_key(mutation, via_file):
    config, kind, path, what = mutation
    event(f"config {kind}")
    if via_file:
        with tempfile.TemporaryDirectory() as tmp:
            f = Path(tmp) / "user.yaml"
            f.write_text(yaml.safe_dump(config, allow_unicode=True))
            config = gconfig.load(f)
    with pytest.raises(gconfig.ConfigError) as info:
        gconfig.validate(config)
    msg = str(info.value)
    if kind == "unknown":
        assert f"unknown config key {what!r}" in msg, msg
        if path:
            assert f"in '{'.'.join(path)}'" in msg, msg
    else:
        # the innermost key, or the enclosing key of a value whose kind is wrong altogether
        dotted = ".".join(path)
        assert f"'{dotted}" in msg or f"config key '{'.'.join(path[:-1])}" in msg, (dotted, msg)


def test_config_file_that_is_not_utf8_or_not_a_mapping(tmp_path):
    bad = tmp_path / "latin1.yaml"
    bad.write_bytes("run: caf\xe9\n".encode("latin-1"))
    with pytest.raises(gconfig.ConfigError, match="latin1.yaml"):
        gconfig.load(bad)
    listed = tmp_path / "list.yaml"
    listed.write_text("- run\n- demo\n")
    with pytest.raises(gconfig.ConfigError, match="list.yaml must hold a mapping"):
        gconfig.load(listed)


# --- calibration fuzzing ------------------------------------------------------------------

CAL_DIR = REPO / "workflow" / "galdist" / "data" / "calibrations"
CAL_FILES = sorted(CAL_DIR.glob("*.yaml"))
CAL_SCHEMA = gschema.calibration_schema()
NUMBER_KEYS = ["pivot", "scatter", "zero_point_error", "magnitude_pivot"]


@st.composite
def calibration_mutations(draw):
    src = draw(st.sampled_from(CAL_FILES))
    data = yaml.safe_load(src.read_text())
    kind = draw(st.sampled_from(["unknown", "missing", "wrong_type", "non_finite", "non_finite_item",
                                 "length", "ragged_covariance", "covariance_shape", "reversed_range"]))
    props = CAL_SCHEMA["properties"]
    if kind == "unknown":
        key = draw(st.sampled_from(["coefficent", "Scatter", "slope", "ünknown"]))
        data[key] = 1.0
    elif kind == "missing":
        key = draw(st.sampled_from(CAL_SCHEMA["required"]))
        del data[key]
    elif kind == "wrong_type":
        key = draw(st.sampled_from(sorted(props)))
        data[key] = draw(st.sampled_from(_wrong_values(props[key])))
    elif kind == "non_finite":
        key = draw(st.sampled_from(NUMBER_KEYS))
        data[key] = draw(st.sampled_from([math.nan, math.inf, -math.inf]))
    elif kind == "non_finite_item":
        key = draw(st.sampled_from(["coefficients", "coefficient_errors", "valid_range"]))
        data[key] = list(data[key])
        data[key][draw(st.integers(0, len(data[key]) - 1))] = draw(st.sampled_from([math.nan, math.inf]))
    elif kind == "length":
        key = "coefficient_errors"
        data[key] = list(data["coefficient_errors"]) + [0.1]
    elif kind == "ragged_covariance":
        key = "covariance"
        m = len(data["coefficients"])
        data[key] = [[0.01] * m for _ in range(m)]
        data[key][-1] = data[key][-1][:-1] or [[0.01]]
    elif kind == "covariance_shape":
        key = "covariance"
        m = len(data["coefficients"]) + 1
        data[key] = np.eye(m).tolist()
    else:
        key = "valid_range"
        data[key] = sorted(data[key], reverse=True)
    return src.name, data, kind, key


@settings(FUZZ, max_examples=N_CALIBRATIONS)
@given(mutation=calibration_mutations())
def test_fuzzed_calibration_errors_name_the_file_and_key(mutation):
    name, data, kind, key = mutation
    event(f"calibration {kind}")
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / name
        path.write_text(yaml.safe_dump(data, allow_unicode=True))
        with pytest.raises(gcal.CalibrationError) as info:
            gcal.load_calibration(path)
    msg = str(info.value)
    assert str(path) in msg, msg
    assert repr(key) in msg or f"'{key}" in msg or key in msg, (kind, key, msg)


def test_calibration_file_that_is_not_utf8_or_not_a_mapping(tmp_path):
    bad = tmp_path / "latin1.yaml"
    bad.write_bytes(CAL_FILES[0].read_text().replace("name:", "notes: caf\xe9\nname:", 1).encode("latin-1"))
    with pytest.raises(gcal.CalibrationError, match="latin1.yaml"):
        gcal.load_calibration(bad)
    listed = tmp_path / "list.yaml"
    listed.write_text("- 1\n- 2\n")
    with pytest.raises(gcal.CalibrationError, match=r"list.yaml: key '\(top level\)'"):
        gcal.load_calibration(listed)


def test_the_shipped_files_pass_the_same_checks():
    """The fuzzers mutate valid files: the originals load (so each failure above is the mutation's)."""
    for path in CAL_FILES:
        gcal.load_calibration(path)
    gconfig.validate(copy.deepcopy(BASE_CONFIG))


# --- a few fuzzed catalogs through snakemake --------------------------------------------

def _nasty_case(fmt: str, n: int, seed: int) -> dict:
    """A catalog with every kind of bad value, awkward IDs, dropped and extra columns."""
    rng = np.random.default_rng(seed)
    cols = small_catalog(n, seed=seed)
    ids = [("NA" if i == 0 else "G-ünï ☃ #" + str(i) if i % 3 else "L" + "x" * 290 + str(i)) for i in range(n)]
    if fmt == "fits":
        ids = [i.encode("ascii", "replace").decode() for i in ids]
    cols["galaxy_id"] = np.array(ids, dtype=object)
    del cols["ebv_err"], cols["galaxy_class"]
    cols["hi_flux"] = rng.uniform(1, 10, n)
    cols["notes"] = np.array(["extra column, not read"] * n, dtype=object)
    injections = {}
    present = [c for c in NUMERIC if c in cols]
    for row in range(1, n, 2):
        col = present[rng.integers(len(present))]
        injections[(row, col)] = list(VALUES)[rng.integers(len(VALUES))]
        cols[col][row] = VALUES[injections[(row, col)]]
    case = {"fmt": fmt, "n": n, "cols": cols, "ids": ids, "injections": injections,
            "input": {k: v.copy() for k, v in cols.items()}, "int_ids": False}
    return case


@pytest.mark.slow
@pytest.mark.parametrize("fmt,n", [("csv", 25), ("votable", 1)])
def test_fuzzed_catalog_through_snakemake(workflow_copy, fmt, n):
    case = _nasty_case(fmt, n, seed=7)
    path = write_catalog(case, workflow_copy)
    result = run_snakemake(workflow_copy, "--config", f"catalog={Path(path).name}", "run=fuzz")
    out = result.stdout + result.stderr
    assert result.returncode == 0, out[-3000:]
    run = workflow_copy / "results" / "fuzz"
    product = pq.read_table(run / "distances.parquet")
    assert product.num_rows == n
    assert product.column("galaxy_id").to_pylist() == case["ids"]
    required, allowed = expected_bits(case)
    q = product.column("quality_flags").to_numpy()
    assert np.all(q & required == required) and np.all(q & ~allowed == 0)
    summary = json.loads((run / "summary.json").read_text())
    assert summary["rows_in"] == summary["rows_out"] == n


def _structural_catalog(kind: str, directory: Path) -> tuple[str, list[str]]:
    """A catalog with one structural problem and the words its error must contain."""
    cols = small_catalog(30)
    for k in ("galaxy_id", "galaxy_class"):
        cols[k] = cols[k].astype(str)
    if kind == "text_in_numeric_parquet":
        cols["sbf_mag"] = np.array([str(v) for v in cols["sbf_mag"]], dtype=object)
        cols["sbf_mag"][3] = "faint"
        pq.write_table(pa.table(cols), directory / "cat.parquet")
        return "cat.parquet", ["column 'sbf_mag'", "must be numeric"]
    if kind == "corrupt_parquet":
        pq.write_table(pa.table(cols), directory / "cat.parquet")
        data = (directory / "cat.parquet").read_bytes()
        (directory / "cat.parquet").write_bytes(data[: len(data) // 3])
        return "cat.parquet", ["catalog cat.parquet", "cannot be read as parquet"]
    if kind == "truncated_fits_header":
        Table(cols).write(directory / "cat.fits")
        data = (directory / "cat.fits").read_bytes()
        (directory / "cat.fits").write_bytes(data[:4000])
        return "cat.fits", ["catalog cat.fits"]
    if kind == "nan_in_calibration":
        text = (REPO / "workflow" / "galdist" / "data" / "calibrations" / "tf_i_tully_courtois_2012.yaml").read_text()
        (directory / "workflow" / "galdist" / "data" / "calibrations" / "tf_i_tully_courtois_2012.yaml").write_text(
            text.replace("scatter: 0.41", "scatter: .nan"))
        pq.write_table(pa.table(cols), directory / "cat.parquet")
        return "cat.parquet", ["tf_i_tully_courtois_2012.yaml", "'scatter'"]
    raise ValueError(kind)


@pytest.mark.parametrize("kind", ["text_in_numeric_parquet", "corrupt_parquet", "truncated_fits_header",
                                  "nan_in_calibration"])
def test_structural_problem_stops_snakemake_before_any_job(workflow_copy, kind):
    name, words = _structural_catalog(kind, workflow_copy)
    result = run_snakemake(workflow_copy, "--config", f"catalog={name}", "run=fuzz")
    out = result.stdout + result.stderr
    assert result.returncode != 0
    assert "galdist cannot start" in out, out[-2000:]
    for w in words:
        assert w in out, (w, out[-2000:])
    assert "Traceback (most recent call last)" not in out
    assert not (workflow_copy / "results").exists()


@pytest.mark.slow
def test_duplicate_ids_stop_the_ingest_job_naming_them(workflow_copy):
    """Found only by reading the rows: the ingest job fails, names the ID and leaves no shards."""
    cols = small_catalog(30)
    for k in ("galaxy_id", "galaxy_class"):
        cols[k] = cols[k].astype(str)
    cols["galaxy_id"][17] = cols["galaxy_id"][4]
    Table(cols).write(workflow_copy / "cat.fits")
    result = run_snakemake(workflow_copy, "--config", "catalog=cat.fits", "run=fuzz")
    out = result.stdout + result.stderr
    assert result.returncode != 0
    assert "galdist: ingest failed: galaxy_id is not unique: 1 IDs repeat ('T-0004' x2)" in out, out[-3000:]
    log = (workflow_copy / "results" / "fuzz" / "logs" / "ingest.log").read_text()
    assert "'T-0004' x2" in log
    assert not (workflow_copy / "results" / "fuzz" / "shards" / "ingest").exists()
    assert not (workflow_copy / "results" / "fuzz" / "distances.parquet").exists()
