"""Batch rows for the store: checks and conversion of frames and records to SQL parameters.

Used by :func:`monitor.store.batch.write_batch`. Each function accepts a DataFrame, a list of
dicts or dataclasses, or (where a key names the row) a mapping ``key -> dict``, checks the
values and returns parameter tuples for ``executemany``. Errors name the row, the field, the
value and the rule.
"""

from __future__ import annotations

import dataclasses
from typing import Any, Iterable, Mapping, NamedTuple

import numpy as np
import pandas as pd

from monitor.errors import StoreError, ValidationError
from monitor.store.codec import format_ts, format_ts_array, to_json
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
    nan = np.isnan(values)
    if not nan.any():
        return values.tolist()
    out = values.astype(object)
    out[nan] = None
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


def _text_column(col: pd.Series) -> pd.Series:
    """``col.astype(str)``, or ``col`` itself when it already holds only ``str`` objects
    (the engine's frames): the same values without a round trip through Arrow text."""
    if col.dtype == object and set(map(type, col.to_numpy())) <= {str}:
        return col
    return col.astype(str)


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
    df = df.assign(series=_text_column(df["series"]), ts=format_ts_array(df["ts"]))
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
    if "controls" in df.columns and set(map(type, df["controls"].tolist())) <= {str, type(None)}:
        controls = df["controls"].tolist()          # text or None: stored as they are
    elif "controls" in df.columns:
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
    srow = _source_rows(df, what)
    rows = list(zip(df["series"].tolist(), df["ts"].tolist(), price.tolist(), qty.tolist(),
                    controls, source, srow, exposure))
    return df, rows


#: integers up to this size pass through float64 unchanged (2**53)
_EXACT_INT = 2 ** 53


def _source_rows(df: pd.DataFrame, what: str) -> list:
    """``source_row`` as a list of ``int`` (``None`` where missing): each value goes through
    float64 and ``int`` as it always has; an integer column whose values float64 holds
    exactly (all row numbers) is the same list straight from the integers."""
    col = df["source_row"] if "source_row" in df.columns else None
    if col is not None and pd.api.types.is_integer_dtype(col.dtype) \
            and not pd.api.types.is_bool_dtype(col.dtype) and not col.isna().any():
        vals = col.to_numpy(dtype=np.int64)
        if not len(vals) or np.abs(vals).max() <= _EXACT_INT:
            return vals.tolist()
    return [None if v is None else int(v) for v in _objects(_floats(df, "source_row", what))]


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


def estimate_rows(data: Any, newest: bool = False) -> tuple[pd.DataFrame, list[tuple]]:
    """Checked estimates in :data:`ESTIMATE_COLUMNS` order; NaN -> None, inf refused.

    Every row is checked; with ``newest=True`` the tuples are those of
    :func:`newest_per_series` only (the rows that update ``latest_estimates``).
    """
    df = as_frame(data)
    what = "estimate"
    _require(df, ("series", "ts", "status"), what)
    df = df.assign(series=_text_column(df["series"]), ts=format_ts_array(df["ts"]))
    status = df["status"].astype(object)
    bad = ~status.isin(STATUS_LABELS)
    if bad.any():
        i = int(np.flatnonzero(bad.to_numpy())[0])
        raise ValidationError(f"{_where(df, i, what)}: field 'status' = {status.iloc[i]!r}: "
                              f"status must be one of {', '.join(STATUS_LABELS)}",
                              field="status", value=status.iloc[i], row=i)
    floats = []
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
        floats.append(vals)
    band = _band_kinds(df, what)
    texts = [df["series"].to_numpy(dtype=object), df["ts"].to_numpy(dtype=object),
             status.to_numpy(dtype=object)]
    if newest:
        take = newest_index(df)
        floats, texts, band = [v[take] for v in floats], [v[take] for v in texts], band[take]
    # the insert's column order: series, ts, five floats, status, four floats, band; one
    # list per column, zipped (no per-row unpacking)
    f = [_objects(v) for v in floats]
    rows = list(zip(texts[0].tolist(), texts[1].tolist(), *f[:5], texts[2].tolist(), *f[5:],
                    band.tolist()))
    return df, rows


def _band_kinds(df: pd.DataFrame, what: str) -> np.ndarray:
    """The ``band`` column as an object array (``None`` where missing, NaN or absent),
    checked: anything else must be one of :data:`BAND_KINDS`."""
    if "band" not in df.columns:
        return np.full(len(df), None, dtype=object)
    col = df["band"]
    if isinstance(col.dtype, pd.StringDtype) and col.dtype.na_value is np.nan:
        # text with NaN for missing (pandas' default for a column of str and None): the
        # same reading, decided on the column (a NaN is missing, any other value is text)
        missing = col.isna().to_numpy()
        bad = ~missing & ~col.isin(BAND_KINDS).to_numpy()
        if not bad.any():
            return col.to_numpy(dtype=object, na_value=None)
    vals = pd.Series(df["band"].tolist(), dtype=object).to_numpy(copy=True)
    # missing: None or a float NaN (any other value must be a band kind)
    missing = np.fromiter((v is None or (isinstance(v, float) and v != v) for v in vals),
                          dtype=bool, count=len(vals))
    vals[missing] = None
    try:
        known = pd.Series(vals, dtype=object).isin(BAND_KINDS).to_numpy()
    except TypeError:                               # an unhashable value: compare one by one
        known = np.fromiter((v in BAND_KINDS for v in vals), dtype=bool, count=len(vals))
    bad = ~missing & ~known
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        v = vals[i]
        raise ValidationError(f"{_where(df, i, what)}: field 'band' = {v!r}: band must be "
                              f"one of {', '.join(BAND_KINDS)} or empty", field="band",
                              value=v, row=i)
    return vals


class SeriesTimeOrder(NamedTuple):
    """Rows of a frame in (series, ts) order: ``order`` (positions), and per series (in name
    order) ``starts`` / ``ends`` into ``order``."""

    order: np.ndarray
    starts: np.ndarray
    ends: np.ndarray


def series_time_order(df: pd.DataFrame) -> SeriesTimeOrder:
    """A stable sort of the rows by series, then ``ts`` (rows of equal keys keep the frame's
    order), as ``sort_values(["series", "ts"], kind="stable")`` orders them: on the codes of
    ``factorize(sort=True)`` of each column (the text order of names and of ``ts``, which is
    time order for data times, :mod:`monitor.store.codec`) with ``np.lexsort`` (stable)."""
    n = len(df)
    if not n:
        z = np.zeros(0, dtype=np.int64)
        return SeriesTimeOrder(z, z, z)
    # on the columns as they are: Arrow text is coded by Arrow (its sort is code point order,
    # Python's str order) without a Python object per row
    s_codes, _ = pd.factorize(df["series"], sort=True)
    t_codes, _ = pd.factorize(df["ts"], sort=True)
    order = np.lexsort((t_codes, s_codes))
    sc = s_codes[order]
    starts = np.flatnonzero(np.r_[True, sc[1:] != sc[:-1]])
    return SeriesTimeOrder(order, starts, np.r_[starts[1:], n])


def newest_index(df: pd.DataFrame, by: SeriesTimeOrder | None = None) -> np.ndarray:
    """Positions of the row with the newest ``ts`` of each series (the last one on ties), in
    series order (the last row of each series in :func:`series_time_order`)."""
    by = series_time_order(df) if by is None else by
    return by.order[by.ends - 1]


def newest_per_series(df: pd.DataFrame, rows: list[tuple],
                      by: SeriesTimeOrder | None = None) -> list[tuple]:
    """The row with the newest ts of each series (the last one on ties)."""
    return [rows[i] for i in newest_index(df, by).tolist()]


def series_counts(obs: pd.DataFrame | None, est: pd.DataFrame | None, now: str,
                  est_order: SeriesTimeOrder | None = None) -> list[tuple]:
    """Per series: (series, first_ts, last_ts, n_obs, n_estimates, now) of this batch
    (``est_order``: :func:`series_time_order` of ``est`` when already known)."""
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
        # rows per series in name order (what groupby("series").size() gives)
        by = series_time_order(est) if est_order is None else est_order
        names = est["series"].to_numpy(dtype=object)[by.order[by.starts]]
        for s, n in zip(names.tolist(), (by.ends - by.starts).tolist()):
            parts.setdefault(s, [None, None, 0, 0])[3] = int(n)
    return [(s, lo, hi, n, ne, now) for s, (lo, hi, n, ne) in parts.items()]


def settings_sql(df: pd.DataFrame, now: str) -> list[tuple[str, tuple]]:
    """One upsert per series setting only the settings given (low, high, forgetting, settings)."""
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


def reject_rows(data: Any, now: str) -> list[tuple]:
    """Rejected rows with their reason (required); ``raw`` stored as JSON."""
    df = as_frame(data)
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


def checkpoint_rows(data: Any, now: str) -> list[tuple]:
    """Checkpoints: state and last_pos as JSON (NaN kept), last_ts canonical."""
    records = _same_key_records(data)
    if records is None:
        df = as_frame(data, key="series")
        if "state" not in df.columns:
            raise ValidationError("checkpoint: missing field 'state'", field="state")
        records = df.to_dict("records")
    rows = []
    done: dict = {}        # (type, value) -> its text: a batch's checkpoints share their times
    for r in records:
        last_ts = r.get("last_ts")
        if last_ts is None or (isinstance(last_ts, float) and np.isnan(last_ts)):
            text = None
        else:
            try:
                key = (type(last_ts), last_ts)
                text = done.get(key)
                if text is None:
                    text = done[key] = format_ts(last_ts)
            except TypeError:                  # unhashable: format_ts judges it
                text = format_ts(last_ts)
        rows.append((str(r["series"]), to_json(r["state"]), text, to_json(r.get("last_pos")),
                     now))
    return rows


def _same_key_records(data: Any) -> list[dict] | None:
    """The records :func:`as_frame` would give for a mapping ``series -> dict`` whose dicts
    all have the same keys, one of them ``state`` (the engine's checkpoints), without the
    frame round trip; ``None`` for anything else (the frame path decides)."""
    if isinstance(data, pd.DataFrame) or not isinstance(data, Mapping) or not data:
        return None
    keys = None
    out = []
    for k, v in data.items():
        if not isinstance(v, Mapping) or "series" in v:
            return None
        if keys is None:
            keys = set(v)
            if "state" not in keys:
                return None
        elif len(v) != len(keys) or set(v) != keys:
            return None
        out.append({"series": k, **v})
    return out


def offset_statements(data: Any, now: str) -> list[tuple]:
    """Source offsets; the last value says whether a position was given (else kept)."""
    df = as_frame(data, key="source")
    rows = []
    for r in df.to_dict("records"):
        has_pos = "position" in r and r["position"] is not None
        err = r.get("last_error")
        err = None if err is None or (isinstance(err, float) and np.isnan(err)) else str(err)
        rows.append((str(r["source"]), r.get("kind"), to_json(r["position"]) if has_pos else None,
                     int(r.get("rows_read") or 0), int(r.get("rows_rejected") or 0), now, err,
                     int(has_pos)))
    return rows
