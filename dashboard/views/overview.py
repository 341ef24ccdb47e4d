"""Overview page: counts at the top, then every series with its current elasticity and interval,
status, open alerts, a trend line and the time of its last observation."""

from __future__ import annotations

import streamlit as st

from dashboard import data, shaping, ui
from dashboard.legend import ALERT_SHAPES, COLOURS, STATUS_STYLE, legend_markdown
from dashboard.safe_text import plain

TABLE_COLUMNS = ["series", "status", "elasticity", "lo", "hi", "trend", "open_alerts",
                 "last_observation", "n_obs", "n_eff"]


def _column_config() -> dict:
    cc = st.column_config
    scale = ("Each row on its own scale, from its lowest (bottom) to its highest (top) value: "
             "see the next column for that range.")
    return {
        "series": cc.TextColumn("series", pinned=True),
        "status": cc.TextColumn("status", help="Symbols are explained under the table."),
        "elasticity": cc.NumberColumn("elasticity b", format="%.2f",
                                      help="Current elasticity d log q / d log p; — while the "
                                           "status says there is no estimate yet."),
        "lo": cc.NumberColumn("interval low", format="%.2f"),
        "hi": cc.NumberColumn("interval high", format="%.2f"),
        "trend": cc.LineChartColumn("trend (recent b)", width="medium", y_min=0.0, y_max=1.0,
                                    color=COLOURS["estimate"],
                                    help="The last stored elasticities. " + scale),
        "trend_range": cc.TextColumn("trend range", help="Lowest to highest b of the trend."),
        "open_alerts": cc.NumberColumn("open alerts", format="%d"),
        "last_observation": cc.DatetimeColumn("last observation (UTC)",
                                              format="YYYY-MM-DD HH:mm", timezone="UTC"),
        "n_obs": cc.NumberColumn("observations", format="%d"),
        "n_eff": cc.NumberColumn("effective n", format="%.0f",
                                 help="Kish's effective number of observations under forgetting."),
    }


def _counts(summ: dict) -> None:
    al = shaping.alert_counts(summ)
    cols = st.columns(5)
    cols[0].metric("Series", f"{int(summ.get('series') or 0):,}")
    cols[1].metric("Observations", f"{int(summ.get('observations') or 0):,}")
    cols[2].metric("Open alerts", f"{al['active']:,}",
                   help=f"Not yet resolved: {al['open']:,} open, {al['acknowledged']:,} "
                        "acknowledged.")
    # one definition of stale: the open 'stale' alerts the service raises for a source or a
    # series past its stale_after limit (the same number as "stale" in the line below)
    cols[3].metric("Stale", f"{int(al['by_kind'].get('stale', 0)):,}",
                   help=f"Open stale alerts: sources (of {int(summ.get('sources') or 0):,}) "
                        "or series that sent nothing for longer than their stale_after limit.")
    cols[4].metric("Rejected rows", f"{int(summ.get('rejects') or 0):,}")
    if al["by_kind"]:
        st.caption("Open alerts by kind: " + " · ".join(
            f"{ALERT_SHAPES.get(k, (None, k.replace('_', ' ')))[1]} {v:,}"
            for k, v in al["by_kind"].items()))
    else:
        st.caption("No open alerts.")


def render() -> None:
    db = ui.require_db()
    st.title("Overview")
    c1, c2, c3, c4 = st.columns([3, 3, 2, 2])
    text = c1.text_input("Search series id", key="ov_search", placeholder="part of a series id")
    statuses = c2.multiselect("Status", options=list(STATUS_STYLE), key="ov_status",
                              format_func=lambda s: s.replace("_", " "),
                              placeholder="all statuses")
    sort = c3.selectbox("Sort", options=list(shaping.SORTS), key="ov_sort")
    only_open = c4.checkbox("Only with open alerts", key="ov_open")

    @st.fragment(run_every=ui.run_every())
    def live() -> None:
        with ui.store_guard():
            summ = data.summary(db)
            _counts(summ)
            latest = data.latest(db)
            table = shaping.overview_table(latest, shaping.sparkline_lists(data.sparklines(db)))
            view = shaping.sort_overview(
                shaping.filter_overview(table, statuses, text, only_open), sort)
            st.caption(f"{len(view):,} of {len(table):,} series shown")
            trends, spans = shaping.per_row_trends(view["trend"])
            shown = view[TABLE_COLUMNS].assign(trend=trends, trend_range=spans)
            shown = shown[TABLE_COLUMNS[:6] + ["trend_range"] + TABLE_COLUMNS[6:]]
            event = st.dataframe(shown, column_config=_column_config(),
                                 hide_index=True, placeholder="—", key="ov_table",
                                 on_select="rerun", selection_mode="single-row", height=520)
            ui.download_csv(shown.drop(columns=["trend"]), "series.csv", key="ov_csv")
            st.caption("Status: " + legend_markdown() + ". Trend: the last elasticities of the "
                       "series; select a row to open its detail.")
            rows = event.selection.rows if event is not None else []
            if rows:
                chosen = str(view["series"].iloc[rows[0]])
                st.session_state["series"] = chosen
                st.page_link("views/series.py", label=f"Open series detail: {plain(chosen)}",
                             icon=":material/show_chart:", query_params={"series": chosen})

    live()


render()
