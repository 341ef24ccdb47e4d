"""Atomic batch writes, checkpoints, source offsets and estimate thinning.

Everything public here is re-exported by :mod:`monitor.store`, which documents the whole store.
Rows are written with ``executemany`` inside one ``BEGIN IMMEDIATE`` transaction (sqlite-utils'
``insert_all`` commits per chunk and is about five times slower for this use).
"""

from __future__ import annotations

import contextlib
import gc
import json
from typing import Any, Iterable, Mapping, NamedTuple

import numpy as np
import pandas as pd

from monitor.errors import ConfigError, StoreError
from monitor.store.alerts import apply_alert_change
from monitor.store.codec import format_ts_array, from_json, wall_ts
from monitor.store.core import Store, accepts_path
from monitor.store.rows import (ESTIMATE_COLUMNS, OBSERVATION_COLUMNS, as_frame, checkpoint_rows,
                                estimate_rows, newest_per_series, observation_rows,
                                offset_statements, reject_rows, series_counts, series_time_order,
                                settings_sql, SeriesTimeOrder)
from monitor.store.schema import SPARK_KEEP, spark_text


UPSERT_SPARK = ("INSERT INTO sparklines (series, n, ts, beta) VALUES (?, ?, ?, ?) ON CONFLICT "
                 "(series) DO UPDATE SET n = excluded.n, ts = excluded.ts, beta = excluded.beta")


def _spark_updates(store: Store, est_df: pd.DataFrame, est_rows: list[tuple],
                   by: SeriesTimeOrder | None = None) -> list[tuple]:
    """New sparkline cache rows: each series' cached points plus this batch's, last SPARK_KEEP.

    Rows of a batch normally come after the cached ones; a late estimate (older ``ts``) is
    merged in time order. The batch's rows are taken in (series, ts) order
    (:func:`monitor.store.rows.series_time_order`), the last SPARK_KEEP of each series. Names,
    times and betas are read from the insert tuples (``est_rows``: the same text and floats as
    the frame, without converting whole Arrow columns to Python objects); a batch that comes
    after the cached points is joined to the cached text as text, splitting only the cached
    points it drops.
    """
    by = series_time_order(est_df) if by is None else by
    sizes = by.ends - by.starts
    keep = np.minimum(sizes, SPARK_KEEP)
    # positions in ``by.order`` of each series' last ``keep`` rows, series after series
    lo = np.repeat(by.ends - keep, keep)
    idx = by.order[lo + np.arange(lo.size) - np.repeat(np.cumsum(keep) - keep, keep)]
    ends = np.cumsum(keep)
    starts = ends - keep
    taken = [est_rows[i] for i in idx.tolist()]
    names = [taken[a][0] for a in starts.tolist()]
    cached = {r[0]: r[1:] for r in store.conn.execute(
        "SELECT series, n, ts, beta FROM sparklines WHERE series IN "
        "(SELECT value FROM json_each(?))", (json.dumps(names),))}
    ts_all = [r[1] for r in taken]
    # the rows' beta (None for NULL) as beta_text writes it: repr, 'nan' for NULL
    beta = np.array([r[2] for r in taken], dtype=np.float64)
    beta_all = list(map(repr, beta.tolist()))
    out = []
    for name, a, b in zip(names, starts.tolist(), ends.tolist()):
        new_ts, new_beta = ts_all[a:b], beta_all[a:b]
        old = cached.get(name)
        if old is not None and 0 < old[0] <= SPARK_KEEP and \
                old[1][old[1].rfind(",") + 1:] < new_ts[0]:
            # the batch comes after the cached points: keep the last ``room`` of them (the
            # text after the first ``old_n - room`` commas; ``n`` counts the cached points, as
            # monitor.store.live.spark_add relies on too)
            old_n, old_ts, old_beta = old
            room = min(SPARK_KEEP - (b - a), old_n)
            if room > 0:
                if room < old_n:
                    drop = old_n - room
                    old_ts = old_ts.split(",", drop)[drop]
                    old_beta = old_beta.split(",", drop)[drop]
                out.append((name, room + b - a, old_ts + "," + ",".join(new_ts),
                            old_beta + "," + ",".join(new_beta)))
                continue
            old = None                     # the batch alone fills the cache
        if old is None:
            out.append((name, b - a, ",".join(new_ts), ",".join(new_beta)))
            continue
        pairs = sorted(list(zip(old[1].split(","), old[2].split(","))) +
                       list(zip(new_ts, new_beta)))
        out.append((name, *spark_text(pairs[-SPARK_KEEP:])))
    return out


class Checkpoint(NamedTuple):
    """A series' saved state: ``(state, last_ts, last_pos)``."""

    state: Any
    last_ts: str | None
    last_pos: Any


INSERT_OBS = ("INSERT INTO observations (series, ts, price, quantity, controls, source, "
               "source_row, exposure) VALUES (?, ?, ?, ?, ?, ?, ?, ?)")
INSERT_EST = f"INSERT INTO estimates ({', '.join(ESTIMATE_COLUMNS)}) VALUES " \
              f"({', '.join('?' * len(ESTIMATE_COLUMNS))})"
UPSERT_LATEST = (f"INSERT INTO latest_estimates ({', '.join(ESTIMATE_COLUMNS)}) VALUES "
                  f"({', '.join('?' * len(ESTIMATE_COLUMNS))}) ON CONFLICT (series) DO UPDATE SET "
                  + ", ".join(f"{c} = excluded.{c}" for c in ESTIMATE_COLUMNS[1:])
                  + " WHERE excluded.ts >= latest_estimates.ts")
UPSERT_SERIES_COUNTS = (
    "INSERT INTO series (series, first_ts, last_ts, n_obs, n_estimates, updated_at) "
    "VALUES (?, ?, ?, ?, ?, ?) ON CONFLICT (series) DO UPDATE SET "
    "first_ts = min(coalesce(first_ts, excluded.first_ts), coalesce(excluded.first_ts, first_ts)),"
    " last_ts = max(coalesce(last_ts, excluded.last_ts), coalesce(excluded.last_ts, last_ts)),"
    " n_obs = n_obs + excluded.n_obs, n_estimates = n_estimates + excluded.n_estimates,"
    " updated_at = excluded.updated_at")


UPSERT_OFFSET = (
    "INSERT INTO source_offsets (source, kind, position, rows_read, rows_rejected, last_run_at,"
    " last_error) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7) ON CONFLICT (source) DO UPDATE SET"
    " kind = coalesce(excluded.kind, kind),"
    " position = CASE WHEN ?8 THEN excluded.position ELSE position END,"
    " rows_read = rows_read + excluded.rows_read,"
    " rows_rejected = rows_rejected + excluded.rows_rejected,"
    " last_run_at = excluded.last_run_at, last_error = excluded.last_error")


@accepts_path(readonly=False)
def write_batch(store: Store, *, observations: Any = None, estimates: Any = None,
                alert_changes: Iterable[Any] | None = None, checkpoints: Any = None,
                offsets: Any = None, rejects: Any = None, series: Any = None,
                latest_estimates: Any = None, now: Any = None) -> dict:
    """Write one processed batch in ONE transaction: all of it, or (on any error) none of it.

    Parameters
    ----------
    observations : DataFrame or list of dict, optional
        Columns ``series, ts, price, quantity`` and optionally ``controls`` (dict or JSON
        text), ``source``, ``source_row``, ``exposure`` (the Poisson model's exposure, > 0;
        missing or NaN: NULL, no exposure). Any other columns are packed into ``controls``.
        A ``(series, ts)`` already stored or repeated in the batch raises :class:`StoreError`
        (duplicates are decided by validation upstream; see :func:`existing_observation_keys`).
        Each series' ``first_ts``, ``last_ts`` and ``n_obs`` are updated from these rows.
    estimates : DataFrame or list of dict, optional
        The estimate rows to keep in the history (columns of :data:`ESTIMATE_COLUMNS`; missing
        numeric columns are NULL). NaN becomes NULL; a NaN ``beta`` is only allowed with
        status ``warming_up`` or ``low_variation``; infinities are refused.
    latest_estimates : DataFrame or list of dict, optional
        Rows from which the newest per series updates ``latest_estimates``; defaults to
        ``estimates``. Pass the unthinned frame when ``estimates`` went through
        :func:`thin_estimates`.
    alert_changes : iterable, optional
        Applied in order by :func:`monitor.store.alerts.apply_alert_change`: dicts with
        ``action`` ``'open'`` (default) / ``'resolve'`` / ``'remind'``, or
        :class:`monitor.types.Alert` values (opened, with ``kind = rule``).
    checkpoints : mapping series -> {state, last_ts, last_pos} or list of dict, optional
        Upserted; ``state`` and ``last_pos`` are stored as JSON (NaN kept exactly).
    offsets : mapping source -> {kind, position, rows_read, rows_rejected, last_error}, optional
        Upserted. ``rows_read`` / ``rows_rejected`` are this batch's counts, ADDED to the
        stored totals; a missing ``position`` keeps the stored one; ``last_error`` missing
        clears it. ``last_run_at`` is set to ``now``.
    rejects : DataFrame or list of dict, optional
        ``source, row, series, ts, field, value, raw, reason``; ``reason`` required.
    series : mapping or list of dict, optional
        Settings per series: any of ``low``, ``high`` (elasticity bounds), ``forgetting``,
        ``settings`` (JSON-able); keys not given are left unchanged.
    now : optional
        Wall time for ``*_at`` columns (default: the clock).

    Returns
    -------
    dict
        Counts per table and the alert ids ``alerts_opened``, ``alerts_resolved``,
        ``alerts_reminded`` and ``alerts_unchanged`` (deduplicated or nothing to resolve).
    """
    with _gc_paused():
        return _write_batch(store, observations, estimates, alert_changes, checkpoints, offsets,
                            rejects, series, latest_estimates, now)


@contextlib.contextmanager
def _gc_paused():
    """Python's cyclic garbage collector off while a batch's rows become tuples (issue 15).

    A batch makes a tuple per row and table: about 100,000 new container objects for 50,000
    observations with their estimates, each 700 of which started a collection that found
    nothing (tuples of text and numbers hold no cycles); 12 ms of the 24 ms building the
    estimate and observation tuples of a 50,000-row batch. Reference counting still frees
    everything; the collector is on again (if it was on) when the batch returns or fails.
    """
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()


def _write_batch(store: Store, observations: Any, estimates: Any, alert_changes: Any,
                 checkpoints: Any, offsets: Any, rejects: Any, series: Any,
                 latest_estimates: Any, now: Any) -> dict:
    now = wall_ts(now)
    summary: dict[str, Any] = {"observations": 0, "estimates": 0, "rejects": 0,
                               "checkpoints": 0, "offsets": 0, "series": 0,
                               "alerts_opened": [], "alerts_resolved": [],
                               "alerts_reminded": [], "alerts_unchanged": []}
    obs_df = obs_rows = est_df = est_rows = latest_rows = None
    if observations is not None:
        obs_df, obs_rows = observation_rows(observations)
    est_order = None
    if estimates is not None:
        est_df, est_rows = estimate_rows(estimates)
        est_order = series_time_order(est_df)
    if latest_estimates is not None and est_rows is not None and _same_frame(latest_estimates,
                                                                             estimates):
        latest_rows = newest_per_series(est_df, est_rows, est_order)  # rows checked above
    elif latest_estimates is not None:
        latest_rows = estimate_rows(latest_estimates, newest=True)[1]
    elif est_rows:
        latest_rows = newest_per_series(est_df, est_rows, est_order)
    settings_df = as_frame(series, key="series") if series is not None else None
    settings_stmts = settings_sql(settings_df, now) if settings_df is not None else []
    own_bounds = settings_df is not None and bool({"low", "high"} & set(settings_df.columns))
    reject_params = reject_rows(rejects, now) if rejects is not None else []
    ckpt_params = checkpoint_rows(checkpoints, now) if checkpoints is not None else []
    offset_params = offset_statements(offsets, now) if offsets is not None else []
    changes = list(alert_changes or [])
    with store.atomic():
        for sql, params in _runs(settings_stmts):      # one executemany per run of equal SQL
            store.conn.executemany(sql, params)
        if own_bounds and settings_stmts:
            store.bounds_version += 1            # Monitor.own_bounds drops its cache
        summary["series"] = len(settings_stmts)
        counts = series_counts(obs_df, est_df, now, est_order)
        if counts:
            store.conn.executemany(UPSERT_SERIES_COUNTS, counts)
        if obs_rows:
            try:
                store.conn.executemany(INSERT_OBS, obs_rows)
            except Exception as exc:
                if "UNIQUE" not in str(exc):
                    raise
                raise StoreError(_duplicate_message(store, obs_df)) from None
            summary["observations"] = len(obs_rows)
        if est_rows:
            try:
                store.conn.executemany(INSERT_EST, est_rows)
            except Exception as exc:
                if "UNIQUE" not in str(exc):
                    raise
                raise StoreError("an estimate for the same (series, ts) is already stored: "
                                 f"{exc}") from None
            summary["estimates"] = len(est_rows)
        if latest_rows:
            store.conn.executemany(UPSERT_LATEST, latest_rows)
        if est_rows:
            store.conn.executemany(UPSERT_SPARK, _spark_updates(store, est_df, est_rows,
                                                                est_order))
        if reject_params:
            store.conn.executemany(
                "INSERT INTO rejects (source, row, series, ts, field, value, raw, reason, "
                "rejected_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)", reject_params)
            summary["rejects"] = len(reject_params)
        if ckpt_params:
            store.conn.executemany(
                "INSERT INTO checkpoints (series, state, last_ts, last_pos, updated_at) VALUES "
                "(?, ?, ?, ?, ?) ON CONFLICT (series) DO UPDATE SET state = excluded.state, "
                "last_ts = excluded.last_ts, last_pos = excluded.last_pos, "
                "updated_at = excluded.updated_at", ckpt_params)
            summary["checkpoints"] = len(ckpt_params)
        if offset_params:
            store.conn.executemany(UPSERT_OFFSET, offset_params)
            summary["offsets"] = len(offset_params)
        for change in changes:
            outcome, alert_id = apply_alert_change(store, change, now=now)
            if alert_id is not None:
                summary[f"alerts_{outcome}"].append(alert_id)
    return summary


def _same_frame(a: Any, b: Any) -> bool:
    """Whether two estimate inputs are the same rows: the same object, or two DataFrames
    with equal columns, dtypes and values (``DataFrame.equals``: NaN equal to NaN in the same
    place), as the engine's unthinned and kept frames are when every estimate is kept."""
    if a is b:
        return True
    if not (isinstance(a, pd.DataFrame) and isinstance(b, pd.DataFrame)):
        return False
    if a.shape != b.shape or list(a.columns) != list(b.columns):
        return False
    return a.reset_index(drop=True).equals(b.reset_index(drop=True))


def _runs(statements: list[tuple[str, tuple]]) -> list[tuple[str, list[tuple]]]:
    """Consecutive statements with the same SQL text as one ``(sql, [params, ...])`` each, in
    order (the same statements in the same order, run by fewer calls)."""
    out: list[tuple[str, list[tuple]]] = []
    for sql, params in statements:
        if out and out[-1][0] == sql:
            out[-1][1].append(params)
        else:
            out.append((sql, [params]))
    return out


def _duplicate_message(store: Store, df: pd.DataFrame) -> str:
    keys = existing_observation_keys(store, df)
    if keys:
        s, t = sorted(keys)[0]
        return (f"observation (series {s!r}, ts {t!r}) is already stored; {len(keys)} row(s) "
                f"of the batch repeat stored observations, the batch was not written")
    return "the batch repeats a stored observation; the batch was not written"


@accepts_path(readonly=True)
def existing_observation_keys(store: Store, frame: Any) -> set[tuple[str, str]]:
    """The ``(series, ts)`` pairs of ``frame`` (columns series, ts) already in the store.

    One indexed range query per distinct series; ``ts`` is normalized with
    :func:`format_ts_array` first.
    """
    df = as_frame(frame)
    if not len(df):
        return set()
    df = pd.DataFrame({"series": df["series"].astype(str), "ts": format_ts_array(df["ts"])})
    found: set[tuple[str, str]] = set()
    for s, grp in df.groupby("series"):
        wanted = set(grp["ts"])
        stored = store.rows("SELECT ts FROM observations WHERE series = ? AND ts BETWEEN ? AND ?",
                            (s, min(wanted), max(wanted)))
        found.update((s, r["ts"]) for r in stored if r["ts"] in wanted)
    return found


@accepts_path(readonly=True)
def load_checkpoints(store: Store) -> dict[str, Checkpoint]:
    """Every series' checkpoint: ``series -> Checkpoint(state, last_ts, last_pos)``."""
    return {r["series"]: Checkpoint(from_json(r["state"]), r["last_ts"], from_json(r["last_pos"]))
            for r in store.rows("SELECT series, state, last_ts, last_pos FROM checkpoints")}


@accepts_path(readonly=True)
def get_offset(store: Store, source: str) -> dict | None:
    """A source's saved offset (``position`` parsed from JSON), or ``None`` if never run."""
    rows = store.rows("SELECT * FROM source_offsets WHERE source = ?", (source,))
    if not rows:
        return None
    row = rows[0]
    row["position"] = from_json(row["position"])
    return row


def thin_estimates(frame: pd.DataFrame, every_n: int,
                   previous_status: Mapping[str, str] | None = None,
                   start_count: Mapping[str, int] | None = None) -> pd.DataFrame:
    """Keep every ``every_n``-th update of each series plus every change of status.

    Row ``k`` of a series (``k = start_count[series] + position in frame``, counted from 1)
    is kept when ``k % every_n == 0`` or its ``status`` differs from the update before it
    (``previous_status[series]`` for the series' first row in ``frame``; none known counts as
    a change). The choice depends only on each row's global update number and status, never
    on where batches start, so a resumed run keeps exactly the rows an uninterrupted one does.

    >>> f = pd.DataFrame({"series": ["a"] * 6, "ts": range(6),
    ...                   "status": ["warming_up", "ok", "ok", "ok", "changed", "changed"]})
    >>> kept = thin_estimates(f, 4, previous_status={"a": "warming_up"}, start_count={"a": 10})
    >>> kept["ts"].tolist()   # updates 12 and 16 (every 4th), and the changes at ts 1 and 4
    [1, 4, 5]
    """
    if isinstance(every_n, bool) or not isinstance(every_n, (int, np.integer)) or every_n < 1:
        raise ConfigError(f"every_n = {every_n!r}: the estimate retention must be an integer "
                          f">= 1 (1 keeps every update)")
    if every_n == 1 or not len(frame):
        return frame.copy()
    series = frame["series"].astype(str)
    count = frame.groupby(series, sort=False).cumcount().to_numpy() + 1
    if start_count:
        count = count + series.map(start_count).fillna(0).to_numpy(dtype=np.int64)
    prev = frame.groupby(series, sort=False)["status"].shift(1)
    first = prev.isna()
    if previous_status:
        prev = prev.where(~first, series.map(previous_status))
    changed = (frame["status"] != prev) | prev.isna()
    return frame[(count % every_n == 0) | changed.to_numpy()].copy()
