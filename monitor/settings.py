"""TOML configuration, validated with messages that name the key.

Sections and keys (all optional; defaults in brackets)::

    [columns]        series, ts, price, quantity: column names in the log ["series", ...]
    [estimator]      forgetting [0.99], controls [[]], log_controls [[]], level [0.95],
                     prior_mean [0.0], prior_sd [1000.0], min_n_eff [10.0],
                     min_price_sd [0.02], excitation_guard [true], guard_forgetting [0.8]
    [validation]     zero_policy ["reject"], duplicate_policy ["keep_first"],
                     allowed_lateness_s [0.0], max_future_s [3600.0], unit_ratio [50.0]

Other modules register their own sections with :func:`register_section` (detectors, rules,
store, service, sinks, sources), so one file configures everything and every key is checked.
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping

from monitor.errors import ConfigError


#: section name -> {key: (type or tuple of types, default)}
SECTIONS: dict[str, dict[str, tuple[Any, Any]]] = {
    "columns": {"series": (str, "series"), "ts": (str, "ts"), "price": (str, "price"),
                "quantity": (str, "quantity")},
    "estimator": {"forgetting": ((int, float), 0.99), "controls": (list, []),
                  "log_controls": (list, []), "level": ((int, float), 0.95),
                  "prior_mean": ((int, float), 0.0), "prior_sd": ((int, float), 1000.0),
                  "min_n_eff": ((int, float), 10.0), "min_price_sd": ((int, float), 0.02),
                  "excitation_guard": (bool, True), "guard_forgetting": ((int, float), 0.8)},
    "validation": {"zero_policy": (str, "reject"), "duplicate_policy": (str, "keep_first"),
                   "allowed_lateness_s": ((int, float), 0.0), "max_future_s": ((int, float), 3600.0),
                   "unit_ratio": ((int, float), 50.0)},
}
#: sections whose content is a free-form table or list validated by their owner
FREE_SECTIONS: dict[str, Callable[[Any], None] | None] = {}


def register_section(name: str, keys: Mapping[str, tuple[Any, Any]] | None = None,
                     validator: Callable[[Any], None] | None = None) -> None:
    """Declare a config section: fixed keys with (type, default), or a free-form validator."""
    if keys is not None:
        SECTIONS[name] = dict(keys)
    else:
        FREE_SECTIONS[name] = validator


def _check_value(section: str, key: str, value: Any, types: Any) -> Any:
    if types in ((int, float),) or types == (int, float):
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


@dataclass
class Config:
    """A validated configuration: ``cfg.section('estimator')`` gives keys with defaults filled."""

    data: dict = field(default_factory=dict)
    path: str | None = None

    def section(self, name: str) -> dict:
        if name in SECTIONS:
            out = {k: (list(d) if isinstance(d, list) else d) for k, (_, d) in SECTIONS[name].items()}
            out.update(self.data.get(name, {}))
            return out
        return self.data.get(name, {})

    def with_overrides(self, section: str, **values) -> "Config":
        data = {k: dict(v) if isinstance(v, dict) else v for k, v in self.data.items()}
        sec = data.setdefault(section, {})
        for k, v in values.items():
            if v is not None:
                if k not in SECTIONS.get(section, {k: None}):
                    raise ConfigError(f"[{section}] {k}: unknown key")
                sec[k] = _check_value(section, k, v, SECTIONS[section][k][0]) if section in SECTIONS else v
        return Config(data, self.path)


def _register_all() -> None:
    """Import the modules that declare their sections, so every file is checked the same way
    whichever command reads it (imported here, lazily, to keep the core free of cycles)."""
    import monitor.live.settings  # noqa: F401  [store], [service], [sources], [sinks]
    import monitor.pipeline.settings  # noqa: F401  [detectors], [bounds], [rules]


def validate(data: Mapping, source: str = "config") -> Config:
    _register_all()
    out: dict = {}
    for name, content in data.items():
        if name in FREE_SECTIONS:
            check = FREE_SECTIONS[name]
            if check is not None:
                check(content)
            out[name] = content
            continue
        if name not in SECTIONS:
            known = ", ".join(sorted(list(SECTIONS) + list(FREE_SECTIONS)))
            raise ConfigError(f"{source}: unknown section [{name}] (known: {known})")
        if not isinstance(content, Mapping):
            raise ConfigError(f"{source}: [{name}] must be a table")
        sec = {}
        for key, value in content.items():
            if key not in SECTIONS[name]:
                known = ", ".join(SECTIONS[name])
                raise ConfigError(f"{source}: [{name}] {key}: unknown key (known: {known})")
            sec[key] = _check_value(name, key, value, SECTIONS[name][key][0])
        out[name] = sec
    return Config(out, source)


def read_toml(path: str | Path, what: str = "config file") -> dict:
    """Parse a TOML file, mapping a missing or malformed file to ConfigError naming it."""
    p = Path(path)
    if not p.is_file():
        raise ConfigError(f"{p}: {what} not found")
    try:
        return tomllib.loads(p.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{p}: not valid TOML: {exc}") from None


def load_config(path: str | Path | None) -> Config:
    """Read and validate a TOML file (an empty config when ``path`` is None)."""
    if path is None:
        return Config()
    return validate(read_toml(path), str(Path(path)))


def estimator_from_config(cfg: Config):
    """Build the ElasticityRLS prototype from ``[estimator]``, mapping ValueError to ConfigError."""
    from monitor.estimators import ElasticityRLS

    try:
        return ElasticityRLS(**cfg.section("estimator"))
    except ValueError as exc:
        raise ConfigError(f"[estimator] {exc}") from None


def validation_from_config(cfg: Config):
    from monitor.rows.validate import ValidationSettings

    return ValidationSettings(**cfg.section("validation"))
