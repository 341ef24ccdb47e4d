"""The store's schema as ordered migrations (see :mod:`monitor.store` for the overview).

Each migration is ``(id, name, statements)``; :func:`monitor.store_core.migrate` applies the
pending ones in id order, each in its own ``BEGIN IMMEDIATE`` transaction together with its row
in the ``migrations`` table, so a store is never left half-migrated. A released migration is
never edited: a schema change is a new entry at the end of :data:`MIGRATIONS`.

Timestamps are TEXT, ISO 8601 in UTC with a ``Z`` suffix (see :func:`monitor.store_core.format_ts`).
Columns named ``ts`` and ``*_ts`` hold data time (the observations' clock); columns named
``*_at`` and ``silences.until`` hold wall-clock time of the machine that wrote them.
"""

from __future__ import annotations

MIGRATIONS_TABLE = (
    "CREATE TABLE IF NOT EXISTS migrations ("
    " id INTEGER PRIMARY KEY, name TEXT NOT NULL, applied_at TEXT NOT NULL)"
)

_INITIAL = [
    # one row per series: settings and running counts kept by write_batch
    """CREATE TABLE series (
        series TEXT PRIMARY KEY,
        first_ts TEXT, last_ts TEXT,
        n_obs INTEGER NOT NULL DEFAULT 0,
        n_estimates INTEGER NOT NULL DEFAULT 0,
        low REAL, high REAL, forgetting REAL,
        settings TEXT,
        updated_at TEXT NOT NULL)""",
    """CREATE TABLE observations (
        id INTEGER PRIMARY KEY,
        series TEXT NOT NULL, ts TEXT NOT NULL,
        price REAL NOT NULL, quantity REAL NOT NULL,
        controls TEXT, source TEXT, source_row INTEGER)""",
    # one observation per (series, ts): duplicates are decided upstream, a repeat here is an error
    "CREATE UNIQUE INDEX observations_series_ts ON observations (series, ts)",
    """CREATE TABLE rejects (
        id INTEGER PRIMARY KEY,
        source TEXT, row INTEGER,
        series TEXT, ts TEXT, field TEXT, value TEXT,
        raw TEXT, reason TEXT NOT NULL,
        rejected_at TEXT NOT NULL)""",
    "CREATE INDEX rejects_source ON rejects (source, id)",
    # the estimate history (possibly thinned, see thin_estimates); NULL where not defined
    """CREATE TABLE estimates (
        series TEXT NOT NULL, ts TEXT NOT NULL,
        beta REAL, beta_se REAL, beta_lo REAL, beta_hi REAL, n_eff REAL,
        status TEXT NOT NULL,
        intercept REAL, resid_sd REAL, innovation REAL, z REAL,
        PRIMARY KEY (series, ts)) WITHOUT ROWID""",
    # the newest estimate of every series, kept by write_batch, so the overview never scans history
    """CREATE TABLE latest_estimates (
        series TEXT PRIMARY KEY, ts TEXT NOT NULL,
        beta REAL, beta_se REAL, beta_lo REAL, beta_hi REAL, n_eff REAL,
        status TEXT NOT NULL,
        intercept REAL, resid_sd REAL, innovation REAL, z REAL)""",
    """CREATE TABLE alerts (
        id INTEGER PRIMARY KEY AUTOINCREMENT,
        series TEXT NOT NULL, kind TEXT NOT NULL,
        severity TEXT NOT NULL CHECK (severity IN ('info', 'warning', 'critical')),
        state TEXT NOT NULL CHECK (state IN ('open', 'acknowledged', 'resolved')),
        opened_ts TEXT, opened_at TEXT NOT NULL, updated_at TEXT NOT NULL,
        resolved_ts TEXT, resolved_at TEXT,
        beta REAL, beta_lo REAL, beta_hi REAL,
        message TEXT NOT NULL, details TEXT,
        last_reminded_at TEXT)""",
    # at most one alert per (series, kind) that is not resolved: the dedupe rule, enforced
    "CREATE UNIQUE INDEX alerts_active ON alerts (series, kind) WHERE state != 'resolved'",
    "CREATE INDEX alerts_series_kind ON alerts (series, kind, id)",
    "CREATE INDEX alerts_state ON alerts (state, id)",
    """CREATE TABLE alert_events (
        id INTEGER PRIMARY KEY,
        alert_id INTEGER NOT NULL REFERENCES alerts (id),
        event TEXT NOT NULL CHECK (event IN
            ('opened', 'acknowledged', 'resolved', 'reminded', 'note', 'silenced')),
        at TEXT NOT NULL, ts TEXT, who TEXT, note TEXT)""",
    "CREATE INDEX alert_events_alert ON alert_events (alert_id, id)",
    """CREATE TABLE checkpoints (
        series TEXT PRIMARY KEY,
        state TEXT NOT NULL, last_ts TEXT, last_pos TEXT,
        updated_at TEXT NOT NULL)""",
    """CREATE TABLE source_offsets (
        source TEXT PRIMARY KEY, kind TEXT, position TEXT,
        rows_read INTEGER NOT NULL DEFAULT 0, rows_rejected INTEGER NOT NULL DEFAULT 0,
        last_run_at TEXT, last_error TEXT)""",
    """CREATE TABLE outbox (
        id INTEGER PRIMARY KEY AUTOINCREMENT,
        alert_id INTEGER NOT NULL REFERENCES alerts (id),
        event TEXT NOT NULL, sink TEXT NOT NULL,
        payload TEXT NOT NULL,
        status TEXT NOT NULL DEFAULT 'pending'
            CHECK (status IN ('pending', 'delivered', 'failed')),
        attempts INTEGER NOT NULL DEFAULT 0,
        next_attempt_at TEXT NOT NULL,
        delivered_at TEXT, last_error TEXT,
        created_at TEXT NOT NULL)""",
    "CREATE INDEX outbox_due ON outbox (status, next_attempt_at)",
    """CREATE TABLE silences (
        id INTEGER PRIMARY KEY,
        series TEXT NOT NULL, kind TEXT NOT NULL,
        until TEXT NOT NULL, note TEXT, who TEXT,
        created_at TEXT NOT NULL)""",
    "CREATE INDEX silences_until ON silences (until)",
]

#: Ordered migrations: (id, name, SQL statements). Append only.
MIGRATIONS: list[tuple[int, str, list[str]]] = [
    (1, "initial schema", _INITIAL),
]

#: The schema version this code expects (the id of the last migration).
SCHEMA_VERSION = MIGRATIONS[-1][0]

#: Tables every elmon store has (names fixed by the issue, plus latest_estimates).
TABLES = ("series", "observations", "rejects", "estimates", "latest_estimates", "alerts",
          "alert_events", "checkpoints", "source_offsets", "outbox", "silences", "migrations")
