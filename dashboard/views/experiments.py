"""Experiments page: a live price experiment's progress, pooled b with its fixed band and
confidence sequence over time, time to precision, health and verdict, with the cautions.

The experiments are the ``[experiments.NAME]`` tables of the config given with ``--config``
after ``--`` on the streamlit command line, the ``ELMON_CONFIG`` environment variable, or the
path typed on the page. Rows come from the store through
:func:`monitor.experiments.sources.status_from_store` (the store's query functions only).
"""

from __future__ import annotations

import argparse
import os
import sys

import altair as alt
import pandas as pd
import streamlit as st

from dashboard import data, files
from dashboard.safe_text import plain
from dashboard.legend import COLOURS
from monitor.errors import ElmonError
from monitor.experiments.report import (CS_COLOUR, EXPERIMENT_CAUTIONS, path_for_display,
                                        progress_share)

VERDICT_WORDS = {
    "collecting": ":material/hourglass_top: collecting: not yet precise enough",
    "precise": ":material/check_circle: precise: the target half-width is reached",
    "stalled": ":material/pause_circle: stalled: prices are not moving as planned",
    "compromised": ":material/error: compromised: the test is not running as designed",
}


def _config_path() -> str | None:
    parser = argparse.ArgumentParser(add_help=False, allow_abbrev=False)
    parser.add_argument("--config")
    args, _ = parser.parse_known_args(sys.argv[1:])
    return args.config or os.environ.get("ELMON_CONFIG") or None


@st.cache_data(ttl=data.QUERY_TTL, show_spinner=False)
def _plans(config: str, mtime: float):
    from monitor.experiments.sources import controls_from_config, plans_from_config
    from monitor.settings import load_config

    cfg = load_config(config)
    return plans_from_config(cfg), controls_from_config(cfg)


@st.cache_data(ttl=data.QUERY_TTL, show_spinner=False)
def _status(db: str, config: str, mtime: float, name: str):
    from monitor.experiments.sources import status_from_store

    plans, (controls, log_controls) = _plans(config, mtime)
    return status_from_store(data.get_store(db), plans[name], controls, log_controls)


def _fmt(v, spec: str = "{:.3f}") -> str:
    return "—" if v is None else spec.format(v)


def _b_chart(path: pd.DataFrame) -> alt.LayerChart:
    df = path.assign(ts=pd.to_datetime(path["ts"], utc=True))
    late = df.iloc[len(df) // 3:]
    vals = pd.concat([late[c] for c in ("b", "cs_lo", "cs_hi", "b_lo", "b_hi")]).dropna()
    lo, hi = (float(vals.min()), float(vals.max())) if len(vals) else (-3.0, 0.0)
    pad = 0.15 * (hi - lo) + 0.02
    dom = [lo - pad, hi + pad]
    y = alt.Y("cs_lo:Q", title="elasticity b", scale=alt.Scale(domain=dom, clamp=True))
    x = alt.X("ts:T", title="time (UTC)")
    cs = alt.Chart(df).mark_area(opacity=0.2, color=CS_COLOUR).encode(
        x=x, y=y, y2="cs_hi:Q", tooltip=["ts:T", alt.Tooltip("cs_lo:Q", format=".3f"),
                                         alt.Tooltip("cs_hi:Q", format=".3f")])
    band = alt.Chart(df).mark_area(opacity=0.5, color=COLOURS["band"]).encode(
        x=x, y=alt.Y("b_lo:Q", scale=alt.Scale(domain=dom, clamp=True)), y2="b_hi:Q")
    line = alt.Chart(df).mark_line(color=COLOURS["estimate"]).encode(
        x=x, y=alt.Y("b:Q", scale=alt.Scale(domain=dom, clamp=True)),
        tooltip=["ts:T", "n:Q", alt.Tooltip("b:Q", format=".3f")])
    return (cs + band + line).properties(height=300, title="Pooled b: fixed band (teal) inside "
                                                          "the confidence sequence (plum)")


def _halfwidth_chart(path: pd.DataFrame, target: float) -> alt.LayerChart:
    long = path.melt(id_vars=["n"], value_vars=["halfwidth", "fixed_halfwidth"],
                     var_name="band", value_name="half-width").dropna()
    long["band"] = long["band"].map({"halfwidth": "confidence sequence",
                                     "fixed_halfwidth": "fixed band"})
    top = float(min(long["half-width"].max(), 6 * target)) if len(long) else 1.0
    lines = alt.Chart(long).mark_line().encode(
        x=alt.X("n:Q", title="observations"),
        y=alt.Y("half-width:Q", scale=alt.Scale(domain=[0, top * 1.05], clamp=True)),
        color=alt.Color("band:N", scale=alt.Scale(domain=["confidence sequence", "fixed band"],
                                                  range=[CS_COLOUR, COLOURS["estimate"]])),
        strokeDash=alt.StrokeDash("band:N", legend=None))
    rule = alt.Chart(pd.DataFrame({"target": [target]})).mark_rule(
        color=COLOURS["truth"], strokeDash=[4, 3]).encode(y="target:Q")
    return (lines + rule).properties(height=220, title=f"Half-width against the target "
                                                       f"{target:g} (dashed)")


def _health_table(health: dict) -> pd.DataFrame:
    rows = []
    for name, chk in health.items():
        if name == "stall":
            flat = chk["stalled_series"]
            rows.append({"check": "prices moving", "result": "ok" if not flat else
                         f"flat lately: {', '.join(flat[:5])}"})
            continue
        text = "ok" if chk.get("ok") else f"FAILED: {chk.get('reason', '')}"
        if chk.get("note"):
            text += f" ({chk['note']})"
        rows.append({"check": name.replace("_", " "), "result": text})
    return pd.DataFrame(rows)


def main() -> None:
    st.title("Price experiments")
    st.warning(EXPERIMENT_CAUTIONS, icon=":material/science:")
    db = data.app_settings()["db"]
    config = st.text_input("Config file with [experiments.NAME] tables", value=_config_path() or "",
                           key="ex_config",
                           help="Given with --config after -- on the command line or ELMON_CONFIG.")
    if not db:
        st.error("No store given. Start the dashboard with `elmon dashboard --db PATH`.")
        return
    if not config:
        st.info("No experiments: give a config file with `[experiments.NAME]` tables.")
        return
    try:
        if config != _config_path():    # typed here: only under the replay root (issue 14)
            config = str(files.under_root(config, data.app_settings()["replay_root"],
                                          "config file"))
        mtime = os.path.getmtime(config)
        plans, _ = _plans(config, mtime)
    except (OSError, ElmonError) as exc:
        st.error(f"The config cannot be read: {plain(exc)}")
        return
    if not plans:
        st.info(f"{plain(config)} defines no `[experiments.NAME]` table.")
        return
    name = st.selectbox("Experiment", sorted(plans), key="ex_name")
    st_ = _status(db, config, mtime, name)
    s = st_.summary
    st.subheader(VERDICT_WORDS[s["verdict"]])
    for r in s["reasons"]:
        st.markdown(f"- {plain(r)}")
    level = f"{100 * st_.plan.level:g}%"
    cols = st.columns(4)
    cols[0].metric("Pooled b", _fmt(s["b"]))
    cols[1].metric(f"Fixed {level} band", f"[{_fmt(s['b_lo'])}, {_fmt(s['b_hi'])}]",
                   help="Valid at one planned look only.")
    cols[2].metric(f"{level} confidence sequence", f"[{_fmt(s['cs_lo'])}, {_fmt(s['cs_hi'])}]",
                   help="Valid at every look: stop whenever it is narrow enough.")
    cols[3].metric("Observations", f"{s['n_obs']:,}")
    cols = st.columns(3)
    cols[0].metric("Half-width / target", f"{_fmt(s['halfwidth'])} / {s['target_halfwidth']:g}")
    cols[1].metric("More observations to the target", _fmt(s["eta_obs"], "{:,.0f}"))
    cols[2].metric("Expected date", (s["eta_ts"] or "—")[:10])
    share = progress_share(s["halfwidth"], s["target_halfwidth"])
    st.progress(share, text=f"Progress toward the target: {100 * share:.0f}% of the information")
    path = path_for_display(st_.path)
    if len(path):
        st.altair_chart(_b_chart(path), width="stretch")
        st.altair_chart(_halfwidth_chart(path, s["target_halfwidth"]), width="stretch")
    st.subheader("Per-series estimates")
    het = st_.heterogeneity
    if het.get("tau") is not None:
        st.caption(f"Spread of the true elasticities between series: tau = {het['tau']:.3f} "
                   f"({level} interval {het['tau_lo']:.3f} to {het['tau_hi']:.3f}), "
                   f"I² = {100 * het['i2']:.0f}%, {het['k']} series.")
    elif het.get("note"):
        st.caption(plain(het["note"]))
    if len(st_.series):
        st.dataframe(st_.series, hide_index=True, width="stretch")
    st.subheader("Health")
    st.dataframe(_health_table(st_.health), hide_index=True, width="stretch")
    for note in st_.notes:
        st.caption(plain(note))


main()
