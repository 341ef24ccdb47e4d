"""Messages and severities of alert events, made from the compiled pipeline's event records.

A message names the series, gives the estimate before and now with its interval, when the
change began, and what a 10% price rise does to quantity now, computed exactly as
``1.1^b - 1`` (not ``0.1 b``: at b = -2 a 10% rise cuts quantity by 17.4%, not 20%). The
estimates are statistical evidence to inform a decision, not the decision: elasticities from
observational prices can be biased, and a randomized price test is the sound confirmation.

Severities: ``critical`` for a confidently positive demand elasticity (sign flip), a confident
bounds breach (interval mode), an elasticity change whose before and after intervals do not
overlap, and a level shift of 50% or more; ``warning`` for other openings; ``info`` for low
price variation and for every clear.

>>> effect_of_10pct(-2.0)
'-17.4%'
>>> effect_of_10pct(-1.5)
'-13.3%'
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from monitor.detectability import delay_text
from monitor.pipeline.rules import ACTIONS, KINDS


# event record columns written by monitor.pipeline.kernel
(EV_ROW, EV_KIND, EV_ACTION, EV_BETA, EV_LO, EV_HI, EV_OLD_B, EV_OLD_LO, EV_OLD_HI,
 EV_START_N, EV_START_TS, EV_N, EV_TS, EV_SIDE, EV_SIZE, EV_STAT, EV_COUNT, EV_EXTRA,
 EV_AFTER_B, EV_AFTER_LO, EV_AFTER_HI, EV_DELAY, EV_SUPERSEDED) = range(23)
NEV = 23
#: alert columns a change alert adds (alerts.csv, the store's alerts table)
CHANGE_COLUMNS = ["change_ts", "beta_before", "beta_before_lo", "beta_before_hi", "beta_after",
                  "beta_after_lo", "beta_after_hi", "size"]
EVENT_COLUMNS = ["row", "sid", "kind", "action", "severity", "beta", "beta_lo", "beta_hi",
                 "message", "details"]


#: largest quantity change (relative) the texts spell out: ``1.1^b - 1`` overflows a float64 for
#: b above about 7,400 (an estimate that far out says only that b is not identified)
EFFECT_CAP = 1e6


def rise_effect(b: float) -> float:
    """``1.1^b - 1`` (relative quantity change for a 10% price rise), at most
    :data:`EFFECT_CAP`; NaN for a b that is not finite."""
    if b is None or not math.isfinite(b):
        return math.nan
    v = float(b) * math.log(1.1)
    return EFFECT_CAP if v > math.log1p(EFFECT_CAP) else math.expm1(v)


def effect_of_10pct(b: float) -> str:
    """Quantity change for a 10% price rise at elasticity b, ``1.1^b - 1``, as a percentage
    ("more than" where it reaches :data:`EFFECT_CAP`)."""
    e = rise_effect(b)
    if not math.isfinite(e):
        return "unknown"
    if e >= EFFECT_CAP:
        return f"more than +{100.0 * EFFECT_CAP:.0f}%"
    return f"{100.0 * e:+.1f}%"


def _fmt_ts(ts: float, n: float) -> str:
    if ts is None or not math.isfinite(ts):
        return f"observation {int(n)}"
    t = pd.Timestamp(int(round(ts / 1000.0)) * 1000, tz="UTC")
    return t.strftime("%Y-%m-%dT%H:%M:%SZ")


def _band(b: float, lo: float, hi: float) -> str:
    if not math.isfinite(b):
        return "b = (not yet estimated)"
    if math.isfinite(lo) and math.isfinite(hi):
        return f"b = {b:.2f} [{lo:.2f}, {hi:.2f}]"
    return f"b = {b:.2f}"


def _num(v: float):
    return None if v is None or not math.isfinite(v) else float(v)


def _int(v: float):
    return None if v is None or not math.isfinite(v) else int(v)


def severity(kind: str, action: str, r: np.ndarray, interval_mode: bool = True) -> str:
    """Severity of one event record (see the module docstring)."""
    if action == "clear" or kind == "low_variation":
        return "info"
    if kind == "sign_flip":
        return "critical"
    if kind == "out_of_bounds":
        return "critical" if interval_mode else "warning"
    if kind == "elasticity_change" and math.isfinite(r[EV_AFTER_B]):
        apart = r[EV_AFTER_LO] > r[EV_OLD_HI] or r[EV_AFTER_HI] < r[EV_OLD_LO]
        return "critical" if apart else "warning"
    if kind == "elasticity_change":
        apart = r[EV_LO] > r[EV_OLD_HI] or r[EV_HI] < r[EV_OLD_LO]
        return "critical" if apart else "warning"
    if kind == "level_shift":
        return "critical" if abs(math.expm1(r[EV_SIZE])) >= 0.5 else "warning"
    return "warning"


def details(kind: str, action: str, r: np.ndarray) -> dict:
    """JSON-able details of one event record."""
    d = {"observation": _int(r[EV_N]), "started_observation": _int(r[EV_START_N]),
         "started_ts": _fmt_ts(r[EV_START_TS], r[EV_START_N]) if math.isfinite(r[EV_START_TS]) else None,
         "beta_before": _num(r[EV_OLD_B]), "beta_before_lo": _num(r[EV_OLD_LO]),
         "beta_before_hi": _num(r[EV_OLD_HI]),
         "effect_of_10pct_price_rise": _num(rise_effect(r[EV_BETA]))}
    if action == "clear":
        d.update(opened_observation=_int(r[EV_START_N]), open_for_observations=_int(r[EV_SIZE]),
                 alarms_while_open=_int(r[EV_COUNT]), superseded=bool(r[EV_SUPERSEDED] == 1.0))
        return d
    if kind in ("elasticity_change", "level_shift"):
        d.update(direction="up" if r[EV_SIDE] > 0 else "down", statistic=_num(r[EV_STAT]))
        if math.isfinite(r[EV_AFTER_B]) or math.isfinite(r[EV_DELAY]):  # split detector
            d.update(change_observation=_int(r[EV_START_N]), change_ts=d["started_ts"],
                     beta_after=_num(r[EV_AFTER_B]), beta_after_lo=_num(r[EV_AFTER_LO]),
                     beta_after_hi=_num(r[EV_AFTER_HI]), delay50_obs=_num(r[EV_DELAY]))
    if kind == "elasticity_change":
        d.update(beta_change=_num(r[EV_SIZE]), slope_statistic=_num(r[EV_EXTRA]))
    elif kind == "level_shift" and math.isfinite(r[EV_DELAY]) and math.isfinite(r[EV_EXTRA]):
        # split detector: the size rests on the rows since the change; 95% normal interval
        lo, hi = r[EV_SIZE] - 1.96 * r[EV_EXTRA], r[EV_SIZE] + 1.96 * r[EV_EXTRA]
        d.update(level_shift_log=_num(r[EV_SIZE]),
                 level_shift_pct=_num(100.0 * math.expm1(r[EV_SIZE])),
                 level_shift_lo_pct=_num(100.0 * math.expm1(lo)),
                 level_shift_hi_pct=_num(100.0 * math.expm1(hi)))
    elif kind == "level_shift":
        d.update(level_shift_log=_num(r[EV_SIZE]),
                 level_shift_pct=_num(100.0 * math.expm1(r[EV_SIZE])) if math.isfinite(r[EV_SIZE]) else None)
    elif kind in ("out_of_bounds", "sign_flip"):
        d.update(side="below" if r[EV_SIDE] < 0 else "above", low=_num(r[EV_SIZE]),
                 high=_num(r[EV_EXTRA]))
    elif kind == "low_variation":
        d.update(log_price_sd=_num(r[EV_SIZE]), min_price_sd=_num(r[EV_EXTRA]),
                 raw_log_price_sd=_num(r[EV_STAT]))
    return d




#: ``[rules] wording``: the advice and nouns of the alert texts for each trade (issue 16: feeder
#: alerts spoke of competitors and assortments). Keys: what moves (``quantity``), the advice after
#: a change of b, after a level shift and under low price variation, and the sound test.
WORDING = {
    "retail": {
        "quantity": "quantity", "demand": "demand",
        "change_advice": "Look for a competitor, assortment, channel or tariff change; confirm "
                         "with a randomized price test before changing prices.",
        "level_advice": "Check stock-outs, promotions, unit or feed changes and seasonality "
                        "that the controls miss.",
        "restore": "A planned price test would restore the estimate.",
        "plan": "the price plan"},
    "load": {
        "quantity": "load", "demand": "load",
        "change_advice": "Look for a programme change (enrolment, in-home displays, automated "
                         "appliances), a change in the connected customers or a tariff "
                         "change; confirm with a randomized tariff trial before changing "
                         "tariffs.",
        "level_advice": "Check new connections or disconnections, meter or feed changes, "
                        "outages, and weather or calendar effects that the controls miss.",
        "restore": "A tariff trial with varied prices would restore the estimate.",
        "plan": "the tariff"},
}


def _split_change_text(series: str, r: np.ndarray, at: str, since: str, now: str,
                       w: dict) -> str:
    before = _band(r[EV_OLD_B], r[EV_OLD_LO], r[EV_OLD_HI])
    after = _band(r[EV_AFTER_B], r[EV_AFTER_LO], r[EV_AFTER_HI])
    db = r[EV_SIZE]
    if db < 0:
        way = (f"b fell by {abs(db):.2f}: {w['demand']} became more sensitive to price"
               if r[EV_OLD_B] <= 0 else f"b fell by {abs(db):.2f}")
    else:
        way = (f"b rose by {db:.2f}: {w['demand']} became less sensitive to price"
               if r[EV_AFTER_B] <= 0 else f"b rose by {db:.2f}")
    # the running estimate with its own effect (it re-anchors on the new regime within a few
    # dozen rows, so it can differ from the after-sample fit at the alarm)
    running = now + (f", a 10% price rise: {effect_of_10pct(r[EV_BETA])}"
                     if math.isfinite(r[EV_BETA]) else "")
    return (f"{series}: the elasticity changed from {before} before to {after} since (the data "
            f"on each side of the change), {way}; detected at {at}, change began about {since}. "
            f"A 10% price rise now changes {w['quantity']} by {effect_of_10pct(r[EV_AFTER_B])} "
            f"(before: {effect_of_10pct(r[EV_OLD_B])}); the running estimate is {running}. "
            f"{delay_text(r[EV_DELAY])[0].upper() + delay_text(r[EV_DELAY])[1:]}. "
            + w["change_advice"])


def message(kind: str, action: str, series: str, r: np.ndarray, causes: str = "",
            wording: str = "retail") -> str:
    """The text of one event record, for a person who has to act on it, in the words of the
    trade ``wording`` (a key of :data:`WORDING`)."""
    w = WORDING[wording]
    now = _band(r[EV_BETA], r[EV_LO], r[EV_HI])
    before = _band(r[EV_OLD_B], r[EV_OLD_LO], r[EV_OLD_HI])
    at = _fmt_ts(r[EV_TS], r[EV_N])
    since = _fmt_ts(r[EV_START_TS], r[EV_START_N])
    effect = (f"a 10% price rise now changes {w['quantity']} by {effect_of_10pct(r[EV_BETA])}"
              if math.isfinite(r[EV_BETA]) else "")
    if action == "clear" and r[EV_SUPERSEDED] == 1.0:
        return (f"{series}: {kind.replace('_', ' ')} superseded at {at} by a further change "
                f"(open for {_int(r[EV_SIZE])} observations); now {now}.")
    if action == "clear":
        return (f"{series}: {kind.replace('_', ' ')} resolved at {at} after "
                f"{_int(r[EV_SIZE])} observations; now {now}"
                + (f", {effect}." if effect else "."))
    if kind == "elasticity_change" and math.isfinite(r[EV_AFTER_B]):
        return _split_change_text(series, r, at, since, now, w)
    if kind == "elasticity_change":
        was = effect_of_10pct(r[EV_OLD_B])
        return (f"{series}: the elasticity changed from {before} to {now} (fast estimate), "
                f"detected at {at}, change began about {since}. {effect[0].upper() + effect[1:]} "
                f"(before: {was}). " + w["change_advice"])
    if kind == "level_shift":
        pct = 100.0 * math.expm1(r[EV_SIZE]) if math.isfinite(r[EV_SIZE]) else math.nan
        way = "above" if pct > 0 else "below"
        return (f"{series}: {w['demand']} is about {abs(pct):.0f}% {way} the model at unchanged "
                "prices "
                f"since about {since} (detected at {at}); the elasticity is not what moved: "
                f"{now} (before: {before}), {effect}. " + w["level_advice"])
    if kind == "out_of_bounds":
        side = "below" if r[EV_SIDE] < 0 else "above"
        rng = f"[{r[EV_SIZE]:g}, {r[EV_EXTRA]:g}]"
        return (f"{series}: the elasticity {now} is {side} the allowed range {rng} since "
                f"{since} (confirmed at {at}; last inside: {before}); {effect}. Review the "
                f"data and {w['plan']}; the estimate is evidence, not a decision.")
    if kind == "sign_flip":
        return (f"{series}: the elasticity is confidently positive, {now}, since {since} "
                f"(last non-positive: {before}): higher prices with higher sales usually mean "
                + (causes or "bad data (units, a broken price feed, a mislabelled series) or a "
                   "broken price test") + "; check the data before using this estimate.")
    if kind == "low_variation":
        raw = r[EV_STAT]
        moved = math.isfinite(raw) and raw >= r[EV_EXTRA]
        what = ("prices have barely varied" if not moved else
                "the price has moved only with the controls")
        tail = (f"; before the controls {100.0 * raw:.1f}%: the controls explain the price's "
                f"moves, so its own effect cannot be told from theirs" if moved else "")
        return (f"{series}: {what} since {since} (sd of log price left after the intercept "
                f"and the controls {100.0 * r[EV_SIZE]:.1f}% < {100.0 * r[EV_EXTRA]:.1f}%"
                f"{tail}); the elasticity {now} cannot be updated reliably and elasticity "
                "alerts are paused until prices vary again. " + w["restore"])
    return f"{series}: {kind} {action} at {at}"


def events_frame(records: np.ndarray, sid: np.ndarray, names=None,
                 interval_mode: bool = True, feedback=None, feedback_events=(),
                 wording: str = "retail") -> pd.DataFrame:
    """The events DataFrame (columns :data:`EVENT_COLUMNS`) from ``(m, NEV)`` records, plus
    the informational ``price_feedback`` events and, for ``sign_flip``, the likely causes in
    order from the row's price-feedback verdict (``feedback``: per-row ``FB_*`` outputs)."""
    from monitor.estimators import feedback as FB

    rows = []
    for r in records:
        kind = KINDS[int(r[EV_KIND])]
        action = ACTIONS[int(r[EV_ACTION])]
        row = int(r[EV_ROW])
        s = int(sid[row])
        series = str(names[s]) if names is not None else f"series {s}"
        rows.append({"row": row, "sid": s, "kind": kind, "action": action,
                     "severity": severity(kind, action, r, interval_mode),
                     "beta": float(r[EV_BETA]), "beta_lo": float(r[EV_LO]),
                     "beta_hi": float(r[EV_HI]),
                     "message": message(kind, action, series, r, "" if feedback is None
                                        or kind != "sign_flip" else FB.sign_flip_causes(
                                            feedback[row, FB.FB_VERDICT],
                                            feedback[row, FB.FB_DIRECTION]),
                                     wording),
                     "details": details(kind, action, r)})
    if len(feedback_events):
        rows = sorted(rows + FB.event_rows(feedback_events, names), key=lambda e: e["row"])
    if not rows:
        return pd.DataFrame({c: pd.Series(dtype=t) for c, t in zip(
            EVENT_COLUMNS, ["int64", "int64", "object", "object", "object", "float64",
                            "float64", "float64", "object", "object"])})
    return pd.DataFrame(rows, columns=EVENT_COLUMNS)
