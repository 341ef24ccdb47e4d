"""Configuration sections: the :class:`Config` object and the key checks every section shares.

A section's owner exports its schema: fixed keys as ``{key: (type or tuple of types,
default)}``, or a validator for a free-form table (sources, sinks, experiments).
:mod:`monitor.settings` composes the owners' schemas, checks a file against them and hands
out a :class:`Config` that carries the composed schema, so ``cfg.section(name)`` fills the
defaults. Nothing registers itself on import.

>>> cfg = Config({"estimator": {"forgetting": 0.98}}, schema={"estimator": {
...     "forgetting": ((int, float), 0.99), "level": ((int, float), 0.95)}})
>>> cfg.section("estimator")
{'forgetting': 0.98, 'level': 0.95}
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping

from monitor.errors import ConfigError


#: one section's fixed keys: key -> (type or tuple of types, default)
Keys = Mapping[str, tuple[Any, Any]]
#: a free-form section's validator (raises ConfigError naming the key)
Validator = Callable[[Any], None]


def check_value(section: str, key: str, value: Any, types: Any) -> Any:
    """``value`` if it has the key's type (a number becomes float), else ConfigError naming
    ``[section] key``, the value and the rule."""
    if types == (int, float):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"[{section}] {key} = {value!r}: must be a number")
        return float(value)
    if types is list and not isinstance(value, list):
        raise ConfigError(f"[{section}] {key} = {value!r}: must be a list")
    if types is bool and not isinstance(value, bool):
        raise ConfigError(f"[{section}] {key} = {value!r}: must be true or false")
    if types is str and not isinstance(value, str):
        raise ConfigError(f"[{section}] {key} = {value!r}: must be a string")
    if types is int and (isinstance(value, bool) or not isinstance(value, int)):
        raise ConfigError(f"[{section}] {key} = {value!r}: must be a whole number")
    return value


def defaults(keys: Keys) -> dict:
    """The defaults of a section's fixed keys (lists copied)."""
    return {k: (list(d) if isinstance(d, list) else d) for k, (_, d) in keys.items()}


@dataclass
class Config:
    """A checked configuration: ``cfg.section('estimator')`` gives the keys with defaults filled
    from ``schema`` (section -> fixed keys); a section without fixed keys is returned as given.

    A Config built without a schema (``Config()``) fills no defaults: each section's owner
    then applies its own (:mod:`monitor.settings` gives the composed one,
    :func:`monitor.settings.default_config`)."""

    data: dict = field(default_factory=dict)
    path: str | None = None
    schema: Mapping[str, Keys] = field(default_factory=dict, repr=False)

    def section(self, name: str) -> dict:
        if name in self.schema:
            out = defaults(self.schema[name])
            out.update(self.data.get(name, {}))
            return out
        return self.data.get(name, {})

    def with_overrides(self, section: str, **values) -> "Config":
        """A copy with ``values`` set in ``section`` (None values are left out), each checked."""
        data = {k: dict(v) if isinstance(v, dict) else v for k, v in self.data.items()}
        sec = data.setdefault(section, {})
        keys = self.schema.get(section)
        for k, v in values.items():
            if v is None:
                continue
            if keys is not None and k not in keys:
                raise ConfigError(f"[{section}] {k}: unknown key")
            sec[k] = check_value(section, k, v, keys[k][0]) if keys is not None else v
        return Config(data, self.path, self.schema)


def read_toml(path: str | Path, what: str = "config file") -> dict:
    """Parse a TOML file, mapping a missing or malformed file to ConfigError naming it."""
    p = Path(path)
    if not p.is_file():
        raise ConfigError(f"{p}: {what} not found")
    try:
        return tomllib.loads(p.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{p}: not valid TOML: {exc}") from None
    except UnicodeDecodeError as exc:
        line = p.read_bytes()[:exc.start].count(b"\n") + 1
        raise ConfigError(f"{p}: line {line}: not UTF-8 text (byte {exc.object[exc.start]:#04x} "
                          f"at offset {exc.start}); a TOML file is UTF-8") from None
