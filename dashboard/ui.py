"""Small streamlit pieces shared by the pages: sidebar controls, the caution line, the store
path, the truth file and the live-refresh interval."""

from __future__ import annotations

import contextlib
from pathlib import Path

import pandas as pd
import streamlit as st

from dashboard import data, files
from dashboard.legend import CAUTION
from dashboard.safe_text import plain
from monitor.errors import ElmonError

#: Refresh intervals offered in the sidebar (seconds).
REFRESH_CHOICES = (2, 5, 10, 30, 60, 300)
DEFAULT_REFRESH = 10


def sidebar() -> None:
    """Live-refresh interval and pause toggle, a refresh button, and where the data comes from."""
    s = data.app_settings()
    with st.sidebar:
        st.subheader("Live refresh")
        st.select_slider("Refresh every (seconds)", options=list(REFRESH_CHOICES),
                         value=DEFAULT_REFRESH, key="refresh_seconds",
                         help="How often the numbers on the page are re-read from the store.")
        st.toggle("Pause live refresh", value=False, key="refresh_paused")
        if st.button("Refresh now", key="refresh_now"):
            data.clear_queries()
        st.caption(f"Store: {plain(Path(s['db']).name) if s['db'] else 'none given'}",
                   help=plain(s["db"]) if s["db"] else "Start with elmon dashboard --db PATH.")
        if s["truth"]:
            st.caption(f"Known change points: {plain(Path(s['truth']).name)}",
                       help=plain(s["truth"]))
        st.caption("Read-only" if not s["actions"] else
                   "Actions enabled: acknowledge and resolve change the store",
                   help="Set when the dashboard starts (elmon dashboard --allow-actions).")


def download_csv(table: pd.DataFrame, name: str, key: str) -> None:
    """A button that downloads ``table`` as CSV (UTF-8, no index), as the table shows it."""
    st.download_button(f"Download {name}", table.to_csv(index=False).encode("utf-8"),
                       file_name=name, mime="text/csv", key=key,
                       icon=":material/download:")


def run_every() -> float | None:
    """Seconds between fragment reruns, or ``None`` while paused."""
    if st.session_state.get("refresh_paused", False):
        return None
    return float(st.session_state.get("refresh_seconds", DEFAULT_REFRESH))


def caution() -> None:
    """The caution line shown at the top of every page."""
    st.info(CAUTION, icon=":material/balance:")


def require_db() -> str:
    """The store path, or an explanation and a stop when none was given or it does not exist."""
    db = data.app_settings()["db"]
    if not db:
        st.error("No store given. Start the dashboard with `elmon dashboard --db PATH`.")
        st.stop()
    if not Path(db).is_file():
        st.error(f"Store {plain(db)} not found. Create it with the service or `elmon demo`, "
                 "then start the dashboard with `elmon dashboard --db PATH`.")
        st.stop()
    try:
        data.get_store(db)
    except ElmonError as exc:
        st.error(f"The store cannot be opened: {plain(exc)}")
        st.stop()
    return db


@contextlib.contextmanager
def store_guard():
    """Show a store error (locked, migrated by a newer elmon, damaged) as a message on the page
    instead of a traceback; the next refresh tries again."""
    try:
        yield
    except ElmonError as exc:
        st.error(f"The store could not be read: {plain(exc)}")


@st.cache_data(ttl=60, show_spinner=False)
def _truth(path: str, mtime: float) -> tuple[pd.DataFrame, pd.DataFrame]:
    return files.load_truth(path)


def truth() -> tuple[pd.DataFrame | None, pd.DataFrame | None, str | None]:
    """``(known change points, rejected rows, error message)`` from the ``--truth`` file."""
    path = data.app_settings()["truth"]
    if not path:
        return None, None, None
    try:
        good, bad = _truth(path, Path(path).stat().st_mtime if Path(path).exists() else 0.0)
    except (OSError, ValueError, files.SourceError) as exc:
        return None, None, str(exc)
    return good, bad, None
