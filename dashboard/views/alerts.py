"""Alerts page: open, acknowledged and resolved alerts with filters; the event history of an
alert; acknowledge or resolve one with a note and a name (through the store functions the CLI
uses) only when the dashboard was started with ``--allow-actions``. Ids and messages are shown
as text (:func:`dashboard.safe_text.plain`)."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from dashboard import charts, data, shaping, ui
from dashboard.legend import ALERT_SHAPES, STATE_SYMBOLS
from dashboard.safe_text import plain
from monitor.errors import ElmonError

STATES = ("open", "acknowledged", "resolved")
TABLE_COLUMNS = ["id", "series", "kind", "state", "verdict", "severity", "opened_ts",
                 "change_ts", "size", "beta_before", "beta_after", "beta", "beta_lo", "beta_hi",
                 "message"]
VERDICT_WORDS = {"confirmed": "confirmed change", "false_alarm": "false alarm"}


def _table(view: pd.DataFrame) -> pd.DataFrame:
    t = view.reindex(columns=TABLE_COLUMNS).copy()
    t["state"] = [STATE_SYMBOLS.get(s, s) for s in t["state"].astype(str)]
    t["kind"] = t["kind"].astype(str).str.replace("_", " ")
    t["opened_ts"] = shaping.to_utc(t["opened_ts"]).to_numpy()
    t["change_ts"] = shaping.to_utc(t["change_ts"]).to_numpy()
    return t


def _column_config() -> dict:
    cc = st.column_config
    return {"id": cc.NumberColumn("alert", format="%d"),
            "opened_ts": cc.DatetimeColumn("opened (data time, UTC)", format="YYYY-MM-DD HH:mm",
                                           timezone="UTC"),
            "change_ts": cc.DatetimeColumn("change began (estimate, UTC)",
                                           format="YYYY-MM-DD HH:mm", timezone="UTC",
                                           help="— where the detector gives no change time"),
            "size": cc.NumberColumn("size of change", format="%.2f",
                                    help="b after − b before for an elasticity change; the "
                                         "log level shift for a level shift"),
            "beta_before": cc.NumberColumn("b before", format="%.2f"),
            "beta_after": cc.NumberColumn("b after", format="%.2f"),
            "beta": cc.NumberColumn("elasticity b", format="%.2f"),
            "beta_lo": cc.NumberColumn("interval low", format="%.2f"),
            "beta_hi": cc.NumberColumn("interval high", format="%.2f")}


def _detail(db: str, alert_id: int) -> None:
    a = data.alert(db, alert_id)
    st.subheader(f"Alert {alert_id}: {plain(a['series'])} · "
                 f"{plain(str(a['kind']).replace('_', ' '))}")
    cols = st.columns(4)
    cols[0].metric("State", plain(STATE_SYMBOLS.get(a["state"], a["state"])))
    cols[1].metric("Severity", plain(a.get("severity", "—")))
    cols[2].metric("Elasticity b", shaping.fmt_num(a.get("beta")))
    cols[3].metric("Interval", f"[{shaping.fmt_num(a.get('beta_lo'))}, "
                               f"{shaping.fmt_num(a.get('beta_hi'))}]")
    st.markdown(plain(a.get("message") or ""))
    st.page_link("views/series.py", label=f"Open series detail: {plain(a['series'])}",
                 icon=":material/show_chart:", query_params={"series": str(a["series"])})
    ev = data.events(db, alert_id)
    cc = st.column_config
    _explain(db, a)
    st.markdown("**Event history**")
    ui.download_csv(ev, f"alert{alert_id}_events.csv", key="al_events_csv")
    st.dataframe(ev, hide_index=True, placeholder="—", key="al_events",
                 column_order=["event", "at", "ts", "who", "note"],
                 column_config={"at": cc.DatetimeColumn("when (clock, UTC)",
                                                        format="YYYY-MM-DD HH:mm:ss",
                                                        timezone="UTC"),
                                "ts": cc.DatetimeColumn("data time (UTC)",
                                                        format="YYYY-MM-DD HH:mm",
                                                        timezone="UTC",
                                                        help="— for actions by people"),
                                "note": cc.TextColumn("note", width="large")})

    _actions(db, alert_id, a)


def _actions(db: str, alert_id: int, a: dict) -> None:
    """Acknowledge / resolve, offered only when the dashboard was started with
    ``--allow-actions``; the name of who acts is required (the store records it)."""
    if not data.app_settings()["actions"]:
        st.caption("This dashboard is read-only. To acknowledge or resolve alerts here, start it "
                   "with `elmon dashboard --allow-actions`, or use `elmon alerts ack` / "
                   "`elmon alerts resolve`.")
        return
    note = st.text_area("Note", key="al_note", placeholder="what was checked, what was decided")
    who = st.text_input("Your name (required)", key="al_who",
                        help="Recorded with the action in the alert's history.")
    c1, c2, c3, c4 = st.columns(4)
    clicked = {
        "acknowledge": c1.button("Acknowledge", key="al_ack", disabled=a["state"] != "open",
                                 help="Mark as seen; it stays active until resolved."),
        "resolve": c2.button("Resolve", key="al_resolve", disabled=a["state"] == "resolved"),
        "confirmed": c3.button("Confirmed change", key="al_confirm",
                               help="A real change: goes into the truth file for tuning."),
        "false_alarm": c4.button("False alarm", key="al_false",
                                 help="No change happened: tuning counts an alarm here as "
                                      "false."),
    }
    done = {"acknowledge": "acknowledged", "resolve": "resolved",
            "confirmed": "marked as a confirmed change", "false_alarm": "marked as a false alarm"}
    for action, hit in clicked.items():
        if not hit:
            continue
        try:
            data.change_alert(db, alert_id, action, note, who)
        except (ElmonError, ValueError, PermissionError) as exc:
            st.error(f"Could not {action.replace('_', ' ')} alert {alert_id}: {plain(exc)}")
        else:
            st.session_state["al_flash"] = f"Alert {alert_id}: {done[action]}."
            st.rerun()


def _explain(db: str, a: dict) -> None:
    """Why this alert fired: the detector's statistic at the alarm against its threshold (where
    the alert records them), the estimated change time, b before and after with intervals, and
    how quickly a change of this series can be seen (median delay, where recorded)."""
    d = a.get("details") or {}
    st.markdown("**Explain this alert**")
    pick = lambda k: a.get(k) if a.get(k) is not None and not pd.isna(a.get(k)) else d.get(k)  # noqa: E731
    cols = st.columns(4)
    cols[0].metric("Statistic at the alarm", shaping.fmt_num(d.get("statistic")),
                   help="the detector's statistic when the alarm was raised")
    thr = d.get("threshold")
    cols[1].metric("Threshold", shaping.fmt_num(thr) if thr is not None else "not recorded")
    cols[2].metric("b before", shaping.fmt_num(pick("beta_before")),
                   help=f"interval [{shaping.fmt_num(pick('beta_before_lo'))}, "
                        f"{shaping.fmt_num(pick('beta_before_hi'))}]")
    cols[3].metric("b after", shaping.fmt_num(pick("beta_after")),
                   help=f"interval [{shaping.fmt_num(pick('beta_after_lo'))}, "
                        f"{shaping.fmt_num(pick('beta_after_hi'))}]")
    change = pick("change_ts") or d.get("started_ts")
    latest = data.latest(db)
    row = latest.loc[latest["series"].astype(str) == str(a["series"])]
    delay = (row["delay50_obs"].iloc[0] if "delay50_obs" in row.columns and len(row)
             else None)
    st.caption(
        "Estimated change began: " + (f"{pd.Timestamp(change):%Y-%m-%d %H:%M} UTC" if change
                                      else "— (this detector gives no change time)")
        + ". Detectability of this series: " + (
            f"a change like this is seen after about {shaping.fmt_num(delay, 0)} observations "
            "(median delay)" if delay is not None and not pd.isna(delay)
            else "— (no median delay recorded for this series)") + ".")
    hist = data.history(db, str(a["series"]))
    band = shaping.band_frame(hist)
    if len(band.loc[band["drawable"]]):
        mine = data.alerts(db, series=str(a["series"]))
        markers = shaping.alert_markers(mine.loc[mine["id"] == a["id"]], band)
        truth = (pd.DataFrame({"ts": [pd.Timestamp(change)], "kind": ["estimated change"]})
                 if change else None)
        drawn = band.loc[band["drawable"]]
        low, high = shaping.bounds_in_effect(row.iloc[0]) if len(row) else (None, None)
        st.altair_chart(charts.elasticity_chart(
            drawn, low, high, markers, truth, height=260,
            y_domain=shaping.beta_domain(drawn, low, high),
            title="Elasticity with this alert and its estimated change time (dotted)"),
            width="stretch")


def render() -> None:
    db = ui.require_db()
    st.title("Alerts")
    if st.session_state.get("al_flash"):
        st.success(st.session_state.pop("al_flash"))
    c1, c2, c3 = st.columns([2, 3, 3])
    states = c1.multiselect("State", STATES, default=["open", "acknowledged"], key="al_states",
                            placeholder="all states")
    kinds = c2.multiselect("Kind", list(ALERT_SHAPES), key="al_kinds",
                           format_func=lambda k: ALERT_SHAPES[k][1], placeholder="all kinds")
    text = c3.text_input("Search series id", key="al_search")

    everything = data.alerts(db)
    view = shaping.filter_alerts(everything, states, kinds, text)
    counts = everything["state"].value_counts() if len(everything) else pd.Series(dtype=int)
    st.caption(f"{len(view):,} of {len(everything):,} alerts shown · "
               + " · ".join(f"{STATE_SYMBOLS[s]} {int(counts.get(s, 0)):,}" for s in STATES))
    if not len(view):
        st.info("No alerts match these filters.")
        return
    marks = data.verdicts(db)
    marks = dict(zip(marks["alert_id"].astype(int), marks["verdict"])) if len(marks) else {}
    view = view.assign(verdict=[VERDICT_WORDS.get(marks.get(int(i)), None) for i in view["id"]])
    table = _table(view)
    st.dataframe(table, column_config=_column_config(), hide_index=True,
                 placeholder="—", key="al_table", height=360)
    c1, c2 = st.columns(2)
    with c1:
        ui.download_csv(table, "alerts.csv", key="al_csv")
    truth, n = data.truth_file(db)
    with c2:
        ui.download_csv(truth, "truth.csv", key="al_truth_csv")
    st.caption(f"truth.csv: the {n['confirmed']} alert(s) marked as confirmed changes, as known "
               f"change points for `elmon tune --truth` ({n['false_alarm']} marked false alarm "
               f"and {n['unmarked']} change alert(s) not marked are left out). Same file: "
               "`elmon alerts truth --db STORE --out truth.csv`.")
    ids = [int(i) for i in view["id"]]
    labels = {int(r.id): f"#{int(r.id)} · {r.series} · {str(r.kind).replace('_', ' ')} · {r.state}"
              for r in view.itertuples()}
    wanted = st.session_state.get("al_selected")
    chosen = st.selectbox("Alert", ids, index=ids.index(wanted) if wanted in ids else 0,
                          format_func=labels.get, key="al_pick")
    st.session_state["al_selected"] = chosen
    _detail(db, chosen)


render()
