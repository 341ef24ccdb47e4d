"""The store's batch writer and the CSV chunk parser as they were before issue 15's second
round (commit dfaca40), kept verbatim as a test oracle: tests/test_ingest_same.py checks
that the faster code writes the same rows, tuples, rejects and stores as this one.

Not used by elmon itself. Changed from the originals only in imports and in the names of two
module-level helpers that the monkeypatching tests swap in (``write_batch_before``,
``parse_fast_before``).
"""

from __future__ import annotations

import dataclasses
import io
import json
from typing import Any, Iterable, Mapping

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv

from monitor.errors import StoreError, ValidationError
from monitor.store.alerts import apply_alert_change
from monitor.store.batch import (INSERT_EST, INSERT_OBS, UPSERT_LATEST, UPSERT_OFFSET,
                                 UPSERT_SERIES_COUNTS, UPSERT_SPARK, _duplicate_message)
from monitor.store.codec import _to_timestamp, _WHOLE_SECOND, format_ts, to_json, wall_ts
from monitor.store.core import Store
from monitor.store.rows import offset_statements, reject_rows, settings_sql
from monitor.store.schema import SPARK_KEEP, beta_text, spark_text
from monitor.types import STATUS_LABELS


OBSERVATION_COLUMNS = ("series", "ts", "price", "quantity", "controls", "source", "source_row",
                       "exposure")
ESTIMATE_COLUMNS = ("series", "ts", "beta", "beta_se", "beta_lo", "beta_hi", "n_eff", "status",
                    "intercept", "resid_sd", "innovation", "z", "band")
#: band kinds an estimate may record (issue 13); NULL where the estimate has no band
BAND_KINDS = ("hc", "hac", "classic")
_EST_FLOATS = ("beta", "beta_se", "beta_lo", "beta_hi", "n_eff", "intercept", "resid_sd",
               "innovation", "z")
_SERIES_SETTINGS = ("low", "high", "forgetting", "settings", "bound_low", "bound_high")



def format_ts_array(values: Any, field: str = "ts") -> np.ndarray:
    """Vectorized :func:`format_ts` over a column; returns an object array of strings.

    Raises :class:`ValidationError` naming the first value that is empty or does not parse.
    """
    col = values if isinstance(values, pd.Series) else pd.Series(values)
    col = col.reset_index(drop=True)
    if pd.api.types.is_datetime64_any_dtype(col.dtype):
        stamps = col
    elif pd.api.types.is_numeric_dtype(col.dtype) and not pd.api.types.is_bool_dtype(col.dtype):
        stamps = pd.to_datetime(col.astype("float64"), unit="s", utc=True)
    else:
        text = col.astype(object)
        is_str = np.fromiter((isinstance(v, str) for v in text), bool, len(text))
        if is_str.all() and col.astype(str).str.match(_WHOLE_SECOND.pattern).all():
            return text.to_numpy(object)
        try:
            if is_str.all():
                stamps = pd.to_datetime(text, utc=True, format="ISO8601", errors="coerce")
            else:   # datetimes, Timestamps or a mixture: one at a time, each message exact
                stamps = pd.Series([_to_timestamp(v) for v in text], dtype="datetime64[ns, UTC]")
        except (ValueError, TypeError):
            stamps = pd.Series([_to_timestamp(v) for v in text], dtype="datetime64[ns, UTC]")
        bad = stamps.isna().to_numpy()
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise ValidationError(f"{field} {text[i]!r} at position {i} is not an ISO 8601 "
                                  f"timestamp", field=field, value=text[i], row=i)
    if stamps.dt.tz is not None:
        stamps = stamps.dt.tz_convert("UTC").dt.tz_localize(None)
    arr = stamps.to_numpy("datetime64[ns]")
    bad = np.isnat(arr)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise ValidationError(f"{field} at position {i} is empty (NaT)", field=field, row=i)
    # batches repeat timestamps (every series at the same hour): format each distinct one once
    uniq, inverse = np.unique(arr, return_inverse=True)
    secs = uniq.astype("datetime64[s]")
    whole = secs == uniq
    text = np.char.add(np.datetime_as_string(secs, unit="s"), "Z").astype(object)
    if not whole.all():
        frac = uniq[~whole].astype("datetime64[us]")
        text[~whole] = np.char.add(np.datetime_as_string(frac, unit="us"), "Z")
    return text[inverse.reshape(-1)]


def as_frame(data: Any, key: str | None = None) -> pd.DataFrame:
    """DataFrame from a DataFrame, list of dicts/dataclasses, or a mapping ``key -> dict``."""
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


def observation_rows(data: Any) -> tuple[pd.DataFrame, list[tuple]]:
    """Checked observations: (frame with canonical ts, parameter tuples of the insert)."""
    df = as_frame(data)
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
    exposure = _exposures(df, what)
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
                    controls, source, srow, exposure))
    return df, rows


def _exposures(df: pd.DataFrame, what: str) -> list:
    """The ``exposure`` column as a list: ``None`` (NULL: no exposure, read as 1) where the
    column is absent or a value is missing or NaN; otherwise a float that must be finite and
    > 0 (the Poisson model's offset is ``log(exposure)``; validation rejects anything else
    before the store, so a bad value here is a caller's error)."""
    if "exposure" not in df.columns:
        return [None] * len(df)
    raw = df["exposure"]
    vals = pd.to_numeric(raw, errors="coerce").to_numpy(dtype="float64", na_value=np.nan)
    text = np.isnan(vals) & raw.notna().to_numpy()
    if text.any():
        i = int(np.flatnonzero(text)[0])
        raise ValidationError(f"{_where(df, i, what)}: field 'exposure' = {raw.iloc[i]!r}: not a "
                              f"number (an exposure is a number > 0, or empty for none)",
                              field="exposure", value=raw.iloc[i], row=i)
    bad = ~np.isnan(vals) & ~(np.isfinite(vals) & (vals > 0))
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise ValidationError(f"{_where(df, i, what)}: field 'exposure' = {float(vals[i])!r}: "
                              f"exposure must be > 0 and finite, or empty for none (validate "
                              f"rows before the store)", field="exposure", value=vals[i], row=i)
    return _objects(vals)


def estimate_rows(data: Any) -> tuple[pd.DataFrame, list[tuple]]:
    """Checked estimates in :data:`ESTIMATE_COLUMNS` order; NaN -> None, inf refused."""
    df = as_frame(data)
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
    band = _band_kinds(df, what)
    rows = [(s, t, *vals[:5], st, *vals[5:], b) for s, t, st, b, *vals in
            zip(df["series"].tolist(), df["ts"].tolist(), status.tolist(), band, *cols)]
    return df, rows


def _band_kinds(df: pd.DataFrame, what: str) -> list:
    """The ``band`` column as a list (``None`` where missing, NaN or absent), checked."""
    if "band" not in df.columns:
        return [None] * len(df)
    vals = [None if v is None or (isinstance(v, float) and v != v) else v
            for v in df["band"].tolist()]
    for i, v in enumerate(vals):
        if v is not None and v not in BAND_KINDS:
            raise ValidationError(f"{_where(df, i, what)}: field 'band' = {v!r}: band must be "
                                  f"one of {', '.join(BAND_KINDS)} or empty", field="band",
                                  value=v, row=i)
    return vals


def newest_per_series(df: pd.DataFrame, rows: list[tuple]) -> list[tuple]:
    """The row with the newest ts of each series (the last one on ties)."""
    order = pd.DataFrame({"series": df["series"], "ts": df["ts"]})
    order = order.sort_values(["series", "ts"], kind="stable").drop_duplicates("series",
                                                                               keep="last")
    return [rows[i] for i in order.index]


def series_counts(obs: pd.DataFrame | None, est: pd.DataFrame | None, now: str) -> list[tuple]:
    """Per series: (series, first_ts, last_ts, n_obs, n_estimates, now) of this batch."""
    parts = {}
    if obs is not None and len(obs):
        # series in sorted order (as a groupby gives them); the batch's rows of each series
        # made contiguous by a stable sort of their codes, then min / max of the timestamp text
        # (text order is time order: monitor.store.codec) per run: 2.7x faster than a pandas
        # groupby on the Arrow-backed text columns (ingest's write_batch, issue 15)
        codes, names = pd.factorize(obs["series"].to_numpy(dtype=object), sort=True)
        order = np.argsort(codes, kind="stable")
        c, t = codes[order], obs["ts"].to_numpy(dtype=object)[order]
        first = np.flatnonzero(np.r_[True, c[1:] != c[:-1]])
        lo, hi = np.minimum.reduceat(t, first), np.maximum.reduceat(t, first)
        size = np.diff(np.r_[first, len(c)])
        for s, a, b, n in zip(names[c[first]].tolist(), lo.tolist(), hi.tolist(),
                              size.tolist()):
            parts[s] = [a, b, int(n), 0]
    if est is not None and len(est):
        for s, n in est.groupby("series").size().items():
            parts.setdefault(s, [None, None, 0, 0])[3] = int(n)
    return [(s, lo, hi, n, ne, now) for s, (lo, hi, n, ne) in parts.items()]


def checkpoint_rows(data: Any, now: str) -> list[tuple]:
    """Checkpoints: state and last_pos as JSON (NaN kept), last_ts canonical."""
    df = as_frame(data, key="series")
    if "state" not in df.columns:
        raise ValidationError("checkpoint: missing field 'state'", field="state")
    rows = []
    for r in df.to_dict("records"):
        last_ts = r.get("last_ts")
        rows.append((str(r["series"]), to_json(r["state"]),
                     None if last_ts is None or (isinstance(last_ts, float) and np.isnan(last_ts))
                     else format_ts(last_ts), to_json(r.get("last_pos")), now))
    return rows




def _spark_updates(store: Store, est_df: pd.DataFrame, est_rows: list[tuple]) -> list[tuple]:
    """New sparkline cache rows: each series' cached points plus this batch's, last SPARK_KEEP.

    Rows of a batch normally come after the cached ones; a late estimate (older ``ts``) is
    merged in time order.
    """
    order = pd.DataFrame({"series": est_df["series"].to_numpy(object),
                          "ts": est_df["ts"].to_numpy(object)})
    order = order.sort_values(["series", "ts"], kind="stable")
    order = order.groupby("series", sort=False).tail(SPARK_KEEP)
    idx = order.index.to_numpy()
    names = order["series"].to_numpy(object)
    cuts = np.flatnonzero(names[1:] != names[:-1]) + 1
    starts, ends = np.r_[0, cuts], np.r_[cuts, len(names)]
    cached = {r[0]: r[1:] for r in store.conn.execute(
        "SELECT series, ts, beta FROM sparklines WHERE series IN (SELECT value FROM json_each(?))",
        (json.dumps(names[starts].tolist()),))}
    ts_all = order["ts"].tolist()
    beta_all = [beta_text(est_rows[i][2]) for i in idx]
    out = []
    for lo, hi in zip(starts.tolist(), ends.tolist()):
        name = names[lo]
        new = list(zip(ts_all[lo:hi], beta_all[lo:hi]))
        if name in cached:
            old = list(zip(cached[name][0].split(","), cached[name][1].split(",")))
            new = old + new if old[-1][0] < new[0][0] else sorted(old + new)
        out.append((name, *spark_text(new[-SPARK_KEEP:])))
    return out

def write_batch_before(store: Store, *, observations: Any = None, estimates: Any = None,
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
    now = wall_ts(now)
    summary: dict[str, Any] = {"observations": 0, "estimates": 0, "rejects": 0,
                               "checkpoints": 0, "offsets": 0, "series": 0,
                               "alerts_opened": [], "alerts_resolved": [],
                               "alerts_reminded": [], "alerts_unchanged": []}
    obs_df = obs_rows = est_df = est_rows = latest_rows = None
    if observations is not None:
        obs_df, obs_rows = observation_rows(observations)
    if estimates is not None:
        est_df, est_rows = estimate_rows(estimates)
    if latest_estimates is not None:
        latest_rows = newest_per_series(*estimate_rows(latest_estimates))
    elif est_rows:
        latest_rows = newest_per_series(est_df, est_rows)
    settings_df = as_frame(series, key="series") if series is not None else None
    settings_stmts = settings_sql(settings_df, now) if settings_df is not None else []
    own_bounds = settings_df is not None and bool({"low", "high"} & set(settings_df.columns))
    reject_params = reject_rows(rejects, now) if rejects is not None else []
    ckpt_params = checkpoint_rows(checkpoints, now) if checkpoints is not None else []
    offset_params = offset_statements(offsets, now) if offsets is not None else []
    changes = list(alert_changes or [])
    with store.atomic():
        for sql, params in settings_stmts:
            store.conn.execute(sql, params)
        if own_bounds and settings_stmts:
            store.bounds_version += 1            # Monitor.own_bounds drops its cache
        summary["series"] = len(settings_stmts)
        counts = series_counts(obs_df, est_df, now)
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
            store.conn.executemany(UPSERT_SPARK, _spark_updates(store, est_df, est_rows))
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



def parse_fast_before(names: list[str], body: bytes, delimiter: str = ","
                ) -> tuple[pd.DataFrame, list[int]]:
    header = (delimiter.join(f'"{n}"' for n in names) + "\n").encode("utf-8")
    bad: list[int] = []

    def invalid(row) -> str:
        bad.append(row.number - 2)          # pyarrow numbers lines from 1, the header is line 1
        return "skip"

    table = pacsv.read_csv(
        io.BytesIO(header + body),
        read_options=pacsv.ReadOptions(use_threads=False, block_size=max(1 << 20, len(body) + 64)),
        parse_options=pacsv.ParseOptions(delimiter=delimiter, invalid_row_handler=invalid,
                                          ignore_empty_lines=False, newlines_in_values=False),
        convert_options=pacsv.ConvertOptions(column_types={n: pa.string() for n in names},
                                             null_values=[""], strings_can_be_null=True,
                                             quoted_strings_can_be_null=True))
    frame = pd.DataFrame({f"c{j}": table.column(j).to_pandas(types_mapper=None)
                          for j in range(table.num_columns)})
    return frame.astype(object).where(frame.notna(), None), sorted(bad)

