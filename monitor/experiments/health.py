"""Experiment health: is the test being run as designed?

Checks on the charged prices of the experiment window (each returns a dict with ``ok``,
the numbers behind it and a plain ``reason`` when it fails):

- :func:`ladder_check`: share of charged prices off the planned ladder. A price is on the
  ladder when it lies within ``ladder_tolerance`` (relative) of a ladder point, or within half a
  cent of it (prices are charged in cents). The ladder is either prices, or multipliers of each
  series' pre-test price.
- :func:`balance_check`: are price levels balanced across weekdays, and across series? Pearson's
  chi-square test of independence on the table of counts (level x weekday, level x series). A
  randomized design is balanced in expectation; the check fails only when the imbalance is both
  significant (p < ``P_FAIL``) and material (Cramer's V >= ``V_FAIL``), so large experiments do
  not fail on trivial imbalances.
- :func:`stall_check`: are prices still moving? A series whose last ``stall_window`` log prices
  have a standard deviation under ``MIN_PRICE_SD`` adds almost no information on b.

Price levels are the ladder rungs when a ladder is planned, else terciles of the log price
relative to each series' reference price.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

#: p-value below which an imbalance counts (common practice for a routine health check run at
#: every look: strict, so a randomized design is almost never flagged by chance)
P_FAIL = 1e-3
#: Cramer's V at or above which an imbalance is material (Cohen 1988: 0.1 is a small effect)
V_FAIL = 0.1
#: standard deviation of log price under which a series' prices count as not moving
#: (the estimator's own ``min_price_sd`` default)
MIN_PRICE_SD = 0.02


def ladder_points(ladder: tuple[float, ...], kind: str, ref_price: np.ndarray) -> np.ndarray:
    """(rows, L) planned price of each ladder point for each row's series reference price."""
    lad = np.asarray(ladder, np.float64)[None, :]
    if kind == "prices":
        return np.broadcast_to(lad, (len(ref_price), lad.shape[1]))
    return np.asarray(ref_price, np.float64)[:, None] * lad


def ladder_check(price: np.ndarray, ref_price: np.ndarray, ladder: tuple[float, ...] | None,
                 kind: str, tolerance: float, max_share: float) -> dict:
    """Share of charged prices off the ladder; fails when above ``max_share``.

    Returns ``ok, share_off, n_off, n, rung`` (rung: index of the nearest ladder point per row,
    -1 when off the ladder) and ``reason``.
    """
    price = np.asarray(price, np.float64)
    if ladder is None:
        return {"ok": True, "share_off": None, "n_off": 0, "n": int(price.size),
                "rung": None, "reason": "", "note": "no ladder planned: not checked"}
    points = ladder_points(ladder, kind, ref_price)
    dist = np.abs(price[:, None] - points)
    nearest = np.argmin(dist, axis=1)
    gap = dist[np.arange(price.size), nearest]
    target = points[np.arange(price.size), nearest]
    on = (gap <= tolerance * target + 1e-9) | (gap <= 0.005 + 1e-9)
    n_off = int((~on).sum())
    share = n_off / price.size if price.size else 0.0
    ok = share <= max_share
    reason = "" if ok else (f"{100 * share:.1f}% of charged prices ({n_off} of {price.size}) are "
                            f"off the planned ladder (more than {100 * max_share:g}% allowed, "
                            f"tolerance {100 * tolerance:g}%)")
    return {"ok": ok, "share_off": share, "n_off": n_off, "n": int(price.size),
            "rung": np.where(on, nearest, -1), "reason": reason, "note": ""}


def price_levels(log_rel: np.ndarray, rung: np.ndarray | None) -> np.ndarray:
    """Level of each row: the ladder rung where on the ladder, else a tercile of the log price
    relative to its series' reference (-1 where off the ladder)."""
    if rung is not None:
        return np.asarray(rung)
    cuts = np.quantile(log_rel, [1 / 3, 2 / 3]) if log_rel.size else np.zeros(2)
    return np.digitize(log_rel, np.unique(cuts))


def chi_square(table: np.ndarray) -> tuple[float, float, float, int]:
    """Pearson's chi-square test of independence on a counts table without empty rows/columns:
    ``(statistic, p_value, cramers_v, dof)``; (0, 1, 0, 0) when the table is degenerate."""
    t = np.asarray(table, np.float64)
    t = t[t.sum(axis=1) > 0][:, t.sum(axis=0) > 0]
    if t.ndim != 2 or min(t.shape) < 2:
        return 0.0, 1.0, 0.0, 0
    n = t.sum()
    expected = t.sum(axis=1, keepdims=True) * t.sum(axis=0, keepdims=True) / n
    stat = float(((t - expected) ** 2 / expected).sum())
    dof = (t.shape[0] - 1) * (t.shape[1] - 1)
    v = float(np.sqrt(stat / (n * (min(t.shape) - 1))))
    return stat, float(stats.chi2.sf(stat, dof)), v, dof


def _table(rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    r_vals, r_idx = np.unique(rows, return_inverse=True)
    c_vals, c_idx = np.unique(cols, return_inverse=True)
    out = np.zeros((r_vals.size, c_vals.size))
    np.add.at(out, (r_idx, c_idx), 1.0)
    return out


def balance_check(levels: np.ndarray, other: np.ndarray, what: str) -> dict:
    """Chi-square balance of price levels across ``other`` (weekday or series codes)."""
    keep = np.asarray(levels) >= 0
    table = _table(np.asarray(levels)[keep], np.asarray(other)[keep])
    stat, p, v, dof = chi_square(table)
    ok = not (p < P_FAIL and v >= V_FAIL)
    reason = "" if ok else (f"price levels are not balanced across {what} (chi-square "
                            f"{stat:.1f} on {dof} df, p = {p:.2g}, Cramer's V = {v:.2f})")
    return {"ok": ok, "statistic": stat, "p_value": p, "cramers_v": v, "dof": dof,
            "reason": reason}


def stall_check(codes: np.ndarray, log_p: np.ndarray, names: list[str], window: int) -> dict:
    """Series whose last ``window`` log prices barely move (sd < MIN_PRICE_SD)."""
    df = pd.DataFrame({"c": codes, "x": log_p})
    tail = df.groupby("c", sort=True).tail(window)
    sd = tail.groupby("c")["x"].std(ddof=1)
    cnt = tail.groupby("c")["x"].size()
    flat = sd[(cnt >= window) & (sd.fillna(0.0) < MIN_PRICE_SD)]
    stalled = [names[int(c)] for c in flat.index]
    share = len(stalled) / max(1, df["c"].nunique())
    return {"stalled_series": stalled, "share": share}


def feedback_check(codes: np.ndarray, log_p: np.ndarray, innovation: np.ndarray,
                   names: list[str]) -> dict:
    """The price-feedback diagnostic (:mod:`monitor.estimators.feedback`, Granger 1969 form)
    on the experiment's rows at forgetting 1: fails when a series' verdict at its newest row is
    ``feedback`` (yesterday's demand surprise predicts today's price move), which a randomized
    ladder rules out. ``innovation`` is the pooled fit's one-step prediction error."""
    try:
        from monitor.estimators import feedback as mfb
    except ImportError:
        return {"ok": True, "reason": "", "flagged": [],
                "note": "price-feedback diagnostic not available in this installation"}
    res = mfb.run_feedback(codes, log_p, innovation, forgetting=1.0)
    last = pd.Series(np.arange(len(codes))).groupby(np.asarray(codes)).last().to_numpy()
    verdict = res.out[last, mfb.FB_VERDICT]
    t = res.out[last, mfb.FB_T]
    flagged = [names[int(codes[j])] for j, v in zip(last, verdict) if v == mfb.V_FEEDBACK]
    ok = not flagged
    reason = "" if ok else (f"prices follow demand in {len(flagged)} series "
                            f"({', '.join(flagged[:5])}): yesterday's demand surprise predicts "
                            f"today's price (|t| >= {mfb.DEFAULT_T_ON:g}), which a randomized "
                            f"ladder rules out")
    return {"ok": ok, "reason": reason, "flagged": flagged,
            "max_abs_t": float(np.nanmax(np.abs(t))) if np.isfinite(t).any() else None,
            "note": ""}
