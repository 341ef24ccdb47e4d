"""Pure data shaping for the dashboard: tables and chart frames from store query results.

Nothing here imports streamlit or touches the store; every function takes and returns plain
pandas / numpy objects so it can be tested on its own (``tests/test_dashboard_shaping.py``).

Units: ``beta`` is the elasticity b = d log q / d log p (dimensionless); ``beta_lo`` /
``beta_hi`` its confidence interval at the configured level; ``innovation`` the one-step-ahead
residual on the log-quantity scale; timestamps are UTC.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from dashboard.legend import STATUS_RANK, status_label

DASH = "—"

#: Sort choices offered on the overview page -> (columns, ascending flags).
SORTS = {
    "needs attention first": (["_rank", "open_alerts", "series"], [True, False, True]),
    "series id": (["series"], [True]),
    "elasticity, most negative first": (["elasticity", "series"], [True, True]),
    "elasticity, least negative first": (["elasticity", "series"], [False, True]),
    "widest interval first": (["_width", "series"], [False, True]),
    "most open alerts first": (["open_alerts", "series"], [False, True]),
    "oldest last observation first": (["last_observation", "series"], [True, True]),
}


def to_utc(values) -> pd.Series:
    """Timestamps (ISO 8601 text, epoch seconds or datetimes) as a tz-aware UTC series."""
    s = pd.Series(values)
    if s.empty:
        return pd.Series(pd.to_datetime(s, utc=True))
    if pd.api.types.is_numeric_dtype(s):
        return pd.to_datetime(s, unit="s", utc=True)
    if pd.api.types.is_datetime64_any_dtype(s):
        return pd.to_datetime(s, utc=True)
    return pd.to_datetime(s, utc=True, format="ISO8601")


def fmt_num(x, digits: int = 2) -> str:
    """A number with ``digits`` decimals and a true minus sign; ``'—'`` when missing.

    >>> fmt_num(-1.5), fmt_num(float('nan'))
    ('−1.50', '—')
    """
    if x is None or (isinstance(x, float) and math.isnan(x)) or pd.isna(x):
        return DASH
    return f"{float(x):.{digits}f}".replace("-", "−")


def fmt_pct(x, digits: int = 1) -> str:
    """A fraction as a signed percentage, ``'—'`` when missing (``-0.646 -> '−64.6%'``)."""
    if x is None or pd.isna(x):
        return DASH
    return f"{100.0 * float(x):+.{digits}f}%".replace("-", "−")


def fmt_timedelta(td) -> str:
    """A duration in the largest sensible unit: ``'3.5 days'``, ``'40 min'``; ``'—'`` if missing."""
    if td is None or pd.isna(td):
        return DASH
    secs = pd.Timedelta(td).total_seconds()
    if math.isinf(secs):
        return "unbounded"
    for unit, size in (("days", 86400.0), ("hours", 3600.0), ("min", 60.0)):
        if abs(secs) >= size:
            return f"{secs / size:.3g} {unit}"
    return f"{secs:.3g} s"


# ----------------------------------------------------------------------------- overview
def sparkline_lists(spark: pd.DataFrame, value: str = "beta") -> dict[str, list[float]]:
    """Long sparkline rows (series, ts, value) -> {series: [values in time order]}, NaN dropped.

    Vectorized: one stable sort (skipped when the rows already come ordered by series and ts,
    as :func:`monitor.store.sparkline_data` returns them) and one split at the series breaks.
    """
    if spark is None or len(spark) == 0:
        return {}
    v = pd.to_numeric(spark[value], errors="coerce").to_numpy(dtype="float64", na_value=np.nan)
    keep = np.isfinite(v)
    codes, names = pd.factorize(spark["series"].astype(str), sort=False)
    t = spark["ts"]
    t = (t.astype("int64").to_numpy() if pd.api.types.is_datetime64_any_dtype(t)
         else to_utc(t).astype("int64").to_numpy())
    codes, t, v = codes[keep], t[keep], v[keep]
    if len(codes) == 0:
        return {}
    ordered = bool(np.all((codes[1:] > codes[:-1]) |
                          ((codes[1:] == codes[:-1]) & (t[1:] >= t[:-1]))))
    if not ordered:
        order = np.lexsort((t, codes))
        codes, v = codes[order], v[order]
    breaks = np.flatnonzero(codes[1:] != codes[:-1]) + 1
    starts = np.r_[0, breaks]
    return {str(names[codes[i]]): chunk.tolist()
            for i, chunk in zip(starts, np.split(v, breaks))}


def overview_table(latest: pd.DataFrame, sparks: dict[str, list[float]] | None = None) -> pd.DataFrame:
    """One display row per series from the store's latest estimates.

    Columns: ``series``, ``status`` (symbol + words), ``elasticity``, ``lo``, ``hi`` (NaN while
    warming up; the page shows ``'—'`` beside the status that explains it), ``trend`` (list of
    recent elasticities for a sparkline), ``open_alerts``, ``last_observation`` (UTC),
    ``n_obs``, ``n_eff``, and the helper columns ``status_code``, ``_rank``, ``_width``.
    """
    sparks = sparks or {}
    out = pd.DataFrame({"series": latest["series"].astype(str).to_numpy()})
    code = latest["status"].fillna("warming_up").astype(str).to_numpy()
    out["status"] = [status_label(c) for c in code]
    for src, dst in (("beta", "elasticity"), ("beta_lo", "lo"), ("beta_hi", "hi")):
        out[dst] = pd.to_numeric(latest[src], errors="coerce").astype("float64").to_numpy()
    out["trend"] = [sparks.get(s, []) for s in out["series"]]
    if "open_alerts" in latest:
        out["open_alerts"] = pd.to_numeric(latest["open_alerts"], errors="coerce"
                                           ).fillna(0).astype("int64").to_numpy()
    else:
        out["open_alerts"] = 0
    last_col = "last_obs_ts" if "last_obs_ts" in latest else "ts"
    out["last_observation"] = to_utc(latest[last_col]).to_numpy()
    out["n_obs"] = (pd.to_numeric(latest["n_obs"], errors="coerce").to_numpy()
                    if "n_obs" in latest else np.nan)
    out["n_eff"] = pd.to_numeric(latest["n_eff"], errors="coerce").astype("float64").to_numpy()
    out["status_code"] = code
    out["_rank"] = [STATUS_RANK.get(c, 9) for c in code]
    out["_width"] = out["hi"] - out["lo"]
    return out


def trend_range(trends, lo_q: float = 0.01, hi_q: float = 0.99) -> tuple[float, float] | None:
    """A common y range for the sparklines: the 1st to 99th percentile of all their values,
    so a small wiggle is not blown up to full height as it would be with per-row scaling.
    ``None`` when there are no values."""
    vals = np.fromiter((v for t in trends for v in t), dtype="float64")
    vals = vals[np.isfinite(vals)]
    if vals.size == 0:
        return None
    lo, hi = np.quantile(vals, [lo_q, hi_q])
    if hi - lo < 1e-9:
        lo, hi = lo - 0.5, hi + 0.5
    return float(lo), float(hi)


def scale_trends(trends, y_range: tuple[float, float] | None) -> list[list[float]]:
    """Map every sparkline onto [0, 1] of the common range ``y_range`` = (lo, hi), values outside
    clipped to its ends, so all rows share one vertical scale (0 = lo, 1 = hi). Streamlit's line
    cells stretch any row that leaves the configured y range to full height, which would undo a
    common scale; mapping first avoids that."""
    if y_range is None:
        return [list(t) for t in trends]
    lo, hi = y_range
    span = hi - lo
    return [np.clip((np.asarray(t, dtype="float64") - lo) / span, 0.0, 1.0).tolist()
            for t in trends]


def filter_overview(table: pd.DataFrame, statuses=None, text: str = "",
                    only_open_alerts: bool = False) -> pd.DataFrame:
    """Rows whose status is in ``statuses`` (all when empty/None), whose series id contains
    ``text`` (case-insensitive, literal, not a regex) and, if asked, with open alerts."""
    mask = np.ones(len(table), dtype=bool)
    if statuses:
        mask &= table["status_code"].isin(list(statuses)).to_numpy()
    text = (text or "").strip()
    if text:
        mask &= table["series"].str.contains(text, case=False, regex=False).to_numpy()
    if only_open_alerts:
        mask &= (table["open_alerts"] > 0).to_numpy()
    return table.loc[mask]


def sort_overview(table: pd.DataFrame, by: str) -> pd.DataFrame:
    """Sort by one of :data:`SORTS`; missing elasticities always go last."""
    if by not in SORTS:
        raise ValueError(f"sort {by!r}: choose one of {sorted(SORTS)}")
    cols, asc = SORTS[by]
    return table.sort_values(cols, ascending=asc, na_position="last", kind="stable")


def alert_counts(summary: dict) -> dict:
    """From :func:`monitor.store.store_summary`: ``{'open', 'acknowledged', 'active', 'by_kind'}``
    where ``active`` = open + acknowledged (not yet resolved) and ``by_kind`` maps each kind
    with an active alert to its active count, largest first."""
    states = summary.get("alerts_by_state") or {}
    kinds = summary.get("alerts_by_kind") or {}
    by_kind = {k: int(v.get("open", 0)) + int(v.get("acknowledged", 0)) for k, v in kinds.items()}
    by_kind = dict(sorted(((k, v) for k, v in by_kind.items() if v > 0),
                          key=lambda kv: (-kv[1], kv[0])))
    o, a = int(states.get("open", 0)), int(states.get("acknowledged", 0))
    return {"open": o, "acknowledged": a, "active": o + a, "by_kind": by_kind}


# ----------------------------------------------------------------------------- history
#: words for each band kind an estimate records (``[estimator] band``; issue 13)
BAND_WORDS = {
    "hc": "heteroskedasticity-robust (White 1980 sandwich)",
    "hac": "autocorrelation-robust (Newey & West 1987 sandwich)",
    "classic": "classic (constant error variance, independent errors)",
}


def band_caption(history: pd.DataFrame) -> str:
    """What kind of confidence band the drawn estimates carry, from their ``band`` column.

    One kind: ``"Band: heteroskedasticity-robust (White 1980 sandwich), at the configured
    level."``; several (the configuration changed): each with its count of estimates; none
    recorded on estimates that have a band (stored before elmon recorded the kind): says so.
    Estimates without a band (warming up, low variation) are not counted.

    >>> band_caption(pd.DataFrame({"beta_lo": [-1.2, None], "beta_hi": [-0.8, None],
    ...                            "band": ["hac", None]}))
    'Band: autocorrelation-robust (Newey & West 1987 sandwich), at the configured level.'
    """
    lo = pd.to_numeric(history.get("beta_lo"), errors="coerce") if "beta_lo" in history else None
    if lo is None or not len(history):
        return "No band to show yet."
    hi = pd.to_numeric(history["beta_hi"], errors="coerce")
    with_band = np.isfinite(lo.to_numpy(dtype=float)) & np.isfinite(hi.to_numpy(dtype=float))
    if not with_band.any():
        return "No band to show yet."
    kinds = (history["band"] if "band" in history else pd.Series([None] * len(history),
                                                                   index=history.index))
    kinds = kinds[with_band]
    counts = kinds.dropna().astype(str).value_counts()
    unknown = int(kinds.isna().sum())
    if not len(counts):
        return ("Band kind not recorded: these estimates were stored before elmon recorded "
                "it (it is the [estimator] band of the configuration that wrote them).")
    words = [BAND_WORDS.get(k, k) for k in counts.index]
    if len(counts) == 1 and not unknown:
        return f"Band: {words[0]}, at the configured level."
    parts = [f"{w} for {n:,} estimates" for w, n in zip(words, counts.tolist())]
    if unknown:
        parts.append(f"not recorded for {unknown:,} estimates stored before elmon recorded it")
    return "Bands: " + "; ".join(parts) + " (the configuration changed over this history)."


def band_frame(history: pd.DataFrame) -> pd.DataFrame:
    """Elasticity with its band for drawing: ``ts`` (UTC), ``beta``, ``beta_lo``, ``beta_hi``,
    ``status`` and ``drawable`` (all three finite; warming-up rows are kept but not drawn)."""
    out = pd.DataFrame({"ts": to_utc(history["ts"]).to_numpy()})
    for c in ("beta", "beta_lo", "beta_hi"):
        out[c] = pd.to_numeric(history[c], errors="coerce").astype("float64").to_numpy()
    out["status"] = history["status"].astype(str).to_numpy()
    out["drawable"] = np.isfinite(out[["beta", "beta_lo", "beta_hi"]].to_numpy()).all(axis=1)
    return out


def downsample(df: pd.DataFrame, columns=("beta", "beta_lo", "beta_hi"), max_points: int = 1500,
               keep=None) -> tuple[pd.DataFrame, int]:
    """Thin a time-ordered frame for drawing, never hiding what matters.

    The rows are cut into equal-count buckets; in each bucket the first row and the rows holding
    the minimum and the maximum of every column in ``columns`` are kept, so every peak and
    trough survives. Rows flagged by ``keep`` (a boolean array, e.g. alert times) are always
    kept, as are the first and the last row.

    Returns
    -------
    (frame, total)
        The kept rows in their original order and the number of rows before thinning, so the
        page can say "showing N of M points".
    """
    n = len(df)
    if n <= max_points:
        return df, n
    cols = [c for c in columns if c in df]
    per_bucket = 2 * len(cols) + 1
    nb = max(1, max_points // per_bucket)
    bucket = (np.arange(n, dtype=np.int64) * nb) // n
    mask = np.zeros(n, dtype=bool)
    mask[0] = mask[-1] = True
    starts = np.r_[True, bucket[1:] != bucket[:-1]]
    mask |= starts
    for c in cols:
        v = df[c].to_numpy(dtype="float64", na_value=np.nan)
        idx = np.flatnonzero(np.isfinite(v))
        if idx.size == 0:
            continue
        order = idx[np.lexsort((v[idx], bucket[idx]))]
        bb = bucket[order]
        edge = bb[1:] != bb[:-1]
        mask[order[np.r_[True, edge]]] = True   # bucket minimum
        mask[order[np.r_[edge, True]]] = True   # bucket maximum
    if keep is not None:
        mask |= np.asarray(keep, dtype=bool)
    return df.loc[mask], n


def nearest_keep_mask(ts: pd.Series, marks) -> np.ndarray:
    """Boolean mask of the rows of ``ts`` nearest (at or before) each time in ``marks``."""
    t = to_utc(ts).to_numpy()
    keep = np.zeros(len(t), dtype=bool)
    if len(t) == 0 or marks is None or len(marks) == 0:
        return keep
    m = to_utc(pd.Series(list(marks))).to_numpy()
    pos = np.clip(np.searchsorted(t, m, side="right") - 1, 0, len(t) - 1)
    keep[pos] = True
    return keep


def residual_frame(history: pd.DataFrame) -> pd.DataFrame:
    """One-step-ahead residuals (log scale) with a ±2 residual-SD guide, finite rows only.

    A residual r means the actual quantity was exp(r) times the one-step forecast.
    """
    out = pd.DataFrame({"ts": to_utc(history["ts"]).to_numpy()})
    out["residual"] = pd.to_numeric(history.get("innovation"), errors="coerce").astype("float64").to_numpy()
    sd = pd.to_numeric(history.get("resid_sd"), errors="coerce").astype("float64").to_numpy()
    out["upper"], out["lower"] = 2.0 * sd, -2.0 * sd
    out["z"] = pd.to_numeric(history.get("z"), errors="coerce").astype("float64").to_numpy()
    return out.loc[np.isfinite(out["residual"].to_numpy())]


def effective_window(forgetting: float, ts=None) -> dict:
    """Effective memory of exponential forgetting with factor λ.

    ``n_obs = (1 + λ) / (1 - λ)``: Kish's effective sample size (Σw)² / Σw² of the weights
    w_k = λ^k summed to infinity (infinite for λ = 1, no forgetting). ``spacing`` is the median
    gap between observations and ``time = n_obs * spacing``.
    """
    lam = float(forgetting)
    if not (0.0 < lam <= 1.0):
        raise ValueError(f"forgetting = {forgetting!r}: must be in (0, 1]")
    n_obs = math.inf if lam == 1.0 else (1.0 + lam) / (1.0 - lam)
    spacing = pd.NaT
    if ts is not None and len(ts) > 1:
        d = to_utc(ts).sort_values().diff().dropna()
        if len(d):
            spacing = d.median()
    if pd.isna(spacing):
        time = pd.NaT
    elif math.isinf(n_obs):
        time = pd.Timedelta.max
    else:
        time = spacing * n_obs
    return {"forgetting": lam, "n_obs": n_obs, "spacing": spacing, "time": time}


def price_change_effect(p1: float, p2: float, beta: float, beta_lo: float, beta_hi: float) -> dict:
    """Exact relative change in quantity for a price move p1 -> p2 under elasticity b.

    ``change = (p2 / p1) ** b - 1``; since r**b is monotone in b for fixed r > 0, the interval
    is the range of ``r ** beta_lo - 1`` and ``r ** beta_hi - 1``. NaN elasticity gives NaN
    results (the page shows the status that explains it).

    >>> round(price_change_effect(10.0, 20.0, -1.5, -1.5, -1.5)["change"], 4)
    -0.6464
    """
    for name, p in (("current price", p1), ("new price", p2)):
        if not (isinstance(p, (int, float)) and math.isfinite(p) and p > 0):
            raise ValueError(f"{name} = {p!r}: must be a finite number > 0")
    r = float(p2) / float(p1)
    ch = r ** beta - 1.0 if math.isfinite(beta) else math.nan
    a = r ** beta_lo - 1.0 if math.isfinite(beta_lo) else math.nan
    b = r ** beta_hi - 1.0 if math.isfinite(beta_hi) else math.nan
    lo, hi = (min(a, b), max(a, b)) if math.isfinite(a) and math.isfinite(b) else (math.nan, math.nan)
    return {"ratio": r, "price_change": r - 1.0, "change": ch, "change_lo": lo, "change_hi": hi}


# ----------------------------------------------------------------------------- alerts
def alert_markers(alerts: pd.DataFrame, band: pd.DataFrame) -> pd.DataFrame:
    """Alert markers for the elasticity chart: ``ts`` (when the alert opened), ``beta`` (the
    alert's own elasticity, else the estimate at or before that time), ``kind``, ``state``."""
    cols = ["ts", "beta", "kind", "state"]
    if alerts is None or len(alerts) == 0:
        return pd.DataFrame(columns=cols)
    ts_col = "opened_ts" if "opened_ts" in alerts else "ts"
    m = pd.DataFrame({"ts": to_utc(alerts[ts_col]).to_numpy(),
                      "beta": pd.to_numeric(alerts.get("beta"), errors="coerce")
                      .astype("float64").to_numpy(),
                      "kind": alerts["kind"].astype(str).to_numpy(),
                      "state": (alerts["state"].astype(str).to_numpy() if "state" in alerts
                                else "open")})
    m = m.loc[m["ts"].notna()].sort_values("ts", kind="stable")
    drawn = band.loc[band["drawable"], ["ts", "beta"]].sort_values("ts", kind="stable")
    if len(drawn) and m["beta"].isna().any():
        near = pd.merge_asof(m[["ts"]], drawn.rename(columns={"beta": "_near"}), on="ts",
                             direction="nearest")
        m["beta"] = m["beta"].fillna(pd.Series(near["_near"].to_numpy(), index=m.index))
    return m.loc[m["beta"].notna(), cols].reset_index(drop=True)


def series_truth(truth: pd.DataFrame | None, series: str) -> pd.DataFrame:
    """Known change points of one series (``ts``, ``kind``), time-ordered."""
    if truth is None or len(truth) == 0:
        return pd.DataFrame(columns=["ts", "kind"])
    t = truth.loc[truth["series"].astype(str) == str(series), ["ts", "kind"]]
    return t.assign(ts=to_utc(t["ts"]).to_numpy()).sort_values("ts").reset_index(drop=True)


def filter_alerts(alerts: pd.DataFrame, states=None, kinds=None, text: str = "") -> pd.DataFrame:
    """Alerts whose state and kind are among those chosen (all when empty) and whose series id
    contains ``text`` (case-insensitive, literal)."""
    mask = np.ones(len(alerts), dtype=bool)
    if states:
        mask &= alerts["state"].isin(list(states)).to_numpy()
    if kinds:
        mask &= alerts["kind"].isin(list(kinds)).to_numpy()
    text = (text or "").strip()
    if text:
        mask &= alerts["series"].astype(str).str.contains(text, case=False, regex=False).to_numpy()
    return alerts.loc[mask]


def latest_per_series(estimates: pd.DataFrame) -> pd.DataFrame:
    """The last row of every series in a time-ordered estimates table (replay output)."""
    if estimates is None or len(estimates) == 0:
        return pd.DataFrame(columns=list(getattr(estimates, "columns", [])))
    order = estimates.assign(_t=to_utc(estimates["ts"]).to_numpy()).sort_values(
        ["series", "_t"], kind="stable")
    return order.groupby("series", sort=True).tail(1).drop(columns="_t").reset_index(drop=True)


# ----------------------------------------------------------------------------- issue 16
def bounds_in_effect(row) -> tuple[float | None, float | None]:
    """The elasticity bounds to draw for a series row of ``latest_estimates``: its own
    ``low`` / ``high`` where set, else ``bound_low`` / ``bound_high`` (the bounds the engine
    recorded as in effect: ``[bounds]`` or ``--bounds``); ``None`` for a side without one."""
    out = []
    for own, rec in (("low", "bound_low"), ("high", "bound_high")):
        v = row.get(own)
        if v is None or pd.isna(v):
            v = row.get(rec)
        out.append(None if v is None or pd.isna(v) else float(v))
    return out[0], out[1]


def truth_in_span(truth: pd.DataFrame, ts) -> tuple[pd.DataFrame, int]:
    """Known change points inside the time span of ``ts`` and the count of those outside, so a
    change point in the future does not stretch the time axis and squash the data."""
    if truth is None or not len(truth) or not len(ts):
        return truth, 0
    t = to_utc(truth["ts"])
    s = to_utc(pd.Series(ts))
    keep = ((t >= s.min()) & (t <= s.max())).to_numpy()
    return truth.loc[keep], int((~keep).sum())


def beta_domain(band: pd.DataFrame, low=None, high=None, lo_q: float = 0.02,
                hi_q: float = 0.98) -> tuple[float, float] | None:
    """Vertical range of the elasticity chart: the ``lo_q`` to ``hi_q`` quantiles of the band
    (``beta_lo``, ``beta``, ``beta_hi``) over rows past warm-up, widened to include the bounds and
    padded by 5 % of the span. Early estimates of a young series (b of -12 or +15 from a
    handful of rows) then no longer flatten a real change from -1.3 to -2.3. ``None`` without
    values."""
    if band is None or not len(band):
        return None
    rows = band
    if "status" in band.columns:
        rows = band.loc[band["status"].astype(str) != "warming_up"]
    vals = np.concatenate([pd.to_numeric(rows[c], errors="coerce").to_numpy(dtype="float64")
                           for c in ("beta_lo", "beta", "beta_hi") if c in rows.columns])
    vals = vals[np.isfinite(vals)]
    if not vals.size:
        return None
    lo, hi = (float(v) for v in np.quantile(vals, [lo_q, hi_q]))
    for b in (low, high):
        if b is not None and np.isfinite(b):
            lo, hi = min(lo, float(b)), max(hi, float(b))
    pad = 0.05 * (hi - lo) if hi > lo else 0.5
    return lo - pad, hi + pad


def per_row_trends(trends) -> tuple[list[list[float]], list[str]]:
    """Each sparkline mapped onto [0, 1] of ITS OWN range (min to max), with a text giving that
    range, so every row shows its own movement instead of a flat line on a shared scale."""
    out, spans = [], []
    for t in trends:
        a = np.asarray(t, dtype="float64")
        fin = a[np.isfinite(a)]
        if not fin.size:
            out.append(list(a))
            spans.append("—")
            continue
        lo, hi = float(fin.min()), float(fin.max())
        span = hi - lo
        out.append(((a - lo) / span).tolist() if span > 1e-12 else [0.5] * len(a))
        spans.append(f"{fmt_num(lo)} to {fmt_num(hi)}")
    return out, spans
