"""The store's schema as ordered migrations (see :mod:`monitor.store` for the overview).

Each migration is ``(id, name, statements)``; :func:`monitor.store.core.migrate` applies the
pending ones in id order, each in its own ``BEGIN IMMEDIATE`` transaction together with its row
in the ``migrations`` table, so a store is never left half-migrated. A released migration is
never edited: a schema change is a new entry at the end of :data:`MIGRATIONS`.

Timestamps are TEXT, ISO 8601 in UTC with a ``Z`` suffix (see :func:`monitor.store.core.format_ts`).
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

#: Points of each series kept in the ``sparklines`` cache (newest last).
SPARK_KEEP = 60


def spark_text(pairs: list[tuple[str, str]]) -> tuple[int, str, str]:
    """``(n, "ts1,ts2,...", "beta1,beta2,...")`` for the cache; beta text ``'nan'`` when NULL."""
    return len(pairs), ",".join(p[0] for p in pairs), ",".join(p[1] for p in pairs)


def beta_text(value: float | None) -> str:
    """A beta as exact decimal text (``repr``) for the cache, ``'nan'`` for NULL."""
    return "nan" if value is None or value != value else repr(float(value))


def _backfill_sparklines(conn) -> None:
    """Fill the sparkline cache from the estimate history (one index seek per series)."""
    names = [r[0] for r in conn.execute("SELECT series FROM series")]
    rows = []
    for name in names:
        last = conn.execute("SELECT ts, beta FROM estimates WHERE series = ? ORDER BY ts DESC "
                            "LIMIT ?", (name, SPARK_KEEP)).fetchall()
        if last:
            rows.append((name, *spark_text([(t, beta_text(b)) for t, b in reversed(last)])))
    conn.executemany("INSERT INTO sparklines (series, n, ts, beta) VALUES (?, ?, ?, ?)", rows)


_SPARKLINES = [
    # the last SPARK_KEEP stored estimates of each series as text, kept by write_batch, so
    # trend lines for 10,000 series are one small read instead of 600,000 history rows
    """CREATE TABLE sparklines (
        series TEXT PRIMARY KEY, n INTEGER NOT NULL, ts TEXT NOT NULL, beta TEXT NOT NULL)""",
    _backfill_sparklines,
]

_GROUPS = [
    # issue 19: attributes of series (key parts of composite ids, or an attributes file)
    """CREATE TABLE series_attributes (
        series TEXT NOT NULL, name TEXT NOT NULL, value TEXT NOT NULL,
        source TEXT NOT NULL CHECK (source IN ('key', 'file')),
        updated_at TEXT NOT NULL,
        PRIMARY KEY (series, name)) WITHOUT ROWID""",
    "CREATE INDEX series_attributes_name ON series_attributes (name, value)",
    # a member alert folded under a group_change alert (one notification for the group)
    """CREATE TABLE alert_members (
        alert_id INTEGER PRIMARY KEY REFERENCES alerts (id),
        group_alert_id INTEGER NOT NULL REFERENCES alerts (id))""",
    "CREATE INDEX alert_members_group ON alert_members (group_alert_id)",
    # the pooled (partially pooled) newest estimate and the series' group, kept by
    # monitor.store.groups.update_pooled after each batch; NULL without groups
    "ALTER TABLE latest_estimates ADD COLUMN beta_pooled REAL",
    "ALTER TABLE latest_estimates ADD COLUMN beta_pooled_se REAL",
    'ALTER TABLE latest_estimates ADD COLUMN "group" TEXT',
]


_CHANGE_COLUMNS = [
    # issue 12: a change alert's estimated change time, b before and after it with intervals,
    # the size of the change; the expected delay of the newest estimate of each series
    "ALTER TABLE alerts ADD COLUMN change_ts TEXT",
    *[f"ALTER TABLE alerts ADD COLUMN {c} REAL" for c in (
        "beta_before", "beta_before_lo", "beta_before_hi", "beta_after", "beta_after_lo",
        "beta_after_hi", "size")],
    "ALTER TABLE latest_estimates ADD COLUMN delay50_obs REAL",
]

_BOUNDS_IN_EFFECT = [
    # issue 16: the bounds the engine applied to a series at its last write ([bounds] or the
    # series' own), so readers can draw them; ``low`` / ``high`` stay the series' OWN bounds
    # (what the engine reads back), these two are only a record and are never read back
    "ALTER TABLE series ADD COLUMN bound_low REAL",
    "ALTER TABLE series ADD COLUMN bound_high REAL",
]

_ALERT_VERDICTS = [
    # issue 16: what people found an alert to be (monitor.store.verdicts); the latest mark of
    # an alert wins, every mark is also a 'note' event in its history
    """CREATE TABLE alert_verdicts (
        alert_id INTEGER PRIMARY KEY REFERENCES alerts (id),
        verdict TEXT NOT NULL CHECK (verdict IN ('confirmed', 'false_alarm')),
        who TEXT, at TEXT NOT NULL, note TEXT)""",
]

_SERIES_RESETS = [
    # issue 14: `elmon series reset NAME` forgets a series' estimator, detector and gate
    # state (its checkpoint); every reset is recorded here with who, why and the checkpoint
    # state it replaced, and the stored history (observations, estimates, alerts) stays
    """CREATE TABLE series_resets (
        id INTEGER PRIMARY KEY AUTOINCREMENT,
        series TEXT NOT NULL, at TEXT NOT NULL, who TEXT NOT NULL, why TEXT NOT NULL,
        last_ts TEXT, before_state TEXT)""",
    "CREATE INDEX series_resets_series ON series_resets (series, id)",
]

_BAND_KIND = [
    # issue 13: the kind of each estimate's band ([estimator] band: 'hc' heteroskedasticity-
    # robust, 'hac' autocorrelation-robust, 'classic'). NULL where the estimate has no band
    # (beta_lo / beta_hi NULL: its status, warming_up or low_variation, says why) and on rows
    # stored before this migration: the checkpoints keep no estimator settings, so the kind
    # that wrote them is not known (it was the [estimator] band of that configuration)
    "ALTER TABLE estimates ADD COLUMN band TEXT CHECK (band IN ('hc', 'hac', 'classic'))",
    "ALTER TABLE latest_estimates ADD COLUMN band TEXT "
    "CHECK (band IN ('hc', 'hac', 'classic'))",
]

_RESET_REQUESTS = [
    # issue 14: `elmon series reset` while the service runs. The service holds the writer
    # lock, so the command records the reset as a request (applied_at NULL); the running
    # service applies it before its next batch (a fresh state in memory and in the
    # checkpoint, in one transaction) and sets applied_at. A reset made with no service
    # running is applied at once (applied_at = at), as every reset before this migration was.
    "ALTER TABLE series_resets ADD COLUMN applied_at TEXT",
    "UPDATE series_resets SET applied_at = at",
    "CREATE INDEX series_resets_pending ON series_resets (id) WHERE applied_at IS NULL",
]

_DELIVERY_LEASE = [
    # issue 14: a delivery attempt claims its outbox row until claimed_until (wall time); no
    # round picks a claimed row again while the attempt may still complete, and the attempt
    # records its own outcome however late. A lease left by a process that died runs out, and
    # the row is sent again (at least once)
    "ALTER TABLE outbox ADD COLUMN claimed_until TEXT",
]

_OBSERVATION_EXPOSURE = [
    # issue 13: the exposure behind each observation's quantity ([estimator] exposure /
    # --exposure-col under the Poisson model: opening hours, customers, connected meters), so
    # a Poisson store can be re-run from its own observations. NULL: no exposure, which the
    # model reads as 1 (every row stored before this migration, and every log-log row)
    "ALTER TABLE observations ADD COLUMN exposure REAL "
    "CHECK (exposure IS NULL OR exposure > 0)",
]

#: Ordered migrations: (id, name, steps). A step is SQL text or a callable taking the sqlite3
#: connection (run inside the migration's transaction). Append only.
MIGRATIONS: list[tuple[int, str, list]] = [
    (1, "initial schema", _INITIAL),
    (2, "sparkline cache", _SPARKLINES),
    (3, "series groups", _GROUPS),
    (4, "change alert columns", _CHANGE_COLUMNS),
    (5, "bounds in effect", _BOUNDS_IN_EFFECT),
    (6, "alert verdicts", _ALERT_VERDICTS),
    (7, "series resets", _SERIES_RESETS),
    (8, "band kind", _BAND_KIND),
    (9, "series reset requests", _RESET_REQUESTS),
    (10, "delivery leases", _DELIVERY_LEASE),
    (11, "observation exposure", _OBSERVATION_EXPOSURE),
]

#: The schema version this code expects (the id of the last migration).
SCHEMA_VERSION = MIGRATIONS[-1][0]

#: Tables every elmon store has (names fixed by the issue, plus the two caches
#: latest_estimates and sparklines).
TABLES = ("series", "observations", "rejects", "estimates", "latest_estimates", "sparklines",
          "alerts", "alert_events", "checkpoints", "source_offsets", "outbox", "silences",
          "series_attributes", "alert_members", "series_resets", "migrations")
