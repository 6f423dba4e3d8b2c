"""Ingest: map a local catalog onto the canonical columns, flag bad values, shard.

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
from .catalog import CatalogError, describe, detect_format, iter_batches
from .columns import Column, OPTIONAL, all_columns, required_columns
from .errors import IngestError
from .io import field as arrow_field
from .io import (INTERMEDIATE_COMPRESSION, AtomicParquetWriter, Fingerprint, RecordSpill, is_arrow_text,
                 sha256_of, write_json)

log = logging.getLogger(__name__)
C_KMS = 299792.458

MAG_RANGE = (-10.0, 40.0)
SBF_MAG_RANGE = (-10.0, 50.0)
SBF_COLOR_RANGE = (-2.0, 5.0)
W50_MAX = 2000.0
# words that mean "no value" in a numeric text column (pyarrow's CSV null words, lower case)
MISSING_WORDS = ["nan", "-nan", "null", "none", "na", "n/a", "#n/a", "#n/a n/a", "#na", "-", "-1.#ind",
                 "-1.#qnan", "1.#ind", "1.#qnan"]


@dataclass
class IngestPlan:
    """What to read: canonical column -> source column, for the files given."""

    paths: list[str]
    fmt: str
    bands: list[str]
    methods: list[str]
    source_of: dict[str, str]  # canonical -> source column present in the files
    units: dict[str, str]  # canonical -> unit of the source column
    columns: list[Column] = field(default_factory=list)  # all shard columns

    @property
    def numeric(self) -> list[str]:
        return [c.name for c in self.columns if not c.is_text]


def plan(paths: list[str], fmt: str, mapping: dict, units: dict, bands: list[str],
         methods: list[str], extra_required=()) -> IngestPlan:
    """Check the catalog's structure without reading its rows; raise on any problem.

    ``mapping`` is config ``columns`` (canonical -> user column), ``units`` config
    ``units`` (canonical -> unit of the user's column).
    """
    known = {c.name for c in all_columns(bands, ["tully_fisher", "sbf"])}
    unknown = sorted(set(mapping) - known)
    if unknown:
        raise IngestError(f"config key 'columns': unknown canonical name(s) {', '.join(unknown)}; "
                          f"allowed: {', '.join(sorted(known))}")
    unknown = sorted(set(units) - known)
    if unknown:
        raise IngestError(f"config key 'units': unknown canonical name(s) {', '.join(unknown)}")
    required = required_columns(bands, methods, list(extra_required))
    shard_cols = all_columns(bands, methods)
    source_of, unit_of = {}, {}
    fmts = []
    for path in paths:
        f = detect_format(path, fmt)
        fmts.append(f)
        declared = describe(path, f)
        problems = []
        for col in shard_cols:
            src = mapping.get(col.name, col.name)
            if src not in declared:
                if any(col.name == r.name for r in required):
                    how = (f"map it with config 'columns: {{{col.name}: <your column>}}'"
                           if col.name not in mapping else f"config 'columns.{col.name}' names '{src}', which the file lacks")
                    why = _needed_by(col.name, methods, extra_required)
                    problems.append(f"missing column '{src}' for canonical '{col.name}' ({why}); {how}")
                continue
            kind = declared[src].kind
            if col.is_text and kind not in ("text", "numeric", "unknown"):
                problems.append(f"column '{src}' ({col.name}) has type {kind}; it must be text")
            if not col.is_text and kind not in ("numeric", "unknown"):
                problems.append(f"column '{src}' ({col.name}) has type {kind}; it must be numeric "
                                f"(fix the file or map another column in config 'columns.{col.name}')")
            source_of[col.name] = src
            unit = units.get(col.name) or declared[src].unit
            if unit:
                _check_unit(col, unit)
                unit_of[col.name] = unit
        if problems:
            raise IngestError(f"catalog {path}:\n  - " + "\n  - ".join(problems))
    if len(set(fmts)) > 1:
        raise IngestError(f"config key 'catalog': all files must share one format (got {', '.join(fmts)})")
    return IngestPlan(list(paths), fmts[0], list(bands), list(methods), source_of, unit_of, shard_cols)


def _needed_by(name: str, methods, extra_required) -> str:
    from .columns import METHOD_COLUMNS
    for m in methods:
        if any(c.name == name for c in METHOD_COLUMNS[m]):
            return f"needed by method {m}; or drop {m} from config 'methods'"
    if isinstance(extra_required, dict) and name in extra_required:
        return extra_required[name]
    return "always needed"


def _check_unit(col: Column, unit: str) -> None:
    try:
        _unit_factor(col, unit)
    except (ValueError, u.UnitsError) as exc:
        raise IngestError(f"config key 'units.{col.name}': {exc}") from exc


def _unit_factor(col: Column, unit: str) -> tuple[float, bool]:
    """(factor, is_velocity): multiply the source value by factor to get the canonical unit."""
    if col.is_text:
        return 1.0, False
    src = u.Unit(unit)
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

def _to_float(values, name: str, first_row: int) -> np.ndarray:
    """Numeric column as float64; text that is not a number is a structural error."""
    if isinstance(values, (pa.Array, pa.ChunkedArray)):
        if is_arrow_text(values.type):
            values = np.asarray(values.to_pylist(), dtype=object)
        else:
            return np.array(pc.cast(values, pa.float64()).to_numpy(zero_copy_only=False), dtype=float)
    arr = np.asarray(values)
    if arr.dtype.kind in "iufb":
        return arr.astype(float)  # a copy: later steps write NaN into it
    s = pd.Series(arr, dtype=object)
    num = pd.to_numeric(s, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    text = s.where(s.notna(), "").astype(str).str.strip()
    bad = np.isnan(num) & (text != "") & ~text.str.lower().isin(MISSING_WORDS).to_numpy()
    if bad.any():
        idx = np.flatnonzero(bad)[:5]
        shown = ", ".join(f"row {first_row + i + 1}: {text.iloc[i][:40]!r}" for i in idx)
        raise IngestError(f"column '{name}' must be numeric but holds text ({int(bad.sum())} rows in this "
                          f"batch; first: {shown}). Fix the file or map another column in config 'columns'.")
    return num


def _to_text(values) -> np.ndarray:
    """Text column as an object array of stripped str (None where missing)."""
    if isinstance(values, (pa.Array, pa.ChunkedArray)):
        if not is_arrow_text(values.type):
            values = pc.cast(values, pa.string())
        return pc.utf8_trim_whitespace(values).to_numpy(zero_copy_only=False).astype(object)
    s = pd.Series(np.asarray(values, dtype=object))
    if len(s) and isinstance(s.iloc[0], bytes):
        s = s.str.decode("utf-8", "replace")
    out = s.astype(object).where(s.notna(), None)
    text = out.map(lambda v: v if v is None else str(v).strip())
    return text.to_numpy(dtype=object)


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


def quality(cols: dict[str, np.ndarray], bands: list[str], present: set[str]) -> np.ndarray:
    """Set the Quality bits and NaN the offending values in ``cols`` (in place).

    Position and redshift are needed for every row, so missing counts as invalid.
    Method inputs come in groups (a magnitude and its error; the four TF inputs; the
    four SBF inputs): a group that is entirely missing means "not observed" and
    sets no bit; a partly missing or out-of-range group does.
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
        _flag_invalid(z, (z < 0) | (z > 1), q, Q.REDSHIFT_INVALID)
        _flag_invalid(cols["z_helio_err"], cols["z_helio_err"] < 0, q, Q.REDSHIFT_ERR_INVALID)
        for b in bands:
            m, e = cols[f"mag_{b}"], cols[f"mag_{b}_err"]
            seen = _observed(cols, [f"mag_{b}", f"mag_{b}_err"])
            _flag_invalid(m, (m < MAG_RANGE[0]) | (m > MAG_RANGE[1]), q, Q.MAG_INVALID, seen)
            _flag_invalid(e, e < 0, q, Q.MAG_ERR_INVALID, seen)
        if "w50" in cols:
            seen = _observed(cols, ["w50", "w50_err", "axis_ratio", "axis_ratio_err"])
            w, ba = cols["w50"], cols["axis_ratio"]
            _flag_invalid(w, (w <= 0) | (w > W50_MAX), q, Q.WIDTH_INVALID, seen)
            _flag_invalid(cols["w50_err"], cols["w50_err"] < 0, q, Q.WIDTH_ERR_INVALID, seen)
            _flag_invalid(ba, (ba <= 0) | (ba > 1), q, Q.AXIS_RATIO_INVALID, seen)
            _flag_invalid(cols["axis_ratio_err"], cols["axis_ratio_err"] < 0, q, Q.AXIS_RATIO_ERR_INVALID, seen)
        if "sbf_mag" in cols:
            seen = _observed(cols, ["sbf_mag", "sbf_mag_err", "sbf_color", "sbf_color_err"])
            m, c = cols["sbf_mag"], cols["sbf_color"]
            _flag_invalid(m, (m < SBF_MAG_RANGE[0]) | (m > SBF_MAG_RANGE[1]), q, Q.SBF_MAG_INVALID, seen)
            _flag_invalid(c, (c < SBF_COLOR_RANGE[0]) | (c > SBF_COLOR_RANGE[1]), q, Q.SBF_COLOR_INVALID, seen)
            for name in ("sbf_mag_err", "sbf_color_err"):
                _flag_invalid(cols[name], cols[name] < 0, q, Q.SBF_ERR_INVALID, seen)
        for name, err in (("ebv", "ebv_err"),):
            if name in present:
                seen = _observed(cols, [name] + ([err] if err in present else []))
                _flag_invalid(cols[name], cols[name] < 0, q, Q.EBV_INVALID, seen)
                if err in present:
                    _flag_invalid(cols[err], cols[err] < 0, q, Q.EBV_INVALID, seen & ~np.isnan(cols[name]))
        for name in ("hi_flux", "w50_resolution"):
            if name in present:
                v = cols[name]
                _flag_invalid(v, v < 0, q, Q.OPTIONAL_INVALID, ~np.isnan(v))
    return q


def canonical_batch(raw: dict, p: IngestPlan, first_row: int) -> dict[str, np.ndarray]:
    """Source batch -> canonical columns (float64 / object), units converted."""
    n = len(next(iter(raw.values()))) if raw else 0
    out = {}
    for col in p.columns:
        src = p.source_of.get(col.name)
        if src is None:
            out[col.name] = np.full(n, None, dtype=object) if col.is_text else np.full(n, np.nan)
            continue
        if col.is_text:
            out[col.name] = _to_text(raw[src])
            continue
        values = np.require(_to_float(raw[src], src, first_row), requirements="W")
        if col.name in p.units:
            factor, _ = _unit_factor(col, p.units[col.name])
            if factor != 1.0:
                values = values * factor
        out[col.name] = values
    ids = out["galaxy_id"]
    ids_s = pd.Series(ids, dtype=object)
    missing = (ids_s.isna() | (ids_s == "")).to_numpy()
    if missing.any():
        rows = ", ".join(str(first_row + i + 1) for i in np.flatnonzero(missing)[:5])
        raise IngestError(f"column '{p.source_of['galaxy_id']}' (galaxy_id) is empty in {int(missing.sum())} "
                          f"rows (first data rows: {rows}); every galaxy needs a unique identifier")
    return out


def _arrow_schema(p: IngestPlan) -> pa.Schema:
    fields = []
    for col in p.columns:
        fields.append(arrow_field(col.name, pa.string() if col.is_text else pa.float64(),
                                  None if col.is_text or not col.unit else col.unit))
    fields.append(pa.field("quality_flags", pa.uint32()))
    return pa.schema(fields)


def _table(cols: dict, q: np.ndarray, schema: pa.Schema) -> pa.Table:
    arrays = [pa.array(cols[f.name], type=f.type) for f in schema if f.name != "quality_flags"]
    arrays.append(pa.array(q, type=pa.uint32()))
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
        log.info("shard %d written: %d rows", self.count, self.rows)
        self.count += 1

    def write(self, table: pa.Table) -> None:
        while table.num_rows:
            take = min(table.num_rows, self.shard_rows - self.rows)
            part, table = table.slice(0, take), table.slice(take)
            self.duplicates.add(self.fp.update(part.column("galaxy_id").to_numpy(zero_copy_only=False)))
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
    out_dir = Path(out_dir)
    tmp_dir = out_dir.parent / f".{out_dir.name}.tmp"
    shutil.rmtree(tmp_dir, ignore_errors=True)
    tmp_dir.mkdir(parents=True)
    schema = _arrow_schema(p)
    present = set(p.source_of)
    counts: Counter = Counter()
    rows = flagged = 0
    writer = _ShardWriter(tmp_dir, schema, shard_rows)
    try:
        needed = sorted(set(p.source_of.values()))
        for path in p.paths:
            for raw in iter_batches(path, p.fmt, needed, max(1, min(batch_rows, shard_rows))):
                cols = canonical_batch(raw, p, rows)
                q = quality(cols, p.bands, present)
                for member in F.Quality:
                    counts[member.name] += int(F.has(q, member).sum())
                flagged += int(np.count_nonzero(q))
                writer.write(_table(cols, q, schema))
                rows += len(q)
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
        "shard_rows": shard_rows,
        "flag_counts": {m.name: counts.get(m.name, 0) for m in F.Quality},
        "inputs": [{"path": str(path), "format": p.fmt, "sha256": sha256_of(path)} for path in p.paths],
        "columns": {canonical: {"source": src, "unit": p.units.get(canonical)}
                    for canonical, src in sorted(p.source_of.items())},
        "absent_optional_columns": sorted(c.name for c in OPTIONAL if c.name not in p.source_of),
    }
    write_json(summary, summary_path)
    return summary


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


__all__ = ["IngestError", "IngestPlan", "plan", "run", "quality", "canonical_batch", "CatalogError"]
