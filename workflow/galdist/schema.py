"""The JSON schemas of configuration and calibration files, loaded in one place.

A neutral module: ``config`` (configuration) and ``calibration`` (calibration files)
both read their schema and their YAML guards (``check_size``, ``non_finite``) from
here, so neither imports the other to validate. The lists of distance methods and
calibration forms are not written in the schema files: they come from the method
registry (``galdist.methods``) when a schema is loaded, so a new method is known
everywhere once it is registered.
"""

from __future__ import annotations

import copy
import functools
import math
from pathlib import Path

import yaml

from .errors import ConfigError

SCHEMA_DIR = Path(__file__).resolve().parent.parent / "schemas"
CONFIG_SCHEMA = SCHEMA_DIR / "config.schema.yaml"
CALIBRATION_SCHEMA = SCHEMA_DIR / "calibration.schema.yaml"

#: More values than any real configuration or calibration holds: a YAML file whose
#: aliases expand past this (the "billion laughs" pattern) is refused unread.
MAX_VALUES = 100_000


#: yaml's C implementation of the safe loader where it is built (the same safe subset as
#: yaml.safe_load, 8x faster: every method job parses the config schema at start-up)
_SAFE_LOADER = getattr(yaml, "CSafeLoader", yaml.SafeLoader)


@functools.cache
def _read(path: Path) -> dict:
    loader = _SAFE_LOADER(path.read_text(encoding="utf-8"))
    try:
        return loader.get_single_data()
    finally:
        loader.dispose()


@functools.cache
def config_schema() -> dict:
    """The configuration schema, with the registered methods as the ``methods`` enum
    (shared: do not modify it)."""
    from .methods import REGISTRY

    schema = copy.deepcopy(_read(CONFIG_SCHEMA))
    schema["properties"]["methods"]["items"]["enum"] = list(REGISTRY)
    schema["properties"]["zero_point"]["properties"]["reference"]["enum"] = ["auto", *REGISTRY]
    return schema


@functools.cache
def calibration_schema() -> dict:
    """The calibration schema, with the registered methods and their forms as enums."""
    from .methods import REGISTRY

    schema = copy.deepcopy(_read(CALIBRATION_SCHEMA))
    schema["properties"]["method"]["enum"] = list(REGISTRY)
    schema["properties"]["form"]["enum"] = list(dict.fromkeys(f for s in REGISTRY.values() for f in s.forms))
    schema["allOf"] = [{"if": {"properties": {"method": {"const": name}}, "required": ["method"]},
                        "then": {"properties": keys}}
                       for name, keys in method_calibration_keys().items() if name in REGISTRY]
    return schema


def method_calibration_keys() -> dict[str, dict]:
    """method -> {key: schema} of the calibration keys that only that method has."""
    return _read(CALIBRATION_SCHEMA).get("$defs", {}).get("method_keys") or {}


def section(name: str) -> dict:
    """The schema of one top-level configuration section (e.g. ``tully_fisher``)."""
    try:
        return _read(CONFIG_SCHEMA)["properties"][name]
    except KeyError:
        raise KeyError(f"the config schema has no section '{name}'") from None


def defaults(name: str) -> dict:
    """Every key of section ``name`` with its schema default (None where it has none)."""
    return {k: copy.deepcopy(v.get("default")) for k, v in section(name)["properties"].items()}


def key_of(error) -> str:
    """The dotted config key a jsonschema error is about."""
    return ".".join(str(p) for p in error.absolute_path) or "(top level)"


def explain(error, prefix: str = "") -> str:
    """One line naming the key (``prefix`` + the error's path), what is wrong and what
    is allowed."""
    key = prefix + key_of(error) if error.absolute_path or not prefix else prefix.rstrip(".")
    schema = error.schema
    if error.validator == "additionalProperties":
        allowed = sorted(schema.get("properties", {}))
        extra = sorted(set(error.instance) - set(allowed))
        where = f"in '{key}'" if key != "(top level)" else "at the top level"
        hint = f"; allowed keys: {', '.join(allowed)}" if allowed else ""
        dotted = [e if key == "(top level)" else f"{key}.{e}" for e in extra]
        moved = "".join(MOVED[d] for d in dotted if d in MOVED)
        return f"unknown config key {', '.join(repr(e) for e in extra)} {where}{hint}{moved}"
    if error.validator == "required":
        return f"config key '{key}' is missing a required entry: {error.message}"
    if error.validator == "oneOf":
        # explain the alternative whose type fits the value, if there is one
        kinds = {dict: "object", list: "array", str: "string"}
        kind = kinds.get(type(error.instance))
        for sub in error.context or []:
            if error.schema["oneOf"][sub.relative_schema_path[0]].get("type") == kind and sub.validator != "type":
                return explain(sub, prefix)
        if key == "catalog":
            return ("config key 'catalog': give a path, a list of paths, or "
                    "{paths: [...], format: auto|parquet|fits|csv|ecsv|votable}")
    message = f"{error.instance!r} is not allowed" if error.validator == "not" else error.message
    desc = schema.get("description")
    tail = f" ({desc.strip()})" if desc and len(desc) < 200 else ""
    return f"config key '{key}': {message}{tail}"


#: keys that moved, with where they live now (named in the message for the old key)
MOVED = {"crosscheck.min_cz_kms": " (crosscheck.min_cz_kms is now redshift.min_cz_kms: one minimum cz for "
                                  "the LOCAL_FLOW flag and the statistics)"}


def check_size(data, what: str, limit: int = MAX_VALUES) -> None:
    """Refuse ``data`` whose values, with YAML aliases expanded, number more than ``limit``.

    Counted with each shared (aliased) node's size computed once, so the count of a
    maliciously nested file costs as little as the file itself.
    """
    sizes: dict[int, int] = {}

    def size(node) -> int:
        if not isinstance(node, (dict, list)):
            return 1
        if id(node) not in sizes:
            sizes[id(node)] = 0  # a self-referencing node counts once (YAML allows it)
            children = node.values() if isinstance(node, dict) else node
            sizes[id(node)] = 1 + sum(min(size(c), limit + 1) for c in children)
        return sizes[id(node)]

    n = size(data)
    if n > limit:
        raise ConfigError(f"{what}: YAML aliases expand to more than {limit} values; write the values out "
                          "plainly (anchors and aliases that multiply are refused)")


def non_finite(data, path: str = ""):
    """(dotted key, value) of every NaN or infinite number in nested dicts and lists."""
    if isinstance(data, float) and not math.isfinite(data):
        yield path or "(top level)", data
    elif isinstance(data, dict):
        for k, v in data.items():
            yield from non_finite(v, f"{path}.{k}" if path else str(k))
    elif isinstance(data, list):
        for i, v in enumerate(data):
            yield from non_finite(v, f"{path}.{i}" if path else str(i))
