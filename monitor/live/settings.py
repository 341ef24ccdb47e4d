"""Config sections of the store, the live service, its sources and its sinks.

Importing this module registers them with :func:`monitor.settings.register_section`, so one TOML
file configures the core and the service and every key is checked (``monitor.live.monitor``,
``monitor.live.service`` and the command line import it)::

    [store]
    path = "elmon.sqlite"        # the SQLite store (created when missing)
    estimates_every = 1          # keep every n-th estimate of a series plus every status change

    [service]
    poll_interval_s = 5.0        # default poll interval of a source
    batch_rows = 50000           # most rows in one committed batch
    misfire_grace_s = 30.0       # a poll that starts this late is still run (APScheduler)
    delivery_interval_s = 10.0   # how often the outbox is delivered
    stale_check_s = 60.0         # how often the staleness check runs
    series_stale_after_s = 0.0   # a series silent this long (wall time) raises `stale`; 0 = off
    reminder_every_s = 0.0       # remind about alerts still open after this long; 0 = off
    delivery_max_attempts = 8    # a delivery failing this often is marked failed
    delivery_backoff_s = 30.0    # first retry delay; doubled per failure
    delivery_max_backoff_s = 3600.0

    [sources.feed]               # one table per source; the name is how the store knows it
    type = "csv"                 # csv (tailed by byte offset) | folder | sql
    path = "feed.csv"
    poll_interval_s = 2.0        # overrides [service] poll_interval_s
    stale_after_s = 600.0        # no new row for this long raises `stale`; 0 = off

Keys of each source type are listed in :data:`SOURCE_KEYS`. ``[sinks.NAME]`` tables are
documented in :mod:`monitor.live.sinks`; their keys are checked here, environment variables only
when the service starts.
"""

from __future__ import annotations

from typing import Any, Mapping

from monitor.errors import ConfigError
from monitor.settings import Config, register_section


STORE_KEYS = {"path": (str, "elmon.sqlite"), "estimates_every": (int, 1)}

SERVICE_KEYS = {
    "poll_interval_s": ((int, float), 5.0), "batch_rows": (int, 50_000),
    "misfire_grace_s": ((int, float), 30.0), "delivery_interval_s": ((int, float), 10.0),
    "stale_check_s": ((int, float), 60.0), "series_stale_after_s": ((int, float), 0.0),
    "reminder_every_s": ((int, float), 0.0), "delivery_max_attempts": (int, 8),
    "delivery_backoff_s": ((int, float), 30.0), "delivery_max_backoff_s": ((int, float), 3600.0),
}

_COMMON = {"type": str, "poll_interval_s": (int, float), "stale_after_s": (int, float)}
#: keys allowed per source type (besides ``type``, ``poll_interval_s``, ``stale_after_s``)
SOURCE_KEYS: dict[str, dict[str, Any]] = {
    "csv": {"path": str, "on_reset": str},
    "folder": {"path": str, "patterns": list, "settle_s": (int, float)},
    "sql": {"path": str, "url": str, "table": str, "key": str},
}
REQUIRED_SOURCE_KEYS = {"csv": ("path",), "folder": ("path",), "sql": ("table",)}


def _type_ok(value: Any, types: Any) -> bool:
    if types == (int, float):
        return isinstance(value, (int, float)) and not isinstance(value, bool)
    return isinstance(value, types)


def check_sources(content: Any) -> None:
    """Validate ``[sources.NAME]`` tables; the message names ``sources.NAME.KEY``."""
    if not isinstance(content, Mapping):
        raise ConfigError("[sources] must be a table of named sources, e.g. [sources.feed]")
    for name, spec in content.items():
        where = f"[sources.{name}]"
        if not isinstance(spec, Mapping):
            raise ConfigError(f"{where}: expected a table of settings, got {spec!r}")
        kind = spec.get("type")
        if kind not in SOURCE_KEYS:
            raise ConfigError(f"{where} type = {kind!r}: must be one of {', '.join(SOURCE_KEYS)}")
        allowed = {**_COMMON, **SOURCE_KEYS[kind]}
        for key, value in spec.items():
            if key not in allowed:
                raise ConfigError(f"{where} {key}: unknown key for a {kind} source "
                                  f"(known: {', '.join(sorted(allowed))})")
            if not _type_ok(value, allowed[key]):
                raise ConfigError(f"{where} {key} = {value!r}: wrong type")
        for key in REQUIRED_SOURCE_KEYS[kind]:
            if key not in spec:
                raise ConfigError(f"{where} {key}: required for a {kind} source")
        if kind == "sql" and ("path" in spec) == ("url" in spec):
            raise ConfigError(f"{where}: give either path (a SQLite file) or url (SQLAlchemy)")
        if spec.get("on_reset", "restart") not in ("restart", "stop"):
            raise ConfigError(f"{where} on_reset = {spec['on_reset']!r}: must be 'restart' or "
                              f"'stop'")
        if "poll_interval_s" in spec and not spec["poll_interval_s"] > 0:
            raise ConfigError(f"{where} poll_interval_s = {spec['poll_interval_s']!r}: must be > 0")
        for key in ("stale_after_s", "settle_s"):
            if key in spec and spec[key] < 0:
                raise ConfigError(f"{where} {key} = {spec[key]!r}: must be >= 0")


def check_sinks(content: Any) -> None:
    """Validate ``[sinks.NAME]`` tables by key (environment variables are checked at start)."""
    from monitor.live import sinks as msinks

    if not isinstance(content, Mapping):
        raise ConfigError("[sinks] must be a table of named sinks, e.g. [sinks.log]")
    for name, spec in content.items():
        if not isinstance(spec, Mapping):
            raise ConfigError(f"[sinks.{name}]: expected a table of settings, got {spec!r}")
        kind = spec.get("type", name if name in msinks._KEYS else None)
        if kind not in msinks._KEYS:
            raise ConfigError(f"[sinks.{name}] type = {kind!r}: must be one of "
                              f"{', '.join(msinks._KEYS)}")
        required, optional = msinks._KEYS[kind]
        for key in spec:
            if key != "type" and key not in required | optional:
                raise ConfigError(f"[sinks.{name}] {key}: unknown key for a {kind} sink "
                                  f"(known: {', '.join(sorted(required | optional))}; secrets "
                                  f"go in environment variables named by *_env)")
        for key in sorted(required - set(spec)):
            raise ConfigError(f"[sinks.{name}] {key}: required for a {kind} sink")


register_section("store", STORE_KEYS)
register_section("service", SERVICE_KEYS)
register_section("sources", None, check_sources)
register_section("sinks", None, check_sinks)


def store_settings(config: Config) -> dict:
    """``[store]`` with defaults, checked."""
    sec = config.section("store")
    if sec["estimates_every"] < 1:
        raise ConfigError(f"[store] estimates_every = {sec['estimates_every']!r}: must be >= 1 "
                          f"(1 keeps every estimate)")
    return sec


def service_settings(config: Config) -> dict:
    """``[service]`` with defaults, checked (intervals > 0, counts >= 1)."""
    sec = config.section("service")
    for key in ("poll_interval_s", "misfire_grace_s", "delivery_interval_s", "stale_check_s",
                "delivery_backoff_s", "delivery_max_backoff_s"):
        if not sec[key] > 0:
            raise ConfigError(f"[service] {key} = {sec[key]!r}: must be > 0")
    for key in ("batch_rows", "delivery_max_attempts"):
        if sec[key] < 1:
            raise ConfigError(f"[service] {key} = {sec[key]!r}: must be >= 1")
    for key in ("series_stale_after_s", "reminder_every_s"):
        if sec[key] < 0:
            raise ConfigError(f"[service] {key} = {sec[key]!r}: must be >= 0 (0 = off)")
    return sec


def sink_names(config: Config) -> tuple[str, ...]:
    """Names of the configured sinks (each alert event enqueues one delivery per name)."""
    return tuple(config.section("sinks").keys())
