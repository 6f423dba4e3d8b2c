"""Settings of a distance method: its config section as a frozen, validated object.

``method_settings("tully_fisher", ...)`` makes a frozen dataclass whose fields are the
keys of the ``tully_fisher:`` section of ``workflow/schemas/config.schema.yaml`` (less
the ``WORKFLOW_KEYS``, which the workflow reads, not the distance function), with the
schema's defaults, checked against the schema's rules whenever one is made: there is no
second list of defaults or allowed values anywhere. Settings the workflow derives from
other configuration (the photometric system of the band, say) are extra fields declared
with their own small schema.
"""

from __future__ import annotations

import copy
import dataclasses
from collections.abc import Iterable, Mapping

import jsonschema

from . import schema


#: Keys of a method's config section that the workflow reads (which calibration, which
#: bands, how many rows get a Monte Carlo, whether a passband mismatch is accepted).
WORKFLOW_KEYS = ("calibration", "band", "color_bands", "mc_max_rows", "accept_passband_mismatch")


class MethodSettings:
    """Base of the generated settings classes (see ``method_settings``)."""

    SECTION = ""  # the config section: also the prefix of every message
    DERIVED: dict = {}  # derived field -> its JSON schema

    def __post_init__(self):
        values = dataclasses.asdict(self)
        config = {k: v for k, v in values.items() if k not in self.DERIVED}
        problems = [schema.explain(e, f"{self.SECTION}.") for e in _validator(self.SECTION).iter_errors(config)
                    if e.validator != "required"]
        problems += [f"config key '{self.SECTION}.{key}': {value} is not a finite number"
                     for key, value in schema.non_finite(values)]
        for name, rule in self.DERIVED.items():
            problems += [f"{self.SECTION} {name} (derived from the bands config): {e.message}"
                         for e in jsonschema.Draft202012Validator(rule).iter_errors(values[name])]
        if problems:
            raise ValueError("; ".join(sorted(problems)))

    @classmethod
    def from_config(cls, section: Mapping | None, *, ignore: Iterable[str] = (), **derived):
        """Settings from the config section (the ``WORKFLOW_KEYS`` and those in ``ignore``
        skipped, any other key the schema lacks refused by name), plus the ``derived``
        fields."""
        skip = set(ignore) | set(WORKFLOW_KEYS)
        values = {k: v for k, v in dict(section or {}).items() if k not in skip}
        unknown = sorted(set(values) - set(cls.config_keys()))
        if unknown:
            raise ValueError(f"unknown config key(s) {', '.join(map(repr, unknown))} in '{cls.SECTION}'; "
                             f"allowed: {', '.join(cls.config_keys())}")
        return cls(**values, **derived)

    @classmethod
    def config_keys(cls) -> list[str]:
        return [f.name for f in dataclasses.fields(cls) if f.name not in cls.DERIVED]


_VALIDATORS: dict = {}


def _field(default):
    if isinstance(default, (list, dict)):  # a fresh copy for every instance
        return dataclasses.field(default_factory=lambda: copy.deepcopy(default))
    return dataclasses.field(default=default)


def _validator(name: str):
    if name not in _VALIDATORS:
        _VALIDATORS[name] = jsonschema.Draft202012Validator(schema.section(name))
    return _VALIDATORS[name]


def method_settings(section: str, derived: Mapping[str, tuple[dict, object]] | None = None) -> type:
    """A frozen settings dataclass for config ``section``: one field per schema key with
    the schema's default, then the ``derived`` fields (name -> (JSON schema, default))."""
    derived = dict(derived or {})
    own = {k: v for k, v in schema.defaults(section).items() if k not in WORKFLOW_KEYS}
    defaults = own | {name: default for name, (_, default) in derived.items()}
    fields = [(key, object, _field(value)) for key, value in defaults.items()]
    namespace = {"SECTION": section, "DERIVED": {name: rule for name, (rule, _) in derived.items()}}
    return dataclasses.make_dataclass(f"{section}_settings", fields, bases=(MethodSettings,), frozen=True,
                                      namespace=namespace)
