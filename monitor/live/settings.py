"""Config sections of the store, the live service, its sources and its sinks.

The schemas (:data:`SECTIONS`, :data:`FREE_SECTIONS`) are composed by :mod:`monitor.settings`
with every other owner's, so one TOML file configures the core and the service and every key is
checked; the readers below fill the defaults themselves::

    [store]
    path = "elmon.sqlite"        # the SQLite store (created when missing)
    estimates_every = 1          # keep every n-th estimate of a series plus every status change
    wal_max_mb = 64              # the write-ahead log is checkpointed and truncated past this

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

Keys of each source type are listed in :data:`monitor.ingest.factory.SOURCE_KEYS`. ``[sinks.NAME]`` tables are
documented in :mod:`monitor.live.sinks`; their keys are checked here, environment variables only
when the service starts.
"""

from __future__ import annotations

from typing import Any, Mapping

from monitor.errors import ConfigError
from monitor.live.sinks import SINK_KEYS
from monitor.sections import Config, defaults


STORE_KEYS = {"path": (str, "elmon.sqlite"), "estimates_every": (int, 1),
              "wal_max_mb": ((int, float), 64.0)}

SERVICE_KEYS = {
    "poll_interval_s": ((int, float), 5.0), "batch_rows": (int, 50_000),
    "misfire_grace_s": ((int, float), 30.0), "delivery_interval_s": ((int, float), 10.0),
    "stale_check_s": ((int, float), 60.0), "series_stale_after_s": ((int, float), 0.0),
    "reminder_every_s": ((int, float), 0.0), "delivery_max_attempts": (int, 8),
    "delivery_backoff_s": ((int, float), 30.0), "delivery_max_backoff_s": ((int, float), 3600.0),
}

#: the longest interval, delay or grace accepted in [service] (366 days, in seconds)
MAX_SECONDS = 366 * 86400


def check_sinks(content: Any) -> None:
    """Validate ``[sinks.NAME]`` tables by key (environment variables are checked at start)."""
    if not isinstance(content, Mapping):
        raise ConfigError("[sinks] must be a table of named sinks, e.g. [sinks.log]")
    for name, spec in content.items():
        if not isinstance(spec, Mapping):
            raise ConfigError(f"[sinks.{name}]: expected a table of settings, got {spec!r}")
        kind = spec.get("type", name if name in SINK_KEYS else None)
        if kind not in SINK_KEYS:
            raise ConfigError(f"[sinks.{name}] type = {kind!r}: must be one of "
                              f"{', '.join(SINK_KEYS)}")
        required, optional = SINK_KEYS[kind]
        for key in spec:
            if key != "type" and key not in required | optional:
                raise ConfigError(f"[sinks.{name}] {key}: unknown key for a {kind} sink "
                                  f"(known: {', '.join(sorted(required | optional))}; secrets "
                                  f"go in environment variables named by *_env)")
        for key in sorted(required - set(spec)):
            raise ConfigError(f"[sinks.{name}] {key}: required for a {kind} sink")


#: the sections this module owns, for monitor.settings to compose: fixed keys ...
SECTIONS = {"store": STORE_KEYS, "service": SERVICE_KEYS}
#: ... and the free-form ``[sinks]`` table with its validator
FREE_SECTIONS = {"sinks": check_sinks}


def store_settings(config: Config) -> dict:
    """``[store]`` with defaults, checked."""
    sec = {**defaults(STORE_KEYS), **config.section("store")}
    if sec["estimates_every"] < 1:
        raise ConfigError(f"[store] estimates_every = {sec['estimates_every']!r}: must be >= 1 "
                          f"(1 keeps every estimate)")
    if not 0 < sec["wal_max_mb"] <= 1e6:
        raise ConfigError(f"[store] wal_max_mb = {sec['wal_max_mb']!r}: must be a number of "
                          f"megabytes in (0, 1e6]")
    return sec


def service_settings(config: Config) -> dict:
    """``[service]`` with defaults, checked (intervals > 0, counts >= 1)."""
    sec = {**defaults(SERVICE_KEYS), **config.section("service")}
    for key in ("poll_interval_s", "misfire_grace_s", "delivery_interval_s", "stale_check_s",
                "delivery_backoff_s", "delivery_max_backoff_s"):
        if not sec[key] > 0:
            raise ConfigError(f"[service] {key} = {sec[key]!r}: must be > 0")
    for key in ("batch_rows", "delivery_max_attempts"):
        if sec[key] < 1:
            raise ConfigError(f"[service] {key} = {sec[key]!r}: must be >= 1")
    for key in ("series_stale_after_s", "reminder_every_s"):
        if not sec[key] >= 0:
            raise ConfigError(f"[service] {key} = {sec[key]!r}: must be >= 0 (0 = off)")
    for key, value in sec.items():      # inf and 1e300 pass '> 0' but stall the scheduler
        if key.endswith("_s") and not value <= MAX_SECONDS:
            raise ConfigError(f"[service] {key} = {value!r}: must be a finite number of "
                              f"seconds, at most {MAX_SECONDS} (366 days)")
    return sec


def sink_names(config: Config) -> tuple[str, ...]:
    """Names of the configured sinks (each alert event enqueues one delivery per name)."""
    return tuple(config.section("sinks").keys())
