"""The whole configuration: every owner's section schema composed in one place, checked with
messages that name the key.

Sections and their owners (each owner exports its schema; nothing registers itself on import)::

    [columns]                 monitor.ingest.logio         the log's column names
    [estimator]               monitor.estimators.settings  forgetting, controls, prior, ...
    [validation]              monitor.rows.validate        zero, duplicate and lateness rules
    [detectors] [bounds] [rules]  monitor.pipeline.settings  charts, thresholds, alert policy
    [store] [service] [sinks] monitor.live.settings        the live service and alert delivery
    [sources]                 monitor.ingest.factory       where rows come from
    [series]                  monitor.groups.settings      composite keys, groups, pooling
    [experiments]             monitor.experiments.plan     randomized price tests

:func:`validate` checks a parsed TOML table against :data:`SCHEMA` (fixed keys with types and
defaults) and :data:`FREE_SECTIONS` (free-form tables with their validators) and returns a
:class:`~monitor.sections.Config` carrying the schema, so ``cfg.section(name)`` has every
default filled; :func:`load_config` reads a file; :func:`default_config` is the empty file.

>>> cfg = validate({"estimator": {"forgetting": 0.98}})
>>> cfg.section("estimator")["forgetting"], cfg.section("detectors")["level_chart"]
(0.98, 'cusum')
>>> validate({"estimator": {"forget": 0.98}})
Traceback (most recent call last):
...
monitor.errors.ConfigError: config: [estimator] forget: unknown key (known: ...)
"""

from __future__ import annotations

from pathlib import Path
from typing import Mapping

from monitor.errors import ConfigError
from monitor.estimators import settings as estimator_settings
from monitor.estimators.settings import estimator_from_config
from monitor.experiments.plan import EXPERIMENTS_SECTION
from monitor.groups.settings import SERIES_SECTION
from monitor.ingest import factory as ingest_factory
from monitor.ingest import logio
from monitor.live import settings as live_settings
from monitor.pipeline import settings as pipeline_settings
from monitor.rows import validate as row_validation
from monitor.rows.validate import validation_from_config
from monitor.sections import Config, Keys, Validator, check_value, read_toml


__all__ = ["SCHEMA", "FREE_SECTIONS", "Config", "validate", "load_config", "default_config",
           "read_toml", "estimator_from_config", "validation_from_config"]

#: section -> fixed keys {key: (type, default)}, composed from the owners' schemas
SCHEMA: dict[str, Keys] = {
    **logio.SECTIONS, **estimator_settings.SECTIONS, **row_validation.SECTIONS,
    **pipeline_settings.SECTIONS, **live_settings.SECTIONS, "series": SERIES_SECTION}
#: section -> validator of a free-form table (or None: accepted as given)
FREE_SECTIONS: dict[str, Validator | None] = {
    **ingest_factory.FREE_SECTIONS, **live_settings.FREE_SECTIONS,
    EXPERIMENTS_SECTION[0]: EXPERIMENTS_SECTION[2]}


def validate(data: Mapping, source: str = "config") -> Config:
    """Check a parsed TOML table: every section known, every key known and of its type."""
    out: dict = {}
    for name, content in data.items():
        if name in FREE_SECTIONS:
            check = FREE_SECTIONS[name]
            if check is not None:
                check(content)
            out[name] = content
            continue
        if name not in SCHEMA:
            known = ", ".join(sorted(list(SCHEMA) + list(FREE_SECTIONS)))
            raise ConfigError(f"{source}: unknown section [{name}] (known: {known})")
        if not isinstance(content, Mapping):
            raise ConfigError(f"{source}: [{name}] must be a table")
        sec = {}
        for key, value in content.items():
            if key not in SCHEMA[name]:
                known = ", ".join(SCHEMA[name])
                raise ConfigError(f"{source}: [{name}] {key}: unknown key (known: {known})")
            sec[key] = check_value(name, key, value, SCHEMA[name][key][0])
        out[name] = sec
    return Config(out, source, SCHEMA)


def default_config() -> Config:
    """The configuration of an empty file: every default, nothing else."""
    return Config({}, None, SCHEMA)


def load_config(path: str | Path | None) -> Config:
    """Read and validate a TOML file (the defaults when ``path`` is None)."""
    if path is None:
        return default_config()
    return validate(read_toml(path), str(Path(path)))
