"""Series detail page: why the monitor thinks what it thinks about one series."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import streamlit as st

from dashboard import charts, data, loglog, shaping, ui
from dashboard.legend import status_label
from dashboard.safe_text import plain
from dashboard.shaping import fmt_num, fmt_pct, fmt_timedelta
from monitor.detectability import delay_text

MAX_DRAWN = 1500


def _pick_series(latest: pd.DataFrame) -> str:
    ids = sorted(latest["series"].astype(str))
    wanted = st.query_params.get("series") or st.session_state.get("series")
    index = ids.index(wanted) if wanted in ids else 0
    chosen = st.selectbox("Series", ids, index=index, key="sd_series",
                          help="Type to search the series ids.")
    st.session_state["series"] = chosen
    if st.query_params.get("series") != chosen:
        st.query_params["series"] = chosen
    return chosen


def _headline(row: pd.Series) -> None:
    status = str(row["status"])
    # the status column is the widest, so its text ("out of bounds") is not cut
    cols = st.columns([2, 3, 4, 2])
    cols[0].metric("Elasticity b", fmt_num(row["beta"]), help=f"status: {plain(status)}")
    cols[1].metric("Interval", f"[{fmt_num(row['beta_lo'])}, {fmt_num(row['beta_hi'])}]")
    cols[2].metric("Status", plain(status_label(status)), help=plain(status_label(status)))
    cols[3].metric("Effective n", fmt_num(row.get("n_eff"), 0))
    if pd.isna(row["beta"]):
        st.caption(f"— means no estimate yet: status {plain(status_label(status))}.")
    elif "delay50_obs" in row.index:
        # issue 12: how fast this series can show a changed b at its own price variation
        text = delay_text(row.get("delay50_obs"))
        st.caption("Detectability: " + text[0].upper() + text[1:] + " (median delay at the "
                   "configured false-alarm budget).")


def _elasticity(db: str, series: str, hist: pd.DataFrame, row: pd.Series) -> None:
    band = shaping.band_frame(hist)
    alerts = data.alerts(db, series=series)
    markers = shaping.alert_markers(alerts, band)
    truth, truth_bad, truth_err = ui.truth()
    known = shaping.series_truth(truth, series)
    drawn = band.loc[band["drawable"]]
    keep = shaping.nearest_keep_mask(drawn["ts"], markers["ts"])
    thin, total = shaping.downsample(drawn, max_points=MAX_DRAWN, keep=keep)
    low, high = shaping.bounds_in_effect(row)
    inside, later = shaping.truth_in_span(known, drawn["ts"])
    st.altair_chart(charts.elasticity_chart(thin, low, high, markers, inside,
                                            y_domain=shaping.beta_domain(drawn, low, high)),
                    width="stretch")
    not_drawn = len(band) - len(drawn)
    msg = f"Showing {len(thin):,} of {total:,} points"
    if len(thin) < total:
        msg += " (thinned for drawing: every bucket keeps its highest and lowest values, "
        msg += "and every alert time is kept)"
    if not_drawn:
        msg += f"; {not_drawn:,} estimates without a value (warming up) are not drawn"
    if later:
        msg += (f"; {later} known change point(s) lie outside the data's time span and are "
                "not drawn")
    st.caption(shaping.band_caption(hist) + " "      # the band's kind (issue 13)
               + msg + f". Alerts: {len(markers)}; known change points: {len(known)}. The "
               "vertical axis spans the 2nd to 98th percentile of the band (early estimates "
               "beyond it are clipped at the edge).")
    if truth_err:
        st.warning(f"Truth file not used: {plain(truth_err)}")
    elif truth_bad is not None and len(truth_bad):
        st.warning(f"{len(truth_bad)} row(s) of the truth file could not be read:")
        st.dataframe(truth_bad, hide_index=True)
        ui.download_csv(truth_bad, "truth_rejects.csv", key="sd_truth_bad_csv")


def _windows(hist: pd.DataFrame, anchors: list, series: str) -> None:
    pts = loglog.loglog_points(hist)
    if len(pts) < 4:
        st.info(f"Only {len(pts)} observation(s) on the log scale: not enough for two windows.")
        return
    c1, c2 = st.columns(2)
    n = c1.slider("Window length (observations)", min_value=2, max_value=max(3, len(pts) // 2),
                  value=min(100, max(2, len(pts) // 4)), key=f"sd_window:{series}")
    choice = c2.radio("Earlier window", list(loglog.EARLIER_CHOICES),
                      key=f"sd_earlier:{series}",
                      format_func=lambda k: loglog.EARLIER_CHOICES[k],
                      index=1 if anchors else 0)
    anchor = None
    if choice == "anchor":
        if anchors:
            anchor = st.selectbox("Ends before", anchors, index=len(anchors) - 1,
                                  key=f"sd_anchor:{series}",
                                  format_func=lambda t: f"{pd.Timestamp(t):%Y-%m-%d %H:%M} UTC")
        else:
            choice = "preceding"
            st.caption("No alert or known change point on this series: the earlier window is "
                       "the one just before the recent window.")
    win = loglog.pick_windows(pts, n, choice, anchor_ts=anchor)
    fits, lines = loglog.fit_lines(win)
    st.altair_chart(charts.loglog_chart(win, lines), width="stretch")
    cols = st.columns(2)
    for col, name in zip(cols, ("earlier", "recent")):
        f = fits[name]
        span = (f"{pd.Timestamp(f['start']):%Y-%m-%d %H:%M} to {pd.Timestamp(f['end']):%Y-%m-%d %H:%M}"
                if "start" in f else "empty")
        col.metric(f"{name} window slope", fmt_num(f["slope"]),
                   help=f"{f['n']} observations, {span}")
        if f["reason"]:
            col.caption(f"— no line: {f['reason']}.")
    skipped = pts.attrs.get("not_on_log_scale", 0)
    per = ("log(quantity / exposure), the quantity per unit of the stored exposure,"
           if pts.attrs.get("per_exposure") else "log quantity")
    st.caption(f"Slopes are plain least-squares fits of {per} on log price within each "
               "window (controls ignored), a picture of the raw relation."
               + (f" {skipped} observation(s) with zero quantity are not on the log scale."
                  if skipped else ""))


def _residuals(hist: pd.DataFrame) -> None:
    res = shaping.residual_frame(hist)
    if not len(res):
        st.info("No residuals yet (the estimator is warming up).")
        return
    thin, total = shaping.downsample(res, columns=("residual",), max_points=MAX_DRAWN)
    st.altair_chart(charts.residual_chart(thin), width="stretch")
    st.caption(f"Showing {len(thin):,} of {total:,} residuals. A residual r means the actual "
               f"quantity was exp(r) times the one-step forecast.")


def _memory(hist: pd.DataFrame, row: pd.Series) -> None:
    lam = row.get("forgetting")
    if lam is None or pd.isna(lam):
        st.info("The forgetting factor of this series is not recorded in the store.")
        return
    w = shaping.effective_window(float(lam), hist["ts"])
    c = st.columns(3)
    c[0].metric("Forgetting factor λ", f"{w['forgetting']:.4f}")
    c[1].metric("Effective window (observations)",
                "unbounded" if math.isinf(w["n_obs"]) else f"{w['n_obs']:,.0f}")
    c[2].metric("Effective window (time)", fmt_timedelta(w["time"]),
                help=f"observations × median spacing ({fmt_timedelta(w['spacing'])})")
    st.caption("Effective window = (1 + λ) / (1 − λ) observations (Kish's effective sample size "
               "of weights λ^k), times the median spacing between observations.")


def _price_change(hist: pd.DataFrame, row: pd.Series, series: str) -> None:
    prices = pd.to_numeric(hist.get("price"), errors="coerce").dropna()
    last = float(prices.iloc[-1]) if len(prices) and prices.iloc[-1] > 0 else 1.0
    c1, c2 = st.columns(2)
    p1 = c1.number_input("Current price", min_value=1e-9, value=last, format="%.4f",
                         key=f"pc_p1:{series}")
    p2 = c2.number_input("New price", min_value=1e-9, value=round(last * 1.05, 4),
                         format="%.4f", key=f"pc_p2:{series}")
    b = float(row["beta"]) if pd.notna(row["beta"]) else math.nan
    lo = float(row["beta_lo"]) if pd.notna(row["beta_lo"]) else math.nan
    hi = float(row["beta_hi"]) if pd.notna(row["beta_hi"]) else math.nan
    eff = shaping.price_change_effect(float(p1), float(p2), b, lo, hi)
    cols = st.columns(3)
    cols[0].metric("Price change", fmt_pct(eff["price_change"]))
    cols[1].metric("Expected quantity change", fmt_pct(eff["change"]))
    cols[2].metric("Interval", f"[{fmt_pct(eff['change_lo'])}, {fmt_pct(eff['change_hi'])}]")
    if np.isnan(eff["change"]):
        st.caption(f"— : no elasticity yet (status {status_label(str(row['status']))}).")
    else:
        st.caption(f"Exact: (p2 / p1)^b − 1 = ({eff['ratio']:.4f})^({fmt_num(b, 3)}) − 1, holding "
                   "everything else equal; the interval uses the ends of the elasticity interval. "
                   f"The linear rule b × Δp/p would say {fmt_pct(b * eff['price_change'])}.")


def render() -> None:
    db = ui.require_db()
    st.title("Series detail")
    latest = data.latest(db)
    if not len(latest):
        st.info("The store holds no series yet.")
        return
    series = _pick_series(latest)

    @st.fragment(run_every=ui.run_every())
    def live() -> None:
        with ui.store_guard():
            row = data.latest(db).set_index("series").loc[series]
            row["series"] = series
            _headline(row)
            hist = data.history(db, series)
            st.subheader("Elasticity over time")
            _elasticity(db, series, hist, row)

    live()
    hist = data.history(db, series)
    row = latest.set_index("series").loc[series]
    markers = shaping.alert_markers(data.alerts(db, series=series), shaping.band_frame(hist))
    known = shaping.series_truth(ui.truth()[0], series)
    anchors = sorted(set(markers["ts"]) | set(known["ts"]))
    t_scatter, t_resid, t_price, t_memory = st.tabs(
        ["Log-log windows", "Residuals", "What a price change does", "Memory"])
    with t_scatter:
        _windows(hist, anchors, series)
    with t_resid:
        _residuals(hist)
    with t_price:
        _price_change(hist, row, series)
    with t_memory:
        _memory(hist, row)


render()
