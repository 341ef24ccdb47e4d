"""Batch rows for the store: checks and conversion of frames and records to SQL parameters.

Used by :func:`monitor.store.batch.write_batch`. Each function accepts a DataFrame, a list of
dicts or dataclasses, or (where a key names the row) a mapping ``key -> dict``, checks the
values and returns parameter tuples for ``executemany``. Errors name the row, the field, the
value and the rule.
"""

from __future__ import annotations

import dataclasses
from typing import Any, Iterable, Mapping

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
