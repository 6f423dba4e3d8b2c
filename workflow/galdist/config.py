"""Configuration: validated against ``workflow/schemas/config.schema.yaml`` with
defaults filled in, before any job runs. Every problem names the key and what is
allowed, so a run never starts on a configuration it would choke on later.
"""

from __future__ import annotations

import copy
from pathlib import Path

import jsonschema
import yaml

from . import shipped
from .errors import ConfigError
from .schema import check_size, config_schema, explain, key_of, non_finite

#: The workflow's default configuration (the demo run); a user's config is laid over it.
DEFAULT_CONFIG = shipped.WORKFLOW_ROOT / "config" / "config.yaml"
#: Keys whose value in a user's config replaces the default whole instead of being
#: merged into it: a catalog with only g and i must not inherit the default V, I, Ks.
REPLACED_KEYS = ("bands", "columns", "units", "catalog", "extinction.table_keys")


def layered(user: dict, defaults: dict, _prefix: str = "") -> dict:
    """``user`` laid over ``defaults``: sections merge key by key, except
    ``REPLACED_KEYS`` and non-mapping values, which the user's value replaces."""
    out = copy.deepcopy(defaults)
    for key, value in user.items():
        dotted = f"{_prefix}{key}"
        if isinstance(value, dict) and isinstance(out.get(key), dict) and dotted not in REPLACED_KEYS:
            out[key] = layered(value, out[key], f"{dotted}.")
        else:
            out[key] = copy.deepcopy(value)
    return out


def _with_defaults(validator_class):
    """A validator that fills in ``default`` values while it validates."""
    validate_properties = validator_class.VALIDATORS["properties"]

    def set_defaults(validator, properties, instance, schema):
        if isinstance(instance, dict):
            for name, sub in properties.items():
                if "default" in sub and name not in instance:
                    instance[name] = copy.deepcopy(sub["default"])
        yield from validate_properties(validator, properties, instance, schema)

    return jsonschema.validators.extend(validator_class, {"properties": set_defaults})


_Validator = _with_defaults(jsonschema.Draft202012Validator)


def _coerce(instance, schema):
    """Turn command-line strings into the number or boolean the schema expects.

    ``--config 'demo={n_galaxies: 600}'`` reaches the workflow with '600' as a
    string; a value that does not parse is left for the validator to report.
    """
    if isinstance(instance, dict):
        props = schema.get("properties", {})
        extra = schema.get("additionalProperties")
        for k, v in instance.items():
            sub = props.get(k, extra if isinstance(extra, dict) else None)
            if sub is not None:
                instance[k] = _coerce(v, sub)
        return instance
    if isinstance(instance, list) and isinstance(schema.get("items"), dict):
        return [_coerce(v, schema["items"]) for v in instance]
    if isinstance(instance, str):
        kinds = schema.get("type")
        kinds = set(kinds) if isinstance(kinds, list) else {kinds}
        if "null" in kinds and instance.lower() in ("null", "none", "~"):
            return None
        for kind, convert in (("integer", int), ("number", float)):
            if kind in kinds:
                try:
                    return convert(instance)
                except ValueError:
                    pass
        if "boolean" in kinds and instance.lower() in ("true", "false"):
            return instance.lower() == "true"
    return instance


#: Top-level config keys renamed: the old name gets a message naming the new one.
RENAMED_KEYS = {"kcorrect": "kcorr"}


def validate(config: dict) -> dict:
    """Validate ``config`` in place (filling defaults) and return it.

    Raises ConfigError with every problem found, one per line.
    """
    check_size(config, "configuration")
    renamed = sorted(set(config) & set(RENAMED_KEYS))
    if renamed:
        raise ConfigError("invalid configuration:\n  - " + "\n  - ".join(
            f"config key '{old}' is now '{RENAMED_KEYS[old]}': rename the section (the old name was a widely "
            "used program's name; galdist 0.2 renamed it)" for old in renamed))
    schema = config_schema()
    _coerce(config, schema)
    errors = sorted(_Validator(schema).iter_errors(config), key=lambda e: (key_of(e), e.validator))
    # NaN passes every minimum/maximum test of the schema (all comparisons are false)
    lines = {explain(e) for e in errors} | {
        f"config key '{key}': {value} is not a finite number (use a finite value)"
        for key, value in non_finite(config)}
    if lines:
        raise ConfigError("invalid configuration:\n  - " + "\n  - ".join(sorted(lines)))
    return config


def catalog_spec(config: dict) -> tuple[list[str], str]:
    """The catalog's paths and format, whichever shape the config gave."""
    cat = config["catalog"]
    if isinstance(cat, str):
        return [cat], "auto"
    if isinstance(cat, list):
        return list(cat), "auto"
    paths = cat["paths"]
    return ([paths] if isinstance(paths, str) else list(paths)), cat.get("format", "auto")


#: config product_layout auto: one product file up to this size of the catalog's files
SINGLE_FILE_MAX_CATALOG_BYTES = 1 << 30


def product_layout(config: dict) -> str:
    """"file" (one distances.parquet) or "parts" (a distances/ folder of per-shard parts):
    config ``product_layout``, where ``auto`` decides by the catalog's size on disk (a
    catalog the workflow builds itself, not there yet, counts as small)."""
    layout = config.get("product_layout", "auto")
    if layout != "auto":
        return layout

    def size(path: Path) -> int:
        if path.is_file():
            return path.stat().st_size
        return sum(p.stat().st_size for p in path.rglob("*") if p.is_file()) if path.is_dir() else 0

    total = sum(size(Path(p)) for p in catalog_spec(config)[0])
    return "parts" if total > SINGLE_FILE_MAX_CATALOG_BYTES else "file"


def check_inputs_exist(paths: list[str], buildable: set[str] = frozenset()) -> None:
    """Every catalog path must exist (or be one the workflow itself builds)."""
    missing = [p for p in paths if p not in buildable and not Path(p).exists()]
    if missing:
        raise ConfigError(
            "config key 'catalog': input file not found: " + ", ".join(missing)
            + " (paths are relative to the directory galdist runs in; "
              "no catalog is ever downloaded)")
    odd = [p for p in paths if Path(p).exists() and not (Path(p).is_file() or Path(p).is_dir())]
    if odd:
        raise ConfigError("config key 'catalog': not a regular file or a folder: " + ", ".join(odd)
                          + " (a pipe, device or socket cannot be a catalog)")


def check_bands(config: dict, cache_dir: str | Path | None = None) -> None:
    """Every band's filter must be loadable (speclite name or an existing file).

    ``cache_dir``: remember each answer there (``galdist.grid_cache.remembered``: keyed by
    the name, the file's content, galdist's code and speclite's version), so a start with
    the same filters need not import speclite."""
    from . import grid_cache

    problems = []
    for label, band in config["bands"].items():
        spec = Path(band["filter"])
        if spec.exists() and not spec.is_file():
            problems.append(f"config key 'bands.{label}.filter': {spec} is not a regular file")
            continue
        error = grid_cache.remembered(cache_dir, "filter_check",
                                      {"filter": band["filter"], "file": grid_cache.file_digest(spec)},
                                      lambda name=band["filter"]: _filter_error(name))
        if error:
            problems.append(f"config key 'bands.{label}.filter': {error}")
    if problems:
        raise ConfigError("invalid configuration:\n  - " + "\n  - ".join(problems))


def _filter_error(name: str) -> str | None:
    """Why the filter ``name`` (speclite name or file) does not load, or None."""
    from .filters import FilterError, load_filter

    try:
        load_filter(name)
    except FilterError as exc:
        return str(exc)
    return None


def load(path: str | Path) -> dict:
    """Read a config file with safe YAML (a regular file, its aliases bounded)."""
    if Path(path).exists() and not Path(path).is_file():
        raise ConfigError(f"config file {path} is not a regular file")
    try:
        data = yaml.safe_load(Path(path).read_text(encoding="utf-8"))
    except yaml.YAMLError as exc:
        raise ConfigError(f"config file {path} is not valid YAML: {exc}") from exc
    except UnicodeDecodeError as exc:
        raise ConfigError(f"config file {path} is not UTF-8 text ({exc})") from exc
    except OSError as exc:
        raise ConfigError(f"config file {path} cannot be read ({exc.strerror})") from exc
    if not isinstance(data, dict):
        raise ConfigError(f"config file {path} must hold a mapping of keys")
    check_size(data, f"config file {path}")
    return data


def extra_required_columns(config: dict) -> dict[str, str]:
    """Optional and band columns that the configured stages make required: column -> why.

    A band's magnitudes are needed where a stage reads them (a method's registry entry
    says which of its bands it reads from the catalog, e.g. the Tully-Fisher band; the
    K-correction colour); a band used only as a filter curve (the SBF band and colour
    bands, bands no stage uses) needs no magnitude column.
    """
    from .methods import REGISTRY

    extra = {}
    if config["extinction"]["source"] == "catalog":
        extra["ebv"] = "extinction.source is catalog; or use a map (extinction.source healpix or zea)"
    users = {}
    for method in config["methods"]:
        for column, key in REGISTRY[method].catalog_band_columns(config[method]).items():
            if not column.endswith("_err"):
                users.setdefault(column.removeprefix("mag_"), []).append(key)
    for label in config["kcorr"]["colour_pair"] or []:
        users.setdefault(label, []).append("kcorr.colour_pair")
    for label, keys in users.items():
        for name in (f"mag_{label}", f"mag_{label}_err"):
            extra[name] = f"band {label} is named in config {' and '.join(keys)}"
    return extra


def extinction_table_file(config: dict) -> Path:
    """The coefficient table: a shipped one by bare name, else the user's path."""
    return shipped.find("extinction", config["extinction"]["table"])


def extinction_map_files(config: dict) -> list[str]:
    ext = config["extinction"]
    return {"catalog": [], "healpix": [ext["map_file"]],
            "zea": [ext["map_north"], ext["map_south"]]}[ext["source"]]


def _stage_settings(config: dict) -> list[str]:
    """Settings the stages would refuse inside a job, checked now. The slow-to-import
    checks (extinction law, named cosmology, template library) run only where the
    setting differs from the schema default, which is valid by construction."""
    from . import extinction, kcorr
    from .columns import Z_HELIO_RANGE

    problems = []
    ext, kc, cosmo = config["extinction"], config["kcorr"], config["redshift"]["cosmology"]

    def attempt(fn, *args):
        try:
            fn(*args)
        except (ValueError, FileNotFoundError) as exc:
            problems.append(f"config: {exc}")

    attempt(kcorr.grid_redshifts, Z_HELIO_RANGE[0], kc["z_max"], kc["dz"])
    if ext["coefficients"] == "law" and ext["r_v"] != 3.1:
        attempt(extinction.extinction_law, ext["law"], ext["r_v"])
    if ext["coefficients"] == "table" and set(config["bands"]) <= set(ext["table_keys"]):
        attempt(lambda: extinction.table_coefficients(extinction_table_file(config),
                                                      {b: ext["table_keys"][b] for b in config["bands"]}))
    if cosmo["name"] is not None:
        from .redshift import make_cosmology
        attempt(make_cosmology, cosmo["name"], cosmo["H0"], cosmo["Om0"])
    if kc["templates"] is not None or kc["default_template"] != "exp_tau5gyr":
        if kc["templates"] is None or Path(kc["templates"]).is_file():
            attempt(lambda: kcorr.load_templates(kc["templates"]).index(kc["default_template"]))
    return problems


def check_stages(config: dict) -> dict:
    """Cross-key checks the schema cannot express; returns the loaded calibrations by method.

    Band labels used by stages must be configured bands; map and table files must
    exist; calibration files must validate and belong to their method.
    """
    from .calibration import load_calibration
    from .methods import REGISTRY

    bands = set(config["bands"])
    problems = []

    def need_band(key, label):
        if label not in bands:
            problems.append(f"config key '{key}': '{label}' is not a configured band "
                            f"(bands: {', '.join(sorted(bands))})")

    lk = config.get("likelihoods", {})
    if lk and not lk.get("eta_max", 0.5) > lk.get("eta_min", -0.5):
        problems.append(f"config keys 'likelihoods.eta_min' and 'likelihoods.eta_max': the grid needs eta_min < "
                        f"eta_max (got {lk.get('eta_min')} and {lk.get('eta_max')})")
    elif lk and (lk.get("eta_max", 0.5) - lk.get("eta_min", -0.5)) / lk.get("eta_step", 0.005) > 10_000:
        problems.append("config key 'likelihoods.eta_step': more than 10000 grid points per galaxy and method; "
                        "take a larger step or a narrower range")
    reference = config.get("zero_point", {}).get("reference", "auto")
    if reference != "auto" and reference not in config["methods"]:
        problems.append(f"config key 'zero_point.reference': '{reference}' is not a configured method "
                        f"(methods: {', '.join(config['methods'])}); name one of them or 'auto'")
    ext = config["extinction"]
    if ext["source"] == "healpix" and not ext["map_file"]:
        problems.append("config key 'extinction.map_file': needed when extinction.source is healpix")
    if ext["source"] == "zea" and not (ext["map_north"] and ext["map_south"]):
        problems.append("config keys 'extinction.map_north' and 'extinction.map_south': needed when "
                        "extinction.source is zea")
    for f in extinction_map_files(config):
        if f and not Path(f).exists():
            problems.append(f"config key 'extinction': map file not found: {f} (galdist never downloads maps; "
                            "see the README on pointing at your own map)")
        elif f and not Path(f).is_file():
            problems.append(f"config key 'extinction': map {f} is not a regular file")
    if ext["coefficients"] == "table":
        try:
            if not extinction_table_file(config).is_file():
                problems.append(f"config key 'extinction.table': no regular file at {ext['table']}")
        except FileNotFoundError as exc:
            problems.append(f"config key 'extinction.table': {exc}")
        missing = sorted(bands - set(ext["table_keys"]))
        if missing:
            problems.append(f"config key 'extinction.table_keys': give the table key of band(s) "
                            f"{', '.join(missing)} (e.g. {{V: landolt-V}})")
    problems += _stage_settings(config)
    kc = config["kcorr"]
    for label in kc["colour_pair"] or []:
        need_band("kcorr.colour_pair", label)
    if kc["templates"] and not Path(kc["templates"]).is_file():
        problems.append(f"config key 'kcorr.templates': no regular file at {kc['templates']}")

    calibrations = {}
    for method in config["methods"]:
        section = config[method]
        try:
            path = shipped.find("calibrations", section["calibration"])
        except FileNotFoundError as exc:
            problems.append(f"config key '{method}.calibration': {exc}")
            continue
        if not path.is_file():
            what = "is not a regular file" if path.exists() else "file not found"
            problems.append(f"config key '{method}.calibration': {what}: {path} (a path is relative "
                            "to the directory galdist runs in; a bare name is a shipped calibration)")
            continue
        cal = load_calibration(path)
        if cal.method != method:
            problems.append(f"config key '{method}.calibration': {path} is a {cal.method} calibration")
        calibrations[method] = cal
        for key in REGISTRY[method].band_keys():
            for label in section[key] if isinstance(section[key], list) else [section[key]]:
                need_band(f"{method}.{key}", label)
    if problems:
        raise ConfigError("invalid configuration:\n  - " + "\n  - ".join(problems))
    return calibrations
