"""Atomic batch writes, checkpoints, source offsets and estimate thinning.

Everything public here is re-exported by :mod:`monitor.store`, which documents the whole store.
Rows are written with ``executemany`` inside one ``BEGIN IMMEDIATE`` transaction (sqlite-utils'
``insert_all`` commits per chunk and is about five times slower for this use).
"""

from __future__ import annotations

import dataclasses
from typing import Any, Iterable, Mapping, NamedTuple

import numpy as np
import pandas as pd

from monitor.errors import ConfigError, StoreError, ValidationError
from monitor.store_alerts import apply_alert_change
from monitor.store_core import Store, accepts_path, format_ts, format_ts_array, from_json, to_json, utc_now, \
    wall_ts
from monitor.types import STATUS_LABELS

OBSERVATION_COLUMNS = ("series", "ts", "price", "quantity", "controls", "source", "source_row")
ESTIMATE_COLUMNS = ("series", "ts", "beta", "beta_se", "beta_lo", "beta_hi", "n_eff", "status",
                    "intercept", "resid_sd", "innovation", "z")
_EST_FLOATS = ("beta", "beta_se", "beta_lo", "beta_hi", "n_eff", "intercept", "resid_sd",
               "innovation", "z")
_SERIES_SETTINGS = ("low", "high", "forgetting", "settings")


class Checkpoint(NamedTuple):
    """A series' saved state: ``(state, last_ts, last_pos)``."""

    state: Any
    last_ts: str | None
    last_pos: Any


def _frame(data: Any, key: str | None = None) -> pd.DataFrame:
    """DataFrame from a DataFrame, list of dicts/dataclasses, or a mapping key -> dict."""
    if isinstance(data, pd.DataFrame):
        return data.reset_index(drop=True)
    if isinstance(data, Mapping) and key is not None:
        data = [{key: k, **(v if isinstance(v, Mapping) else {"value": v})}
                for k, v in data.items()]
    rows = [dataclasses.asdict(r) if dataclasses.is_dataclass(r) else dict(r) for r in data]
    return pd.DataFrame.from_records(rows)


def _objects(values: np.ndarray) -> list:
    """Float array -> list with ``None`` in place of NaN (SQLite NULL)."""
    out = values.astype(object)
    out[np.isnan(values)] = None
    return out.tolist()


def _floats(df: pd.DataFrame, col: str, what: str) -> np.ndarray:
    if col not in df.columns:
        return np.full(len(df), np.nan)
    try:
        values = pd.to_numeric(df[col], errors="raise").to_numpy(dtype="float64",
                                                                  na_value=np.nan)
    except (ValueError, TypeError) as exc:
        raise ValidationError(f"{what}: column {col!r} is not numeric ({exc})",
                              field=col) from None
    return values


def _where(df: pd.DataFrame, i: int, what: str) -> str:
    return f"{what} {i} (series {df['series'].iloc[i]!r}, ts {df['ts'].iloc[i]!r})"


def _require(df: pd.DataFrame, cols: Iterable[str], what: str) -> None:
    missing = [c for c in cols if c not in df.columns]
    if missing:
        raise ValidationError(f"{what}: missing column(s) {', '.join(missing)}",
                              field=missing[0])
    for col in ("series",):
        if col in df.columns:
            bad = df[col].isna() | (df[col].astype(str).str.len() == 0)
            if bad.any():
                i = int(np.flatnonzero(bad.to_numpy())[0])
                raise ValidationError(f"{what} {i}: field 'series' is empty", field="series",
                                      row=i)


def _observation_rows(data: Any) -> tuple[pd.DataFrame, list[tuple]]:
    df = _frame(data)
    what = "observation"
    _require(df, ("series", "ts", "price", "quantity"), what)
    df = df.assign(series=df["series"].astype(str), ts=format_ts_array(df["ts"]))
    price, qty = _floats(df, "price", what), _floats(df, "quantity", what)
    for name, vals, ok in (("price", price, price > 0), ("quantity", qty, qty >= 0)):
        bad = ~(np.isfinite(vals) & ok)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            rule = "must be > 0" if name == "price" else "must be >= 0"
            raise ValidationError(f"{_where(df, i, what)}: field {name!r} = {float(vals[i])!r}: "
                                  f"{name} {rule} and finite (validate rows before the store)",
                                  field=name, value=vals[i], row=i)
    dup = df.duplicated(["series", "ts"])
    if dup.any():
        i = int(np.flatnonzero(dup.to_numpy())[0])
        raise StoreError(f"{_where(df, i, what)} appears twice in the batch")
    extra = [c for c in df.columns if c not in OBSERVATION_COLUMNS]
    if "controls" in df.columns:
        controls = [v if isinstance(v, str) or v is None else
                    (None if isinstance(v, float) and np.isnan(v) else to_json(dict(v)))
                    for v in df["controls"].tolist()]
    elif extra:
        packed = df[extra].to_dict("records")
        controls = [to_json(r) for r in packed]
    else:
        controls = [None] * len(df)
    source = df["source"].astype(object).where(df["source"].notna(), None).tolist() \
        if "source" in df.columns else [None] * len(df)
    srow = _objects(_floats(df, "source_row", what))
    srow = [None if v is None else int(v) for v in srow]
    rows = list(zip(df["series"].tolist(), df["ts"].tolist(), price.tolist(), qty.tolist(),
                    controls, source, srow))
    return df, rows


def _estimate_rows(data: Any) -> tuple[pd.DataFrame, list[tuple]]:
    df = _frame(data)
    what = "estimate"
    _require(df, ("series", "ts", "status"), what)
    df = df.assign(series=df["series"].astype(str), ts=format_ts_array(df["ts"]))
    status = df["status"].astype(object)
    bad = ~status.isin(STATUS_LABELS)
    if bad.any():
        i = int(np.flatnonzero(bad.to_numpy())[0])
        raise ValidationError(f"{_where(df, i, what)}: field 'status' = {status.iloc[i]!r}: "
                              f"status must be one of {', '.join(STATUS_LABELS)}",
                              field="status", value=status.iloc[i], row=i)
    cols = []
    for col in _EST_FLOATS:
        vals = _floats(df, col, what)
        if np.isinf(vals).any():
            i = int(np.flatnonzero(np.isinf(vals))[0])
            raise ValidationError(f"{_where(df, i, what)}: field {col!r} = {float(vals[i])!r}: "
                                  f"estimates must be finite or NaN", field=col, row=i)
        if col == "beta":
            undefined = np.isnan(vals) & ~status.isin(("warming_up", "low_variation")).to_numpy()
            if undefined.any():
                i = int(np.flatnonzero(undefined)[0])
                raise ValidationError(f"{_where(df, i, what)}: beta is NaN with status "
                                      f"{status.iloc[i]!r}: an undefined beta needs status "
                                      f"warming_up or low_variation", field="beta", row=i)
        cols.append(_objects(vals))
    rows = [(s, t, *vals[:5], st, *vals[5:]) for s, t, st, *vals in
            zip(df["series"].tolist(), df["ts"].tolist(), status.tolist(), *cols)]
    return df, rows


def _latest(df: pd.DataFrame, rows: list[tuple]) -> list[tuple]:
    order = pd.DataFrame({"series": df["series"], "ts": df["ts"]})
    order = order.sort_values(["series", "ts"], kind="stable").drop_duplicates("series",
                                                                               keep="last")
    return [rows[i] for i in order.index]


_INSERT_OBS = ("INSERT INTO observations (series, ts, price, quantity, controls, source, "
               "source_row) VALUES (?, ?, ?, ?, ?, ?, ?)")
_INSERT_EST = f"INSERT INTO estimates ({', '.join(ESTIMATE_COLUMNS)}) VALUES " \
              f"({', '.join('?' * len(ESTIMATE_COLUMNS))})"
_UPSERT_LATEST = (f"INSERT INTO latest_estimates ({', '.join(ESTIMATE_COLUMNS)}) VALUES "
                  f"({', '.join('?' * len(ESTIMATE_COLUMNS))}) ON CONFLICT (series) DO UPDATE SET "
                  + ", ".join(f"{c} = excluded.{c}" for c in ESTIMATE_COLUMNS[1:])
                  + " WHERE excluded.ts >= latest_estimates.ts")
_UPSERT_SERIES_COUNTS = (
    "INSERT INTO series (series, first_ts, last_ts, n_obs, n_estimates, updated_at) "
    "VALUES (?, ?, ?, ?, ?, ?) ON CONFLICT (series) DO UPDATE SET "
    "first_ts = min(coalesce(first_ts, excluded.first_ts), coalesce(excluded.first_ts, first_ts)),"
    " last_ts = max(coalesce(last_ts, excluded.last_ts), coalesce(excluded.last_ts, last_ts)),"
    " n_obs = n_obs + excluded.n_obs, n_estimates = n_estimates + excluded.n_estimates,"
    " updated_at = excluded.updated_at")


def _series_counts(obs: pd.DataFrame | None, est: pd.DataFrame | None, now: str) -> list[tuple]:
    parts = {}
    if obs is not None and len(obs):
        g = obs.groupby("series")["ts"].agg(["min", "max", "size"])
        for s, lo, hi, n in zip(g.index.tolist(), g["min"].tolist(), g["max"].tolist(),
                                g["size"].tolist()):
            parts[s] = [lo, hi, int(n), 0]
    if est is not None and len(est):
        for s, n in est.groupby("series").size().items():
            parts.setdefault(s, [None, None, 0, 0])[3] = int(n)
    return [(s, lo, hi, n, ne, now) for s, (lo, hi, n, ne) in parts.items()]


def _settings_sql(df: pd.DataFrame, now: str) -> list[tuple[str, tuple]]:
    statements = []
    for rec in df.to_dict("records"):
        cols = [c for c in _SERIES_SETTINGS if c in rec]
        unknown = [c for c in rec if c != "series" and c not in _SERIES_SETTINGS]
        if unknown:
            raise ValidationError(f"series {rec['series']!r}: unknown setting(s) "
                                  f"{', '.join(unknown)}; allowed: {', '.join(_SERIES_SETTINGS)}",
                                  field=unknown[0])
        values = [to_json(rec[c]) if c == "settings" else
                  (None if rec[c] is None or pd.isna(rec[c]) else float(rec[c])) for c in cols]
        low, high = rec.get("low"), rec.get("high")
        if low is not None and high is not None and not pd.isna(low) and not pd.isna(high) \
                and float(low) >= float(high):
            raise ValidationError(f"series {rec['series']!r}: bounds low = {low} must be below "
                                  f"high = {high}", field="low", value=low)
        sets = ", ".join(f"{c} = excluded.{c}" for c in cols + ["updated_at"])
        sql = (f"INSERT INTO series (series, {', '.join(cols + ['updated_at'])}) VALUES "
               f"({', '.join('?' * (len(cols) + 2))}) ON CONFLICT (series) DO UPDATE SET {sets}")
        statements.append((sql, (str(rec["series"]), *values, now)))
    return statements


def _reject_rows(data: Any, now: str) -> list[tuple]:
    df = _frame(data)
    if "reason" not in df.columns:
        raise ValidationError("reject: missing column 'reason'", field="reason")
    rows = []
    for i, r in enumerate(df.to_dict("records")):
        get = lambda k: None if k not in r or (not isinstance(r[k], (dict, list)) and
                                               pd.isna(r[k])) else r[k]
        reason = get("reason")
        if not reason:
            raise ValidationError(f"reject {i}: field 'reason' is empty; every rejected row "
                                  f"needs its reason", field="reason", row=i)
        row_no = get("row")
        value = get("value")
        rows.append((get("source"), None if row_no is None else int(row_no), get("series"),
                     None if get("ts") is None else str(get("ts")), get("field"),
                     None if value is None else str(value), to_json(get("raw")), str(reason),
                     now))
    return rows


def _checkpoint_rows(data: Any, now: str) -> list[tuple]:
    df = _frame(data, key="series")
    if "state" not in df.columns:
        raise ValidationError("checkpoint: missing field 'state'", field="state")
    rows = []
    for r in df.to_dict("records"):
        last_ts = r.get("last_ts")
        rows.append((str(r["series"]), to_json(r["state"]),
                     None if last_ts is None or (isinstance(last_ts, float) and np.isnan(last_ts))
                     else format_ts(last_ts), to_json(r.get("last_pos")), now))
    return rows


def _offset_statements(data: Any, now: str) -> list[tuple]:
    df = _frame(data, key="source")
    rows = []
    for r in df.to_dict("records"):
        has_pos = "position" in r and r["position"] is not None
        err = r.get("last_error")
        err = None if err is None or (isinstance(err, float) and np.isnan(err)) else str(err)
        rows.append((str(r["source"]), r.get("kind"), to_json(r["position"]) if has_pos else None,
                     int(r.get("rows_read") or 0), int(r.get("rows_rejected") or 0), now, err,
                     int(has_pos)))
    return rows


_UPSERT_OFFSET = (
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
        text), ``source``, ``source_row``. Any other columns are packed into ``controls``.
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
        Applied in order by :func:`monitor.store_alerts.apply_alert_change`: dicts with
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
    now = wall_ts(now)
    summary: dict[str, Any] = {"observations": 0, "estimates": 0, "rejects": 0,
                               "checkpoints": 0, "offsets": 0, "series": 0,
                               "alerts_opened": [], "alerts_resolved": [],
                               "alerts_reminded": [], "alerts_unchanged": []}
    obs_df = obs_rows = est_df = est_rows = latest_rows = None
    if observations is not None:
        obs_df, obs_rows = _observation_rows(observations)
    if estimates is not None:
        est_df, est_rows = _estimate_rows(estimates)
    if latest_estimates is not None:
        latest_rows = _latest(*_estimate_rows(latest_estimates))
    elif est_rows:
        latest_rows = _latest(est_df, est_rows)
    settings = _settings_sql(_frame(series, key="series"), now) if series is not None else []
    reject_rows = _reject_rows(rejects, now) if rejects is not None else []
    ckpt_rows = _checkpoint_rows(checkpoints, now) if checkpoints is not None else []
    offset_rows = _offset_statements(offsets, now) if offsets is not None else []
    changes = list(alert_changes or [])
    with store.atomic():
        for sql, params in settings:
            store.conn.execute(sql, params)
        summary["series"] = len(settings)
        counts = _series_counts(obs_df, est_df, now)
        if counts:
            store.conn.executemany(_UPSERT_SERIES_COUNTS, counts)
        if obs_rows:
            try:
                store.conn.executemany(_INSERT_OBS, obs_rows)
            except Exception as exc:
                if "UNIQUE" not in str(exc):
                    raise
                raise StoreError(_duplicate_message(store, obs_df)) from None
            summary["observations"] = len(obs_rows)
        if est_rows:
            try:
                store.conn.executemany(_INSERT_EST, est_rows)
            except Exception as exc:
                if "UNIQUE" not in str(exc):
                    raise
                raise StoreError("an estimate for the same (series, ts) is already stored: "
                                 f"{exc}") from None
            summary["estimates"] = len(est_rows)
        if latest_rows:
            store.conn.executemany(_UPSERT_LATEST, latest_rows)
        if reject_rows:
            store.conn.executemany(
                "INSERT INTO rejects (source, row, series, ts, field, value, raw, reason, "
                "rejected_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)", reject_rows)
            summary["rejects"] = len(reject_rows)
        if ckpt_rows:
            store.conn.executemany(
                "INSERT INTO checkpoints (series, state, last_ts, last_pos, updated_at) VALUES "
                "(?, ?, ?, ?, ?) ON CONFLICT (series) DO UPDATE SET state = excluded.state, "
                "last_ts = excluded.last_ts, last_pos = excluded.last_pos, "
                "updated_at = excluded.updated_at", ckpt_rows)
            summary["checkpoints"] = len(ckpt_rows)
        if offset_rows:
            store.conn.executemany(_UPSERT_OFFSET, offset_rows)
            summary["offsets"] = len(offset_rows)
        for change in changes:
            outcome, alert_id = apply_alert_change(store, change, now=now)
            if alert_id is not None:
                summary[f"alerts_{outcome}"].append(alert_id)
    return summary


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
    df = _frame(frame)
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
