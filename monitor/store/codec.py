"""Timestamps and JSON as the store writes them (re-exported by :mod:`monitor.store`).

Data times (``ts``, ``*_ts``) are ISO 8601 UTC text with a ``Z`` suffix and six fractional
digits only when a fraction is present (:func:`format_ts`). Wall times (``*_at``, silence
``until``) always carry six fractional digits (:func:`wall_ts`) because SQL compares them as
text. JSON is compact with sorted keys; NaN survives in checkpoints and becomes ``null`` in
payloads sent out.

Text order equals time order for data times, with one exception: within a single second a
whole-second time (``...:05Z``) sorts after a fractional one (``...:05.250000Z``). Series that
mix the two inside one second (rare: sub-second data) should send fractional times throughout.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import re
import time
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from monitor.errors import ValidationError


_WHOLE_SECOND = re.compile(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ$")
#: the same pattern for Arrow's RE2 (stricter than Python's: see _all_whole_second)
_WHOLE_SECOND_RE2 = r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ$"


def _to_timestamp(value: Any) -> pd.Timestamp:
    """Parse one timestamp to a UTC :class:`pandas.Timestamp` (naive means UTC)."""
    if isinstance(value, (bool, np.bool_)):
        raise ValidationError(f"timestamp {value!r} is not a time", field="ts", value=value)
    try:
        if isinstance(value, (int, float, np.integer, np.floating)):
            stamp = pd.Timestamp(float(value), unit="s", tz="UTC")
        else:
            stamp = pd.Timestamp(value)
    except (ValueError, TypeError, OverflowError) as exc:
        raise ValidationError(f"timestamp {value!r} is not ISO 8601 or epoch seconds ({exc})",
                              field="ts", value=value) from None
    if stamp is pd.NaT:
        raise ValidationError(f"timestamp {value!r} is empty", field="ts", value=value)
    return stamp.tz_localize("UTC") if stamp.tzinfo is None else stamp.tz_convert("UTC")


def format_ts(value: Any) -> str:
    """Canonical data timestamp: ISO 8601 UTC, ``Z`` suffix, microseconds only when present.

    Accepts ISO strings (with an offset, ``Z`` or naive = UTC), datetimes, pandas/numpy
    timestamps and epoch seconds.

    >>> format_ts("2024-03-01 12:00:00+01:00")
    '2024-03-01T11:00:00Z'
    >>> format_ts(1709294400.25)
    '2024-03-01T12:00:00.250000Z'
    """
    if isinstance(value, str) and _WHOLE_SECOND.match(value):
        return value
    stamp = _to_timestamp(value)
    if stamp.microsecond or stamp.nanosecond:
        return stamp.strftime("%Y-%m-%dT%H:%M:%S.%fZ")
    return stamp.strftime("%Y-%m-%dT%H:%M:%SZ")


def _all_whole_second(text: pd.Series) -> bool:
    """Whether every value is a ``str`` of the canonical whole-second form (already what
    :func:`format_ts` writes), decided in C: Arrow takes the column as text only when every
    value is a ``str`` (anything else raises), then one RE2 expression over it. RE2's ``\\d``
    is ASCII only and its ``$`` the very end, so a ``True`` here is also ``True`` by
    :data:`_WHOLE_SECOND` (Python's ``re``); a ``False`` is checked again the Python way."""
    try:
        arr = pa.array(text.to_numpy(object), type=pa.string(), from_pandas=False)
    except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError):
        return False
    if arr.null_count:
        return False
    return bool(pc.all(pc.match_substring_regex(arr, _WHOLE_SECOND_RE2)).as_py())


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
        if _all_whole_second(text):
            return text.to_numpy(object)
        is_str = np.fromiter((isinstance(v, str) for v in text), bool, len(text))
        if is_str.all() and col.astype(str).str.match(_WHOLE_SECOND.pattern).all():
            return text.to_numpy(object)      # Python's reading (Unicode digits, "...Z\n")
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


def wall_ts(value: Any = None) -> str:
    """Wall-clock timestamp, fixed width ``YYYY-MM-DDTHH:MM:SS.ffffffZ``; now when ``None``.

    Wall times are compared as text in SQL (``next_attempt_at <= ?``), so they always carry
    six fractional digits.

    >>> wall_ts("2024-05-01T08:30:00Z")
    '2024-05-01T08:30:00.000000Z'
    """
    if value is None:        # now, without a pandas Timestamp (3 us instead of 30-70 us)
        secs, ns = divmod(time.time_ns(), 1_000_000_000)
        return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(secs)) + f".{ns // 1000:06d}Z"
    return _to_timestamp(value).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def utc_now() -> str:
    """The current wall-clock time as :func:`wall_ts` text."""
    return wall_ts(None)


def parse_ts(value: Any) -> pd.Timestamp:
    """Parse a stored (or any accepted) timestamp into a UTC :class:`pandas.Timestamp`."""
    return _to_timestamp(value)


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, (pd.Timestamp, dt.datetime, np.datetime64)):
        return format_ts(obj)
    raise TypeError(f"{type(obj).__name__} is not JSON serializable")


def to_json(obj: Any, *, finite: bool = False) -> str | None:
    """Compact JSON text (sorted keys); ``None`` stays ``None``.

    With ``finite=True`` every NaN or infinity becomes ``null`` (for payloads sent out);
    otherwise they are written as ``NaN``/``Infinity``, which Python reads back bit for bit
    (estimator checkpoints).
    """
    if obj is None:
        return None
    if finite:
        obj = finite_or_none(json.loads(json.dumps(obj, default=_json_default)))
        return _FINITE.encode(obj)
    return _EXACT.encode(obj)


#: the encoders :func:`to_json` uses: what ``json.dumps(obj, sort_keys=True, separators=(",",
#: ":"), default=_json_default, allow_nan=...)`` makes for each call (the same text), made once
#: (a batch's checkpoints call it twice per series)
_EXACT = json.JSONEncoder(sort_keys=True, separators=(",", ":"), default=_json_default,
                          allow_nan=True)
_FINITE = json.JSONEncoder(sort_keys=True, separators=(",", ":"), default=_json_default,
                           allow_nan=False)


def finite_or_none(obj: Any) -> Any:
    """Replace non-finite floats by ``None``, recursively through dicts and lists."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: finite_or_none(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [finite_or_none(v) for v in obj]
    return obj


def from_json(text: str | None) -> Any:
    """Inverse of :func:`to_json` (``None``, NaN from a pandas text column and ``''`` give ``None``)."""
    return json.loads(text) if isinstance(text, (str, bytes)) and text else None


def parse_ts_column(values: Any) -> pd.Series:
    """Stored timestamp text -> tz-aware UTC datetimes in nanoseconds (NULL -> NaT).

    Each distinct text is parsed once: a column of 300,000 timestamps shared by 10,000
    series parses in a few milliseconds.
    """
    col = values if isinstance(values, pd.Series) else pd.Series(values)
    codes, uniques = pd.factorize(col.astype(object), use_na_sentinel=True)
    parsed = pd.DatetimeIndex(pd.to_datetime(pd.Series(uniques, dtype=object), utc=True,
                                             format="ISO8601"))
    if not len(parsed):
        return pd.Series(pd.NaT, index=col.index, dtype="datetime64[ns, UTC]")
    out = parsed.as_unit("ns").take(codes, allow_fill=True, fill_value=pd.NaT)
    return pd.Series(out, index=col.index)
