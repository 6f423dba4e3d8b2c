"""Local catalog files: format detection, a structural check, and streaming reads.

Parquet (a file or a directory dataset), FITS binary tables, CSV and ECSV are read
in row batches; the whole catalog is never in memory. VOTable is XML and is parsed
whole by astropy: keep it for small catalogs. Nothing here touches the network.

A Parquet directory is a list of files (``source_files``), each described and read on
its own; files and folders whose name starts with "." or "_" (``.staging/``,
``_temporary/``, ``_SUCCESS``) are not part of it. Missing values arrive as NaN or as
nulls of a pyarrow array: FITS TNULL and masked VOTable integers included.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import yaml

from .errors import CatalogError

FORMATS = ("parquet", "fits", "csv", "ecsv", "votable")
_SUFFIXES = {".parquet": "parquet", ".pq": "parquet", ".fits": "fits", ".fit": "fits",
             ".fts": "fits", ".csv": "csv", ".ecsv": "ecsv", ".xml": "votable",
             ".vot": "votable", ".votable": "votable"}


@dataclass(frozen=True)
class SourceColumn:
    """A column as the file declares it: kind is 'numeric', 'text', 'unknown' (CSV),
    'boolean', 'vector (...)' (several values per row), or another type's description."""

    name: str
    kind: str
    unit: str | None = None


def detect_format(path: str | Path, declared: str = "auto") -> str:
    if declared != "auto":
        return declared
    path = Path(path)
    if path.is_dir():
        return "parquet"
    name = path.name.lower()
    for suffix in (".fits.gz", ".fit.gz"):
        if name.endswith(suffix):
            return "fits"
    fmt = _SUFFIXES.get(path.suffix.lower())
    if fmt is None:
        raise CatalogError(f"catalog {path}: cannot tell its format from the name; set "
                           f"catalog.format to one of {', '.join(FORMATS)}")
    return fmt


def _hidden(relative: Path) -> bool:
    """A path under a dataset directory that is not part of it (a leading '.' or '_')."""
    return any(part.startswith((".", "_")) for part in relative.parts)


def _parquet_files(path: Path) -> list[Path]:
    if path.is_dir():
        files = sorted(p for p in path.rglob("*.parquet") if p.is_file() and not _hidden(p.relative_to(path)))
        if not files:
            raise CatalogError(f"catalog {path}: directory holds no .parquet files (files and folders "
                               "whose name starts with '.' or '_' are ignored)")
        return files
    return [path]


def source_files(path: str | Path, fmt: str) -> list[Path]:
    """The files a catalog path stands for: itself, or every Parquet file of a directory."""
    path = Path(path)
    return _parquet_files(path) if fmt == "parquet" else [path]


def _arrow_kind(t: pa.DataType) -> str:
    if pa.types.is_dictionary(t):
        return _arrow_kind(t.value_type)
    if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t) or pa.types.is_null(t):
        return "numeric"
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        return "text"
    if pa.types.is_boolean(t):
        return "boolean"
    if pa.types.is_list(t) or pa.types.is_large_list(t) or pa.types.is_fixed_size_list(t):
        return f"vector (Parquet type {t})"
    return str(t)


def _fits_kind(col) -> str:
    """'text', 'numeric', 'boolean', 'vector (...)' or a description, from TFORM (and TDIM)."""
    code, repeat = col.format.format, col.format.repeat
    if code == "A":
        return "text"
    if code == "L":
        return "boolean"
    if code in "BIJKED" and (repeat == 1 and not col.dim):
        return "numeric"
    if code in "BIJKED":
        return f"vector ({repeat} values per row, FITS format '{col.format}')"
    names = {"C": "complex", "M": "complex", "X": "bit array", "P": "variable-length array",
             "Q": "variable-length array"}
    return f"{names.get(code, 'FITS type')} (FITS format '{col.format}')"


def _votable_kind(f) -> str:
    if f.datatype in ("char", "unicodeChar"):
        return "text"
    if f.datatype == "boolean":
        return "boolean"
    if f.arraysize not in (None, "1"):
        return f"vector (VOTable arraysize {f.arraysize})"
    if f.datatype in ("floatComplex", "doubleComplex"):
        return f"complex (VOTable datatype {f.datatype})"
    return "numeric"


def _ecsv_header(path: Path) -> tuple[dict, int]:
    """The ECSV YAML header and the number of comment lines before the column names."""
    lines = []
    with open(path, encoding="utf-8") as fh:
        for line in fh:
            if not line.startswith("#"):
                break
            lines.append(line[2:] if line.startswith("# ") else line[1:])
    if not lines or not lines[0].startswith("%ECSV"):
        raise CatalogError(f"catalog {path}: not an ECSV file (no '# %ECSV' first line)")
    try:
        header = yaml.safe_load("".join(lines[1:])) or {}
    except yaml.YAMLError as exc:
        raise CatalogError(f"catalog {path}: ECSV header is not valid YAML: {exc}") from exc
    return header, len(lines)


def _numpy_kind(dtype: np.dtype) -> str:
    if dtype.kind in "iuf":
        return "numeric"
    if dtype.kind in "SUO":
        return "text"
    return str(dtype)


def describe(path: str | Path, fmt: str) -> dict[str, SourceColumn]:
    """The columns a file declares, without reading its rows (VOTable excepted).

    For a Parquet directory: the columns every file declares, each with its unit where
    all files agree on it (``ingest.plan`` checks the files one by one).
    """
    path = Path(path)
    if fmt == "parquet" and path.is_dir():
        described = [describe(f, fmt) for f in _parquet_files(path)]
        common = {}
        for name, col in described[0].items():
            seen = [d.get(name) for d in described]
            if all(c is not None and c.kind == col.kind for c in seen):
                unit = col.unit if all(c.unit == col.unit for c in seen) else None
                common[name] = SourceColumn(name, col.kind, unit)
        return common
    try:
        if fmt == "parquet":
            schema = pq.read_schema(path)
            return {f.name: SourceColumn(f.name, _arrow_kind(f.type),
                                         (f.metadata or {}).get(b"unit", b"").decode() or None)
                    for f in schema}
        if fmt == "fits":
            from astropy.io import fits
            with fits.open(path, memmap=True) as hdul:
                hdu = _first_table(hdul, path)
                return {c.name: SourceColumn(c.name, _fits_kind(c), c.unit or None) for c in hdu.columns}
        if fmt == "csv":
            reader = pacsv.open_csv(path, read_options=pacsv.ReadOptions(block_size=1 << 16))
            names = reader.schema.names
            return {n: SourceColumn(n, "unknown") for n in names}
        if fmt == "ecsv":
            header, _ = _ecsv_header(path)
            cols = {}
            for c in header.get("datatype", []):
                kind = {"string": "text", "bool": "boolean"}.get(c.get("datatype"), "numeric")
                if c.get("subtype"):  # JSON-encoded objects or arrays (astropy's object columns)
                    fix = ".astype(str)" if kind == "text" else " as a plain number column"
                    kind = (f"ECSV subtype {c['subtype']!r} (JSON-encoded values; write it as "
                            f"table['{c['name']}']{fix})")
                cols[c["name"]] = SourceColumn(c["name"], kind, c.get("unit"))
            return cols
        if fmt == "votable":
            from astropy.io.votable import parse_single_table
            table = parse_single_table(str(path))
            return {f.name: SourceColumn(f.name, _votable_kind(f), str(f.unit) if f.unit is not None else None)
                    for f in table.fields}
    except CatalogError:
        raise
    except Exception as exc:  # corrupt or truncated files raise many kinds
        raise CatalogError(f"catalog {path}: cannot be read as {fmt} ({type(exc).__name__}: {exc})") from exc
    raise CatalogError(f"catalog {path}: unknown format '{fmt}' (allowed: {', '.join(FORMATS)})")


def _first_table(hdul, path):
    from astropy.io import fits
    for hdu in hdul:
        if isinstance(hdu, fits.BinTableHDU):
            return hdu
    hint = ""
    if Path(path).is_file() and Path(path).stat().st_size % 2880:
        hint = " (its size is not a whole number of 2880-byte FITS blocks: truncated or corrupt?)"
    raise CatalogError(f"catalog {path}: no binary table extension in the FITS file{hint}")


def _native(arr: np.ndarray) -> np.ndarray:
    arr = np.asarray(arr)
    if arr.dtype.kind in "SU":
        return np.char.strip(arr.astype(str)).astype(object)
    if arr.dtype.byteorder not in ("=", "|"):
        arr = arr.astype(arr.dtype.newbyteorder("="))
    return arr


def _fits_values(part, col, path: Path, first_row: int):
    """One FITS column of a row slice: scaled values; TNULL (integers) and NaN are missing;
    text decoded as UTF-8 (FITS asks for ASCII, which UTF-8 contains)."""
    values = part.field(col.name)
    if col.format.format == "A":
        return _fits_text(np.asarray(values), col.name, path, first_row)
    if col.null is not None and col.format.format in "BIJK":
        raw = np.rec.recarray.field(part, col.name)  # the stored integers, before TSCAL/TZERO
        try:
            missing = raw == int(col.null)
        except (TypeError, ValueError):
            raise CatalogError(f"catalog {path}: column '{col.name}' has TNULL {col.null!r}, not an integer; "
                               "fix the header (TNULL of a binary table is an integer)") from None
        if missing.any():
            return pa.array(_native(values), mask=np.asarray(missing, dtype=bool))
    return _native(values)


def _fits_text(values: np.ndarray, name: str, path: Path, first_row: int) -> np.ndarray:
    if values.dtype.kind != "S":
        return _native(values)
    try:
        text = values.astype(str)  # ASCII: the common case, vectorised
    except UnicodeDecodeError:
        decoded = []
        for i, b in enumerate(values.tolist()):
            try:
                decoded.append(b.decode("utf-8").strip())
            except UnicodeDecodeError:
                raise CatalogError(f"catalog {path}: column '{name}' row {first_row + i + 1} holds bytes that "
                                   f"are not UTF-8 text ({b[:40]!r}); re-write the column as ASCII or "
                                   "UTF-8") from None
        text = np.array(decoded, dtype=object)
    return np.char.strip(text).astype(object) if text.dtype.kind == "U" else text


def _votable_values(column):
    """A VOTable column of a row slice; masked numbers are missing (NaN or null), masked text is ''."""
    data = np.asarray(np.ma.getdata(column))
    mask = np.ma.getmaskarray(column)
    if data.ndim == 1 and data.dtype.kind in "iub" and mask.any():
        return pa.array(_native(data), mask=mask)
    if data.dtype.kind == "f":
        return _native(np.ma.filled(column, np.nan))
    return _native(np.ma.filled(column))


def iter_batches(path: str | Path, fmt: str, columns: list[str], batch_rows: int) -> Iterator[dict]:
    """Yield dicts column -> array (numpy or pyarrow) of at most ``batch_rows`` rows, in file order."""
    path = Path(path)
    try:
        if fmt == "parquet":
            for f in _parquet_files(path):
                # a buffered stream, not pre-buffered whole row groups: pyarrow's default
                # kept ~1.3 GB of a 10^7-row catalog alive while iterating (measured)
                reader = pq.ParquetFile(f, pre_buffer=False, buffer_size=1 << 22)
                for batch in reader.iter_batches(batch_size=batch_rows, columns=columns, use_threads=True):
                    yield {c: batch.column(c) for c in columns}
        elif fmt == "fits":
            from astropy.io import fits
            with fits.open(path, memmap=True) as hdul:
                hdu = _first_table(hdul, path)
                n = hdu.header["NAXIS2"]
                described = [(c, hdu.columns[c]) for c in columns]
                for start in range(0, n, batch_rows):
                    part = hdu.data[start:min(n, start + batch_rows)]  # a view: only these rows are scaled
                    yield {c: _fits_values(part, col, path, start) for c, col in described}
        elif fmt in ("csv", "ecsv"):
            read, parse = pacsv.ReadOptions(block_size=1 << 24), pacsv.ParseOptions()
            if fmt == "ecsv":
                header, skip = _ecsv_header(path)
                read = pacsv.ReadOptions(block_size=1 << 24, skip_rows=skip)
                parse = pacsv.ParseOptions(delimiter=header.get("delimiter", " "))
            # only an empty field is null: a text column may hold "NA" or "null" as a
            # name; numeric columns read such words as missing values (ingest._to_float)
            convert = pacsv.ConvertOptions(include_columns=columns,
                                           column_types={c: pa.string() for c in columns},
                                           null_values=[""], strings_can_be_null=True)
            reader = pacsv.open_csv(path, read_options=read, parse_options=parse, convert_options=convert)
            for batch in reader:
                for start in range(0, batch.num_rows, batch_rows):
                    part = batch.slice(start, batch_rows)
                    yield {c: part.column(c) for c in columns}
        elif fmt == "votable":
            from astropy.io.votable import parse_single_table
            table = parse_single_table(str(path)).to_table()
            for start in range(0, len(table), batch_rows):
                part = table[start:start + batch_rows]
                yield {c: _votable_values(part[c]) for c in columns}
        else:
            raise CatalogError(f"catalog {path}: unknown format '{fmt}'")
    except CatalogError:
        raise
    except Exception as exc:
        raise CatalogError(f"catalog {path}: reading failed ({type(exc).__name__}: {exc}); "
                           "the file may be corrupt or truncated") from exc
