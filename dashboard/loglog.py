"""Log-log scatter of two windows of one series and their least-squares lines (no streamlit).

Within a window, ``log q = a + b log p`` is fitted by ordinary least squares with
``numpy.polyfit(log_p, log_q, 1)``; the slope b is that window's elasticity, ignoring any
controls, so it is a picture of the raw relation rather than the monitor's estimate.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from dashboard.shaping import to_utc

#: Choices for the earlier window.
EARLIER_CHOICES = {
    "preceding": "the observations just before the recent window",
    "anchor": "the observations just before a chosen time (an alert or a change point)",
    "first": "the first observations of the history",
}

#: Smallest spread of log price that a slope can be fitted on (about a 0.1% price move).
MIN_LOG_PRICE_SD = 1e-3


def loglog_points(history: pd.DataFrame) -> pd.DataFrame:
    """``ts``, ``price``, ``quantity``, ``log_price``, ``log_quantity`` of the rows that can be
    put on the log-log scale (price > 0 and quantity > 0); the count of the rest is kept in
    ``attrs['not_on_log_scale']`` so the page can say how many were left out and why.

    When the history has an ``exposure`` column with values (the Poisson model's exposure,
    stored with each observation), ``log_quantity`` is ``log(quantity / exposure)``, the
    quantity per unit of exposure as the model has it (a missing exposure is 1), and
    ``attrs['per_exposure']`` is True."""
    price = pd.to_numeric(history["price"], errors="coerce").astype("float64").to_numpy()
    qty = pd.to_numeric(history["quantity"], errors="coerce").astype("float64").to_numpy()
    expo = np.ones(len(qty))
    per_exposure = "exposure" in history.columns and history["exposure"].notna().any()
    if per_exposure:
        e = pd.to_numeric(history["exposure"], errors="coerce").astype("float64").to_numpy()
        expo = np.where(np.isnan(e), 1.0, e)
    ok = np.isfinite(price) & np.isfinite(qty) & (price > 0) & (qty > 0) & (expo > 0)
    out = pd.DataFrame({"ts": to_utc(history["ts"]).to_numpy()[ok], "price": price[ok],
                        "quantity": qty[ok]})
    out["log_price"] = np.log(out["price"].to_numpy())
    out["log_quantity"] = np.log(out["quantity"].to_numpy() / expo[ok])
    out.attrs["not_on_log_scale"] = int((~ok).sum())
    out.attrs["per_exposure"] = bool(per_exposure)
    return out.reset_index(drop=True)


def pick_windows(points: pd.DataFrame, n_window: int, earlier: str = "preceding",
                 anchor_ts=None) -> pd.DataFrame:
    """Label the last ``n_window`` points ``'recent'`` and ``n_window`` earlier ones ``'earlier'``.

    ``earlier`` is one of :data:`EARLIER_CHOICES`. With ``'anchor'`` the earlier window ends at
    the last point at or before ``anchor_ts``. When the history is shorter than two windows the
    window length is cut to half of it so the two never overlap. Returns the labelled rows only.
    """
    if earlier not in EARLIER_CHOICES:
        raise ValueError(f"earlier = {earlier!r}: choose one of {sorted(EARLIER_CHOICES)}")
    n = len(points)
    w = int(max(2, min(int(n_window), n // 2)))
    if n < 4:
        return points.iloc[0:0].assign(window=pd.Series(dtype=object))
    recent_start = n - w
    if earlier == "first":
        e_start = 0
    elif earlier == "anchor" and anchor_ts is not None:
        t = points["ts"].to_numpy()
        a = to_utc(pd.Series([anchor_ts])).to_numpy()[0]
        end = int(np.searchsorted(t, a, side="right"))  # rows [.., end) are at or before anchor
        e_start = max(0, min(end, recent_start) - w)
    else:
        e_start = recent_start - w
    e_end = min(e_start + w, recent_start)
    labels = np.full(n, None, dtype=object)
    labels[e_start:e_end] = "earlier"
    labels[recent_start:] = "recent"
    out = points.assign(window=labels)
    return out.loc[out["window"].notna()].reset_index(drop=True)


def fit_window(log_p, log_q) -> dict:
    """OLS line of log q on log p: ``slope`` (the window's elasticity), ``intercept``, ``n`` and
    ``reason`` (``None`` when fitted, otherwise why not: too few points or no price spread)."""
    x = np.asarray(log_p, dtype="float64")
    y = np.asarray(log_q, dtype="float64")
    n = int(x.size)
    if n < 3:
        return {"slope": np.nan, "intercept": np.nan, "n": n, "reason": f"only {n} points"}
    if float(np.std(x)) < MIN_LOG_PRICE_SD:
        return {"slope": np.nan, "intercept": np.nan, "n": n,
                "reason": "price barely moved in this window"}
    slope, intercept = np.polyfit(x, y, 1)
    return {"slope": float(slope), "intercept": float(intercept), "n": n, "reason": None}


def fit_lines(windows: pd.DataFrame) -> tuple[dict, pd.DataFrame]:
    """Fit each window; return ``{window: fit}`` and a frame of line end points
    (``window``, ``log_price``, ``log_quantity``) across each window's price range."""
    fits, rows = {}, []
    for name in ("earlier", "recent"):
        part = windows.loc[windows["window"] == name]
        fit = fit_window(part["log_price"], part["log_quantity"])
        if len(part):
            fit["start"], fit["end"] = part["ts"].iloc[0], part["ts"].iloc[-1]
        fits[name] = fit
        if fit["reason"] is None:
            for x in (float(part["log_price"].min()), float(part["log_price"].max())):
                rows.append({"window": name, "log_price": x,
                             "log_quantity": fit["intercept"] + fit["slope"] * x})
    return fits, pd.DataFrame(rows, columns=["window", "log_price", "log_quantity"])
