"""Read-only queries for the dashboard, ``elmon status`` and ``elmon alerts``.

Everything public here is re-exported by :mod:`monitor.store`, which documents the whole store.
Each function takes a :class:`~monitor.store.core.Store` (open it with ``readonly=True`` in a
reader process) or a path, and returns a pandas DataFrame, except :func:`store_summary`
(a dict). Timestamp columns come back as tz-aware UTC datetimes; JSON columns (``details``,
``controls``, ``raw``, ``position``) as Python objects. Every query runs on an index:
none scans the estimate or observation history of all series.
"""

from __future__ import annotations

import json
from typing import Any, Iterable

import numpy as np
import pandas as pd

from monitor.errors import ValidationError
from monitor.store.alerts import ALERT_STATES, get_alert
from monitor.store.codec import format_ts, from_json, parse_ts, parse_ts_column, wall_ts
from monitor.store.core import Store, accepts_path
from monitor.store.schema import SPARK_KEEP


_ALERT_TS = ("opened_ts", "opened_at", "updated_at", "resolved_ts", "resolved_at",
             "last_reminded_at")
_SEVERITY_RANK = "CASE severity WHEN 'critical' THEN 3 WHEN 'warning' THEN 2 ELSE 1 END"


def _bounds(start: Any, end: Any) -> tuple[str, str]:
    return ("" if start is None else format_ts(start)), ("\uffff" if end is None else
                                                        format_ts(end))


def _parse(df: pd.DataFrame, col: str) -> pd.DataFrame:
    if col in df.columns:
        df[col] = [from_json(v) for v in df[col]]
    return df


@accepts_path(readonly=True)
def latest_estimates(store: Store) -> pd.DataFrame:
    """One row per series: its newest estimate, counts, bounds and open alerts.

    Columns: ``series, ts, beta, beta_se, beta_lo, beta_hi, n_eff, status, intercept,
    resid_sd, innovation, z, first_ts, last_obs_ts, n_obs, n_estimates, open_alerts,
    alert_severity, low, high, forgetting, bound_low, bound_high, beta_pooled, beta_pooled_se, group,
    delay50_obs, band`` (``band``: the kind of the newest estimate's band, issue 13; ``beta_pooled`` .. ``group`` NULL unless groups are set:
    :mod:`monitor.store.groups`; ``delay50_obs``: expected observations to detect a change of
    0.5 in b, :mod:`monitor.store.detection`). ``ts`` is the time of the
    newest estimate and ``last_obs_ts`` of the newest observation. A series without an estimate yet has NULL
    numbers and status ``warming_up``; ``alert_severity`` is the worst open severity or NULL.
    """
    sql = (
        "SELECT s.series, l.ts, l.beta, l.beta_se, l.beta_lo, l.beta_hi, l.n_eff,"
        " coalesce(l.status, 'warming_up') AS status, l.intercept, l.resid_sd, l.innovation,"
        " l.z, s.first_ts, s.last_ts AS last_obs_ts, s.n_obs, s.n_estimates,"
        " coalesce(a.n, 0) AS open_alerts,"
        " CASE a.worst WHEN 3 THEN 'critical' WHEN 2 THEN 'warning' WHEN 1 THEN 'info' END"
        " AS alert_severity, s.low, s.high, s.forgetting, s.bound_low, s.bound_high,"
        ' l.beta_pooled, l.beta_pooled_se, l."group", l.delay50_obs, l.band'
        " FROM series s LEFT JOIN latest_estimates l ON l.series = s.series"
        f" LEFT JOIN (SELECT series, count(*) AS n, max({_SEVERITY_RANK}) AS worst FROM alerts"
        " WHERE state != 'resolved' GROUP BY series) a ON a.series = s.series"
        " ORDER BY s.series")
    return store.frame(sql, ts_columns=("ts", "first_ts", "last_obs_ts"))


@accepts_path(readonly=True)
def series_history(store: Store, series: str, start: Any = None, end: Any = None) -> pd.DataFrame:
    """A series' stored estimates with their bands, joined with the observed price and quantity.

    Columns: ``series, ts, beta, beta_se, beta_lo, beta_hi, n_eff, status, intercept,
    resid_sd, innovation, z, price, quantity, band, exposure``; ordered by ``ts``; ``start`` /
    ``end`` inclusive. ``band`` is the kind of each estimate's band ("hc", "hac", "classic";
    NULL with no band or when stored before the kind was recorded); ``exposure`` the Poisson
    model's exposure of the observation (NULL: none).
    """
    lo, hi = _bounds(start, end)
    sql = ("SELECT e.series, e.ts, e.beta, e.beta_se, e.beta_lo, e.beta_hi, e.n_eff, e.status,"
           " e.intercept, e.resid_sd, e.innovation, e.z, o.price, o.quantity, e.band,"
           " o.exposure"
           " FROM estimates e LEFT JOIN observations o ON o.series = e.series AND o.ts = e.ts"
           " WHERE e.series = ? AND e.ts >= ? AND e.ts <= ? ORDER BY e.ts")
    return store.frame(sql, (series, lo, hi), ts_columns=("ts",))


@accepts_path(readonly=True)
def series_observations(store: Store, series: str, start: Any = None,
                        end: Any = None) -> pd.DataFrame:
    """A series' observations: ``id, series, ts, price, quantity, controls, source, source_row,
    exposure`` (the Poisson model's exposure; NULL: none, read as 1)."""
    lo, hi = _bounds(start, end)
    df = store.frame("SELECT id, series, ts, price, quantity, controls, source, source_row,"
                     " exposure"
                     " FROM observations WHERE series = ? AND ts >= ? AND ts <= ? ORDER BY ts",
                     (series, lo, hi), ts_columns=("ts",))
    return _parse(df, "controls")


@accepts_path(readonly=True)
def list_alerts(store: Store, state: str | Iterable[str] | None = None, series: str | None = None,
                kind: str | None = None, limit: int | None = None) -> pd.DataFrame:
    """Alerts, newest first, filtered by state (one, several, or ``'active'`` = not resolved),
    series and kind. Columns are those of the ``alerts`` table (``details`` parsed)."""
    where, params = [], []
    if state is not None:
        states = ["open", "acknowledged"] if state == "active" else \
            [state] if isinstance(state, str) else list(state)
        unknown = [s for s in states if s not in ALERT_STATES]
        if unknown:
            raise ValidationError(f"alert state {unknown[0]!r} must be one of "
                                  f"{', '.join(ALERT_STATES)} or 'active'", field="state",
                                  value=unknown[0])
        where.append(f"state IN ({', '.join('?' * len(states))})")
        params += states
    for col, value in (("series", series), ("kind", kind)):
        if value is not None:
            where.append(f"{col} = ?")
            params.append(value)
    sql = "SELECT * FROM alerts" + (" WHERE " + " AND ".join(where) if where else "") + \
        " ORDER BY id DESC"
    if limit is not None:
        sql += " LIMIT ?"
        params.append(int(limit))
    return _parse(store.frame(sql, params, ts_columns=_ALERT_TS), "details")


@accepts_path(readonly=True)
def open_alerts(store: Store) -> pd.DataFrame:
    """Alerts not resolved (open or acknowledged), worst severity first, then oldest first."""
    df = store.frame(f"SELECT * FROM alerts WHERE state != 'resolved' ORDER BY {_SEVERITY_RANK}"
                     " DESC, opened_ts, id", ts_columns=_ALERT_TS)
    return _parse(df, "details")


@accepts_path(readonly=True)
def alert_events(store: Store, alert_id: int) -> pd.DataFrame:
    """An alert's history: ``id, alert_id, event, at, ts, who, note`` in order."""
    get_alert(store, alert_id)
    return store.frame("SELECT id, alert_id, event, at, ts, who, note FROM alert_events"
                       " WHERE alert_id = ? ORDER BY id", (int(alert_id),),
                       ts_columns=("at", "ts"))


@accepts_path(readonly=True)
def source_status(store: Store, now: Any = None) -> pd.DataFrame:
    """Every source: ``source, kind, position, rows_read, rows_rejected, last_run_at,
    last_error, lag_seconds`` (wall seconds since its last committed run)."""
    df = store.frame("SELECT source, kind, position, rows_read, rows_rejected, last_run_at,"
                     " last_error FROM source_offsets ORDER BY source",
                     ts_columns=("last_run_at",))
    now_ts = parse_ts(wall_ts(now))
    df["lag_seconds"] = (now_ts - df["last_run_at"]).dt.total_seconds() if len(df) else []
    return _parse(df, "position")


@accepts_path(readonly=True)
def store_summary(store: Store, now: Any = None, stale_after: float = 3600.0) -> dict:
    """Counts for a status line: series, observations, estimates, rejects, alerts by state and
    by kind, outbox by status, sources and stale sources (no run for ``stale_after`` seconds),
    newest observation time, schema version and the file's size in bytes."""
    one = store.rows("SELECT count(*) AS series, coalesce(sum(n_obs), 0) AS observations,"
                     " coalesce(sum(n_estimates), 0) AS estimates, max(last_ts) AS last_obs_ts"
                     " FROM series")[0]
    by = store.rows("SELECT kind, state, count(*) AS n FROM alerts GROUP BY kind, state")
    kinds: dict[str, dict[str, int]] = {}
    states = {s: 0 for s in ALERT_STATES}
    for r in by:
        kinds.setdefault(r["kind"], {})[r["state"]] = r["n"]
        states[r["state"]] += r["n"]
    outbox = {s: 0 for s in ("pending", "delivered", "failed")}
    outbox.update({r["status"]: r["n"] for r in store.rows(
        "SELECT status, count(*) AS n FROM outbox GROUP BY status")})
    sources = source_status(store, now=now)
    stale = int((sources["lag_seconds"] > stale_after).sum()) if len(sources) else 0
    size = store.path.stat().st_size if store.path.exists() else 0
    return {**one, "rejects": int(store.scalar("SELECT count(*) FROM rejects")),
            "alerts_by_state": states, "alerts_by_kind": kinds,
            "open_alerts": states["open"] + states["acknowledged"], "outbox": outbox,
            "sources": len(sources), "stale_sources": stale,
            "schema_version": store.schema_version(), "file_bytes": size}


@accepts_path(readonly=True)
def list_rejects(store: Store, source: str | None = None, limit: int | None = None) -> pd.DataFrame:
    """Rejected rows, newest first: ``id, source, row, series, ts, field, value, raw, reason,
    rejected_at`` (``ts`` as given, since it may be the unparsable value; ``raw`` parsed)."""
    sql, params = "SELECT * FROM rejects", []
    if source is not None:
        sql += " WHERE source = ?"
        params.append(source)
    sql += " ORDER BY id DESC"
    if limit is not None:
        sql += " LIMIT ?"
        params.append(int(limit))
    return _parse(store.frame(sql, params, ts_columns=("rejected_at",)), "raw")


@accepts_path(readonly=True)
def sparkline_data(store: Store, series_list: Iterable[str] | None = None,
                   points: int = 30) -> pd.DataFrame:
    """The last ``points`` stored estimates of each series (all series, or ``series_list``).

    Long format ``series, ts, beta`` ordered by series then ts. Up to ``SPARK_KEEP`` (60)
    points come from the ``sparklines`` cache that :func:`write_batch` keeps: one row per
    series, so 10,000 trend lines cost one small read. More points are read from the history
    (per series an index seek for its ``points``-th newest ``ts``, then a range scan).
    """
    points = int(points)
    if points < 1:
        raise ValidationError(f"points = {points}: need at least 1", field="points")
    where, params = "", []
    if series_list is not None:
        where = " WHERE series IN (SELECT value FROM json_each(?))"
        params.append(json.dumps([str(s) for s in series_list]))
    if points > SPARK_KEEP:
        sql = ("SELECT e.series, e.ts, e.beta FROM series s CROSS JOIN estimates e ON"
               " e.series = s.series AND e.ts >= coalesce((SELECT e2.ts FROM estimates e2 WHERE"
               " e2.series = s.series ORDER BY e2.ts DESC LIMIT 1 OFFSET ?), '')"
               + where.replace("series IN", "s.series IN") + " ORDER BY e.series, e.ts")
        return store.frame(sql, [points - 1] + params, ts_columns=("ts",))
    rows = store.rows("SELECT series, n, ts, beta FROM sparklines" + where + " ORDER BY series",
                      params)
    names, counts, ts_parts, beta_parts = [], [], [], []
    for r in rows:
        ts, beta = r["ts"].split(","), r["beta"].split(",")
        if r["n"] > points:
            ts, beta = ts[-points:], beta[-points:]
        names.append(r["series"])
        counts.append(len(ts))
        ts_parts.extend(ts)
        beta_parts.extend(beta)
    return pd.DataFrame({"series": np.repeat(np.array(names, dtype=object), counts),
                         "ts": parse_ts_column(pd.Series(ts_parts, dtype=object)),
                         "beta": np.array(beta_parts, dtype="float64")})


@accepts_path(readonly=True)
def list_silences(store: Store, active_only: bool = True, now: Any = None) -> pd.DataFrame:
    """Silences (only those still running at ``now`` unless ``active_only=False``)."""
    sql, params = "SELECT * FROM silences", []
    if active_only:
        sql += " WHERE until > ?"
        params.append(wall_ts(now))
    return store.frame(sql + " ORDER BY id", params, ts_columns=("until", "created_at"))


@accepts_path(readonly=True)
def list_outbox(store: Store, status: str | None = None, limit: int | None = None) -> pd.DataFrame:
    """Outbox rows (deliveries), newest first, optionally of one status (pending, delivered,
    failed); ``payload`` parsed."""
    sql, params = "SELECT * FROM outbox", []
    if status is not None:
        sql += " WHERE status = ?"
        params.append(status)
    sql += " ORDER BY id DESC"
    if limit is not None:
        sql += " LIMIT ?"
        params.append(int(limit))
    return _parse(store.frame(sql, params, ts_columns=("next_attempt_at", "delivered_at",
                                                       "created_at")), "payload")


@accepts_path(readonly=True)
def experiment_observations(store: Store, patterns: Iterable[str], start: Any = None,
                            end: Any = None) -> pd.DataFrame:
    """Observations of the series whose id matches any glob pattern (SQLite ``GLOB``: ``*``,
    ``?``, ``[...]``), ``start`` / ``end`` inclusive, ordered by ``ts`` then ``series``.

    Columns: ``series, ts, price, quantity, controls, exposure`` (controls parsed; exposure
    NULL where the row has none). The matching series
    come from the ``series`` table; their rows are read on the ``(series, ts)`` index, so an
    experiment's window costs its own rows, not the whole history (issue 18).
    """
    pats = [str(p) for p in patterns]
    if not pats:
        return pd.DataFrame(columns=["series", "ts", "price", "quantity", "controls",
                                     "exposure"])
    lo, hi = _bounds(start, end)
    match = " OR ".join("series GLOB ?" for _ in pats)
    df = store.frame("SELECT series, ts, price, quantity, controls, exposure FROM observations"
                     f" WHERE series IN (SELECT series FROM series WHERE {match})"
                     " AND ts >= ? AND ts <= ? ORDER BY ts, series",
                     (*pats, lo, hi), ts_columns=("ts",))
    return _parse(df, "controls")
