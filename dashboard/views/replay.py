"""Replay page: pick a replay output folder (or run a replay of a log) and see its estimates,
alerts, rejects and, where a truth file was used, detection delay and false alarms.

Every path typed here must lie under the replay root fixed when the dashboard started
(``--replay-root DIR``, default the store's folder; :func:`dashboard.files.under_root`); paths
are taken relative to the root, and errors are shown as text, never as markdown."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import streamlit as st

from dashboard import charts, data, files, shaping, ui
from dashboard.safe_text import plain
from monitor.errors import ElmonError, SourceError


MAX_DRAWN = 1500
NONE = "(none)"


@st.cache_data(ttl=30, show_spinner=False)
def _load(folder: str, stamp: float) -> dict:
    return files.load_replay(folder)


def _root() -> str | None:
    return data.app_settings()["replay_root"]


def _stamp(folder: str) -> float:
    p = Path(folder) / "estimates.csv"
    return p.stat().st_mtime if p.is_file() else 0.0


def _run_form() -> None:
    with st.expander("Run a replay of a log"):
        log = st.text_input("Observation log (CSV or Parquet)", key="rp_log")
        out = st.text_input("Output folder", key="rp_out")
        cfg_path = st.text_input("Config file (TOML, optional)", key="rp_config")
        lam = st.number_input("Forgetting factor λ", min_value=0.5, max_value=1.0, value=0.99,
                              step=0.001, format="%.3f", key="rp_lambda",
                              help="Overrides [estimator] forgetting of the config file.")
        truth = st.text_input("Truth file of known change points (optional)", key="rp_truth")
        if st.button("Run replay", key="rp_run", disabled=not (log and out)):
            try:
                from monitor.replay.driver import replay
                from monitor.settings import load_config
            except ImportError as exc:
                st.error(f"Replay is not available in this installation: {plain(exc)}")
                return
            root = _root()
            try:
                log_p = files.under_root(log, root, "observation log")
                out_p = files.under_root(out, root, "output folder")
                cfg_p = files.under_root(cfg_path, root, "config file") if cfg_path else None
                truth_p = files.under_root(truth, root, "truth file") if truth else None
                cfg = load_config(str(cfg_p) if cfg_p else None).with_overrides(
                    "estimator", forgetting=float(lam))
                with st.spinner("Replaying…"):      # the driver of `elmon replay`
                    replay(str(log_p), str(out_p), cfg,
                           truth=str(truth_p) if truth_p else None, progress=False)
            except (ElmonError, OSError, ValueError) as exc:
                st.error(f"Replay failed: {plain(exc)}")
            else:
                st.session_state["rp_ran"] = str(out_p)
                st.rerun()


def _detection_metrics(block: dict) -> None:
    """Headline numbers of summary.json's ``detection`` block (see monitor.replay.detection)."""
    rate = block.get("detection_rate")
    cols = st.columns(4)
    cols[0].metric("Detected", f"{block.get('detected', 0)} of {block.get('changes', 0)}",
                   help="Changes in the response with data after them.")
    cols[1].metric("Detection rate", "—" if rate is None else f"{100 * rate:.0f}%")
    med, p90 = block.get("median_delay_obs"), block.get("p90_delay_obs")
    cols[2].metric("Median delay (observations)", shaping.fmt_num(med, 1),
                   help="90th percentile: " + shaping.fmt_num(p90, 1))
    fa, per = block.get("false_alarms"), block.get("false_alarms_per_10k")
    cols[3].metric("False alarms", "—" if fa is None else f"{fa}",
                   help="per 10,000 quiet observations: " + shaping.fmt_num(per, 2))
    if rate is None:
        st.caption("— : no change in the response with data after it, so no rate.")


def _detection(rep: dict) -> None:
    det = rep["detection"]
    summ = rep["summary"]
    if det is None:
        st.info("No detection.csv: this replay ran without a truth file of known change points.")
        return
    st.subheader("Detection against known change points")
    block = summ.get("detection")
    if isinstance(block, dict):
        _detection_metrics(block)
    elif summ.get("false_alarms") is not None:
        st.metric("False alarms", f"{summ['false_alarms']}")
    cc = st.column_config
    st.dataframe(files.detection_summary(det), hide_index=True, placeholder="—",
                 key="rp_det_summary",
                 column_config={
                     "change_points": cc.NumberColumn("change points"),
                     "scored": cc.NumberColumn("scored", help="detected or missed; changes "
                                               "without data after them or caught by "
                                               "validation are not scored"),
                     "detection_rate": cc.NumberColumn("detection rate", format="percent"),
                     "median_delay_obs": cc.NumberColumn("median delay (observations)",
                                                         format="%.1f"),
                     "max_delay_obs": cc.NumberColumn("longest delay (observations)",
                                                      format="%.0f")})
    st.caption("Delay: observations from the change point to the first alert that caught it; "
               "missed change points do not enter the delays.")
    st.markdown("**Per change point**")
    st.dataframe(det, hide_index=True, placeholder="—", key="rp_det")
    ui.download_csv(det, "detection.csv", key="rp_det_csv")


def render() -> None:
    st.title("Replay")
    root = _root()
    found = sorted(files.find_replay_folders(root)) if root else []
    st.caption("Replay root (set with `elmon dashboard --replay-root DIR`): "
               + (plain(root) if root else "none")
               + ". Paths below are taken relative to it and must stay inside it.")
    c1, c2 = st.columns(2)
    picked = c1.selectbox("Replay output found under the replay root", [NONE] + found,
                          key="rp_found", index=1 if found else 0)
    typed = c2.text_input("…or type a replay output folder", key="rp_folder_text")
    _run_form()
    folder = (typed.strip() or st.session_state.get("rp_ran")
              or (picked if picked != NONE else ""))
    if not folder:
        st.info("Pick or type a folder written by `elmon replay LOG --out DIR`.")
        return
    try:
        folder = str(files.under_root(folder, root, "replay folder"))
        st.caption(f"Showing replay output in {plain(folder)}")
        rep = _load(folder, _stamp(folder))
    except (ElmonError, SourceError) as exc:
        st.error(plain(exc))
        return
    if rep["missing"]:
        st.warning("Missing from this folder: " + plain(", ".join(rep["missing"])))
    est, alerts, rejects = rep["estimates"], rep["alerts"], rep["rejects"]
    cols = st.columns(4)
    cols[0].metric("Series", f"{est['series'].nunique() if len(est) else 0:,}")
    cols[1].metric("Estimates", f"{len(est):,}")
    cols[2].metric("Alerts", f"{len(alerts):,}")
    cols[3].metric("Rejected rows", f"{len(rejects):,}")
    _detection(rep)

    st.subheader("Final estimate per series")
    final = shaping.latest_per_series(est)
    st.dataframe(final, hide_index=True, placeholder="—", key="rp_final")
    ui.download_csv(final, "final_estimates.csv", key="rp_final_csv")
    if len(est):
        ids = sorted(est["series"].astype(str).unique())
        s = st.selectbox("Series to draw", ids, key="rp_series")
        part = est.loc[est["series"].astype(str) == s]
        band = shaping.band_frame(part)
        drawn = band.loc[band["drawable"]]
        al = alerts.loc[alerts["series"].astype(str) == s] if len(alerts) else alerts
        if len(al):
            al = al.rename(columns={"rule": "kind"}) if "kind" not in al else al
        markers = shaping.alert_markers(al, band)
        thin, total = shaping.downsample(
            drawn, max_points=MAX_DRAWN, keep=shaping.nearest_keep_mask(drawn["ts"], markers["ts"]))
        st.altair_chart(charts.elasticity_chart(thin, alerts=markers,
                                                title=f"Replay: elasticity of {s}",
                                                y_domain=shaping.beta_domain(drawn)),
                        width="stretch")
        st.caption(f"Showing {len(thin):,} of {total:,} points"
                   + (f"; {len(band) - len(drawn):,} without a value (warming up) not drawn"
                      if len(band) > len(drawn) else "") + ".")
    st.subheader("Alerts")
    st.dataframe(alerts, hide_index=True, placeholder="—", key="rp_alerts")
    if len(alerts):
        ui.download_csv(alerts, "alerts.csv", key="rp_alerts_csv")
    st.subheader("Rejected rows")
    if len(rejects):
        st.dataframe(rejects, hide_index=True, placeholder="—", key="rp_rejects")
        ui.download_csv(rejects, "rejects.csv", key="rp_rejects_csv")
    else:
        st.caption("None.")
    with st.expander("Settings and counts (summary.json)"):
        st.json(rep["summary"])


render()
