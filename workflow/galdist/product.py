"""The final product: join every stage's shard files, cross-check, write one Parquet.

``assemble`` streams shard by shard (never the whole catalog in memory): it
reads the ingest shard and each stage's narrow file (fingerprints checked),
derives the per-galaxy cross-check columns from the sample statistics computed
beforehand over all shards (``crosscheck.sample_statistics``), and appends the
rows, in input order, to ``distances.parquet``. Units go into field metadata,
provenance into the schema metadata. It also counts every flag bit for the
summary and keeps a small deterministic subsample of rows for the plots.
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
from . import flags as F
from .io import AtomicParquetWriter, iter_shard, table_from_columns, write_parquet
from .methods import REGISTRY

log = logging.getLogger(__name__)

#: config name -> column prefix of every registered method
METHOD_PREFIX = {name: spec.prefix for name, spec in REGISTRY.items()}
FLAG_COLUMNS = tuple(F.ALL)
LEADING = ["galaxy_id", "ra", "dec", "gal_l", "gal_b", "galaxy_class", *FLAG_COLUMNS,
           "z_helio", "z_helio_err", "z_cmb", "z_cmb_err", "mu_z", "mu_z_err", "d_z_mpc",
           "ebv", "ebv_err", "ebv_used", "ebv_used_err"]
TRAILING = ["mu_best", "mu_best_err", "mu_best_err_sys", "best_method"]
CROSSCHECK_UNITS = {"dmu": "mag", "vpec": "km / s", "vpec_err": "km / s", "vpec_lr": "km / s",
                    "vpec_lr_err": "km / s", "logd_ratio": "dex"}
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
PLOT_COLUMNS = ["galaxy_id", "gal_l", "gal_b", "z_cmb", "mu_z", "mu_z_err"] + [
    f"{s.prefix}_{c}" for s in REGISTRY.values() if s.relation_plot for c in (s.relation_plot.x, s.relation_plot.y)
] + [f"{p}_{c}" for p in METHOD_PREFIX.values() for c in ("mu", "mu_err", "flags", "dmu", "vpec")]
PACKAGES = ("galdist", "numpy", "pandas", "pyarrow", "astropy", "scipy", "speclite",
            "dust_extinction", "astropy-healpix", "matplotlib", "snakemake")


def ordered(names: list[str]) -> list[str]:
    """Product column order: identity and flags, redshift, extinction, then the rest
    in stage order, the combined distance last."""
    first = [n for n in LEADING if n in names]
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


def _unit(name: str, units: dict) -> str | None:
    if name in units:
        return units[name]
    for suffix, unit in CROSSCHECK_UNITS.items():
        if name.endswith("_" + suffix):
            return unit
    if name.startswith("mu_best"):
        return "mag"
    return None


def assemble(shards: list[dict], out_path, sample_path, grid, statistics: dict, methods: list[str],
             provenance_info: dict, *, min_cz: float, clip_sigma: float, plot_max_points: int,
             total_rows: int) -> dict:
    """Stream the shards into ``out_path``; returns flag counts and best-method counts.

    ``shards``: one dict per shard, in order, mapping "shard" to the ingest shard
    and each stage name to its narrow file.
    """
    prefixes = [METHOD_PREFIX[m] for m in methods]
    flag_counts = {c: Counter() for c in FLAG_COLUMNS}
    best = Counter()
    rows = 0
    writer = None
    samples = []
    keep_fraction = min(1.0, plot_max_points / max(total_rows, 1))
    try:
        for index, files in enumerate(shards):
            stages = {k: v for k, v in files.items() if k != "shard"}
            rng = np.random.default_rng(index)
            for cols, units in iter_shard(files["shard"], stages):
                cols |= crosscheck.galaxy_columns(cols, grid, statistics, methods=prefixes, min_cz=min_cz,
                                                  clip_sigma=clip_sigma)
                names = ordered(list(cols))
                table = table_from_columns({n: cols[n] for n in names},
                                           {n: u for n in names if (u := _unit(n, units))})
                if writer is None:
                    schema = table.schema.with_metadata({b"galdist.provenance": json.dumps(
                        provenance_info, sort_keys=True, default=str).encode()})
                    writer = AtomicParquetWriter(out_path, schema)
                writer.write(table.cast(writer.writer.schema))
                for c in FLAG_COLUMNS:
                    if c in cols:
                        for m in F.ALL[c]:
                            flag_counts[c][m.name] += int(F.has(cols[c], m).sum())
                best.update(crosscheck.count_labels(cols["best_method"]))
                pick = rng.uniform(size=table.num_rows) < keep_fraction
                samples.append(table.select([n for n in PLOT_COLUMNS if n in names]).filter(pa.array(pick)))
                rows += table.num_rows
                log.info("shard %d/%d: %d of %d rows written", index + 1, len(shards), rows, total_rows)
    except BaseException:
        if writer is not None:
            writer.__exit__(RuntimeError, None, None)
        raise
    writer.__exit__(None, None, None)
    write_parquet(pa.concat_tables(samples), sample_path)
    return {"rows": rows,
            "flag_counts": {c: {m.name: flag_counts[c].get(m.name, 0) for m in F.ALL[c]}
                            for c in FLAG_COLUMNS if flag_counts[c] or c in ("quality_flags",)},
            "best_method": dict(sorted(best.items()))}
