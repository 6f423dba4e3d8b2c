"""Ingest: map a local catalog onto the canonical columns, flag bad values, add the
Galactic coordinates (computed once here for every later stage), shard.

Structural problems (a missing or non-numeric column, duplicate or missing IDs)
stop with an ``IngestError`` naming the column, rows or IDs. Row-level problems
never drop a row: the value is set to NaN and a ``Quality`` bit records why.
Rows keep their input order; shard k holds rows [k*S, (k+1)*S).
"""

from __future__ import annotations

import logging
import shutil
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import astropy.units as u
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from . import flags as F
from .catalog import CatalogError, describe, detect_format, iter_batches, source_files
from .columns import DERIVED, OPTIONAL, Z_HELIO_RANGE, Column, all_columns, method_columns, required_columns
from .errors import IngestError
from .io import field as arrow_field
from .io import (INTERMEDIATE_COMPRESSION, AtomicParquetWriter, Fingerprint, RecordSpill, is_arrow_text, stored_float,
                 sha256_of, write_json)

log = logging.getLogger(__name__)
C_KMS = 299792.458

# Bounds of a usable input value (canonical units). Outside them a value is absurd, not
# merely unusual: it is flagged and set to NaN like a missing one. Common practice
# unless a source is named; the flag texts in galdist.flags.Quality say the same.
MAG_RANGE = (-10.0, 40.0)
MAG_ERR_MAX = 10.0  # mag: an error of 10 mag carries no information about the magnitude
Z_ERR_MAX = 1.0  # larger than the whole allowed range of z_helio
EBV_MAX = 10.0  # mag: A_V ~ 31 mag; no extinction correction of that size is usable
HI_FLUX_MAX = 1e7  # Jy km/s: ~10x the Large Magellanic Cloud, the brightest HI source in the sky (~1e6, from memory)
W50_RESOLUTION_MAX = 500.0  # km/s: 10x coarser than any HI survey's channels (tens of km/s at most)
# words that mean "no value" in a numeric text column (pyarrow's CSV null words, lower case)
MISSING_WORDS = ["nan", "-nan", "null", "none", "na", "n/a", "#n/a", "#n/a n/a", "#na", "-", "-1.#ind",
                 "-1.#qnan", "1.#ind", "1.#qnan"]


@dataclass(frozen=True)
class SourceFile:
    """One file to read (a file of a Parquet directory too), with its own units and types."""

    path: str
    catalog: str  # the catalog path it belongs to, as configured
    units: dict[str, str]  # canonical -> unit of this file's column (config ``units`` first)
    kinds: dict[str, str]  # canonical -> kind the file declares (catalog.SourceColumn.kind)


@dataclass
class IngestPlan:
    """What to read: canonical column -> source column, for the files given."""

    paths: list[str]
    fmt: str
    bands: list[str]
    methods: list[str]
    source_of: dict[str, str]  # canonical -> source column present in the files
    units: dict[str, str]  # canonical -> unit of the source column, where every file has the same
    columns: list[Column] = field(default_factory=list)  # all shard columns
    files: list[SourceFile] = field(default_factory=list)  # in reading order, each with its own units
    #: pass-through columns (config keep_columns): product name -> (source column, Arrow type, declared unit)
    keep: dict[str, tuple[str, pa.DataType, str | None]] = field(default_factory=dict)

    def __post_init__(self):
        if not self.files:  # a plan made by hand: every file in the plan's units
            self.files = [SourceFile(str(f), str(path), dict(self.units), {})
                          for path in self.paths for f in source_files(path, self.fmt)]

    @property
    def numeric(self) -> list[str]:
        return [c.name for c in self.columns if not c.is_text]


MAX_LISTED = 20  # problems listed in one structural error


def plan(paths: list[str], fmt: str, mapping: dict, units: dict, bands: list[str],
         methods: list[str], extra_required=(), keep=()) -> IngestPlan:
    """Check the catalog's structure without reading its rows; raise on any problem.

    ``mapping`` is config ``columns`` (canonical -> user column), ``units`` config
    ``units`` (canonical -> unit of the user's column, for every file). Every file,
    each file of a Parquet directory included, is checked on its own; a unit the file
    declares applies to that file where config gives none. ``keep``: config
    ``keep_columns``, the user's columns passed through as ``user_<name>``
    (``keep_types``).
    """
    from .methods import REGISTRY

    every = all_columns(bands, list(REGISTRY))
    known = {c.name for c in every}
    unknown = sorted(set(mapping) - known)
    if unknown:
        raise IngestError(f"config key 'columns': unknown canonical name(s) {', '.join(unknown)}; "
                          f"allowed: {', '.join(sorted(known))}")
    unknown = sorted(set(units) - known)
    if unknown:
        raise IngestError(f"config key 'units': unknown canonical name(s) {', '.join(unknown)}")
    by_name = {c.name: c for c in every}
    for name, unit in units.items():
        _check_unit(by_name[name], unit)
    required = {c.name for c in required_columns(bands, methods, list(extra_required))}
    shard_cols = all_columns(bands, methods)
    fmts = [detect_format(path, fmt) for path in paths]
    if len(set(fmts)) > 1:
        raise IngestError(f"config key 'catalog': all files must share one format (got {', '.join(fmts)})")
    files: list[SourceFile] = []
    problems: list[tuple[str, str]] = []  # (file, problem)
    first_with: dict[str, str] = {}  # canonical -> first file that has its column
    for path, f in zip(paths, fmts):
        for one in source_files(path, f):
            spec, present, found = _plan_file(str(one), str(path), f, shard_cols, required, mapping, units,
                                              methods, extra_required)
            problems += [(str(one), p) for p in found]
            files.append((spec, present))
            for name in present:
                first_with.setdefault(name, str(one))
    # a column read from one file must be in every file: its rows elsewhere would be empty
    for spec, present in files:
        for name, first in first_with.items():
            if name not in present and name not in required:
                src = mapping.get(name, name)
                problems.append((spec.path, f"missing column '{src}' for canonical '{name}', which {first} "
                                            "has; every file of a catalog needs the same columns: add it "
                                            "(empty values are fine) or remove it from the other files"))
    kept, found = keep_types([spec.path for spec, _ in files], fmts[0], list(keep))
    problems += found
    if problems:
        raise IngestError(_problem_message(problems))
    files = [spec for spec, _ in files]
    source_of = {name: mapping.get(name, name) for name in first_with}
    common = {name: files[0].units[name] for name in source_of if name in files[0].units
              and all(spec.units.get(name) == files[0].units[name] for spec in files)}
    return IngestPlan(list(paths), fmts[0], list(bands), list(methods), source_of, common, shard_cols, files, kept)


def keep_types(files: list[str], fmt: str, keep: list[str]) -> tuple[dict, list[tuple[str, str]]]:
    """The pass-through columns (config ``keep_columns``): product name ``user_<name>`` ->
    (source column, Arrow type, unit the file declares), and the problems found, per file.

    Parquet keeps the column's type (integers stay exact); other formats give numbers as
    float64, text as text, and CSV, which declares no types, text as written. Every
    file must have the column, with one type."""
    from .dictionary import keep_name

    kept, problems = {}, []
    for name in keep:
        types = []
        for path in files:
            declared = describe(path, fmt)
            col = declared.get(name)
            if col is None:
                shown = ", ".join(sorted(declared)[:30]) + (" ..." if len(declared) > 30 else "")
                problems.append((path, f"config key 'keep_columns': no column '{name}' in this file (its columns: "
                                       f"{shown}); fix the name or remove it from keep_columns"))
                continue
            if fmt == "parquet":
                t = _parquet_type(path, name)
            else:
                t = {"numeric": pa.float64(), "text": pa.string(), "unknown": pa.string(),
                     "boolean": pa.bool_()}.get(col.kind)
            if t is None or not (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t)
                                 or pa.types.is_string(t)):
                problems.append((path, f"config key 'keep_columns': column '{name}' is a {col.kind}; galdist "
                                       "passes through one number, text or true/false per row: remove it from "
                                       "keep_columns or write the part you need as a column of its own"))
                continue
            types.append((t, col.unit))
        if types and len({str(t) for t, _ in types}) > 1:
            problems.append((files[0], f"config key 'keep_columns': column '{name}' has different types in the "
                                       f"catalog's files ({', '.join(sorted({str(t) for t, _ in types}))}); "
                                       "give it one type in every file"))
        elif types:
            units = {u for _, u in types}
            kept[keep_name(name)] = (name, types[0][0], units.pop() if len(units) == 1 else None)
    return kept, problems


def _parquet_type(path: str, name: str) -> pa.DataType:
    import pyarrow.parquet as pq

    t = pq.read_schema(path).field(name).type
    if pa.types.is_dictionary(t):
        t = t.value_type
    return pa.string() if pa.types.is_large_string(t) else t


def _kept_values(values, t: pa.DataType, name: str, first_row: int, where: str) -> pa.Array:
    """A pass-through column of one batch as an Arrow array of type ``t`` (missing: null)."""
    if pa.types.is_string(t):
        return pa.array(_to_text(values), type=t)
    if isinstance(values, (pa.Array, pa.ChunkedArray)):
        if pa.types.is_dictionary(values.type):
            values = pc.cast(values, values.type.value_type)
        if values.type == t:
            return values.combine_chunks() if isinstance(values, pa.ChunkedArray) else values
    if pa.types.is_floating(t):
        return pa.array(_to_float(values, name, first_row, where), type=t)
    return pa.array(values, type=t) if not isinstance(values, (pa.Array, pa.ChunkedArray)) else pc.cast(values, t)


def _plan_file(path: str, catalog: str, fmt: str, shard_cols: list[Column], required: set, mapping: dict,
               units: dict, methods, extra_required) -> tuple[SourceFile, set, list[str]]:
    """One file's columns, kinds and units; the canonical names it has; the problems in its header."""
    declared = describe(path, fmt)
    problems, kinds, unit_of = [], {}, {}
    present = {col.name for col in shard_cols if mapping.get(col.name, col.name) in declared}
    for col in shard_cols:
        src = mapping.get(col.name, col.name)
        if src not in declared:
            if col.name in required:
                how = (f"map it with config 'columns: {{{col.name}: <your column>}}'"
                       if col.name not in mapping else f"config 'columns.{col.name}' names '{src}', which the file lacks")
                why = _needed_by(col.name, methods, extra_required)
                problems.append(f"missing column '{src}' for canonical '{col.name}' ({why}); {how}")
            continue
        kind = declared[src].kind
        wrong = _kind_problem(col, src, kind)
        if wrong:
            problems.append(wrong)
            continue
        kinds[col.name] = kind
        if col.name in units:
            unit_of[col.name] = units[col.name]
        elif declared[src].unit and not col.is_text:
            unit = declared[src].unit
            try:
                _unit_factor(col, unit)
            except (ValueError, u.UnitsError) as exc:
                problems.append(f"column '{src}' ({col.name}) declares unit '{unit}': {exc}; if the values are "
                                f"in another unit, say so in config 'units: {{{col.name}: <unit>}}' (it "
                                "overrides the file's)")
                continue
            unit_of[col.name] = unit
    return SourceFile(path, catalog, unit_of, kinds), present, problems


def _kind_problem(col: Column, src: str, kind: str) -> str | None:
    """Why a declared column type cannot feed canonical ``col`` (None: it can)."""
    fix = f"fix the file or map another column in config 'columns.{col.name}'"
    if kind in ("numeric", "unknown") or (kind == "text" and col.is_text):
        return None
    if kind.startswith("vector"):
        return (f"column '{src}' ({col.name}) is a {kind}; a canonical column takes one value per row: "
                f"write the element you mean as a column of its own and map it in config 'columns.{col.name}'")
    if kind == "boolean":
        return f"column '{src}' ({col.name}) is boolean (true/false); it must be {_wanted(col)}: {fix}"
    return f"column '{src}' ({col.name}) has type {kind}; it must be {_wanted(col)} ({fix})"


def _wanted(col: Column) -> str:
    return "text" if col.is_text else "numeric"


def _problem_message(problems: list[tuple[str, str]]) -> str:
    """One structural error, a line per problem, each naming its file (pre-flight shows
    the lines without the heading)."""
    shown = [f"catalog {f}: {p}" for f, p in problems[:MAX_LISTED]]
    if len(problems) > MAX_LISTED:
        shown.append(f"... and {len(problems) - MAX_LISTED} more")
    return "catalog structure:\n  - " + "\n  - ".join(shown)


def _needed_by(name: str, methods, extra_required) -> str:
    for m in methods:
        if any(c.name == name for c in method_columns(m)):
            return f"needed by method {m}; or drop {m} from config 'methods'"
    if isinstance(extra_required, dict) and name in extra_required:
        return extra_required[name]
    return "always needed"


def _check_unit(col: Column, unit: str) -> None:
    try:
        _unit_factor(col, unit)
    except (ValueError, u.UnitsError) as exc:
        raise IngestError(f"config key 'units.{col.name}': {exc}") from exc


def _parse_unit(unit: str) -> u.UnitBase:
    """A unit string as astropy writes it, or as FITS, VOTable or CDS files spell it."""
    try:
        return u.Unit(unit)
    except ValueError as first:
        for style in ("fits", "vounit", "cds"):
            try:
                return u.Unit(unit, format=style)
            except ValueError:
                continue
        raise first


def _unit_factor(col: Column, unit: str) -> tuple[float, bool]:
    """(factor, is_velocity): multiply the source value by factor to get the canonical unit."""
    if col.is_text:
        return 1.0, False
    src = _parse_unit(unit)
    if col.name in ("z_helio", "z_helio_err") and src.is_equivalent(u.km / u.s):
        return src.to(u.km / u.s) / C_KMS, True
    target = u.Unit(col.unit) if col.unit else u.dimensionless_unscaled
    if src == u.mag or target == u.mag:
        if src != target:
            raise ValueError(f"unit '{unit}' cannot be converted to '{col.unit}'")
        return 1.0, False
    if not src.is_equivalent(target):
        raise ValueError(f"unit '{unit}' cannot be converted to '{col.unit or 'dimensionless'}'")
    return float(src.to(target)), False


# --- per-batch conversion -------------------------------------------------------------

def _to_float(values, name: str, first_row: int, where: str = "") -> np.ndarray:
    """Numeric column as float64 (nulls NaN); text that is not a number, or true/false,
    is a structural error."""
    if isinstance(values, (pa.Array, pa.ChunkedArray)):
        if pa.types.is_dictionary(values.type):
            values = pc.cast(values, values.type.value_type)
        if pa.types.is_boolean(values.type):
            values = np.zeros(0, dtype=bool)  # refused below, whatever the rows hold
        elif is_arrow_text(values.type):
            values = np.asarray(values.to_pylist(), dtype=object)
        else:
            return np.array(pc.cast(values, pa.float64()).to_numpy(zero_copy_only=False), dtype=float)
    arr = np.asarray(values)
    if arr.dtype.kind == "b":
        raise IngestError(f"{where}column '{name}' is boolean (true/false) but must be numeric; fix the file "
                          "or map another column in config 'columns'")
    if arr.dtype.kind in "iuf":
        return arr.astype(float)  # a copy: later steps write NaN into it
    s = pd.Series(arr, dtype=object)
    num = pd.to_numeric(s, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    text = s.where(s.notna(), "").astype(str).str.strip()
    bad = np.isnan(num) & (text != "") & ~text.str.lower().isin(MISSING_WORDS).to_numpy()
    if bad.any():
        idx = np.flatnonzero(bad)[:5]
        shown = ", ".join(f"row {first_row + i + 1}: {text.iloc[i][:40]!r}" for i in idx)
        raise IngestError(f"{where}column '{name}' must be numeric but holds text ({int(bad.sum())} rows in this "
                          f"batch; first: {shown}). Fix the file or map another column in config 'columns'.")
    return num


def _to_text(values, numeric: bool = False) -> np.ndarray:
    """Text column as an object array of stripped str (None where missing: null, NaN,
    and, in a column the file declares numeric, the words of MISSING_WORDS)."""
    if isinstance(values, (pa.Array, pa.ChunkedArray)):
        if pa.types.is_floating(values.type):
            values = pc.if_else(pc.is_nan(values), pa.scalar(None, values.type), values)
        if not is_arrow_text(values.type):
            values = pc.cast(values, pa.string())
        text = pc.utf8_trim_whitespace(values).to_numpy(zero_copy_only=False).astype(object)
    else:
        s = pd.Series(np.asarray(values, dtype=object))
        if len(s) and isinstance(s.iloc[0], bytes):
            s = s.str.decode("utf-8", "replace")
        out = s.astype(object).where(s.notna(), None)
        text = out.map(lambda v: v if v is None else str(v).strip()).to_numpy(dtype=object)
    if numeric and len(text):
        lower = pd.Series(text, dtype=object).str.lower()
        text[lower.isin(MISSING_WORDS).to_numpy()] = None
    return text


def _flag_invalid(values: np.ndarray, bad: np.ndarray, qflags: np.ndarray, bit,
                  measured: np.ndarray | None = None) -> None:
    """NaN the bad values and set ``bit``. Rows where ``measured`` is false were
    simply not observed for this quantity (e.g. no HI for an early type): their
    NaN is not a problem and sets no bit."""
    bad = bad | ~np.isfinite(values)
    F.set_where(qflags, bad if measured is None else bad & measured, bit)
    values[bad] = np.nan


def _observed(cols, names) -> np.ndarray:
    """Rows where any of the named inputs carries a value (NaN everywhere = not observed)."""
    return np.logical_or.reduce([~np.isnan(cols[n]) for n in names])


def quality(cols: dict[str, np.ndarray], bands: list[str], present: set[str], methods=()) -> np.ndarray:
    """Set the Quality bits and NaN the offending values in ``cols`` (in place).

    Position and redshift are needed for every row, so missing counts as invalid.
    Method inputs come in groups (a magnitude and its error; the catalog columns of
    each of ``methods``, bounded by its registry entry): a group that is entirely
    missing means "not observed" and sets no bit; a partly missing or out-of-range
    group does.
    """
    n = len(cols["ra"])
    q = F.new(n)
    Q = F.Quality
    with np.errstate(invalid="ignore"):
        ra, dec = cols["ra"], cols["dec"]
        badpos = ~np.isfinite(ra) | ~np.isfinite(dec) | (np.abs(dec) > 90) | (ra < 0) | (ra >= 360)
        F.set_where(q, badpos, Q.POSITION_INVALID)
        ra[badpos] = np.nan
        dec[badpos] = np.nan
        z = cols["z_helio"]
        _flag_invalid(z, (z < Z_HELIO_RANGE[0]) | (z > Z_HELIO_RANGE[1]), q, Q.REDSHIFT_INVALID)
        ze = cols["z_helio_err"]
        _flag_invalid(ze, (ze < 0) | (ze > Z_ERR_MAX), q, Q.REDSHIFT_ERR_INVALID)
        for b in bands:
            m, e = cols[f"mag_{b}"], cols[f"mag_{b}_err"]
            seen = _observed(cols, [f"mag_{b}", f"mag_{b}_err"])
            _flag_invalid(m, (m < MAG_RANGE[0]) | (m > MAG_RANGE[1]), q, Q.MAG_INVALID, seen)
            _flag_invalid(e, (e < 0) | (e > MAG_ERR_MAX), q, Q.MAG_ERR_INVALID, seen)
        for method in methods:  # each method's inputs, as its registry entry bounds them
            group = method_columns(method)
            seen = _observed(cols, [c.name for c in group])
            for c in group:  # an optional column's gaps are not a problem, only its impossible values
                v, (lo, hi) = cols[c.name], c.valid or (-np.inf, np.inf)
                _flag_invalid(v, (v < lo) | (v > hi), q, Q[c.quality or "METHOD_INPUT_INVALID"],
                              seen if c.required else ~np.isnan(v))
        for name, err in (("ebv", "ebv_err"),):
            if name in present:
                seen = _observed(cols, [name] + ([err] if err in present else []))
                v = cols[name]
                _flag_invalid(v, (v < 0) | (v > EBV_MAX), q, Q.EBV_INVALID, seen)
                if err in present:
                    e = cols[err]
                    _flag_invalid(e, (e < 0) | (e > EBV_MAX), q, Q.EBV_INVALID, seen & ~np.isnan(v))
        for name, top in (("hi_flux", HI_FLUX_MAX), ("w50_resolution", W50_RESOLUTION_MAX)):
            if name in present:
                v = cols[name]
                _flag_invalid(v, (v < 0) | (v > top), q, Q.OPTIONAL_INVALID, ~np.isnan(v))
    return q


def canonical_batch(raw: dict, p: IngestPlan, first_row: int,
                    source: SourceFile | None = None) -> dict[str, np.ndarray]:
    """Source batch -> canonical columns (float64 / object), converted with the units of
    ``source``, the file the batch comes from (default: the plan's common units).
    ``first_row`` counts rows in that file, for messages."""
    n = len(next(iter(raw.values()))) if raw else 0
    if source is None and any(f.units != p.units for f in p.files):
        raise ValueError("the plan's files differ in units: pass the batch's SourceFile as source")
    units = source.units if source is not None else p.units
    kinds = source.kinds if source is not None else {}
    where = f"catalog {source.path}: " if source is not None else ""
    out = {}
    for col in p.columns:
        src = p.source_of.get(col.name)
        if src is None:
            out[col.name] = np.full(n, None, dtype=object) if col.is_text else np.full(n, np.nan)
            continue
        if col.is_text:
            out[col.name] = _to_text(raw[src], numeric=kinds.get(col.name) == "numeric")
            continue
        values = np.require(_to_float(raw[src], src, first_row, where), requirements="W")
        if col.name in units:
            factor, _ = _unit_factor(col, units[col.name])
            if factor != 1.0:
                values = values * factor
        out[col.name] = values
    ids = out["galaxy_id"]
    ids_s = pd.Series(ids, dtype=object)
    missing = (ids_s.isna() | (ids_s == "")).to_numpy()
    if missing.any():
        rows = ", ".join(str(first_row + i + 1) for i in np.flatnonzero(missing)[:5])
        raise IngestError(f"{where}column '{p.source_of['galaxy_id']}' (galaxy_id) is empty in {int(missing.sum())} "
                          f"rows (first data rows: {rows}; empty text, null or NaN); every galaxy needs a unique "
                          "identifier")
    return out


def _arrow_schema(p: IngestPlan) -> pa.Schema:
    fields = []
    for col in p.columns + DERIVED:
        fields.append(arrow_field(col.name, pa.string() if col.is_text else stored_float(col.name),
                                  None if col.is_text or not col.unit else col.unit))
    fields.append(pa.field("quality_flags", pa.uint32()))
    fields += [pa.field(name, t) for name, (_, t, _) in p.keep.items()]
    return pa.schema(fields)


def _table(cols: dict, q: np.ndarray, schema: pa.Schema) -> pa.Table:
    cols = {**cols, "quality_flags": q}
    arrays = [cols[f.name] if isinstance(cols[f.name], pa.Array) else pa.array(cols[f.name], type=f.type)
              for f in schema]
    return pa.Table.from_arrays(arrays, schema=schema)


class _DuplicateCheck:
    """Finds repeated galaxy_id hashes at a fixed memory cost: the 64-bit hashes go to
    disk in 256 buckets by their top 8 bits, and each bucket is sorted on its own
    (about N/256 hashes in memory at a time: 0.3 MB at 10^7 rows)."""

    def __init__(self, near: Path):
        self.spill = RecordSpill(near)

    def add(self, hashes: np.ndarray) -> None:
        top = (hashes >> np.uint64(56)).astype(np.intp)
        order = np.argsort(top, kind="stable")
        bounds = np.cumsum(np.bincount(top, minlength=256))[:-1]
        for bucket, part in enumerate(np.split(hashes[order], bounds)):
            if part.size:
                self.spill.append(str(bucket), part)

    def repeated(self) -> np.ndarray:
        """The hashes seen more than once."""
        found = []
        for key in self.spill.keys():
            h = np.sort(np.concatenate(list(self.spill.reader(key))))
            found.append(np.unique(h[1:][h[1:] == h[:-1]]))
        return np.concatenate(found) if found else np.empty(0, dtype=np.uint64)

    def close(self) -> None:
        self.spill.close()


class _ShardWriter:
    """Writes consecutive shards of ``shard_rows`` rows, batch by batch (bounded memory)."""

    def __init__(self, directory: Path, schema: pa.Schema, shard_rows: int):
        self.directory, self.schema, self.shard_rows = directory, schema, shard_rows
        self.count = 0
        self.files: list[dict] = []  # name, rows, fingerprint of every shard written
        self.duplicates = _DuplicateCheck(directory)  # beside the shard directory, not in it
        self._open()

    def _open(self):
        self.rows = 0
        self.fp = Fingerprint()
        self.writer = AtomicParquetWriter(self.directory / f"part-{self.count:05d}.parquet", self.schema,
                                          compression=INTERMEDIATE_COMPRESSION)

    def _close(self):
        self.writer.add_metadata({"galdist.shard_fingerprint": self.fp.hexdigest(),
                                  "galdist.shard_index": str(self.count)})
        self.writer.__exit__(None, None, None)
        self.files.append({"name": self.writer.path.name, "rows": self.rows, "fingerprint": self.fp.hexdigest()})
        log.info("shard %d written: %d rows", self.count, self.rows)
        self.count += 1

    def write(self, table: pa.Table) -> None:
        while table.num_rows:
            take = min(table.num_rows, self.shard_rows - self.rows)
            part, table = table.slice(0, take), table.slice(take)
            self.duplicates.add(self.fp.update(part))
            self.writer.write(part)
            self.rows += take
            if self.rows == self.shard_rows and table.num_rows:
                self._close()
                self._open()

    def finish(self) -> int:
        self._close()
        return self.count

    def abort(self) -> None:
        self.writer.__exit__(RuntimeError, None, None)


def run(p: IngestPlan, out_dir: str | Path, summary_path: str | Path, shard_rows: int,
        batch_rows: int = 131_072) -> dict:
    """Stream the catalog into shards ``out_dir/part-NNNNN.parquet`` and write the summary.

    Memory stays at about one batch whatever the catalog size. The shard directory
    appears only when every shard and the duplicate-ID check are done (it is written
    beside its final place under a temporary name, then renamed).
    """
    from .ebv_maps import galactic_coordinates  # astropy.coordinates: only the job that needs it

    out_dir = Path(out_dir)
    tmp_dir = out_dir.parent / f".{out_dir.name}.tmp"
    shutil.rmtree(tmp_dir, ignore_errors=True)
    tmp_dir.mkdir(parents=True)
    schema = _arrow_schema(p)
    present = set(p.source_of)
    counts: Counter = Counter()
    rows = flagged = 0
    writer = _ShardWriter(tmp_dir, schema, shard_rows)
    # the longest value of each text column: every product part's header needs the catalog's
    text_names, text_lengths = [f.name for f in schema if is_arrow_text(f.type)], {}
    try:
        needed = sorted(set(p.source_of.values()) | {src for src, _, _ in p.keep.values()})
        for source in p.files:
            in_file = 0
            for raw in iter_batches(source.path, p.fmt, needed, max(1, min(batch_rows, shard_rows))):
                cols = canonical_batch(raw, p, in_file, source)
                cols |= {name: _kept_values(raw[src], t, src, in_file, f"catalog {source.path}: ")
                         for name, (src, t, _) in p.keep.items()}
                q = quality(cols, p.bands, present, p.methods)
                cols["gal_l"], cols["gal_b"] = galactic_coordinates(cols["ra"], cols["dec"])
                for member in F.Quality:
                    counts[member.name] += int(F.has(q, member).sum())
                flagged += int(np.count_nonzero(q))
                table = _table(cols, q, schema)
                for name in text_names:
                    longest = pc.max(pc.utf8_length(table.column(name))).as_py() or 0
                    text_lengths[name] = max(text_lengths.get(name, 0), longest)
                writer.write(table)
                rows += len(q)
                in_file += len(q)
                log.info("read %d rows", rows)
        n_shards = writer.finish()
        log.info("checking %d galaxy_id values for repeats", rows)
        _check_duplicates(writer.duplicates.repeated(), tmp_dir)
        shutil.rmtree(out_dir, ignore_errors=True)
        tmp_dir.rename(out_dir)
    except BaseException:
        writer.abort()
        raise
    finally:
        writer.duplicates.close()
        shutil.rmtree(tmp_dir, ignore_errors=True)
    summary = {
        "rows_in": rows, "rows_out": rows, "rows_flagged": flagged, "shards": n_shards,
        "shard_rows": shard_rows, "shard_files": writer.files,
        "flag_counts": {m.name: counts.get(m.name, 0) for m in F.Quality},
        "inputs": [{"path": str(path), "format": p.fmt, "sha256": sha256_of(path),
                    "files": [{"path": f.path, "units": f.units} for f in p.files if f.catalog == str(path)]}
                   for path in p.paths],
        "columns": {canonical: {"source": src, "unit": _summary_unit(p, canonical)}
                    for canonical, src in sorted(p.source_of.items())},
        "absent_optional_columns": sorted(c.name for c in OPTIONAL if c.name not in p.source_of),
        "kept_columns": {name: {"source": src, "type": str(t), "unit": unit} for name, (src, t, unit) in p.keep.items()},
        "text_lengths": {name: text_lengths.get(name, 0) for name in text_names},
    }
    write_json(summary, summary_path)
    return summary


def _summary_unit(p: IngestPlan, canonical: str) -> str | None:
    if canonical in p.units:
        return p.units[canonical]
    return "differs between files (see inputs)" if any(canonical in f.units for f in p.files) else None


def _check_duplicates(dup: np.ndarray, shard_dir: Path) -> None:
    """Raise if any hash in ``dup`` belongs to a galaxy_id that really repeats (not a
    collision of two IDs' hashes), naming up to ten of them."""
    if dup.size == 0:
        return
    import pyarrow.parquet as pq
    found: Counter = Counter()
    for f in sorted(shard_dir.glob("part-*.parquet")):
        ids = pq.read_table(f, columns=["galaxy_id"]).column(0).to_numpy(zero_copy_only=False)
        hit = np.isin(pd.util.hash_array(ids.astype(object)), dup)
        found.update(ids[hit].tolist())
    dups = {k: v for k, v in found.items() if v > 1}
    if not dups:  # hash collision between distinct IDs: not a duplicate
        return
    shown = ", ".join(f"{k!r} x{v}" for k, v in sorted(dups.items())[:10])
    raise IngestError(f"galaxy_id is not unique: {len(dups)} IDs repeat ({shown}"
                      f"{', ...' if len(dups) > 10 else ''}). Every row needs its own ID.")


__all__ = ["IngestError", "IngestPlan", "SourceFile", "plan", "run", "quality", "canonical_batch", "CatalogError"]
