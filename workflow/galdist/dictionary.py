"""The column dictionary of ``distances.parquet``: every column's description, unit,
storage type and, for a flag column, its bits, gathered from where each column is
declared, never written twice:

* catalog columns: ``galdist.columns`` (``Column.meaning``; a method's in its registry entry);
* flag columns and their bits: ``galdist.flags``;
* the stages' columns: ``galdist.stages`` (``output_columns``);
* the methods' columns: ``galdist.methods`` (``outputs`` and ``descriptions`` of each
  entry, ``COMMON_OUTPUTS`` and ``COMMON_DESCRIPTIONS``);
* the cross-check's and the assembly's columns: ``galdist.product`` (``DERIVED_COLUMNS``);
* the groups' per-galaxy columns: ``galdist.groups`` (``GROUP_COLUMNS``);
* the user's pass-through columns (config ``keep_columns``): ``user_<name>``, as given.

The product's field metadata (unit, description, flag bits), the astropy-readable
table header in its schema metadata (``astropy_metadata``), the run's ``COLUMNS.md``,
the README's column section and the exports all read it. The assembly refuses a
column without an entry, so adding a column is one line where it is declared.
"""

from __future__ import annotations

import json
from dataclasses import dataclass

from . import io

#: prefix of the user's pass-through columns (config ``keep_columns``); no other column
#: name starts with it, so a kept column never clashes with galdist's
KEEP_PREFIX = "user_"

#: types of the product's columns as computed (``stored`` narrows them for writing)
FLOAT, FLAGS, BOOL, TEXT = "float64", "uint32", "bool", "string"
#: float columns stored in full (float64), as in every file galdist writes
FULL_PRECISION = io.FULL_PRECISION
#: why float32 is ample elsewhere (COLUMNS.md and the README say it)
PRECISION_NOTE = ("Stored types are chosen by the precision each value needs: float32 (relative "
                  "precision 6e-8: 2e-6 mag at mu = 35, 2e-3 km/s at 3e4 km/s, far below any "
                  "measurement error) for every measured or derived value except positions and "
                  "redshifts (float64); flag columns in the narrowest unsigned integer that holds "
                  "their bits; counts as int32; your keep_columns as read.")


@dataclass(frozen=True)
class Entry:
    """One product column: ``unit`` is an astropy unit string ("" dimensionless or text)."""

    name: str
    unit: str
    description: str
    dtype: str = FLOAT
    flags: str | None = None  # the flag column whose bits it holds (a key of galdist.flags.ALL)
    origin: str = ""  # the stage that writes it

    def bits(self) -> list[dict]:
        """The bit table of a flag column (name, bit, value, meaning, action), else []."""
        from .flags import ALL

        return ALL[self.flags].describe() if self.flags else []

    def field_metadata(self) -> dict[bytes, bytes]:
        """Parquet field metadata: unit (if any), description, and a flag column's bits as JSON."""
        meta = {b"description": self.description.encode()}
        if self.unit:
            meta[b"unit"] = self.unit.encode()
        if self.flags:
            meta[b"flag_bits"] = json.dumps({d["name"]: d["value"] for d in self.bits()}).encode()
        return meta


def _text_unit(unit: str) -> tuple[str, str]:
    """(unit, dtype) of a ``galdist.columns.Column`` unit ("string": text)."""
    return ("", TEXT) if unit == "string" else (unit, FLOAT)


def _catalog(bands, methods) -> list[Entry]:
    from .columns import BASE, DERIVED, OPTIONAL, band_columns, method_columns

    if bands is None:
        band_cols = [c for c in band_columns("{band}")]
    else:
        band_cols = [c for b in bands for c in band_columns(b)]
    cols = BASE + DERIVED + band_cols + [c for m in methods for c in method_columns(m)] + OPTIONAL
    out, seen = [], set()
    for c in cols:
        if c.name in seen:
            continue
        seen.add(c.name)
        unit, dtype = _text_unit(c.unit)
        where = "ingest (computed from ra, dec)" if c in DERIVED else "catalog"
        text = c.meaning if c in DERIVED or dtype == TEXT else f"{c.meaning} (NaN where flagged in quality_flags)"
        out.append(Entry(c.name, unit, text, dtype, origin=where))
    return out


def templates(methods=None) -> list[Entry]:
    """The dictionary with "{band}" left in band columns' names, in product order: every
    registered method (or ``methods``, config names), every column a run may write, and
    ``user_<name>`` standing for the pass-through columns."""
    from .product import ordered

    keep = {keep_name("<name>"): {"source": "<name>", "type": "as read"}}
    entries = by_name(for_run(None, methods, keep))
    return [entries[n] for n in ordered(list(entries))]


def readme_section() -> str:
    """The README's column table (``scripts/sync_flag_table.py`` writes it; a test checks it)."""
    return markdown(templates(), with_bits=False)


def for_run(bands, methods=None, keep: dict[str, dict] | None = None) -> list[Entry]:
    """Every column of a run's product, in no particular order (``product.ordered``
    orders them): ``bands`` the configured band labels (None: "{band}" templates),
    ``methods`` config names (default every registered method), ``keep`` the
    pass-through columns as ingest_summary.json's ``kept_columns`` records them
    (product name -> source, Arrow type, declared unit)."""
    from . import stages
    from .flags import STAGE_FLAGS
    from .methods import REGISTRY
    from .groups import GROUP_COLUMNS
    from .product import DERIVED_COLUMNS

    methods = list(REGISTRY) if methods is None else list(methods)
    out = _catalog(bands, methods)
    out.append(Entry("quality_flags", "", "input problems found at ingest, a bit per reason", FLAGS, "quality_flags",
                     "ingest"))
    for stage in ("extinction", "kcorr", "redshift"):
        for name, (unit, text) in stages.output_columns(stage, bands).items():
            is_flags = name in STAGE_FLAGS
            out.append(Entry(name, unit, text, FLAGS if is_flags else FLOAT, name if is_flags else None, stage))
    for m in methods:
        spec = REGISTRY[m]
        texts = spec.output_descriptions()
        for name, unit in spec.output_units().items():
            if name not in texts:
                raise KeyError(f"column {name} of method {m} has no description: add it to the entry's "
                               "descriptions (or methods.COMMON_DESCRIPTIONS)")
            dtype = FLAGS if name == spec.flags_column else BOOL if name.endswith("_malmquist_applied") else FLOAT
            out.append(Entry(name, unit, texts[name], dtype, name if dtype == FLAGS else None, m))
        for suffix, (unit, text) in DERIVED_COLUMNS["per_method"].items():
            out.append(Entry(f"{spec.prefix}_{suffix}", unit, text.format(title=spec.title, prefix=spec.prefix),
                             FLOAT, origin="assemble"))
    for name, (unit, text, dtype) in DERIVED_COLUMNS["per_row"].items():
        out.append(Entry(name, unit, text, dtype, origin="assemble"))
    for name, (unit, text, dtype) in GROUP_COLUMNS.items():
        out.append(Entry(name, unit, text, dtype, origin="groups"))
    out = [stored(e) for e in out]
    for name, info in (keep or {}).items():
        unit = f"; unit the file declares: {info['unit']}" if info.get("unit") else ""
        dtype = {"double": FLOAT, "float": "float32"}.get(info["type"], info["type"])
        out.append(Entry(name, "", f"your catalog's column {info['source']!r}, passed through as read "
                                   f"(config keep_columns{unit})", dtype, origin="catalog (keep_columns)"))
    return out


def stored(e: Entry) -> Entry:
    """``e`` with the type the product stores (``PRECISION_NOTE``): float32 but for
    ``FULL_PRECISION``, a flag column's narrowest unsigned integer, int32 counts."""
    from dataclasses import replace

    from .flags import ALL

    if e.dtype == FLOAT and e.name not in FULL_PRECISION:
        return replace(e, dtype="float32")
    if e.dtype == FLAGS and e.flags:
        top = max(int(m.value) for m in ALL[e.flags])
        return replace(e, dtype=next(t for t, limit in (("uint8", 0xFF), ("uint16", 0xFFFF), (FLAGS, 0xFFFFFFFF))
                                     if top <= limit))
    if e.dtype == "int64":
        return replace(e, dtype="int32")
    return e


def keep_name(source: str) -> str:
    """Product name of the user's column ``source`` (config keep_columns)."""
    return KEEP_PREFIX + source


def by_name(entries: list[Entry]) -> dict[str, Entry]:
    return {e.name: e for e in entries}


def lookup(entries: dict[str, Entry], names) -> list[Entry]:
    """The entries of ``names``; KeyError naming every column without one."""
    missing = [n for n in names if n not in entries]
    if missing:
        raise KeyError(f"product column(s) without a dictionary entry: {', '.join(missing)}; declare each "
                       "where it is produced (see galdist.dictionary)")
    return [entries[n] for n in names]


# ----------------------------------------------------------------------------- astropy

def astropy_metadata(schema, entries: dict[str, Entry], string_lengths: dict[str, int]) -> dict[str, str]:
    """Schema metadata astropy's Parquet reader understands (the keys its own writer puts
    there): ``table_meta_yaml``, the ECSV-style header with each column's unit and
    description (and a flag column's bits under ``meta``), and ``table::len::<name>``,
    the longest string of each text column. ``Table.read(product)`` then gives units
    and descriptions without a warning."""
    import astropy.units as u
    import numpy as np
    from astropy.table import Column, Table
    from astropy.table.meta import get_yaml_from_table

    cols = []
    for field in schema:
        e = entries[field.name]
        dtype = "U1" if e.dtype == TEXT else np.dtype(field.type.to_pandas_dtype())
        meta = {"flag_bits": {d["name"]: d["value"] for d in e.bits()}} if e.flags else None
        # a measured dimensionless value is dimensionless (Quantity-ready); text, flags, booleans have no unit
        unit = e.unit or (u.dimensionless_unscaled if e.dtype.startswith("float") else None)
        cols.append(Column(name=field.name, dtype=dtype, length=0, unit=unit,
                           description=e.description, meta=meta))
    out = {"table_meta_yaml": "\n".join(get_yaml_from_table(Table(cols)))}
    for name, n in string_lengths.items():
        out[f"table::len::{name}"] = str(max(int(n), 1))
    return out


# ----------------------------------------------------------------------------- markdown

def _md(text: str) -> str:
    return text.replace("|", "\\|")


def markdown(entries: list[Entry], with_bits: bool = True) -> str:
    """A Markdown table of ``entries`` (in the order given), then each flag column's bits."""
    lines = ["| column | unit | type | description |", "|---|---|---|---|"]
    for e in entries:
        name = e.name.replace("{band}", "<band>")
        lines.append(f"| `{name}` | {_md(e.unit) or '–'} | {e.dtype} | {_md(e.description.replace('{band}', '<band>'))} |")
    if with_bits:
        seen = set()
        for e in entries:
            if not e.flags:
                continue
            key = tuple(d["name"] for d in e.bits())
            lines.append(f"\n**`{e.name}`** bits" + (" (as above)" if key in seen else "") + "\n")
            if key in seen:
                continue
            seen.add(key)
            lines.append("| bit | value | name | meaning |")
            lines.append("|---|---|---|---|")
            lines += [f"| {d['bit']} | {d['value']} | `{d['name']}` | {_md(d['meaning'])} |" for d in e.bits()]
    return "\n".join(lines)


def columns_markdown(entries: list[Entry], run: str | None = None) -> str:
    """The run's ``COLUMNS.md``: the product's columns in product order, with their bits."""
    head = f"# Columns of distances.parquet{f' (run {run})' if run else ''}\n\n"
    intro = ("One row per input galaxy, in input order. Units are astropy unit strings ('–': "
             "dimensionless); they and the descriptions are also in each Parquet field's metadata, and "
             "`astropy.table.Table.read` gives them as column units and descriptions. A flag column's "
             "value is the sum of its set bits' values (`galdist flags VALUE --column NAME` decodes one). "
             "Distances (`*_d_mpc`, `d_z_mpc`) are luminosity distances; `*_dmu` and `*_logd_ratio` are "
             "method minus redshift distance: positive `dmu`, negative `logd_ratio`, means the galaxy is "
             "farther than its redshift says. " + PRECISION_NOTE + "\n\n")
    return head + intro + markdown(entries) + "\n"
