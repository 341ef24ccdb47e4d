"""elmon dashboard entry point: ``elmon dashboard --db PATH`` runs
``streamlit run dashboard/app.py -- --db PATH``.

Pages (one module each under ``dashboard/views/``): Overview, Series detail, Alerts, Replay,
Groups.
Every page shows the caution line first; the sidebar holds the live-refresh controls.
"""

from pathlib import Path

import streamlit as st

from dashboard import ui

HERE = Path(__file__).resolve().parent

st.set_page_config(page_title="elmon: elasticity monitor", page_icon=":material/monitoring:",
                   layout="wide")

pages = [
    st.Page(HERE / "views" / "overview.py", title="Overview", icon=":material/dashboard:",
            url_path="overview", default=True),
    st.Page(HERE / "views" / "series.py", title="Series detail", icon=":material/show_chart:",
            url_path="series"),
    st.Page(HERE / "views" / "alerts.py", title="Alerts", icon=":material/notifications:",
            url_path="alerts"),
    st.Page(HERE / "views" / "replay.py", title="Replay", icon=":material/history:",
            url_path="replay"),
    st.Page(HERE / "views" / "experiments.py", title="Experiments", icon=":material/science:",
            url_path="experiments"),
    st.Page(HERE / "views" / "groups.py", title="Groups", icon=":material/workspaces:",
            url_path="groups"),
]
page = st.navigation(pages)
ui.sidebar()
ui.caution()
with ui.store_guard():
    page.run()
