"""Store functions the live service needs beyond :mod:`monitor.store`: source errors,
staleness, per-series bounds and the single-observation writer.

Kept apart from the store modules (they belong to the store's owner); everything here goes
through :meth:`Store.atomic` / :meth:`Store.rows` with parameterized SQL.
"""

from __future__ import annotations

import fcntl
import json
import math
import os
import socket
import sqlite3
import stat
import sys
from typing import Any

import pandas as pd

from monitor.errors import StoreError
from monitor.rows.gate_state import last_time
from monitor.store import Store, from_json, parse_ts, wall_ts
from monitor.store.core import accepts_path
from monitor.store.detection import DELAY50_SQL
from monitor.store.alerts import apply_alert_change
# the store's own statements, so the single-row writer cannot drift from write_batch's SQL
from monitor.store.batch import (INSERT_EST, INSERT_OBS, UPSERT_LATEST, UPSERT_OFFSET,
                                 UPSERT_SERIES_COUNTS, UPSERT_SPARK)
from monitor.store.schema import SPARK_KEEP, beta_text, spark_text


_UPSERT_CHECKPOINT = (
    "INSERT INTO checkpoints (series, state, last_ts, last_pos, updated_at) VALUES "
    "(?, ?, ?, ?, ?) ON CONFLICT (series) DO UPDATE SET state = excluded.state, "
    "last_ts = excluded.last_ts, last_pos = excluded.last_pos, updated_at = excluded.updated_at")

#: prefix of the alert ``series`` used for alerts about a source rather than a series
SOURCE_PREFIX = "source:"


def writer_lock_path(store_path) -> str:
    """``<store>.writer.lock`` beside the store's real file: a symbolic link to the store (or
    a link in its folder path) names the same lock, so it cannot start a second writer."""
    return os.path.realpath(str(store_path)) + ".writer.lock"


def take_writer_lock(store_path):
    """Hold the store's writer lock exclusively (``flock`` on :func:`writer_lock_path`) so one
    process writes live state; the kernel releases it when the process ends, even by SIGKILL.

    The lock file is opened with ``O_NOFOLLOW`` and must be a regular file: a symbolic link
    planted at its path is refused (it would otherwise make elmon create or truncate the file
    it points to). The holder's pid, command line, host and start time are written into the
    file, and a refusal names them. Returns the open file.
    """
    path = writer_lock_path(store_path)
    flags = os.O_RDWR | os.O_CREAT | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_CLOEXEC", 0)
    try:
        fd = os.open(path, flags, 0o644)
    except OSError as exc:
        if os.path.islink(path):
            raise StoreError(f"writer lock {path!r} is a symbolic link (to "
                             f"{os.readlink(path)!r}); elmon does not follow it: remove the "
                             f"link") from None
        raise StoreError(f"writer lock {path!r} cannot be opened: {exc.strerror}") from None
    if not stat.S_ISREG(os.fstat(fd).st_mode):
        os.close(fd)
        raise StoreError(f"writer lock {path!r} is not a regular file; remove it")
    fh = os.fdopen(fd, "r+")
    try:
        fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        fh.seek(0)
        holder = describe_holder(fh.read(4096))
        fh.close()
        raise WriterBusy(f"store {str(store_path)!r} is being processed by another elmon "
                         f"process ({holder}); stop it first", holder) from None
    fh.seek(0)
    fh.truncate()
    fh.write(json.dumps({"pid": os.getpid(), "host": socket.gethostname(),
                         "started": wall_ts(), "command": " ".join(sys.argv)[:500]}))
    fh.flush()
    return fh


class WriterBusy(StoreError):
    """The writer lock is held by another process; ``holder`` describes it
    (:func:`describe_holder`)."""

    def __init__(self, message: str, holder: str):
        super().__init__(message)
        self.holder = holder


def describe_holder(text: str) -> str:
    """The holder recorded in a lock file, as text: ``pid N, 'command', host H, since T``
    (files of older versions hold only the pid).

    >>> describe_holder('{"pid": 42, "host": "ops1", "started": "2026-01-02T03:04:05Z", '
    ...                 '"command": "elmon run --config elmon.toml"}')
    "pid 42, 'elmon run --config elmon.toml', host ops1, since 2026-01-02T03:04:05Z"
    >>> describe_holder("42"), describe_holder("")
    ('pid 42', 'pid unknown')
    """
    text = text.strip()
    try:
        info = json.loads(text) if text.startswith("{") else {"pid": text or "unknown"}
    except ValueError:
        info = {"pid": "unknown"}
    parts = [f"pid {info.get('pid', 'unknown')}"]
    if info.get("command"):
        parts.append(repr(str(info["command"])))
    if info.get("host"):
        parts.append(f"host {info['host']}")
    if info.get("started"):
        parts.append(f"since {info['started']}")
    return ", ".join(parts)


def release_writer_lock(fh) -> None:
    fcntl.flock(fh, fcntl.LOCK_UN)
    fh.close()


def reset_source(store: Store, source: str) -> bool:
    """Forget a source's position (its counts stay), so it is read again from its start; the
    caller holds the writer lock. Returns whether the source was known."""
    with store.atomic():
        cur = store.execute("UPDATE source_offsets SET position = NULL, last_error = NULL "
                            "WHERE source = ?", (source,))
    return cur.rowcount > 0


def _checked_reset(store: Store, series: str, who: str, why: str) -> None:
    if not str(why or "").strip() or not str(who or "").strip():
        raise StoreError(f"reset of series {series!r}: give who and why (they are recorded)")
    if store.scalar("SELECT count(*) FROM checkpoints WHERE series = ?", (series,)) == 0:
        known = store.scalar("SELECT count(*) FROM checkpoints")
        raise StoreError(f"no series {series!r} in the store ({known} series have state; "
                         f"names are exact, e.g. as 'elmon status --json' lists them)")


def fresh_state(state: dict | None) -> dict:
    """The checkpoint state of a reset series made from its current one: a new series'
    pipeline state (``null``) and gate, keeping only what keeps time order and duplicate
    detection (the gate's and the series' newest times) and the zero-row count."""
    state = state or {}
    gate = state.get("gate")
    return {"pipeline": None,
            "gate": {"last_ts": last_time(gate), "count": 0} if gate else None,
            "updates": 0, "last_status": None,
            "last_obs_ns": state.get("last_obs_ns"),
            "zero_skipped": state.get("zero_skipped", 0)}


def _apply_reset(store: Store, series: str, now: str) -> tuple[dict, dict]:
    """Inside a transaction: replace the series' checkpoint state by :func:`fresh_state`;
    returns the checkpoint row before (``state`` text, ``last_ts``) and the fresh state."""
    before = store.rows("SELECT state, last_ts FROM checkpoints WHERE series = ?", (series,))[0]
    fresh = fresh_state(from_json(before["state"]))
    store.execute("UPDATE checkpoints SET state = ?, updated_at = ? WHERE series = ?",
                  (json.dumps(fresh), now, series))
    return before, fresh


def reset_series(store: Store, series: str, who: str, why: str) -> dict:
    """Forget a series' estimator, detector and validation state; the caller holds the writer
    lock (``elmon series reset`` with no service running).

    The checkpoint keeps only what keeps time order and duplicate detection: the newest
    observation time (a row not newer than it is still late or a duplicate). The estimator,
    the detectors and the recent prices of the unit check start afresh at the next row, as for
    a new series. Observations, estimates, alerts and rejects stay stored. The reset is
    recorded in ``series_resets`` with ``who``, ``why``, the replaced checkpoint state and
    ``applied_at`` (now). While a service holds the writer lock use
    :func:`request_series_reset` instead.

    Returns the ``series_resets`` row. Raises :class:`StoreError` for a series the store does
    not know, or an empty ``who`` / ``why``.
    """
    _checked_reset(store, series, who, why)
    now = wall_ts()
    with store.atomic():
        before, _ = _apply_reset(store, series, now)
        cur = store.execute("INSERT INTO series_resets (series, at, who, why, last_ts, "
                            "before_state, applied_at) VALUES (?, ?, ?, ?, ?, ?, ?)",
                            (series, now, str(who), str(why), before["last_ts"],
                             before["state"], now))
    return {"id": cur.lastrowid, "series": series, "at": now, "who": str(who), "why": str(why),
            "last_ts": before["last_ts"], "applied_at": now}


def request_series_reset(store: Store, series: str, who: str, why: str) -> dict:
    """Record a reset for the process that holds the writer lock (a running service) to
    apply before its next batch (:func:`pending_series_resets`, :func:`apply_series_reset`).

    Takes no writer lock: it is one ``INSERT`` into ``series_resets`` with ``applied_at``
    NULL, ordered with the service's batches by SQLite's write lock, like ``elmon bounds
    set``. Checks like :func:`reset_series`. Returns the request row."""
    _checked_reset(store, series, who, why)
    now = wall_ts()
    with store.atomic():
        cur = store.execute("INSERT INTO series_resets (series, at, who, why) VALUES "
                            "(?, ?, ?, ?)", (series, now, str(who), str(why)))
    return {"id": cur.lastrowid, "series": series, "at": now, "who": str(who), "why": str(why),
            "last_ts": None, "applied_at": None}


def pending_series_resets(store: Store) -> list[dict]:
    """Reset requests not applied yet (``id``, ``series``), oldest first; one indexed read,
    cheap enough for every batch."""
    return store.rows("SELECT id, series FROM series_resets WHERE applied_at IS NULL "
                      "ORDER BY id")


def apply_series_reset(store: Store, request_id: int, series: str) -> dict:
    """Apply one reset request in one transaction: the series' checkpoint becomes
    :func:`fresh_state` of it, the request gets ``applied_at``, ``last_ts`` and the replaced
    ``before_state``. The caller (the writer) then resets the series in memory the same
    way. Returns the fresh state (``{}`` when the series has no checkpoint any more)."""
    now = wall_ts()
    with store.atomic():
        if store.scalar("SELECT count(*) FROM checkpoints WHERE series = ?", (series,)):
            before, fresh = _apply_reset(store, series, now)
        else:
            before, fresh = {"state": None, "last_ts": None}, {}
        store.execute("UPDATE series_resets SET applied_at = ?, last_ts = ?, before_state = ? "
                      "WHERE id = ?", (now, before["last_ts"], before["state"],
                                       int(request_id)))
    return fresh


@accepts_path(readonly=True)
def list_series_resets(store: Store, series: str | None = None) -> pd.DataFrame:
    """Recorded series resets, newest first (``before_state`` left out)."""
    sql = "SELECT id, series, at, who, why, last_ts, applied_at FROM series_resets"
    params: tuple = ()
    if series is not None:
        sql += " WHERE series = ?"
        params = (series,)
    return store.frame(sql + " ORDER BY id DESC", params)


def record_source_error(store: Store, source: str, kind: str, message: str | None) -> None:
    """Set (or clear, with ``None``) a source's ``last_error`` without touching its position,
    counts or ``last_run_at`` (which keeps meaning "last committed batch")."""
    with store.atomic():
        store.execute("INSERT INTO source_offsets (source, kind, last_error) VALUES (?, ?, ?) "
                      "ON CONFLICT (source) DO UPDATE SET last_error = excluded.last_error, "
                      "kind = coalesce(source_offsets.kind, excluded.kind)",
                      (source, kind, None if message is None else str(message)[:2000]))


def series_bounds(store: Store, names: list[str]) -> dict[str, tuple]:
    """``series -> (low, high)`` for the series among ``names`` that have their own elasticity
    bounds in the ``series`` table (either side may be ``None``)."""
    if not names:
        return {}
    rows = store.rows("SELECT series, low, high FROM series WHERE (low IS NOT NULL OR high IS "
                      "NOT NULL) AND series IN (SELECT value FROM json_each(?))",
                      (json.dumps([str(n) for n in names]),))
    return {r["series"]: (r["low"], r["high"]) for r in rows}


def source_rows_at(store: Store) -> dict[str, pd.Timestamp]:
    """Wall time of each source's last committed batch (``last_run_at``)."""
    return {r["source"]: parse_ts(r["last_run_at"]) for r in
            store.rows("SELECT source, last_run_at FROM source_offsets WHERE last_run_at IS NOT NULL")}


def series_activity(store: Store) -> pd.DataFrame:
    """Every series with its newest data time, the wall time of its last write and its own
    ``stale_after_s`` setting (from ``series.settings``, NaN when not set)."""
    rows = store.rows("SELECT series, last_ts, updated_at, settings FROM series ORDER BY series")
    df = pd.DataFrame(rows, columns=["series", "last_ts", "updated_at", "settings"])
    df["stale_after_s"] = [float((from_json(s) or {}).get("stale_after_s", float("nan")))
                           if s else float("nan") for s in df["settings"]]
    df["updated_at"] = pd.to_datetime(df["updated_at"], utc=True, format="ISO8601")
    return df.drop(columns=["settings"])


def active_stale(store: Store) -> dict[str, int]:
    """``series -> alert id`` of every ``stale`` alert not resolved (sources included)."""
    return {r["series"]: r["id"] for r in
            store.rows("SELECT id, series FROM alerts WHERE kind = 'stale' AND state != 'resolved'")}


def stale_changes(store: Store, now: Any, source_limits: dict[str, float],
                  source_last: dict[str, Any], series_after: float) -> list[dict]:
    """Alert changes that open ``stale`` alerts for silent sources and series and resolve the
    ones whose source or series has sent rows again.

    ``source_limits``: source -> seconds (0 = not watched); ``source_last``: source -> wall
    time of its last rows; ``series_after``: default seconds for series (0 = off; a series'
    own ``stale_after_s`` setting wins).
    """
    now_ts = parse_ts(wall_ts(now))
    active = active_stale(store)
    changes: list[dict] = []

    def decide(key: str, age: float, limit: float, ts, what: str, details: dict) -> None:
        if limit > 0 and age > limit and key not in active:
            changes.append({"action": "open", "series": key, "kind": "stale", "ts": ts,
                            "beta": None, "beta_lo": None, "beta_hi": None,
                            "severity": "warning", "details": details, "cooldown": limit,
                            "message": f"{what} has sent nothing for {age:.0f} s (expected "
                                       f"within {limit:g} s)"})
        elif key in active and (limit <= 0 or age <= limit):
            changes.append({"action": "resolve", "series": key, "kind": "stale", "ts": ts,
                            "note": f"{what} is sending again"})

    for name, limit in source_limits.items():
        last = source_last.get(name)
        if last is None:
            continue
        age = (now_ts - parse_ts(last)).total_seconds()
        decide(SOURCE_PREFIX + name, age, float(limit), wall_ts(now_ts), f"source {name}",
               {"age_s": age, "stale_after_s": limit})
    series = series_activity(store)
    for r in series.itertuples(index=False):
        limit = r.stale_after_s if r.stale_after_s == r.stale_after_s else series_after
        age = (now_ts - r.updated_at).total_seconds()
        if r.last_ts is None:
            continue
        decide(r.series, age, float(limit), r.last_ts, f"series {r.series}",
               {"age_s": age, "stale_after_s": limit, "last_ts": r.last_ts})
    return changes


def write_one(store: Store, *, observation: tuple, estimate: tuple, keep: bool,
              checkpoint: tuple, offset: tuple, changes: list, now: str,
              delay50: float | None = None) -> dict:
    """One observation's batch in one transaction, without building frames (``Monitor.observe``).

    Writes exactly the rows :func:`monitor.store.write_batch` writes for a batch of one
    accepted observation, with the same SQL statements: the series' counts, the observation,
    the estimate (history only when ``keep``; ``latest_estimates`` always), the sparkline cache,
    the checkpoint, the source offset and the alert changes. Parameters are the rows in the
    statements' column order (``estimate`` with NULL for NaN). ``delay50`` is the series'
    ``latest_estimates.delay50_obs`` (:func:`monitor.store.detection.write_delay50`; NaN or
    infinity -> NULL), set in the same transaction. tests/test_engine.py holds the two writers
    equal over every table.
    """
    series, ts = observation[0], observation[1]
    summary = {"alerts_opened": [], "alerts_resolved": [], "alerts_reminded": [],
               "alerts_unchanged": []}
    with store.atomic():
        store.conn.execute(UPSERT_SERIES_COUNTS, (series, ts, ts, 1, int(keep), now))
        try:
            store.conn.execute(INSERT_OBS, observation)
        except sqlite3.IntegrityError:
            raise StoreError(f"observation (series {series!r}, ts {ts!r}) is already stored; "
                             f"the batch was not written") from None
        if keep:
            store.conn.execute(INSERT_EST, estimate)
        store.conn.execute(UPSERT_LATEST, estimate)
        d50 = None if delay50 is None or not math.isfinite(float(delay50)) else float(delay50)
        store.conn.execute(DELAY50_SQL, (d50, series))
        if keep:
            row = store.conn.execute("SELECT n, ts, beta FROM sparklines WHERE series = ?",
                                     (series,)).fetchone()
            store.conn.execute(UPSERT_SPARK, (series, *spark_add(row, ts,
                                                                  beta_text(estimate[2]))))
        store.conn.execute(_UPSERT_CHECKPOINT, checkpoint)
        store.conn.execute(UPSERT_OFFSET, offset)
        for change in changes:
            outcome, alert_id = apply_alert_change(store, change, now=now)
            if alert_id is not None:
                summary[f"alerts_{outcome}"].append(alert_id)
    return summary


def spark_add(row: tuple | None, ts: str, beta: str) -> tuple[int, str, str]:
    """The ``sparklines`` cache row ``(n, ts text, beta text)`` after one more point.

    ``row`` is the series' ``(n, ts, beta)`` or ``None``. The usual point is the newest one:
    its text is appended (and the oldest point's cut once ``SPARK_KEEP`` are held) without
    splitting the lists, 10 us less per :func:`write_one` call than the general way, taken for
    any other point: the points as pairs, the new one sorted in, the last ``SPARK_KEEP`` kept.
    Both give the same text (:func:`monitor.store.schema.spark_text`).

    >>> spark_add((2, "2024-01-01T00:00:00Z,2024-01-01T01:00:00Z", "-1.5,nan"),
    ...           "2024-01-01T02:00:00Z", "-1.25")
    (3, '2024-01-01T00:00:00Z,2024-01-01T01:00:00Z,2024-01-01T02:00:00Z', '-1.5,nan,-1.25')
    """
    if row is not None and 0 < row[0] <= SPARK_KEEP and row[1].rpartition(",")[2] < ts:
        n, ts_text, beta_text_ = row
        if n == SPARK_KEEP:                      # cut the oldest point (SPARK_KEEP >= 2)
            ts_text = ts_text.partition(",")[2]
            beta_text_ = beta_text_.partition(",")[2]
            n -= 1
        return n + 1, f"{ts_text},{ts}", f"{beta_text_},{beta}"
    pairs = list(zip(row[1].split(","), row[2].split(","))) if row else []
    new = (ts, beta)
    pairs = pairs + [new] if not pairs or pairs[-1][0] < ts else sorted(pairs + [new])
    return spark_text(pairs[-SPARK_KEEP:])


def rows_read_by_source(store: Store) -> dict[str, int]:
    """``{source: rows read}`` of every committed source position."""
    return {r["source"]: int(r["rows_read"])
            for r in store.rows("SELECT source, rows_read FROM source_offsets")}


def checkpoint_texts(store: Store, size: int = 4096):
    """Every series' checkpoint as ``(series, state text)``, in series order, read in blocks
    of ``size`` rows (a restart decodes them as they come instead of holding every parsed
    checkpoint at once)."""
    with store.lock:
        cur = store.conn.execute("SELECT series, state FROM checkpoints ORDER BY series")
    while True:
        with store.lock:
            block = cur.fetchmany(size)
        if not block:
            return
        yield from block
