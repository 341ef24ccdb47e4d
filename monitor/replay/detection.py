"""Detection metrics of a replay against known change points (a truth file).

Truth
-----
A CSV with at least ``series, ts, kind`` (one known change per row, written by hand for
incidents a user knows about), or the simulators' full format ``series, ts, kind, end_ts,
beta_before, beta_after, note``. ``ts`` is the first affected observation, ``end_ts`` (optional)
the last one of a stretch (drift, flat prices, outage...). Kinds are those of
:data:`simulators.CHANGE_KINDS`.

Scoring (per series, on the observations the replay processed, in time order)
-----------------------------------------------------------------------------
- Which alerts count: :data:`KIND_RULES` maps each truth kind to the alert rules that detect
  it: ``elasticity_change`` and ``gradual_drift`` -> rule ``elasticity_change``;
  ``level_shift`` -> ``level_shift``; ``flat_price`` -> ``low_variation``. Kinds caught by
  validation rather than by an alert rule (``unit_error``, ``stockout``, ``outage``) are listed
  with status ``not_scored``.
- Detection window, in observations of that series: from the first observation at or after
  ``ts`` (index ``i0``) up to ``horizon`` observations after the last affected one (``end_ts``,
  or ``i0`` for a step), cut short at the next change point of the series. A change is
  ``detected`` when an alert of a counted rule opens inside the window, else ``missed``
  (``no_data`` when the series has no observation at or after ``ts``).
- Delay: ``delay_obs`` = index of the alerting observation minus ``i0`` (0 = alert on the first
  affected observation); ``delay_s`` = alert time minus ``ts``, seconds. Delays count from the
  true change time.
- Change-time error (issue 12): a change alert carries the detector's estimate of when the
  change began (``change_ts``, the likelihood's argmax). For the detecting alert,
  ``change_ts`` is that estimate, ``change_error_obs`` = index of the first observation at or
  after it minus ``i0`` (negative: estimated too early) and ``change_error_s`` = estimate minus
  ``ts``, seconds; empty when the alert carries no estimate (the previous charts, or an
  ``alerts`` frame without a ``change_ts`` column). The summary gives the median of
  ``|change_error_obs|`` over the detected changes that have one, beside the median delay.
- False alarms: alerts of :data:`FALSE_ALARM_RULES` (``elasticity_change``, ``level_shift``)
  opened at observations outside every change's exclusion zone ``[i0, i_end + 1 + horizon)``
  (kinds ``elasticity_change``, ``gradual_drift``, ``level_shift``). Data problems (flat
  prices, stock-outs, unit errors, outages) are not changes in the response: alarms near them
  count as false. The rate is per 10,000 of these quiet observations, counting every processed
  observation (warm-up included) outside the zones.

Scores of disjoint sets of series merge by concatenation (:meth:`Scores.merge`), so partitions
scored on different workers give the same summary as one pass.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from monitor.errors import SourceError, ValidationError
from monitor.rows.isotime import format_ts
from monitor.rows.validate import parse_timestamps


CHANGE_KINDS = ("elasticity_change", "level_shift", "gradual_drift", "unit_error", "flat_price",
                "outage", "stockout")
#: truth kind -> alert rules whose opening inside the window counts as its detection
KIND_RULES = {"elasticity_change": ("elasticity_change",), "gradual_drift": ("elasticity_change",),
              "level_shift": ("level_shift",), "flat_price": ("low_variation",)}
#: kinds that change the demand response: scored in the detection rate, excluded from quiet stretches
RESPONSE_KINDS = ("elasticity_change", "gradual_drift", "level_shift")
#: alert rules that count as false alarms in quiet stretches
FALSE_ALARM_RULES = ("elasticity_change", "level_shift")
#: default detection window after the last affected observation, observations
DEFAULT_HORIZON = 90
DETECTION_COLUMNS = ["series", "kind", "ts", "end_ts", "status", "rules", "alert_ts", "alert_rule",
                     "delay_obs", "delay_s", "window_obs", "beta_before", "beta_after", "note",
                     "change_ts", "change_error_obs", "change_error_s"]
NAT = np.iinfo(np.int64).min


def truth_frame(df: pd.DataFrame, source: str = "truth") -> pd.DataFrame:
    """Check and normalize a truth table; ``ts``/``end_ts`` become int64 ns (``end_ts`` NAT if empty).

    Raises ValidationError naming the row (1-based data row), the field, the value and the rule.
    """
    missing = [c for c in ("series", "ts", "kind") if c not in df.columns]
    if missing:
        raise SourceError(f"{source}: missing column(s) {missing}; a truth file needs at least "
                          f"series, ts, kind (it has {list(df.columns)})")
    out = pd.DataFrame({"row": np.arange(1, len(df) + 1)})
    series = df["series"].astype("string").str.strip()
    kind = df["kind"].astype("string").str.strip()
    ts = parse_timestamps(df["ts"])
    problems = []
    for i in range(len(df)):
        if pd.isna(series.iat[i]) or series.iat[i] == "":
            problems.append(f"row {i + 1}: field 'series' = {df['series'].iat[i]!r}: empty field")
        if ts[i] == NAT:
            problems.append(f"row {i + 1}: field 'ts' = {df['ts'].iat[i]!r}: unparsable timestamp "
                            "(expected ISO 8601 or epoch seconds)")
        if pd.isna(kind.iat[i]) or kind.iat[i] not in CHANGE_KINDS:
            problems.append(f"row {i + 1}: field 'kind' = {df['kind'].iat[i]!r}: unknown kind "
                            f"(one of {', '.join(CHANGE_KINDS)})")
    end = np.full(len(df), NAT, dtype=np.int64)
    if "end_ts" in df.columns:
        raw = df["end_ts"].astype("string").str.strip().fillna("")
        given = (raw != "").to_numpy()
        end[given] = parse_timestamps(raw[given])
        for i in np.flatnonzero(given & (end == NAT)):
            problems.append(f"row {i + 1}: field 'end_ts' = {df['end_ts'].iat[i]!r}: unparsable "
                            "timestamp")
        for i in np.flatnonzero(given & (end != NAT) & (ts != NAT) & (end < ts)):
            problems.append(f"row {i + 1}: field 'end_ts' = {df['end_ts'].iat[i]!r}: before ts")
    if problems:
        more = f" (and {len(problems) - 10} more)" if len(problems) > 10 else ""
        raise ValidationError(f"{source}: " + "; ".join(problems[:10]) + more)
    out["series"] = series.astype(str).to_numpy(dtype=object)
    out["ts"] = ts
    out["kind"] = kind.astype(str).to_numpy(dtype=object)
    out["end_ts"] = end
    for c in ("beta_before", "beta_after"):
        out[c] = pd.to_numeric(df[c], errors="coerce").to_numpy(dtype=float) if c in df.columns \
            else np.nan
    out["note"] = df["note"].astype("string").fillna("").astype(str).to_numpy(dtype=object) \
        if "note" in df.columns else ""
    return out.sort_values(["series", "ts", "row"], kind="stable").reset_index(drop=True)


def read_truth(path) -> pd.DataFrame:
    """Read a truth CSV (see the module docstring) into :func:`truth_frame`'s form."""
    p = Path(path)
    if not p.is_file():
        raise SourceError(f"{p}: truth file not found")
    try:
        df = pd.read_csv(p, dtype=str, keep_default_na=False)
    except (pd.errors.ParserError, UnicodeDecodeError, pd.errors.EmptyDataError) as exc:
        raise SourceError(f"{p}: unreadable truth file: {exc}") from None
    return truth_frame(df, str(p))


@dataclass
class Scores:
    """Per-change results (:data:`DETECTION_COLUMNS`) and per-series quiet counts."""

    changes: pd.DataFrame
    quiet: pd.DataFrame            # series, n_obs, quiet_obs, false_alarms
    horizon: int = DEFAULT_HORIZON

    @classmethod
    def merge(cls, parts: list["Scores"], truth: pd.DataFrame | None = None) -> "Scores":
        """Scores of disjoint sets of series (each from ``score(..., partial=True)``), combined;
        with ``truth``, its series seen in no part are added as ``no_data``. The result equals
        scoring all series together."""
        frames = [p.changes for p in parts]
        if truth is not None:
            seen = set().union(*(set(p.quiet["series"]) for p in parts)) if parts else set()
            rest = truth[~truth["series"].isin(seen)]
            if len(rest):
                frames.append(score(np.zeros(0, np.int64), np.zeros(0, np.int64), [], _empty_alerts(),
                                    rest, parts[0].horizon if parts else DEFAULT_HORIZON).changes)
        ch = pd.concat(frames, ignore_index=True) if frames else _empty_changes()
        q = pd.concat([p.quiet for p in parts], ignore_index=True) if parts else _empty_quiet()
        return cls(_sort_changes(ch), q.sort_values("series", kind="stable").reset_index(drop=True),
                   parts[0].horizon if parts else DEFAULT_HORIZON)

    def summary(self) -> dict:
        """Detection rate, delays and the false-alarm rate (see :func:`summarize`)."""
        return summarize(self.changes, self.quiet, self.horizon)


def _empty_changes() -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=object) for c in DETECTION_COLUMNS})


def _empty_alerts() -> pd.DataFrame:
    return pd.DataFrame({"series": pd.Series(dtype=object), "ts": pd.Series(dtype="int64"),
                         "rule": pd.Series(dtype=object), "change_ts": pd.Series(dtype="int64")})


def _empty_quiet() -> pd.DataFrame:
    return pd.DataFrame({"series": pd.Series(dtype=object), "n_obs": pd.Series(dtype="int64"),
                         "quiet_obs": pd.Series(dtype="int64"),
                         "false_alarms": pd.Series(dtype="int64")})


_FLOAT_COLS = ("delay_obs", "delay_s", "beta_before", "beta_after", "change_error_obs",
               "change_error_s")


def _sort_changes(ch: pd.DataFrame) -> pd.DataFrame:
    """Canonical row order and column types (text as str, numbers as float64/int64)."""
    ch = ch.astype({c: (float if c in _FLOAT_COLS else int if c == "window_obs" else str)
                    for c in DETECTION_COLUMNS})
    return ch.sort_values(["series", "ts", "kind"], kind="stable").reset_index(drop=True)


def score(sid: np.ndarray, ts: np.ndarray, names, alerts: pd.DataFrame, truth: pd.DataFrame,
          horizon: int = DEFAULT_HORIZON, partial: bool = False) -> Scores:
    """Score alerts against truth on the processed observations ``(sid, ts)``.

    Parameters
    ----------
    sid, ts : arrays (n,)
        Series code (index into ``names``) and time (int64 ns UTC) of every processed observation.
    names : sequence of str
        Series id of each code.
    alerts : DataFrame
        Opened alerts: ``series``, ``ts`` (int64 ns or ISO 8601 text), ``rule``, and optionally
        ``change_ts`` (the estimated change time the alert carries, same forms; empty/None
        where it has none).
    truth : DataFrame
        From :func:`truth_frame` / :func:`read_truth`.
    horizon : int
        Detection window after the last affected observation, in observations (>= 1).
    partial : bool
        Score only the truth rows of series in ``names`` (one partition of the series; combine
        partitions with :meth:`Scores.merge`).
    """
    if int(horizon) < 1:
        raise ValidationError(f"horizon = {horizon!r}: must be >= 1 observation", field="horizon")
    horizon = int(horizon)
    sid = np.asarray(sid, dtype=np.int64)
    ts = np.asarray(ts, dtype=np.int64)
    if sid.size > 1 and not (np.all(np.diff(sid) >= 0)
                             and np.all((np.diff(ts) > 0) | (np.diff(sid) > 0))):
        order = np.lexsort((ts, sid))
        sid, ts = sid[order], ts[order]
    names = [str(n) for n in names]
    codes = np.arange(len(names))
    starts = np.searchsorted(sid, codes, "left")
    ends = np.searchsorted(sid, codes, "right")
    code_of = {n: i for i, n in enumerate(names)}
    a_series = alerts["series"].astype(str).to_numpy(dtype=object) if len(alerts) else np.array([], object)
    a_ts = _ns(alerts["ts"]) if len(alerts) else np.array([], np.int64)
    a_rule = alerts["rule"].astype(str).to_numpy(dtype=object) if len(alerts) else np.array([], object)
    a_chg = _change_ns(alerts["change_ts"]) if len(alerts) and "change_ts" in alerts.columns \
        else np.full(a_ts.size, NAT, dtype=np.int64)
    a_code = np.array([code_of.get(s, -1) for s in a_series], dtype=np.int64)
    keep = a_code >= 0
    a_code, a_ts, a_rule, a_chg = a_code[keep], a_ts[keep], a_rule[keep], a_chg[keep]
    order = np.lexsort((a_ts, a_code))                 # alerts by series, then time
    a_code, a_ts, a_rule, a_chg = a_code[order], a_ts[order], a_rule[order], a_chg[order]
    a_lo = np.searchsorted(a_code, codes, "left")
    a_hi = np.searchsorted(a_code, codes, "right")
    # alert -> index of its observation within its series
    a_idx = np.empty(a_code.size, dtype=np.int64)
    for c in np.unique(a_code):
        a, b = a_lo[c], a_hi[c]
        a_idx[a:b] = np.searchsorted(ts[starts[c]:ends[c]], a_ts[a:b], "left")
    fa_mask = np.isin(a_rule, FALSE_ALARM_RULES)

    rows = []
    n_per = ends - starts
    quiet_obs = n_per.copy()
    valid = fa_mask & (a_idx < n_per[a_code]) if a_code.size else np.zeros(0, dtype=bool)
    false_alarms = np.bincount(a_code[valid], minlength=len(names)).astype(np.int64)
    empty = (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, object),
             np.zeros(0, np.int64))
    for series, group in truth.groupby("series", sort=True):
        c = code_of.get(series)
        if partial and c is None:
            continue
        t = ts[starts[c]:ends[c]] if c is not None else np.array([], np.int64)
        mine = (a_idx[a_lo[c]:a_hi[c]], a_ts[a_lo[c]:a_hi[c]], a_rule[a_lo[c]:a_hi[c]],
                a_chg[a_lo[c]:a_hi[c]]) if c is not None else empty
        i0s = np.searchsorted(t, group["ts"].to_numpy(), "left")
        quiet = np.ones(t.size, dtype=bool)
        for j, ch in enumerate(group.itertuples(index=False)):
            rows.append(_score_one(ch, t, i0s, j, horizon, mine, quiet))
        if c is not None:
            idx, rule = mine[0], mine[2]
            sel = np.isin(rule, FALSE_ALARM_RULES) & (idx < t.size)
            quiet_obs[c] = int(quiet.sum())
            false_alarms[c] = int(quiet[idx[sel]].sum())
    changes = pd.DataFrame(rows, columns=DETECTION_COLUMNS) if rows else _empty_changes()
    for col in ("ts", "end_ts", "alert_ts", "change_ts"):   # ns -> ISO 8601 text in one pass
        if len(changes):
            v = changes[col].to_numpy(dtype=np.int64)
            text = np.full(v.size, "", dtype=object)
            text[v != NAT] = format_ts(v[v != NAT])
            changes[col] = text
    has_obs = (ends - starts) > 0
    quiet_df = pd.DataFrame({"series": np.array(names, dtype=object)[has_obs],
                             "n_obs": (ends - starts)[has_obs].astype(np.int64),
                             "quiet_obs": quiet_obs[has_obs].astype(np.int64),
                             "false_alarms": false_alarms[has_obs].astype(np.int64)})
    return Scores(_sort_changes(changes), quiet_df, horizon)


def _ns(col: pd.Series) -> np.ndarray:
    if pd.api.types.is_integer_dtype(col):
        return col.to_numpy(dtype=np.int64)
    return parse_timestamps(col)


def _change_ns(col: pd.Series) -> np.ndarray:
    """Estimated change times as int64 ns, NAT where missing (None, NaN, empty text)."""
    if pd.api.types.is_integer_dtype(col):
        return col.to_numpy(dtype=np.int64)
    if pd.api.types.is_float_dtype(col):
        v = col.to_numpy(dtype=float)
        out = np.full(v.size, NAT, dtype=np.int64)
        ok = np.isfinite(v)
        out[ok] = v[ok].astype(np.int64)
        return out
    text = col.astype("string").str.strip().fillna("")
    out = np.full(len(col), NAT, dtype=np.int64)
    given = (text != "").to_numpy()
    if given.any():
        out[given] = parse_timestamps(text[given])
    return out


def _score_one(ch, t, i0s, j, horizon, mine, quiet) -> dict:
    """One change point: window, first counted alert, delay; marks its exclusion zone.
    ``mine``: the series' alerts (observation index, time, rule), in time order. Times stay
    int64 ns here (NAT when empty); :func:`score` writes them as text."""
    kind = ch.kind
    rules = KIND_RULES.get(kind, ())
    row = {"series": ch.series, "kind": kind, "ts": int(ch.ts), "end_ts": int(ch.end_ts),
           "rules": " ".join(rules), "alert_ts": NAT, "alert_rule": "", "delay_obs": np.nan,
           "delay_s": np.nan, "window_obs": 0, "beta_before": ch.beta_before,
           "beta_after": ch.beta_after, "note": ch.note, "change_ts": NAT,
           "change_error_obs": np.nan, "change_error_s": np.nan}
    n = t.size
    i0 = int(i0s[j])
    if i0 >= n:
        row["status"] = "no_data"
        return row
    i_end = i0
    if ch.end_ts != NAT:
        i_end = max(i0, int(np.searchsorted(t, ch.end_ts, "right")) - 1)
    later = i0s[(i0s > i0)]
    stop = min(i_end + 1 + horizon, n, int(later.min()) if later.size else n)
    row["window_obs"] = stop - i0
    if kind in RESPONSE_KINDS:
        quiet[i0:min(i_end + 1 + horizon, n)] = False
    if not rules:
        row["status"] = "not_scored"
        return row
    idx, a_ts, a_rule, a_chg = mine
    sel = np.flatnonzero(np.isin(a_rule, rules) & (idx >= i0) & (idx < stop))
    if sel.size == 0:
        row["status"] = "missed"
        return row
    first = sel[np.argmin(idx[sel])]
    row.update(status="detected", alert_ts=int(a_ts[first]), alert_rule=a_rule[first],
               delay_obs=float(idx[first] - i0), delay_s=(int(a_ts[first]) - int(ch.ts)) / 1e9)
    c = int(a_chg[first])
    if c != NAT:
        row.update(change_ts=c, change_error_obs=float(int(np.searchsorted(t, c, "left")) - i0),
                   change_error_s=(c - int(ch.ts)) / 1e9)
    return row


def _quantile(values: np.ndarray, q: float) -> float:
    """Linear-interpolation quantile (numpy's default) that allows +inf (a miss) in the data."""
    v = np.sort(np.asarray(values, dtype=float))
    if v.size == 0:
        return math.nan
    pos = q * (v.size - 1)
    lo, hi = int(math.floor(pos)), int(math.ceil(pos))
    if math.isinf(v[hi]):
        return math.inf
    return float(v[lo] + (pos - lo) * (v[hi] - v[lo]))


def _num(v: float):
    return None if v is None or not math.isfinite(v) else float(v)


def summarize(changes: pd.DataFrame, quiet: pd.DataFrame, horizon: int = DEFAULT_HORIZON) -> dict:
    """Summary of :class:`Scores`.

    ``detection_rate`` counts response changes (:data:`RESPONSE_KINDS`) with data after them;
    ``median_delay_obs`` / ``p90_delay_obs`` are over the detected ones;
    ``median_delay_all_obs`` counts a miss as an infinite delay (``null`` once half are
    missed), which is what the tuning ranks by, so a setting cannot look fast by catching
    only the easy changes. ``median_abs_change_error_obs`` is the median ``|change_error_obs|``
    over the detected changes whose alert estimated a change time (``null`` without any);
    issue 12 asks for it to be at most half the median delay.
    """
    resp = changes[changes["kind"].isin(RESPONSE_KINDS) & (changes["status"] != "no_data")]
    det = resp[resp["status"] == "detected"]
    d_obs = det["delay_obs"].to_numpy(dtype=float)
    d_s = det["delay_s"].to_numpy(dtype=float)
    censored = np.r_[d_obs, np.full(len(resp) - len(det), np.inf)]
    q_obs = int(quiet["quiet_obs"].sum()) if len(quiet) else 0
    fa = int(quiet["false_alarms"].sum()) if len(quiet) else 0
    err = np.abs(det["change_error_obs"].to_numpy(dtype=float)) \
        if len(det) and "change_error_obs" in det.columns else np.zeros(0)
    err = err[np.isfinite(err)]
    by_kind = {}
    for kind, g in changes.groupby("kind", sort=True):
        by_kind[str(kind)] = {s: int((g["status"] == s).sum()) for s in
                              ("detected", "missed", "no_data", "not_scored") if (g["status"] == s).any()}
    return {
        "changes": int(len(resp)), "detected": int(len(det)), "missed": int(len(resp) - len(det)),
        "detection_rate": _num(len(det) / len(resp)) if len(resp) else None,
        "median_delay_obs": _num(_quantile(d_obs, 0.5)), "p90_delay_obs": _num(_quantile(d_obs, 0.9)),
        "median_delay_s": _num(_quantile(d_s, 0.5)), "p90_delay_s": _num(_quantile(d_s, 0.9)),
        "median_delay_all_obs": _num(_quantile(censored, 0.5)),
        "median_abs_change_error_obs": _num(_quantile(err, 0.5)),
        "observations": int(quiet["n_obs"].sum()) if len(quiet) else 0,
        "quiet_obs": q_obs, "false_alarms": fa,
        "false_alarms_per_10k": _num(1e4 * fa / q_obs) if q_obs else None,
        "by_kind": by_kind, "horizon_obs": int(horizon),
        "false_alarm_rules": list(FALSE_ALARM_RULES),
    }
