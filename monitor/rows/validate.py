"""Row validation with quarantine: every rejected row keeps its row number and a reason.

Used by every input path (replay, ``elmon ingest``, the service's sources, ``Monitor.observe``).
Checks, in order, each giving one reason per row (the first that fails):

- ``series``: empty field;
- ``ts``: empty, unparsable (ISO 8601 with offset or Z, naive = UTC, or epoch seconds; or the
  stated ``ts_format``), a date or time field out of range (2024-02-30, hour 25), a word
  (``now``, ``today``: the wall clock is never taken for a row's time), outside the supported
  range :data:`TS_MIN` .. :data:`TS_MAX` (times are int64 nanoseconds since 1970, which end in
  1677 and 2262; a year 9999 is rejected, never wrapped), or in the future beyond
  ``max_future_s`` (only when a reference time ``now`` is given);
- ``price``, ``quantity`` and each named control: empty, not a number, NaN, infinity (a
  literal or a number beyond float64); price <= 0; quantity < 0; price or a non-zero quantity
  outside ``[min_value, max_value]`` (1e-9 .. 1e12: a subnormal or a 1e300 is a corrupt field,
  and its log would dominate every estimate); a control beyond ``max_value`` in size; quantity
  == 0 (zero policy: ``reject`` quarantines it, ``skip`` counts it and keeps it out of the
  estimator, ``keep`` passes it on for a model that takes zero quantities as data); a logged
  control (an exposure) <= 0 or outside ``[min_value, max_value]``; ``-0.0`` is zero;
- per series, in time order, against state carried across batches (:class:`SeriesGate`):
  a duplicate (same series and timestamp as the latest or one of the last 15 accepted rows;
  ``keep_first`` keeps the first and quarantines later copies); a row older than the series' last accepted time by more than ``allowed_lateness_s``;
  a suspected unit error: a price ``unit_ratio`` (50) times or more away from the median of the
  series' last accepted prices (for example cents logged against dollars); a suspected
  quantity error: a non-zero quantity ``quantity_ratio`` (1000) times or more away from the
  median of the series' last 15 accepted non-zero quantities (once 2 are known; a corrupt
  1e300, or a count logged in thousandths, would otherwise dominate the estimate).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
from numba import njit

from monitor.errors import ConfigError, SourceError
from monitor.groups.keys import EMPTY_PART_RULE, compose_series
from monitor.rows.isotime import parse_plain_iso


REQUIRED = ("series", "ts", "price", "quantity")
WINDOW = 15          # recent accepted prices kept per series for the unit check
MIN_HISTORY = 2      # accepted prices needed before the unit check uses the series' history
MIN_BATCH = 5        # time-ordered batches: rows of a new series that give a batch median

#: the longest lateness or future allowance accepted, seconds (100 years; inf would overflow)
MAX_TIME_S = 100 * 366 * 86400.0

#: the supported time range (ISO 8601 UTC): int64 ns since 1970 reach 1677-09-21 .. 2262-04-11;
#: whole years inside that are accepted, anything outside is rejected (never wrapped)
TS_MIN, TS_MAX = "1678-01-01T00:00:00Z", "2261-12-31T23:59:59Z"
TS_MIN_NS = int(np.datetime64(TS_MIN[:-1], "ns").astype(np.int64))
TS_MAX_NS = int(np.datetime64("2262-01-01T00:00:00", "ns").astype(np.int64)) - 1
#: words pandas would read as the wall clock
TS_WORDS = frozenset({"now", "today", "yesterday", "tomorrow"})
#: whole years inside the supported range (the plain ISO reader's limits)
_YEAR_LO, _YEAR_HI = int(TS_MIN[:4]), int(TS_MAX[:4])
TS_RANGE_RULE = (f"timestamp outside the supported range {TS_MIN} .. {TS_MAX} (times are "
                 f"int64 nanoseconds since 1970-01-01)")
TS_WORD_RULE = ("unparsable timestamp: a word, not a time (a row's time is never taken from "
                "the clock; write ISO 8601 or epoch seconds)")
TS_FIELD_RULE = ("unparsable timestamp: no such date or time (a month, day, hour, minute or "
                 "second out of range)")
TS_UNPARSABLE_RULE = "unparsable timestamp (expected ISO 8601 or epoch seconds)"
_ISO_SHAPE = (r"^[+-]?\d{4,}-\d{1,2}-\d{1,2}([T ]\d{1,2}(:\d{1,2}(:\d{1,2}([.,]\d+)?)?)?)?"
              r"\s*(Z|[+-]\d{2}(:?\d{2})?)?$")


@dataclass(frozen=True)
class ValidationSettings:
    """Validation rules; see the module docstring."""

    zero_policy: str = "reject"            # reject | skip | keep (a model that takes q itself)
    duplicate_policy: str = "keep_first"   # keep_first | reject_all
    allowed_lateness_s: float = 0.0
    max_future_s: float = 3600.0
    unit_ratio: float = 50.0
    quantity_ratio: float = 1000.0         # 0 turns the quantity history check off
    key: tuple = ()                        # [series] key: 2+ columns make a composite id
    order: str = "auto"                    # auto | time | arrival (see monitor.rows.prepare)
    min_value: float = 1e-9                # price, non-zero quantity, logged control: >= this
    max_value: float = 1e12                # ... and <= this; a control's size <= this
    ts_format: str = ""                    # strftime format of text timestamps ("" = ISO 8601)

    def __post_init__(self):
        if self.zero_policy not in ("reject", "skip", "keep"):
            raise ConfigError(f"zero_policy = {self.zero_policy!r}: must be 'reject', 'skip' or "
                              f"'keep'")
        if self.order not in ("auto", "time", "arrival"):
            raise ConfigError(f"order = {self.order!r}: must be 'auto', 'time' or 'arrival'")
        if self.duplicate_policy not in ("keep_first", "reject_all"):
            raise ConfigError(f"duplicate_policy = {self.duplicate_policy!r}: must be 'keep_first' or 'reject_all'")
        for name in ("allowed_lateness_s", "max_future_s"):
            if not 0 <= getattr(self, name) <= MAX_TIME_S:
                raise ConfigError(f"{name} = {getattr(self, name)!r}: must be a finite number "
                                  f"of seconds, 0 .. {MAX_TIME_S:g} (100 years)")
        if not 1 < self.unit_ratio < math.inf:
            raise ConfigError(f"unit_ratio = {self.unit_ratio!r}: must be > 1 and finite")
        if not (self.quantity_ratio == 0 or 1 < self.quantity_ratio < math.inf):
            raise ConfigError(f"quantity_ratio = {self.quantity_ratio!r}: must be > 1 and finite "
                              f"(0 turns the check off)")
        if not (0 < self.min_value < self.max_value < math.inf):
            raise ConfigError(f"min_value = {self.min_value!r}, max_value = {self.max_value!r}: "
                              f"must be finite with 0 < min_value < max_value")
        if self.min_value < np.finfo(np.float64).tiny:
            raise ConfigError(f"min_value = {self.min_value!r}: must be at least "
                              f"{np.finfo(np.float64).tiny!r} (no subnormal numbers)")
        if self.ts_format:
            check_ts_format(self.ts_format)


def check_ts_format(fmt: str) -> str:
    """``fmt`` if it is a strftime format pandas can read timestamps with, else
    :class:`ConfigError` saying why.

    >>> check_ts_format("%d/%m/%Y")
    '%d/%m/%Y'
    >>> check_ts_format("dd/mm/yyyy")
    Traceback (most recent call last):
    ...
    monitor.errors.ConfigError: ts_format = 'dd/mm/yyyy': must be a strftime format with % codes, for example '%d/%m/%Y' or '%d/%m/%Y %H:%M'
    """
    example = "for example '%d/%m/%Y' or '%d/%m/%Y %H:%M'"
    if "%" not in fmt:
        raise ConfigError(f"ts_format = {fmt!r}: must be a strftime format with % codes, "
                          f"{example}")
    try:
        pd.to_datetime(pd.Series(["x"]), format=fmt, errors="coerce", utc=True)
    except ValueError as exc:
        raise ConfigError(f"ts_format = {fmt!r}: {exc} ({example})") from None
    return fmt


#: ``[validation]`` keys: (type, default), the schema :mod:`monitor.settings` composes
VALIDATION_KEYS = {"zero_policy": (str, "reject"), "duplicate_policy": (str, "keep_first"),
                   "allowed_lateness_s": ((int, float), 0.0),
                   "max_future_s": ((int, float), 3600.0), "unit_ratio": ((int, float), 50.0),
                   "order": (str, "auto"), "quantity_ratio": ((int, float), 1000.0),
                   "min_value": ((int, float), 1e-9),
                   "max_value": ((int, float), 1e12)}
SECTIONS = {"validation": VALIDATION_KEYS}


def validation_from_config(cfg) -> ValidationSettings:
    """The validation settings of ``[validation]`` (the dataclass's defaults for keys not
    given)."""
    key = tuple(cfg.section("series").get("key") or ())
    sec = dict(cfg.section("validation"))
    if cfg.section("estimator").get("model") == "poisson":
        sec["zero_policy"] = "keep"           # zero quantities are data for the Poisson model
    ts_format = cfg.section("columns").get("ts_format") or ""    # the log's own time format
    return ValidationSettings(**sec, key=key, ts_format=ts_format)


@dataclass
class Validated:
    """Good rows (sorted by series then ts; ``ts`` as int64 ns UTC) and quarantined rows."""

    good: pd.DataFrame
    rejects: pd.DataFrame
    zero_skipped: pd.DataFrame = field(default_factory=pd.DataFrame)
    #: the gate's series id of each good row (``gate.ids(good["series"])``, known to the
    #: ordered checks; None where it was not computed)
    sid: np.ndarray | None = None


REJECT_COLUMNS = ["row", "series", "ts", "field", "value", "reason", "raw"]


@njit(cache=True)
def _edges_plain(offsets, data):  # pragma: no cover - compiled
    """True when every field (``data[offsets[i]:offsets[i + 1]]``) is non-empty and starts and
    ends with a byte in ``!`` .. ``~``."""
    for i in range(offsets.shape[0] - 1):
        a, b = offsets[i], offsets[i + 1]
        if not (b > a and 33 <= data[a] <= 126 and 33 <= data[b - 1] <= 126):
            return False
    return True


def plain_text(arr) -> bool:
    """True when every field of the Arrow string array ``arr`` is present, not empty, and
    starts and ends with a printable ASCII character other than a space (``!`` .. ``~``): then
    no field is blank and stripping changes none (Python's ``str.strip`` and Arrow's
    ``utf8_trim_whitespace`` remove only whitespace, and no whitespace character is in that
    range). Read in one compiled pass over the array's buffers; False sends a column to the
    general path."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks() if arr.num_chunks != 1 else arr.chunk(0)
    n = len(arr)
    if arr.null_count or not (pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type)):
        return False
    if n == 0:
        return True
    bufs = arr.buffers()
    wide = pa.types.is_large_string(arr.type)
    offsets = np.frombuffer(bufs[1], np.int64 if wide else np.int32)[arr.offset:arr.offset + n + 1]
    data = np.frombuffer(bufs[2], np.uint8) if bufs[2] is not None else np.zeros(0, np.uint8)
    return bool(_edges_plain(np.asarray(offsets, np.int64), data))


def _is_blank(col: pd.Series) -> np.ndarray:
    """Empty fields. Float columns hold no empties (:func:`monitor.ingest.logio.table_to_frame` turns a
    float column with nulls into objects with None), so a NaN there is a literal NaN."""
    arr = arrow_text_array(col)
    if arr is not None and plain_text(arr):
        return np.zeros(len(col), dtype=bool)
    if col.dtype == object:
        none = np.fromiter((v is None or v is pd.NA or (isinstance(v, str) and not v.strip())
                            for v in col), dtype=bool, count=len(col))
        return none
    if pd.api.types.is_string_dtype(col):
        s = col.astype("string")
        return (s.isna() | (s.str.strip() == "")).to_numpy(dtype=bool)
    if pd.api.types.is_float_dtype(col):
        return np.zeros(len(col), dtype=bool)
    return col.isna().to_numpy(dtype=bool)


def arrow_text_array(col: pd.Series):
    """The Arrow array of an Arrow-backed text column (``str`` / ``string[pyarrow]`` /
    ``ArrowDtype(string)``; chunks joined into one array), ``None`` for any other column."""
    dt = col.dtype
    if isinstance(dt, pd.StringDtype):
        arrow = dt.storage in ("pyarrow", "pyarrow_numpy")
    elif isinstance(dt, pd.ArrowDtype):
        arrow = pa.types.is_string(dt.pyarrow_dtype) or pa.types.is_large_string(dt.pyarrow_dtype)
    else:
        arrow = False
    return pa.array(col.array) if arrow else None


def _arrow_numbers(col: pd.Series) -> np.ndarray | None:
    """float64 values of an Arrow-backed text column parsed in C by
    :func:`pyarrow.compute.cast` on the whitespace-trimmed text, or ``None`` when the column
    needs :func:`parse_numbers`' general path.

    Used only when every field parses to a finite, non-negative-zero number: a blank, a NaN
    word, an infinity, a number beyond float64 or junk makes the cast fail or give a non-finite
    value, and the general path then gives today's values and reasons. ``-0`` is left to that
    path too: ``pd.to_numeric`` reads an all-integer column as integers, so ``-0`` becomes
    ``+0.0`` there (``-0.0`` in a column with a decimal point), while the cast always gives
    ``-0.0``. A leading ``+`` is left to it as well: ``pd.to_numeric`` reads such text up to
    one unit in the last place away from the nearest float64 (``+1.052e+119``; the cast and
    Python's ``float`` round correctly), and the result must not depend on the column's type.
    Every other value is the same float64 to the bit (checked in tests/test_validate_arrow.py
    on random texts against the general path and Python's ``float``).
    """
    arr = arrow_text_array(col)
    if arr is None or arr.null_count:
        return None
    text = arr if plain_text(arr) else pc.utf8_trim_whitespace(arr)
    if pc.any(pc.starts_with(text, "+")).as_py():
        return None
    try:
        v = pc.cast(text, pa.float64())
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return None
    v = np.asarray(v.to_numpy(zero_copy_only=False), dtype=np.float64)
    if not np.isfinite(v).all() or np.signbit(v[v == 0]).any():
        return None
    return v


def parse_numbers(col: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Float values and a mask of fields that are present but do not parse as numbers.

    Arrow-backed text whose every field is a finite number is parsed by Arrow in C
    (:func:`_arrow_numbers`; ``pd.to_numeric`` would make a Python object of every field
    first); any other column takes the general path below, which reads
    blanks, NaN words, infinities and junk. Both give the same float64 to the bit.
    """
    if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
        return col.to_numpy(dtype=np.float64, na_value=np.nan), np.zeros(len(col), dtype=bool)
    fast = _arrow_numbers(col)
    if fast is not None:
        return fast, np.zeros(len(col), dtype=bool)
    s = col.astype("string").str.strip()
    v = pd.to_numeric(s, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    low = s.str.lower()
    nan_words = low.isin(["nan", "+nan", "-nan"]).to_numpy(dtype=bool, na_value=False).copy()
    if col.dtype == object:   # literal NaN floats kept beside None (empty) by table_to_frame
        nan_words |= np.fromiter((isinstance(v, float) and v != v for v in col), dtype=bool,
                                 count=len(col))
    v[nan_words] = np.nan
    bad = np.isnan(v) & ~nan_words & ~_is_blank(col)
    return v, bad


def _number_like(s: pd.Series) -> np.ndarray | None:
    """Fields of trimmed text that may be epoch seconds: all but those starting with digits,
    a ``-`` and a digit (``2025-01-31...``), which no number reading accepts (a ``-`` after
    digits is a number only after an exponent ``e``). ``None``: every field (not Arrow text).
    Decided in C by Arrow's regular expressions."""
    arr = arrow_text_array(s)
    if arr is None:
        return None
    dated = pc.fill_null(pc.match_substring_regex(arr, r"^[+-]?[0-9]+-[0-9]"), False)
    return ~np.asarray(dated.to_numpy(zero_copy_only=False), dtype=bool)


def parse_timestamps(col: pd.Series, ts_format: str = "") -> np.ndarray:
    """int64 ns since the epoch, UTC; ``INT64_MIN`` where empty, unparsable or out of range
    (:func:`read_timestamps` says why)."""
    return read_timestamps(col, ts_format)[0]


def _in_range(t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """ns of datetime64 values (any unit) and a mask of those inside TS_MIN .. TS_MAX, checked
    in the values' own unit so nothing wraps on the way to nanoseconds."""
    nat = np.iinfo(np.int64).min
    t = np.asarray(t)
    unit = np.datetime_data(t.dtype)[0]
    lo = np.datetime64(TS_MIN_NS, "ns").astype(f"datetime64[{unit}]")
    hi = np.datetime64(TS_MAX_NS, "ns").astype(f"datetime64[{unit}]")
    ok = ~np.isnat(t) & (t >= lo) & (t <= hi)
    out = np.full(t.shape, nat, dtype=np.int64)
    out[ok] = t[ok].astype("datetime64[ns]").view(np.int64)
    return out, ok


def read_timestamps(col: pd.Series, ts_format: str = "") -> tuple[np.ndarray, np.ndarray]:
    """Timestamps as int64 ns since 1970 UTC, and why each one that failed did.

    Text is ISO 8601 (an offset or ``Z``; naive is UTC) or, with ``ts_format``, that strftime
    format (naive is UTC; ``%z`` for an offset); numbers (or number text) are epoch seconds.
    Datetime columns (Parquet) are taken as they are, naive as UTC.

    Returns
    -------
    ns : int64 array
        ``INT64_MIN`` where the field is empty or failed.
    why : object array
        ``None``, or the rule a present field broke: :data:`TS_UNPARSABLE_RULE` (or the format
        it does not match), :data:`TS_FIELD_RULE`, :data:`TS_WORD_RULE`,
        :data:`TS_RANGE_RULE`.
    """
    nat = np.iinfo(np.int64).min
    n = len(col)
    why = np.full(n, None, dtype=object)
    if isinstance(col.dtype, pd.DatetimeTZDtype) or pd.api.types.is_datetime64_dtype(col):
        t = pd.to_datetime(col, utc=True).dt.tz_localize(None).to_numpy()
        out, ok = _in_range(t)
        why[~ok & ~np.isnat(t)] = TS_RANGE_RULE
        return out, why
    lo_s, hi_s = TS_MIN_NS / 1e9, TS_MAX_NS / 1e9
    if pd.api.types.is_numeric_dtype(col):
        v = col.to_numpy(dtype=np.float64, na_value=np.nan)
        out = np.full(n, nat, dtype=np.int64)
        ok = np.isfinite(v) & (v >= lo_s) & (v <= hi_s)
        out[ok] = np.round(v[ok] * 1e9).astype(np.int64)
        why[~ok & ~np.isnan(v)] = TS_RANGE_RULE
        return out, why
    if not ts_format:
        # the plain ISO forms (most logs: YYYY-MM-DDTHH:MM:SSZ) read from the Arrow buffers in
        # one compiled pass; the other fields (if any) take the general path below
        arr = arrow_text_array(col)
        if arr is not None:
            ns, plain = parse_plain_iso(arr, _YEAR_LO, _YEAR_HI)
            if plain.all():
                return ns, why
            if plain.any():
                rest = np.flatnonzero(~plain)
                ns[rest], why[rest] = read_timestamps(col.iloc[rest].reset_index(drop=True))
                return ns, why
    s = col.astype("string").str.strip()
    maybe = _number_like(s)
    if maybe is None:
        num = pd.to_numeric(s, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    else:      # ISO dates skip pd.to_numeric (it makes a Python object of every field first)
        num = np.full(n, np.nan)
        if maybe.any():
            num[maybe] = pd.to_numeric(s[maybe], errors="coerce").to_numpy(dtype=np.float64,
                                                                            na_value=np.nan)
    out = np.full(n, nat, dtype=np.int64)
    is_num = ~np.isnan(num)
    ok = is_num & (num >= lo_s) & (num <= hi_s)
    out[ok] = np.round(num[ok] * 1e9).astype(np.int64)
    why[is_num & ~ok] = TS_RANGE_RULE
    rest = ~is_num & ~_is_blank(col)
    if rest.any():
        text = s[rest]
        word = text.str.lower().isin(TS_WORDS).to_numpy(dtype=bool, na_value=False)
        idx = np.flatnonzero(rest)
        why[idx[word]] = TS_WORD_RULE
        idx, text = idx[~word], text[~word]
        if ts_format:
            t = pd.to_datetime(text, format=ts_format, utc=True, errors="coerce")
        else:
            t = pd.to_datetime(text, utc=True, errors="coerce", format="ISO8601")
        vals, good = _in_range(t.dt.tz_localize(None).to_numpy())
        out[idx[good]] = vals[good]
        failed = t.isna().to_numpy(dtype=bool)
        why[idx[~good & ~failed]] = TS_RANGE_RULE
        if failed.any():
            bad = idx[failed]
            if ts_format:
                why[bad] = (f"timestamp does not match the stated format {ts_format!r} "
                            f"(--ts-format / [columns] ts_format)")
            else:
                shaped = text[failed].str.match(_ISO_SHAPE).to_numpy(dtype=bool, na_value=False)
                why[bad] = np.where(shaped, TS_FIELD_RULE, TS_UNPARSABLE_RULE)
                # a year beyond 4 digits or one pandas cannot hold is out of range, not a typo
                years = text[failed].str.extract(r"^([+-]?\d{4,})-", expand=False)
                far = years.notna().to_numpy() & shaped
                if far.any():
                    y = pd.to_numeric(years[far], errors="coerce").to_numpy(dtype=np.float64)
                    outside = (y < 1678) | (y > 2261)
                    sel = bad[np.flatnonzero(far)[outside]]
                    why[sel] = TS_RANGE_RULE
    return out, why


class SeriesGate:
    """Per-series state of the ordered checks (last accepted time, recent prices).

    Kept across batches and in checkpoints (:meth:`to_state` / :meth:`from_state`).
    """

    def __init__(self):
        self.index: dict[str, int] = {}
        self.last_ts = np.zeros(0, dtype=np.int64)
        self.ring = np.zeros((0, WINDOW))
        self.ring_ts = np.zeros((0, WINDOW), dtype=np.int64)
        self.count = np.zeros(0, dtype=np.int64)
        self.qring = np.zeros((0, WINDOW))                  # recent log quantities (non-zero)
        self.qcount = np.zeros(0, dtype=np.int64)

    def ids(self, series: np.ndarray) -> np.ndarray:
        codes, uniques = pd.factorize(series)
        mapping = np.empty(len(uniques), dtype=np.int64)
        for j, name in enumerate(uniques):
            i = self.index.get(name)
            if i is None:
                i = len(self.index)
                self.index[name] = i
            mapping[j] = i
        n = len(self.index)
        if n > self.last_ts.size:
            grow = n - self.last_ts.size
            self.last_ts = np.concatenate([self.last_ts, np.full(grow, np.iinfo(np.int64).min)])
            self.ring = np.vstack([self.ring, np.zeros((grow, WINDOW))])
            self.ring_ts = np.vstack([self.ring_ts, np.zeros((grow, WINDOW), dtype=np.int64)])
            self.count = np.concatenate([self.count, np.zeros(grow, dtype=np.int64)])
            self.qring = np.vstack([self.qring, np.zeros((grow, WINDOW))])
            self.qcount = np.concatenate([self.qcount, np.zeros(grow, dtype=np.int64)])
        return mapping[codes]

    def state_of(self, series: str) -> dict:
        i = self.index[series]
        return {"last_ts": int(self.last_ts[i]), "ring": self.ring[i].tolist(),
                "ring_ts": self.ring_ts[i].tolist(), "count": int(self.count[i]),
                "qring": self.qring[i].tolist(), "qcount": int(self.qcount[i])}

    def restore(self, series: str, state: dict) -> None:
        """Set one series' state from :meth:`state_of`'s dict; a dict without ``ring`` (a reset
        series: only ``last_ts``, ``count = 0``) starts the recent prices afresh, and one without
        ``qring`` (a checkpoint of an older version) the recent quantities."""
        i = self.ids(np.array([series], dtype=object))[0]
        last = state.get("last_ts")
        self.last_ts[i] = np.iinfo(np.int64).min if last is None else int(last)
        self.ring[i] = np.asarray(state.get("ring", np.zeros(WINDOW)), dtype=np.float64)
        self.ring_ts[i] = np.asarray(state.get("ring_ts", np.zeros(WINDOW)), dtype=np.int64)
        self.count[i] = int(state["count"])
        self.qring[i] = np.asarray(state.get("qring", np.zeros(WINDOW)), dtype=np.float64)
        self.qcount[i] = int(state.get("qcount", 0))


@njit(cache=True, inline="always")
def ring_median(ring, s, c, tmp):
    """Median of ``ring[s, :c]`` without allocating: :func:`_sorted_copy` into ``tmp`` (c <=
    WINDOW = 15 values), then :func:`_sorted_median`, the arithmetic the ordered checks use;
    the mean of the two middle values when c is even is ``np.median``'s (``(a + b) / 2``), so
    the result is identical (tests/test_validate.py)."""
    _sorted_copy(ring, s, c, tmp)
    return _sorted_median(tmp, c)


@njit(cache=True, inline="always")
def _insert(srt, c, v):
    """``srt[:c + 1]``: ``v`` inserted into the ascending ``srt[:c]`` (after equal values)."""
    k = c
    while k > 0 and srt[k - 1] > v:
        srt[k] = srt[k - 1]
        k -= 1
    srt[k] = v


@njit(cache=True, inline="always")
def _sorted_copy(ring, s, c, out):
    """``out[:c]`` = ``ring[s, :c]`` in ascending order (insertion sort)."""
    for i in range(c):
        _insert(out, i, ring[s, i])


@njit(cache=True, inline="always")
def _sorted_median(srt, c):
    """Median of the ascending ``srt[:c]`` (the mean of the two middle values when ``c`` is
    even, as ``np.median``)."""
    half = c >> 1
    if c & 1:
        return srt[half]
    return (srt[half - 1] + srt[half]) / 2


@njit(cache=True, inline="always")
def _sorted_push(srt, c, w, old, new):
    """The window's ascending copy ``srt[:c]`` after ``new`` enters the ring: added when the
    ring holds fewer than ``w`` values, else replacing one value equal to ``old`` (the value it
    overwrites). Returns False when no value equals ``old`` (the copy is then stale)."""
    if c >= w:
        k = 0
        while k < c and srt[k] != old:
            k += 1
        if k == c:
            return False
        while k < c - 1:               # take ``old`` out
            srt[k] = srt[k + 1]
            k += 1
        c -= 1
    _insert(srt, c, new)
    return True


@njit(cache=True)
def ordered_checks(sid, ts, lp, last_ts, ring, ring_ts, count, lateness_ns, log_ratio,
                    reject_all, code, batch_median, lq, qring, qcount, log_qratio):
    """Walk rows sorted by (sid, ts, arrival); set code 1 duplicate, 2 late, 3 unit error,
    4 quantity error.

    The unit check compares log price with the median of the series' last accepted prices (once
    2 are known), or else with ``batch_median`` (NaN: no check). The quantity check compares a
    finite log quantity ``lq`` (``-inf`` for a zero kept as data: not checked, not kept) with
    the median of the series' last accepted ones (once 2 are known; ``log_qratio`` <= 0: off).

    The medians come from ascending copies of the series' two windows, built from the rings
    when the walk reaches a series and kept in order as values enter (one insertion and one
    removal per accepted row, instead of sorting the window for every row): the same values in
    the same order as a sort of the window (:func:`ring_median`), so the same medians to the
    bit (rows of a series need not be adjacent: the copies are rebuilt whenever the series
    changes).
    """
    n = sid.shape[0]
    w = ring.shape[1]
    sp = np.empty(w)               # ring[cur, :min(count, w)] ascending
    sq = np.empty(w)               # qring[cur, :min(qcount, w)] ascending
    cur = -1
    for j in range(n):
        s = sid[j]
        if s != cur:
            _sorted_copy(ring, s, min(count[s], w), sp)
            _sorted_copy(qring, s, min(qcount[s], w), sq)
            cur = s
        if count[s] > 0 or last_ts[s] != np.iinfo(np.int64).min:
            dup = ts[j] == last_ts[s]
            for i in range(min(count[s], w)):
                if ring_ts[s, i] == ts[j]:
                    dup = True
            if dup:
                code[j] = 1
                continue
            if ts[j] < last_ts[s] - lateness_ns:
                code[j] = 2
                continue
        c = min(count[s], w)
        if c >= 2:
            med = _sorted_median(sp, c)
        else:
            med = batch_median[s]
        if med == med and abs(lp[j] - med) >= log_ratio:
            code[j] = 3
            continue
        finite_q = lq[j] > -np.inf
        if finite_q and log_qratio > 0 and qcount[s] >= 2:
            qmed = _sorted_median(sq, min(qcount[s], w))
            if abs(lq[j] - qmed) >= log_qratio:
                code[j] = 4
                continue
        if finite_q:
            if not _sorted_push(sq, min(qcount[s], w), w, qring[s, qcount[s] % w], lq[j]):
                cur = -1
            qring[s, qcount[s] % w] = lq[j]
            qcount[s] += 1
        if not _sorted_push(sp, c, w, ring[s, count[s] % w], lp[j]):
            cur = -1
        ring[s, count[s] % w] = lp[j]
        ring_ts[s, count[s] % w] = ts[j]
        count[s] += 1
        if ts[j] > last_ts[s]:
            last_ts[s] = ts[j]
    if reject_all:
        # every copy of a duplicated (series, ts) inside this batch
        for j in range(1, n):
            if code[j] == 1 and sid[j] == sid[j - 1] and ts[j] == ts[j - 1]:
                k = j - 1
                while k >= 0 and sid[k] == sid[j] and ts[k] == ts[j]:
                    code[k] = 1
                    k -= 1


_ORDER_REASONS = {1: ("ts", "duplicate row: same series and timestamp as an earlier row"),
                  2: ("ts", "late row: older than the series' last accepted time beyond the allowed lateness"),
                  3: ("price", "suspected unit error: price is {ratio:.0f}x or more away from the series' recent median"),
                  4: ("quantity", "suspected quantity error: quantity is {qratio:.0f}x or more away from the series' recent median ([validation] quantity_ratio)")}


def validate_frame(frame: pd.DataFrame, *, controls=(), log_controls=(),
                   settings: ValidationSettings | None = None, gate: SeriesGate | None = None,
                   now_ns: int | None = None, row_offset: int = 0,
                   order_by: str = "time", exposure: str = "") -> Validated:
    """Validate a frame of raw rows in arrival order.

    Parameters
    ----------
    frame : DataFrame
        Raw columns ``series, ts, price, quantity`` and any controls (already renamed).
    controls, log_controls : names of the controls used (entered as given / in logs).
    exposure : str
        The name among ``log_controls`` that is the Poisson model's exposure (checked as a
        logged control; its messages say "exposure").
    gate : SeriesGate
        Ordered-check state carried across batches; a new one if omitted.
    now_ns : int, optional
        Reference time (ns UTC) for the future-timestamp check; no check when omitted.
    row_offset : int
        Number of data rows before this frame in its source (row numbers are 1-based data rows).
    order_by : "time" or "arrival"
        ``time`` (replay): each series' rows are checked and returned in timestamp order; a new
        series' unit check may use the median of its prices in this batch. ``arrival`` (live
        service): rows are checked in arrival order and returned in it, so the result does not
        depend on how rows were split into batches (needed for exact resume); a row older than
        the series' latest accepted time by more than the allowed lateness is late.

    Returns
    -------
    Validated
        ``good`` in processing order (see ``order_by``) with column ``row``; ``rejects`` with
        ``row, series, ts, field, value, reason, raw``; ``zero_skipped`` rows (zero policy skip).
    """
    if order_by not in ("time", "arrival"):
        raise ValueError(f"order_by = {order_by!r}: must be 'time' or 'arrival'")
    settings = settings or ValidationSettings()
    gate = gate if gate is not None else SeriesGate()
    keys = None
    if len(settings.key) > 1:     # composite series id (monitor.groups.keys), blank parts flagged
        keys = compose_series(frame, settings.key)
        frame = frame.assign(series=keys.series.to_numpy(dtype=object))
    names = list(REQUIRED) + list(controls) + list(log_controls)
    missing = [c for c in names if c not in frame.columns]
    if missing:
        raise SourceError(f"missing column(s) {missing}; the log has columns "
                          f"{list(frame.columns)}{separator_hint(frame.columns)}")
    n = len(frame)
    rows = np.arange(row_offset + 1, row_offset + n + 1, dtype=np.int64)
    reason = np.full(n, None, dtype=object)
    bad_field = np.full(n, None, dtype=object)
    flagged = np.zeros(n, dtype=bool)          # reason is set (cheaper than reason == None)

    def flag(mask, fld, text):
        if not mask.any():        # the usual case on clean data: no pass over the row arrays
            return
        m = mask & ~flagged
        reason[m] = text
        bad_field[m] = fld
        flagged[m] = True

    series = frame["series"]
    for col in (settings.key if keys is not None else ()):
        flag(keys.blank[col], col, EMPTY_PART_RULE)
    flag(_is_blank(series), "series", "empty field")
    ts, ts_why = read_timestamps(frame["ts"], settings.ts_format)
    nat = np.iinfo(np.int64).min
    flag(_is_blank(frame["ts"]), "ts", "empty field")
    failed = ts_why[ts == nat]           # a reason is only ever given where the time failed
    for text in pd.unique(failed[failed != None]):    # noqa: E711 (object array)
        flag(ts_why == text, "ts", text)
    flag(ts == nat, "ts", TS_UNPARSABLE_RULE)
    if now_ns is not None:
        flag((ts != nat) & (ts > now_ns + int(settings.max_future_s * 1e9)), "ts",
             f"timestamp in the future by more than {settings.max_future_s:g} s")
    values = {}
    lo, hi = settings.min_value, settings.max_value
    limits = f"[{lo:g}, {hi:g}] ([validation] min_value, max_value)"
    for c in ["price", "quantity"] + list(controls) + list(log_controls):
        v, unparsable = parse_numbers(frame[c])
        flag(_is_blank(frame[c]), c, "empty field")
        flag(unparsable, c, "not a number")
        flag(np.isnan(v), c, "NaN is not a value")
        if np.isinf(v).any():
            word = _inf_words(frame[c])
            flag(np.isinf(v) & word, c, "infinity is not a value")
            flag(np.isinf(v), c, "number beyond the float64 range (it overflows to infinity)")
        values[c] = v
    price, qty = values["price"], values["quantity"]
    flag(price <= 0, "price", "price must be > 0")
    flag(qty < 0, "quantity", "quantity must be >= 0")
    flag((price < lo) | (price > hi), "price", f"price outside the accepted range {limits}")
    flag((qty != 0) & ((qty < lo) | (qty > hi)), "quantity",
         f"quantity outside the accepted range {limits}")
    for c in log_controls:
        what = "an exposure" if c == exposure else "a control entered in logs"
        flag(values[c] <= 0, c, f"{what} must be > 0")
        flag((values[c] < lo) | (values[c] > hi), c,
             f"{what} outside the accepted range {limits}")
    for c in controls:
        flag(np.abs(values[c]) > hi, c, f"a control beyond +-{hi:g} in size ([validation] "
                                        f"max_value)")
    zero = (values["quantity"] == 0) & ~flagged
    if settings.zero_policy == "reject":
        flag(zero, "quantity", "zero quantity cannot be logged (zero_policy = reject)")
        zero[:] = False
    elif settings.zero_policy == "keep":      # the model takes zero quantities as data
        zero[:] = False

    # ordered checks on the remaining rows, per series in time order
    ok = ~flagged & ~zero
    idx = np.flatnonzero(ok)
    sid_all = np.full(n, -1, dtype=np.int64)
    if idx.size:
        # a text column (arrow-backed) is factorized by arrow without making Python strings
        arrow_text = pd.api.types.is_string_dtype(series) and series.dtype != object
        every = idx.size == n                # no row flagged so far: no take of the column
        sid_all[idx] = gate.ids((series if every else series.iloc[idx]) if arrow_text
                                else series.to_numpy(dtype=object)[idx])
        if order_by == "time":
            order = idx[np.lexsort((idx, ts[idx], sid_all[idx]))]
        else:
            order = idx[np.argsort(sid_all[idx], kind="stable")]
        code = np.zeros(order.size, dtype=np.int8)
        lp = np.log(values["price"][order])
        with np.errstate(divide="ignore"):
            lq = np.log(values["quantity"][order])          # a zero kept as data: -inf
        batch_median = np.full(gate.last_ts.size, np.nan)
        if order_by == "time":
            # the walk reads a series' batch median only while the series has fewer than
            # MIN_HISTORY accepted prices, and that count only grows: the medians of series
            # that start the batch with that many are never read and are not computed
            s_ord = sid_all[order]
            young = gate.count[s_ord] < MIN_HISTORY
            if young.any():
                grouped = pd.Series(lp[young]).groupby(s_ord[young])
                med = grouped.median().where(grouped.size() >= MIN_BATCH)
                batch_median[med.index.to_numpy()] = med.to_numpy(dtype=np.float64)
        ordered_checks(sid_all[order], ts[order], lp, gate.last_ts,
                        gate.ring, gate.ring_ts, gate.count, np.int64(settings.allowed_lateness_s * 1e9),
                        math.log(settings.unit_ratio), settings.duplicate_policy == "reject_all", code,
                        batch_median, lq, gate.qring, gate.qcount, log_qratio(settings))
        for c, (fld, text) in _ORDER_REASONS.items():
            m = np.zeros(n, dtype=bool)
            m[order[code == c]] = True
            flag(m, fld, text.format(ratio=settings.unit_ratio, qratio=settings.quantity_ratio))
        good_idx = order[code == 0]
        if order_by == "arrival":
            good_idx = np.sort(good_idx)
    else:
        good_idx = idx

    if pd.api.types.is_string_dtype(series) and series.dtype != object:
        good_series = series.iloc[good_idx].astype("str").reset_index(drop=True)   # same values
    else:
        good_series = series.to_numpy(dtype=object)[good_idx].astype(str)
    # one frame of fresh arrays, not copied again into consolidated blocks
    good = pd.DataFrame({"row": rows[good_idx], "series": good_series, "ts": ts[good_idx],
                         **{c: v[good_idx] for c, v in values.items()}}, copy=False)
    bad = np.flatnonzero(flagged)
    rejects = _reject_frame(frame, rows, bad, bad_field, reason)
    zi = np.flatnonzero(zero)
    zero_frame = pd.DataFrame({"row": rows[zi], "series": series.iloc[zi].to_numpy(dtype=object),
                               "ts": ts[zi]})
    return Validated(good=good.reset_index(drop=True), rejects=rejects, zero_skipped=zero_frame,
                     sid=sid_all[good_idx])


def _inf_words(col: pd.Series) -> np.ndarray:
    """Fields written as infinity (``inf``, ``-Infinity``, a float inf), as against a number
    too large for float64 (``1e309``)."""
    if pd.api.types.is_float_dtype(col):
        return np.isinf(col.to_numpy(dtype=np.float64))
    if col.dtype == object:
        floats = np.fromiter((isinstance(v, float) and math.isinf(v) for v in col), dtype=bool,
                             count=len(col))
    else:
        floats = np.zeros(len(col), dtype=bool)
    low = col.astype("string").str.strip().str.lower().str.lstrip("+-")
    return floats | low.isin(["inf", "infinity"]).to_numpy(dtype=bool, na_value=False)


def log_qratio(settings: ValidationSettings) -> float:
    """``log(quantity_ratio)``, or 0 (no quantity check) when the ratio is 0."""
    return math.log(settings.quantity_ratio) if settings.quantity_ratio > 0 else 0.0


def separator_hint(columns) -> str:
    """Advice when a column name holds a field separator (the file was split by another one).

    >>> separator_hint(["series;ts;price;quantity"])
    " (a column name holds ';': is that the field separator? give --delimiter ';' or [columns] delimiter)"
    >>> separator_hint(["series", "ts"])
    ''
    """
    seps = [d for d in (";", "\t", "|", ",") if any(d in str(c) for c in columns)]
    return (f" (a column name holds {seps[0]!r}: is that the field separator? give "
            f"--delimiter {seps[0]!r} or [columns] delimiter)" if seps else "")


def _cell(v) -> str:
    if v is None:
        return ""
    if isinstance(v, float) and math.isnan(v):
        return "nan"
    if v is pd.NA or v is pd.NaT:
        return ""
    if isinstance(v, pd.Timestamp):   # format_ts's text, without its per-call array set-up
        u = v.tz_convert("UTC") if v.tzinfo else v
        return u.strftime("%Y-%m-%dT%H:%M:%S.%fZ" if u.value % 1_000_000_000 else "%Y-%m-%dT%H:%M:%SZ")
    return str(v)


def _reject_frame(frame, rows, bad, bad_field, reason) -> pd.DataFrame:
    if bad.size == 0:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in REJECT_COLUMNS})
    sub = frame.iloc[bad]
    records = sub.to_dict(orient="records")
    # in text columns a missing value is an empty field; in float columns NaN is a literal NaN
    text_cols = {c for c in frame.columns
                 if frame[c].dtype != object and pd.api.types.is_string_dtype(frame[c])}
    out = []
    for j, rec in zip(bad, records):
        fld = bad_field[j]
        raw = {k: ("" if k in text_cols and isinstance(v, float) and math.isnan(v) else _cell(v))
               for k, v in rec.items()}
        val = raw.get(fld, "")
        out.append({"row": int(rows[j]), "series": raw.get("series", ""), "ts": raw.get("ts", ""),
                    "field": fld, "value": val,
                    "reason": f"row {int(rows[j])}: field '{fld}' = {val!r}: {reason[j]}",
                    "raw": json.dumps(raw, sort_keys=True)})
    return pd.DataFrame(out, columns=REJECT_COLUMNS)


def renumber(v: Validated, rows: np.ndarray) -> Validated:
    """Map validation's row numbers (1..n within the frame) onto the source's row numbers.

    ``zero_skipped`` gains a column ``local``: each skipped row's position within the frame.
    """
    good = v.good.assign(row=rows[v.good["row"].to_numpy(dtype=np.int64) - 1])
    rej = v.rejects
    if len(rej):
        local = rej["row"].to_numpy(dtype=np.int64)
        real = rows[local - 1]
        reasons = [f"row {b}:" + text[len(f"row {a}:"):] if text.startswith(f"row {a}:") else text
                   for a, b, text in zip(local.tolist(), real.tolist(), rej["reason"].tolist())]
        rej = rej.assign(row=real, reason=reasons)
    zero = v.zero_skipped
    if len(zero):
        zero = zero.assign(local=zero["row"].to_numpy(dtype=np.int64) - 1,
                           row=rows[zero["row"].to_numpy(dtype=np.int64) - 1])
    else:
        zero = zero.assign(local=np.zeros(0, dtype=np.int64)) if len(zero.columns) else \
            pd.DataFrame({"row": [], "series": [], "ts": [], "local": []})
    return Validated(good=good, rejects=rej, zero_skipped=zero, sid=v.sid)
