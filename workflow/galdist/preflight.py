"""Every check that can run before a job: configuration, files, calibrations against
the configured passbands, method settings, catalog structure and whole-column sanity.

The workflow's start-up (``workflow/rules/common.smk``) and ``galdist check`` call
the same ``check``; a run never starts on a configuration it would choke on, or
that would give silently biased numbers.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from . import config as gconfig
from .errors import CalibrationError, CatalogError, ConfigError, IngestError

STRUCTURAL = (ConfigError, IngestError, CatalogError, CalibrationError)


@dataclass(frozen=True)
class Finding:
    """One result of a check: ``level`` is 'error' (the run cannot start), 'warning'
    (it starts; the user should know) or 'ok' (what the check made sure of)."""

    level: str
    check: str
    message: str


@dataclass
class Preflight:
    """The resolved configuration and what the checks found."""

    config: dict
    findings: list[Finding]
    calibrations: dict
    plan: object | None = None

    @property
    def errors(self) -> list[Finding]:
        return [f for f in self.findings if f.level == "error"]

    def raise_on_error(self) -> None:
        if self.errors:
            raise ConfigError("\n".join(f"[{f.check}] {f.message}" for f in self.errors))


def resolve(user: dict) -> dict:
    """The user's config laid over the workflow's defaults (not yet validated)."""
    return gconfig.layered(user, gconfig.load(gconfig.DEFAULT_CONFIG))


def check(user: dict, buildable: frozenset = frozenset(), sample_rows: bool = True,
          remember: bool = False) -> Preflight:
    """Run every check in order; a failed check stops the ones that depend on it.

    ``buildable``: catalog paths the workflow itself makes (the demo): not required
    to exist yet. ``sample_rows``: read the first rows of each file for the
    whole-column unit checks. ``remember``: the filter checks remember their answers in
    the output folder's grid cache (``cache_dir``; False: check every time).
    """
    result = Preflight(resolve(user), [], {})
    cfg = result.config

    def step(name, fn):
        try:
            out = fn()
        except STRUCTURAL as exc:
            result.findings.extend(Finding("error", name, line) for line in _lines(str(exc)))
            return False, None
        warnings = out.pop("warnings", []) if isinstance(out, dict) else []
        result.findings.extend(Finding("warning", name, w) for w in warnings)
        result.findings.append(Finding("ok", name, _DONE[name]))
        return True, out

    ok, _ = step("config", lambda: gconfig.validate(cfg))
    if not ok:
        return result
    ok_files, spec = step("catalog files", lambda: _catalog_files(cfg, buildable))
    ok_bands, _ = step("bands", lambda: gconfig.check_bands(cfg, cache_dir(cfg) if remember else None))
    ok_cal, cals = step("calibrations and stages", lambda: gconfig.check_stages(cfg))
    result.calibrations = cals or {}
    if ok_cal and ok_bands:
        step("passbands and systems", lambda: _passbands(cfg, result.calibrations))
        step("method settings", lambda: _method_settings(cfg, result.calibrations))
    if cfg["calibrate"]["catalog"]:
        from . import calibrate
        step("calibration sample", lambda: calibrate.check(cfg, buildable))
    if ok_files and all(Path(p).exists() for p in spec[0]):
        from . import ingest
        ok_plan, result.plan = step("catalog structure", lambda: ingest.plan(
            spec[0], spec[1], cfg["columns"], cfg["units"], list(cfg["bands"]), list(cfg["methods"]),
            gconfig.extra_required_columns(cfg), cfg["keep_columns"]))
        if ok_plan and sample_rows:
            step("rows", lambda: _has_rows(result.plan))
            step("column values", lambda: _column_sanity(result.plan, cfg["units"]))
    return result


def cache_dir(config: dict) -> Path:
    """The output folder's grid cache (``galdist.grid_cache``)."""
    from .grid_cache import CACHE_FOLDER

    return Path(config["output_dir"]) / CACHE_FOLDER


_DONE = {
    "config": "keys and types match the schema",
    "catalog files": "every catalog file exists and is a regular file",
    "bands": "every band's filter curve loads",
    "calibrations and stages": "calibrations load and fit the configured bands and settings",
    "passbands and systems": "each calibration's band, colour bands and system fit the configured bands",
    "method settings": "every setting the enabled methods need is present and valid",
    "calibration sample": "the calibrate target's sample, method, form and selection are usable",
    "catalog structure": "every catalog file has the needed columns with usable types and units",
    "rows": "the catalog holds rows",
    "column values": "a sample of rows has redshifts, coordinates, widths and axis ratios in the declared units",
}


def _catalog_files(cfg, buildable):
    paths, fmt = gconfig.catalog_spec(cfg)
    gconfig.check_inputs_exist(paths, buildable=set(buildable))
    return paths, fmt


def _lines(text: str) -> list[str]:
    """A multi-problem message as one line per problem."""
    parts = [p.strip() for p in text.split("\n  - ")]
    head, rest = parts[0], parts[1:]
    if rest and head.endswith(":"):
        return rest
    return [text.strip()]


def _passbands(cfg, cals) -> dict:
    from . import passbands

    problems, warnings = [], []
    for method, cal in cals.items():
        section = cfg[method]
        found = passbands.mismatches(method, cal, section, cfg["bands"])
        if found and section.get("accept_passband_mismatch"):
            warnings += [f"accepted by {method}.accept_passband_mismatch (distances flagged PASSBAND_OVERRIDE): "
                         + m for m in found]
        else:
            problems += found
        problems += passbands.system_problems(method, cal, section, cfg["bands"])
    for label in cfg["kcorr"]["colour_pair"] or []:
        band = cfg["bands"].get(label)
        if band and band["system"] == "Vega" and band.get("ab_minus_vega") is None:
            problems.append(f"config key 'bands.{label}.ab_minus_vega': band {label} (Vega) is in "
                            "kcorr.colour_pair and the templates' colours are AB; give m_AB - m_Vega")
    if problems:
        raise ConfigError("passbands:\n  - " + "\n  - ".join(problems))
    return {"warnings": warnings}


def _method_settings(cfg, cals) -> None:
    """The settings each method will require, checked now rather than inside a job
    (each registry entry's ``check``)."""
    from .methods import REGISTRY

    problems = []
    for method, cal in cals.items():
        try:
            REGISTRY[method].check(cfg, cal)
        except ValueError as exc:
            problems.append(f"{method}: {exc}")
    if problems:
        raise ConfigError("method settings:\n  - " + "\n  - ".join(problems))


def _has_rows(plan) -> None:
    """A catalog without a single row stops here: galdist's choice, since an empty
    product is far more often a wrong path or filter than an intended result."""
    from .catalog import iter_batches

    needed = sorted(set(plan.source_of.values()))[:1]
    for source in plan.files:
        if any(len(next(iter(batch.values()))) for batch in iter_batches(source.path, plan.fmt, needed, 1024)):
            return
    raise ConfigError("config key 'catalog': the catalog holds no rows (" + ", ".join(plan.paths)
                      + "); check the path, or the export that wrote it")


#: canonical column -> (test of a bad value in the canonical unit, what it looks like, the fix)
_SANITY = {
    "z_helio": (lambda v: v > 1, "a velocity in km/s, not a redshift", "set units: {z_helio: km/s}"),
    "ra": (None, "", ""),  # special-cased below: radians or hours
    "w50": (lambda v: v > 2000, "m/s, not km/s", "set units: {w50: m/s} (and w50_err)"),
    "axis_ratio": (lambda v: v > 1, "a/b or per cent, not b/a in (0, 1]",
                   "give b/a (invert an a/b column), or set units: {axis_ratio: percent}"),
}
SANITY_ROWS = 10_000


def _column_sanity(plan, declared_units: dict) -> None:
    """Whole-column unit mistakes, from the first rows of every catalog file.

    Half or more of a sample outside the canonical range means the column is in
    another unit, not that the galaxies are odd. A unit declared in config
    ``units`` is taken as the user's word and not second-guessed.
    """
    import numpy as np

    from .catalog import iter_batches
    from .ingest import canonical_batch

    problems = []
    needed = sorted(set(plan.source_of.values()))
    for source in plan.files:  # every file (of a Parquet directory too), in its own units
        path = source.path
        raw = next(iter(iter_batches(path, plan.fmt, needed, SANITY_ROWS)), None)
        if raw is None:
            continue
        cols = canonical_batch(raw, plan, 0, source)
        for name, (bad, looks, fix) in _SANITY.items():
            if name not in plan.source_of or name in declared_units:
                continue
            v = cols[name][np.isfinite(cols[name])]
            if v.size == 0:
                continue
            src = f"column '{plan.source_of[name]}' ({name}) in {path}"
            if name == "ra":
                dec = cols["dec"][np.isfinite(cols["dec"])]
                if v.size >= 10 and v.max() <= 2 * np.pi and (dec.size == 0 or np.abs(dec).max() <= np.pi / 2):
                    problems.append(f"{src}: every RA and Dec of the first {v.size} rows is within "
                                    "2 pi and pi/2: looks like radians; set units: {ra: rad, dec: rad} "
                                    "(or units: {ra: deg} if degrees are right)")
                elif v.size >= 10 and v.max() <= 24 and dec.size and np.abs(dec).max() > 24:
                    problems.append(f"{src}: RA stays within 0-24 while |Dec| reaches "
                                    f"{np.abs(dec).max():.0f} deg: looks like hours; set units: "
                                    "{ra: hourangle} (or units: {ra: deg} if degrees are right)")
                continue
            frac = float(np.mean(bad(v)))
            if frac >= 0.5:
                problems.append(f"{src}: {frac:.0%} of the first {v.size} values (median {np.median(v):.4g}) "
                                f"are outside the canonical range: looks like {looks}; {fix}")
    if problems:
        raise ConfigError("column values:\n  - " + "\n  - ".join(problems))
