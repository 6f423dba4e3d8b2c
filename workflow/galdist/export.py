"""Exports of a run's product to FITS, ECSV or CSV, streamed, with units and descriptions.

The product carries its column dictionary (``galdist.dictionary``) in each field's
metadata, so an export needs nothing but the product. The rows are read a record
batch at a time (memory: one batch, whatever the number of rows) and written to a
temporary file renamed into place when complete (``galdist.io.atomic_path``).

* FITS: one binary table; TUNITn the unit (FITS spelling where the standard has
  one, e.g. ``km s-1``; astropy's for the logarithmic ``dex(...)`` units, which FITS
  cannot spell), TCOMMn the description (and a flag column's bits); text columns
  are as wide as their longest value; unsigned 16- and 32-bit flags use TZERO = 2^15, 2^31.
  Written by ``astropy.io.fits.StreamingHDU``.
* ECSV: astropy's own header (units, descriptions, a flag column's bits under
  ``meta``), then the rows, comma-separated.
* CSV: a plain CSV file that any reader takes without options, and beside it
  ``<file>.columns.json`` with each column's unit, description, type and bits. (ECSV
  is the CSV with a commented header; plain CSV stays plain for spreadsheets.)
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .io import atomic_path, dataset_files, is_arrow_text

FORMATS = ("fits", "ecsv", "csv")
BATCH_ROWS = 65_536


def columns_info(product: str | Path, columns=None) -> list[dict]:
    """Each column's name, unit, description, Arrow type, flag bits and longest text, read
    from the product's metadata. ``columns``: the names to keep, in that order (ValueError
    naming any the product lacks)."""
    schema = pq.read_schema(dataset_files(product)[0])  # parts share one schema and header
    meta = schema.metadata or {}
    if columns:
        missing = [c for c in columns if c not in schema.names]
        if missing:
            raise ValueError(f"no column {', '.join(repr(c) for c in missing)} in {product}; its columns are "
                             "listed in COLUMNS.md beside it")
        names = list(dict.fromkeys(columns))
    else:
        names = schema.names
    out = []
    for name in names:
        f = schema.field(name)
        fm = f.metadata or {}
        bits = json.loads(fm[b"flag_bits"]) if b"flag_bits" in fm else None
        description = fm.get(b"description", b"").decode()
        if bits:
            description += "; bits: " + ", ".join(f"{k}={v}" for k, v in bits.items())
        out.append({"name": name, "unit": fm.get(b"unit", b"").decode(), "description": description,
                    "type": f.type, "bits": bits,
                    "length": int(meta.get(f"table::len::{name}".encode(), b"1"))})
    return out


def _batches(product, names):
    for path in dataset_files(product):
        pf = pq.ParquetFile(path, pre_buffer=False, buffer_size=1 << 22)
        yield from pf.iter_batches(batch_size=BATCH_ROWS, columns=names, use_threads=False)


def export(product: str | Path, out: str | Path, fmt: str, columns=None) -> dict:
    """Write ``product``'s rows (one file, or a folder of parts) (``columns`` only, if given) to ``out`` in ``fmt``; returns
    {"rows", "columns", "files"}."""
    if fmt not in FORMATS:
        raise ValueError(f"format {fmt!r}: choose one of {', '.join(FORMATS)}")
    info = columns_info(product, columns)
    out = Path(out)
    writer = {"fits": _fits, "ecsv": _ecsv, "csv": _csv}[fmt]
    rows = writer(product, out, info)
    files = [str(out)]
    if fmt == "csv":
        sidecar = out.with_name(out.name + ".columns.json")
        from .io import write_json

        write_json({"file": out.name, "rows": rows,
                    "columns": [{k: (str(v) if k == "type" else v) for k, v in c.items() if k != "length"}
                                for c in info]}, sidecar)
        files.append(str(sidecar))
    return {"rows": rows, "columns": len(info), "files": files}


# --------------------------------------------------------------------------------- FITS

def _fits_unit(unit: str) -> str:
    import astropy.units as u

    if not unit:
        return ""
    try:
        return u.Unit(unit).to_string("fits")
    except (ValueError, u.UnitsError):
        return unit  # logarithmic units: astropy's spelling (FITS has none)


def _ascii(text: str) -> str:
    """FITS headers take printable ASCII only: dashes and the like spelled in ASCII."""
    import unicodedata

    text = text.replace("\u2013", "-").replace("\u2212", "-").replace("\u2014", "-")
    return unicodedata.normalize("NFKD", text).encode("ascii", "ignore").decode("ascii")


def _fits_values(array: pa.Array, c: dict, dtype: np.dtype) -> np.ndarray:
    t = c["type"]
    if is_arrow_text(t):
        return np.array(array.fill_null("").cast(pa.binary()).to_numpy(zero_copy_only=False), dtype=dtype)
    if pa.types.is_boolean(t):
        return np.where(np.asarray(array.fill_null(False).to_numpy(zero_copy_only=False)), ord("T"),
                        ord("F")).astype(dtype)
    if pa.types.is_unsigned_integer(t) and t.bit_width > 8:  # stored signed, TZERO = 2^(bits - 1)
        return (array.to_numpy(zero_copy_only=False).astype(np.int64) - 2 ** (t.bit_width - 1)).astype(dtype)
    if pa.types.is_floating(t):
        return array.fill_null(np.nan).to_numpy(zero_copy_only=False).astype(dtype)
    return array.fill_null(0).to_numpy(zero_copy_only=False).astype(dtype)


def _fits(product, out: Path, info: list[dict]) -> int:
    import io as _io
    import warnings

    from astropy.io import fits
    from astropy.table import Column, Table

    n = sum(pq.ParquetFile(p).metadata.num_rows for p in dataset_files(product))
    # astropy's own header for these columns (TFORM, TZERO of unsigned flags, and the
    # descriptions and bits as its serialized-column comments, which Table.read restores);
    # the units are set below, where FITS cannot spell a unit astropy would warn
    empty = Table([Column(name=c["name"], dtype=_numpy_dtype(c), length=0,
                          description=_ascii(c["description"]) or None,
                          meta={"flag_bits": c["bits"]} if c["bits"] else None) for c in info])
    buf = _io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        empty.write(buf, format="fits")
    buf.seek(0)
    with fits.open(buf) as hdul:
        hdu = hdul[1]
        header, columns = hdu.header.copy(), list(hdu.columns)
    header["NAXIS2"] = n
    for i, c in enumerate(info, start=1):
        if c["unit"]:
            header.insert(f"TFORM{i}", (f"TUNIT{i}", _fits_unit(c["unit"])), after=True)
        if c["description"]:
            header.insert(f"TFORM{i}", (f"TCOMM{i}", _ascii(c["description"])), after=True)
    header["EXTNAME"] = "DISTANCES"
    # the stored (big-endian, TZERO-shifted) record of a row
    stored = np.dtype([(c["name"], _stored_dtype(col)) for c, col in zip(info, columns)])
    rows = 0
    with atomic_path(out) as tmp:
        fits.PrimaryHDU().writeto(tmp)
        shdu = fits.StreamingHDU(str(tmp), header)
        try:
            for batch in _batches(product, [c["name"] for c in info]):
                rec = np.empty(batch.num_rows, dtype=stored)
                for k, c in enumerate(info):
                    rec[c["name"]] = _fits_values(batch.column(k), c, stored[c["name"]])
                shdu.write(rec.view(np.uint8))  # a binary table is a stream of bytes (BITPIX 8)
                rows += batch.num_rows
        finally:
            shdu.close()
    return rows


def _stored_dtype(col) -> np.dtype:
    code = col.format.format
    if code == "A":
        return np.dtype(f"S{col.format.repeat}")
    return np.dtype({"L": "i1", "B": "u1", "I": ">i2", "J": ">i4", "K": ">i8", "E": ">f4", "D": ">f8"}[code])


# --------------------------------------------------------------------------------- ECSV / CSV

def _numpy_dtype(c: dict):
    t = c["type"]
    if is_arrow_text(t):
        return f"U{max(c['length'], 1)}"
    return np.dtype(t.to_pandas_dtype())


def _ecsv(product, out: Path, info: list[dict]) -> int:
    import io as _io

    import astropy.units as u
    from astropy.table import Column, Table

    empty = Table([Column(name=c["name"], dtype=_numpy_dtype(c), length=0,
                          unit=u.Unit(c["unit"]) if c["unit"] else None, description=c["description"] or None,
                          meta={"flag_bits": c["bits"]} if c["bits"] else None) for c in info])
    buf = _io.StringIO()
    empty.write(buf, format="ascii.ecsv", delimiter=",")
    return _text_rows(product, out, info, buf.getvalue())


def _csv(product, out: Path, info: list[dict]) -> int:
    import csv
    import io as _io

    buf = _io.StringIO()
    csv.writer(buf, lineterminator="\n").writerow([c["name"] for c in info])
    return _text_rows(product, out, info, buf.getvalue())


def _text_rows(product, out: Path, info: list[dict], head: str) -> int:
    """``head`` then every row as CSV (comma, text quoted where needed, NaN as ``nan``,
    missing text as an empty field)."""
    import pyarrow.compute as pc
    import pyarrow.csv as pacsv

    rows = 0
    with atomic_path(out) as tmp:
        with open(tmp, "wb") as fh:
            fh.write(head.encode("utf-8"))
            options = pacsv.WriteOptions(include_header=False, delimiter=",")
            for batch in _batches(product, [c["name"] for c in info]):
                arrays = []
                for k, c in enumerate(info):
                    a = batch.column(k)
                    if pa.types.is_boolean(a.type):  # the spelling astropy's ECSV reader and pandas both take
                        a = pc.if_else(a, pa.scalar("True"), pa.scalar("False"))
                    arrays.append(a)
                pacsv.write_csv(pa.Table.from_arrays(arrays, names=[c["name"] for c in info]), fh, options)
                rows += batch.num_rows
    return rows
