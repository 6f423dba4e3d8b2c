"""The final product: join every stage's shard files, cross-check, write Parquet parts.

``assemble_part`` streams one shard (one job per shard, in parallel): it reads the
ingest shard and each stage's narrow file (fingerprints checked), derives the
per-galaxy cross-check columns from the sample statistics computed beforehand over
all shards (``crosscheck.sample_statistics``), and writes the rows, in input order,
to the shard's product part. Units go into field metadata, provenance into the
schema metadata. It also counts every flag bit for the summary and keeps a small
deterministic subsample of rows for the plots. The parts are the product
(``distances/``, a Parquet dataset) or are joined into one ``distances.parquet``
(``concatenate``; config ``product_layout``, ``galdist.config.product_layout``).
"""

from __future__ import annotations

import datetime as _dt
import json
import logging
import subprocess
from collections import Counter
from importlib import metadata as _metadata
from pathlib import Path

import numpy as np
import pyarrow as pa

from . import crosscheck
from .groups import GROUP_COLUMNS
from .likelihood import SUMMARIES
from . import flags as F
from .errors import StaleInputError
from .io import AtomicParquetWriter, iter_shard, table_from_columns, write_parquet
from .methods import REGISTRY

log = logging.getLogger(__name__)

#: config name -> column prefix of every registered method
METHOD_PREFIX = {name: spec.prefix for name, spec in REGISTRY.items()}
FLAG_COLUMNS = tuple(F.ALL)
LEADING = ["galaxy_id", "ra", "dec", "gal_l", "gal_b", "galaxy_class", "group_id", *FLAG_COLUMNS,
           "z_helio", "z_helio_err", "z_cmb", "z_cmb_err", "cz_cmb_kms", "mu_z", "mu_z_err", "d_z_mpc",
           "ebv", "ebv_err", "ebv_used", "ebv_used_err"]
TRAILING = ["mu_best", "mu_best_err", "mu_best_err_sys", "best_method", *(f"best_{k}" for k in SUMMARIES),
            *GROUP_COLUMNS]
#: The columns the assembly derives (the cross-check's per galaxy, and its own), for the
#: column dictionary (galdist.dictionary): per method ("{title}", "{prefix}" filled in) and
#: per row. Each is (unit, description[, storage type]).
DERIVED_COLUMNS = {
    "per_method": {
        "dmu": ("mag", "{prefix}_mu - mu_z: positive when the {title} distance is larger than the redshift "
                       "distance"),
        "logd_ratio": ("dex", "log10(d_z / d) = (mu_z - {prefix}_mu) / 5, luminosity distances: negative when "
                              "the {title} distance is larger than the redshift distance"),
        "vpec": ("km / s", "peculiar velocity from (1 + z_cmb) = (1 + z_cos)(1 + z_pec), z_cos the redshift "
                           "of {prefix}_mu in the configured cosmology; positive = receding faster than the "
                           "Hubble flow at that distance"),
        "vpec_err": ("km / s", "error of vpec (mu_err and z_cmb_err)"),
        "vpec_lr": ("km / s", "peculiar velocity by the log-ratio estimator of Watkins & Feldman 2015 "
                              "(MNRAS 450, 1868)"),
        "vpec_lr_err": ("km / s", "error of vpec_lr"),
        **{k: ("dex", f"{text} (the {{title}} distance's; eta = log10(d_z / d), its likelihood in "
                      f"eta_likelihoods.parquet, {{prefix}}_eta_like)") for k, text in SUMMARIES.items()},
    },
    "per_row": {
        "cz_cmb_kms": ("km / s", "c z_cmb, the velocity the LOCAL_FLOW flags and redshift.min_cz_kms speak of",
                       "float64"),
        "mu_best": ("mag", "inverse-variance mean of the usable methods' mu (a method is usable where mu and "
                           "mu_err are finite and it has no flag besides LOCAL_FLOW and OUTLIER, "
                           "crosscheck.BEST_IGNORE_FLAGS), each less its zero-point offset where "
                           "zero_point.apply is true", "float64"),
        "mu_best_err": ("mag", "random error of mu_best, 1 / sqrt(sum of the weights 1 / mu_err^2)", "float64"),
        "mu_best_err_sys": ("mag", "systematic error of mu_best: the methods' mu_err_sys combined with the same "
                                   "weights, the calibrations independent of each other, and the zero-point "
                                   "offsets' errors where applied", "float64"),
        "best_method": ("", f"prefixes of the methods mu_best combines, joined by '+' (e.g. tf+sbf); "
                            f"'{crosscheck.NO_METHOD}' where no method is usable", "string"),
        **{f"best_{k}": ("dex", f"{text} (mu_best's; its likelihood in eta_likelihoods.parquet, best_eta_like)",
                         "float64") for k, text in SUMMARIES.items()},
    },
}
CAUTIONS = (
    "Tully-Fisher distances of discs below the inclination limit (LOW_INCLINATION) are unreliable: "
    "the deprojection 1/sin i blows up for face-on discs.",
    "Distances outside a calibration's valid predictor range are extrapolations (OUT_OF_RANGE, EXTRAPOLATED); "
    "SBF gives none there unless config allows it.",
    "Redshift distances, dmu and v_pec below the minimum cz (LOCAL_FLOW) are not distances: "
    "peculiar velocities are a large part of cz there.",
    "Single-galaxy peculiar velocities carry errors of about 0.46 sigma_mu cz; use them in aggregate.",
    "Extinction corrections above the E(B-V) limit (HIGH_EXTINCTION) are unreliable.",
    "mu_z assumes the configured cosmology (default flat LCDM, H0 = 70): a convention for comparison, "
    "not a measurement.",
    "Calibrations marked 'from memory' in their files must be checked against the papers before publication.",
    "Each *_mu_err is the random error (measurements, intrinsic scatter); *_mu_err_sys is the calibration's "
    "systematic error, common to every galaxy of that method: never average it down.",
    "An implied H0 from a calibration whose zero point assumes an H0 (h0_implied_independent false) "
    "returns that H0 by construction: it is not a measurement.",
)
#: rows the assembly handles at once: a batch holds every stage's columns and the cross-check's
#: in float64 (measured on the benchmark's 10^6-row shards, with likelihood.BLOCK_ROWS = 4096:
#: peak 0.75 GB; 131072 rows and blocks of 16384 reached 1.15 GB)
BATCH_ROWS = 65_536
#: likelihood blocks are gathered up to this many bytes before a write: a batch of mostly
#: Gaussian (null) rows is one row group, a batch of stored curves a few
LIKELIHOOD_FLUSH_BYTES = 32 << 20
#: the catalog columns the product always carries (config copy_inputs: false drops the rest)
IDENTITY_COLUMNS = frozenset({"galaxy_id", "ra", "dec", "z_helio", "z_helio_err", "galaxy_class", "group_id"})
PLOT_COLUMNS = ["galaxy_id", "gal_l", "gal_b", "z_cmb", "mu_z", "mu_z_err"] + [
    f"{s.prefix}_{c}" for s in REGISTRY.values() if s.relation_plot for c in (s.relation_plot.x, s.relation_plot.y)
] + [f"{p}_{c}" for p in METHOD_PREFIX.values() for c in ("mu", "mu_err", "flags", "dmu", "vpec")]
PACKAGES = ("galdist", "numpy", "pandas", "pyarrow", "astropy", "scipy", "speclite",
            "dust_extinction", "astropy-healpix", "matplotlib", "snakemake")


def ordered(names: list[str]) -> list[str]:
    """Product column order: identity and flags, redshift, extinction, then the rest
    in stage order, the combined distance last."""
    from .dictionary import KEEP_PREFIX

    first = [n for n in LEADING if n in names] + [n for n in names if n.startswith(KEEP_PREFIX)]
    last = [n for n in TRAILING if n in names]
    middle = [n for n in names if n not in first and n not in last]
    methods = [p + "_" for p in METHOD_PREFIX.values()]
    common = [n for n in middle if not n.startswith(tuple(methods))]
    grouped = [n for p in methods for n in middle if n.startswith(p)]
    return first + common + grouped + last


def _git_commit(repo: Path) -> str | None:
    try:
        out = subprocess.run(["git", "-C", str(repo), "rev-parse", "HEAD"], capture_output=True, text=True,
                             timeout=10)
    except (OSError, subprocess.TimeoutExpired):
        return None
    return out.stdout.strip() if out.returncode == 0 else None


def provenance(config: dict, calibrations: dict, ingest_summary: dict, repo: Path,
               created: str | None = None) -> dict:
    """Everything needed to reproduce the product, as JSON-ready values."""
    versions = {}
    for name in PACKAGES:
        try:
            versions[name] = _metadata.version(name)
        except _metadata.PackageNotFoundError:
            versions[name] = None
    return {
        "config": config,
        "calibrations": {m: {"as_configured": config.get(m, {}).get("calibration", c.path), "name": c.name,
                             "sha256": c.sha256, "text": c.text, "reference": c.citation(),
                             "conventions": {"extinction": c.extinction_convention,
                                             "zero_point_h0": c.zero_point_h0, "fit": c.fit}}
                         for m, c in calibrations.items()},
        "inputs": ingest_summary.get("inputs", []),
        "packages": versions,
        "git_commit": _git_commit(repo),
        "cautions": list(CAUTIONS),
        "created_utc": created or _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
    }


def ordered_entries(names, entries: dict) -> list:
    """The dictionary entries of ``names`` in product order (KeyError naming any without one)."""
    from .dictionary import lookup

    return lookup(entries, ordered(list(names)))


def dtype_name(t: pa.DataType) -> str:
    """The dictionary's name of an Arrow type (float64, uint32, bool, string, int64...)."""
    return "float64" if t == pa.float64() else "float32" if t == pa.float32() else str(t)


def _narrows(computed: pa.DataType, target: pa.DataType) -> bool:
    """Whether ``computed`` is stored as ``target`` of the same kind (float64 as float32, uint32
    flags as uint8, int64 counts as int32); the writer's safe cast refuses an integer that does
    not fit."""
    kinds = (pa.types.is_floating, pa.types.is_unsigned_integer, pa.types.is_signed_integer)
    return any(k(computed) and k(target) for k in kinds)


def product_schema(table: pa.Table, entries: dict, provenance_info: dict, text_lengths: dict) -> pa.Schema:
    """The product's schema: each field's type checked against its dictionary entry and its
    metadata (unit, description, flag bits) from it; in the schema metadata the provenance
    and the header astropy reads (``dictionary.astropy_metadata``; ``text_lengths``: the
    longest value of each text column)."""
    from .dictionary import TEXT, astropy_metadata

    fields = []
    for f in table.schema:
        e = entries[f.name]
        target = f.type if dtype_name(f.type) == e.dtype else pa.type_for_alias(e.dtype)
        if not (target == f.type or _narrows(f.type, target)):
            raise TypeError(f"product column {f.name} is {f.type}; the column dictionary says {e.dtype}")
        fields.append(pa.field(f.name, target, metadata=e.field_metadata()))
    schema = pa.schema(fields)
    lengths = {f.name: text_lengths.get(f.name, 0) for f in schema if entries[f.name].dtype == TEXT}
    meta = {"galdist.provenance": json.dumps(provenance_info, sort_keys=True, default=str)}
    meta |= astropy_metadata(schema, entries, lengths)
    return schema.with_metadata({k.encode(): v.encode() for k, v in meta.items()})


def longest_texts(paths) -> dict[str, int]:
    """The longest value (in characters) of every text column of the ingest shards: astropy
    needs it in the header (``table::len::<name>``) before the first row is written. Reads
    only the text columns, a row group at a time."""
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    from .io import is_arrow_text, iter_rows

    out: dict[str, int] = {}
    for path in paths:
        names = [f.name for f in pq.read_schema(path) if is_arrow_text(f.type)]
        if not names:
            continue
        for table in iter_rows(path, names, 1 << 18):
            for name in names:
                out[name] = max(out.get(name, 0), pc.max(pc.utf8_length(table.column(name))).as_py() or 0)
    return out


def likelihood_schema(schema: pa.Schema, eta_grid) -> pa.Schema:
    """eta_likelihoods.parquet's schema: each list's description and unit, each kind column's
    codes, the grid in the metadata."""
    from .likelihood import KINDS, schema_metadata

    def meta(name):
        if name == "galaxy_id":
            return None
        source = "mu_best" if name.startswith("best_") else name.split("_eta_like")[0] + "_mu"
        if name.endswith("_kind"):
            codes = "; ".join(f"{k}: {v}" for k, v in KINDS.items())
            return {b"unit": b"", b"description": f"where the likelihood from {source} came from ({codes})".encode()}
        return {b"unit": b"1 / dex", b"description": (f"likelihood of eta = log10(d_z / d) from {source} on the "
                                                      "grid of the schema metadata (galdist.eta_grid): a density "
                                                      "in 1/dex; null where there is no distance or it is the "
                                                      f"analytic Gaussian of {source} (kind 1; "
                                                      "galdist.likelihood.dense_curves rebuilds it)").encode()}

    fields = [pa.field(f.name, f.type, metadata=meta(f.name)) for f in schema]
    return pa.schema(fields, metadata=schema_metadata(np.asarray(eta_grid)))


def assemble_part(files: dict, index: int, out_path, sample_path, grid, statistics: dict, methods: list[str],
                  provenance_info: dict, *, min_cz: float, clip_sigma: float, keep_fraction: float,
                  text_lengths: dict, entries: dict, zero_point: dict | None = None, likelihood_path=None,
                  eta_grid=None, likelihood_parts=None, copy_inputs: bool = True) -> dict:
    """Stream one shard's stages into the product part ``out_path``; returns its counts
    (``merge_counts`` adds the parts').

    ``files``: "shard" the ingest shard and each stage name its narrow file; ``index``:
    the shard's place (it seeds the plot subsample, ``keep_fraction`` of the rows, written
    to ``sample_path``). ``entries``: the run's column dictionary
    (``dictionary.by_name(dictionary.for_run(...))``); a column without an entry stops the
    assembly. Besides the provenance, the schema metadata holds the header astropy reads
    (``dictionary.astropy_metadata``; ``text_lengths``: the longest value of each text
    column over the whole catalog, so that every part has the same header).
    ``zero_point``: the run's zero-point tie (``groups.fit_zero_points``), subtracted in
    mu_best where "applied". ``likelihood_path``: the part of the companion file of every
    row's eta likelihoods on ``eta_grid`` per method and for mu_best
    (``galdist.likelihood``); their summaries go into the product. ``likelihood_parts``:
    method -> its job's eta-likelihood part file of this shard (the rows whose likelihood
    is not the analytic Gaussian); without them every likelihood is the analytic Gaussian.
    No ``eta_grid``: no likelihoods and no summary columns. ``copy_inputs`` false: of the
    catalog's own columns only ``IDENTITY_COLUMNS`` (config ``copy_inputs``; the rows keep
    the catalog's order, so galaxy_id joins the rest back).
    """
    from . import likelihood as lk
    from .io import FINGERPRINT_KEY, check_stamps, read_fingerprint
    from .redshift import C_KMS

    prefixes = [METHOD_PREFIX[m] for m in methods]
    flag_counts = {c: Counter() for c in FLAG_COLUMNS}
    best, kinds = Counter(), {}
    rows = 0
    writer = like_writer = None
    samples, used = [], []
    text_lengths = dict(text_lengths)
    offsets = crosscheck.tie(zero_point, prefixes)[0]
    stages = {k: v for k, v in files.items() if k != "shard"}
    rng = np.random.default_rng(index)
    readers = {}
    if eta_grid is not None and likelihood_parts:
        part_files = {METHOD_PREFIX[m]: path for m, path in likelihood_parts.items()}
        check_stamps(part_files.values(), FINGERPRINT_KEY.decode(), read_fingerprint(files["shard"]),
                     f"computed from another version of shard {files['shard']}")
        for p, path in part_files.items():
            # an empty part (a job that computes no likelihood) depends on no grid
            got = lk.part_grid(path) if lk.part_rows(path) else eta_grid
            if got.shape != eta_grid.shape or not np.allclose(got, eta_grid, rtol=0, atol=1e-9):
                raise StaleInputError(f"{path} holds eta likelihoods on another grid than config "
                                      "likelihoods; delete it and run the same command again")
        readers = {p: lk.PartReader(path) for p, path in part_files.items()}
    try:
        for cols, units in iter_shard(files["shard"], stages, rows=BATCH_ROWS):
            cols |= crosscheck.galaxy_columns(cols, grid, statistics, methods=prefixes, min_cz=min_cz,
                                              clip_sigma=clip_sigma, zero_point=zero_point)
            cols["cz_cmb_kms"] = C_KMS * np.asarray(cols["z_cmb"], dtype=float)
            if eta_grid is not None:
                # the likelihoods go to their file a block at a time; their summaries into the product
                dists = {p: (cols[f"{p}_mu"], cols[f"{p}_mu_err"]) for p in prefixes if f"{p}_mu" in cols}
                dists["best"] = (cols["mu_best"], cols["mu_best_err"])
                n_rows = len(cols["mu_z"])
                usable = {p: crosscheck.best_usable(cols[f"{p}_mu"], cols[f"{p}_mu_err"], cols[f"{p}_flags"])
                          for p in prefixes if f"{p}_mu" in cols}
                parts = {p: (lambda a, b, r=r, s=rows: r.take(s + a, s + b)) for p, r in readers.items()}
                blocks = []  # likelihood rows written together (few row groups, bounded memory)

                def flush():
                    nonlocal like_writer
                    lt = pa.concat_tables(blocks)
                    if like_writer is None:
                        like_writer = AtomicParquetWriter(likelihood_path, likelihood_schema(lt.schema, eta_grid))
                    like_writer.write(lt.cast(like_writer.writer.schema))
                    blocks.clear()
                for a, b, lists, summaries, kind in lk.likelihood_blocks(
                        dists, cols["mu_z"], eta_grid, parts=parts, usable=usable, offsets=offsets):
                    for k, v in summaries.items():
                        cols.setdefault(k, np.full(n_rows, np.nan))[a:b] = v
                    for name, v in kind.items():
                        counts_of = kinds.setdefault(name, Counter())
                        counts_of.update({str(k): int(c) for k, c in zip(*np.unique(v, return_counts=True))})
                    if likelihood_path is not None:
                        blocks.append(pa.table({"galaxy_id": cols["galaxy_id"][a:b]}
                                               | {f"{name}_eta_like": arr for name, arr in lists.items()}
                                               | {f"{name}_eta_like_kind": pa.array(v) for name, v in kind.items()}))
                        if sum(t.nbytes for t in blocks) > LIKELIHOOD_FLUSH_BYTES:
                            flush()
                if blocks:
                    flush()
            if writer is None:
                used = [e for e in ordered_entries(cols, entries)
                        if copy_inputs or e.origin != "catalog" or e.name in IDENTITY_COLUMNS]
                stale = [f"{e.name} ({units[e.name]!r} in the stage file, {e.unit!r} in the dictionary)"
                         for e in used if e.name in units and units[e.name] != e.unit]
                if stale:
                    raise ValueError("units differ between the stage files and the column dictionary: "
                                     + ", ".join(stale))
            names = [e.name for e in used]
            table = table_from_columns({n: cols[n] for n in names})
            if writer is None:
                text_lengths["best_method"] = max(len("+".join(prefixes)), len(crosscheck.NO_METHOD))
                writer = AtomicParquetWriter(out_path, product_schema(table, entries, provenance_info, text_lengths))
            writer.write(table.cast(writer.writer.schema))
            for c in FLAG_COLUMNS:
                if c in cols:
                    for m in F.ALL[c]:
                        flag_counts[c][m.name] += int(F.has(cols[c], m).sum())
            best.update(crosscheck.count_labels(cols["best_method"]))
            pick = rng.uniform(size=table.num_rows) < keep_fraction
            samples.append(table.select([n for n in PLOT_COLUMNS if n in names]).filter(pa.array(pick)))
            rows += table.num_rows
            log.info("%d rows written", rows)
    except BaseException:
        for w in (writer, like_writer):
            if w is not None:
                w.__exit__(RuntimeError, None, None)
        raise
    for w in (writer, like_writer):
        if w is not None:
            w.__exit__(None, None, None)
    write_parquet(pa.concat_tables(samples), sample_path)
    return {"rows": rows,
            "flag_counts": {c: dict(v) for c, v in flag_counts.items() if v or c in ("quality_flags",)},
            "best_method": dict(best), "columns": [e.name for e in used],
            "likelihood_kinds": {name: dict(v) for name, v in kinds.items()}}


def merge_counts(parts: list[dict], entries: dict) -> dict:
    """The counts of every product part added up (``assemble_part``'s), each flag bit named
    (zero where no row has it), and the product's dictionary entries in column order."""
    from .likelihood import KIND_NAMES

    flag_counts = {c: Counter() for c in FLAG_COLUMNS}
    best, kinds = Counter(), {}
    for part in parts:
        for c, v in part["flag_counts"].items():
            flag_counts[c].update(v)
        best.update(part["best_method"])
        for name, v in part["likelihood_kinds"].items():
            kinds.setdefault(name, Counter()).update(v)
    columns = parts[0]["columns"] if parts else []
    return {"rows": sum(p["rows"] for p in parts),
            "flag_counts": {c: {m.name: flag_counts[c].get(m.name, 0) for m in F.ALL[c]}
                            for c in FLAG_COLUMNS if any(c in p["flag_counts"] for p in parts)},
            "best_method": dict(sorted(best.items())), "entries": [entries[n] for n in columns],
            "likelihood_kinds": {name: {KIND_NAMES[int(k)]: int(c) for k, c in sorted(v.items(), key=lambda kv: int(kv[0]))}
                                 for name, v in kinds.items()}}


def join_parts(parts: list, out_path) -> None:
    """The product parts as the one file ``out_path``: a single part is renamed (same file
    system, atomic), several are concatenated (``concatenate``)."""
    import os

    if len(parts) == 1:
        os.replace(parts[0], out_path)
    else:
        concatenate(parts, out_path)


def concatenate(parts: list, out_path, created: str | None = None) -> int:
    """The product parts, in order, as one Parquet file (row group by row group, never a
    whole part in memory); the schema and its metadata are the first part's, with the
    provenance's creation time ``created`` (default: now). Returns the rows written."""
    import pyarrow.parquet as pq

    schema = pq.read_schema(parts[0])
    meta = dict(schema.metadata or {})
    if b"galdist.provenance" in meta:
        info = json.loads(meta[b"galdist.provenance"])
        info["created_utc"] = created or _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
        meta[b"galdist.provenance"] = json.dumps(info, sort_keys=True, default=str).encode()
    schema = schema.with_metadata(meta)
    rows = 0
    with AtomicParquetWriter(out_path, schema) as writer:
        for path in parts:
            pf = pq.ParquetFile(path)
            if not pf.schema_arrow.equals(schema, check_metadata=False):
                raise StaleInputError(f"{path} has other columns than {parts[0]}: the parts of one product "
                                      "must come from one run; delete them and run the same command again")
            for g in range(pf.num_row_groups):
                table = pf.read_row_group(g)
                writer.write(table.replace_schema_metadata(meta))
                rows += table.num_rows
    return rows
