"""The dashboard's only door to the store: cached calls of :mod:`monitor.store`'s query functions.

- The read-only connection is opened once per process with ``st.cache_resource``.
- Each query is cached with ``st.cache_data`` for :data:`QUERY_TTL` seconds, keyed by the store
  path and the query's arguments, so a live refresh at most every few seconds costs one query.
- Acknowledge / resolve open their own short-lived writable store (never the cached read-only
  one) and then clear the query caches so the next run shows the change.

Where the store lives: ``--db PATH`` after ``--`` on the ``streamlit run`` command line (what
``elmon dashboard`` passes), else the ``ELMON_DB`` environment variable. A truth file of known
change points likewise comes from ``--truth`` or ``ELMON_TRUTH``.

Security settings (issue 14), fixed when the server starts, never from the page:

- ``--allow-actions`` (or ``ELMON_DASHBOARD_ACTIONS=1``): acknowledge / resolve are offered;
  without it the dashboard changes nothing in the store.
- ``--replay-root DIR`` (or ``ELMON_REPLAY_ROOT``): the only folder tree the Replay page reads
  and writes; default the store's folder.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

import pandas as pd
import streamlit as st

from monitor import store as mstore

#: Seconds a query result is reused before the store is asked again.
QUERY_TTL = 5


def app_settings() -> dict:
    """``{'db', 'truth', 'actions', 'replay_root'}`` from the command line or environment:
    paths or ``None``; ``actions`` is ``True`` only when explicitly enabled."""
    parser = argparse.ArgumentParser(add_help=False, allow_abbrev=False)
    parser.add_argument("--db")
    parser.add_argument("--truth")
    parser.add_argument("--allow-actions", action="store_true")
    parser.add_argument("--replay-root")
    args, _ = parser.parse_known_args(sys.argv[1:])
    db = args.db or os.environ.get("ELMON_DB") or None
    root = args.replay_root or os.environ.get("ELMON_REPLAY_ROOT") or None
    if root is None and db:
        root = str(Path(db).resolve().parent)
    env_actions = os.environ.get("ELMON_DASHBOARD_ACTIONS", "").strip().lower()
    return {"db": db,
            "truth": args.truth or os.environ.get("ELMON_TRUTH") or None,
            "actions": bool(args.allow_actions or env_actions in ("1", "true", "yes")),
            "replay_root": root}


@st.cache_resource(show_spinner=False)
def get_store(db: str):
    """The shared read-only store of this dashboard process."""
    return mstore.open_store(db, readonly=True)


@st.cache_data(ttl=QUERY_TTL, show_spinner=False)
def latest(db: str) -> pd.DataFrame:
    return mstore.latest_estimates(get_store(db))


@st.cache_data(ttl=QUERY_TTL, show_spinner=False)
def summary(db: str) -> dict:
    return mstore.store_summary(get_store(db))


@st.cache_data(ttl=QUERY_TTL, show_spinner=False)
def sparklines(db: str, points: int = 30) -> pd.DataFrame:
    return mstore.sparkline_data(get_store(db), None, points=points)


@st.cache_data(ttl=QUERY_TTL, show_spinner=False)
def history(db: str, series: str) -> pd.DataFrame:
    return mstore.series_history(get_store(db), series)


@st.cache_data(ttl=QUERY_TTL, show_spinner=False)
def alerts(db: str, state=None, series=None, kind=None, limit=None) -> pd.DataFrame:
    return mstore.list_alerts(get_store(db), state=state, series=series, kind=kind, limit=limit)


@st.cache_data(ttl=QUERY_TTL, show_spinner=False)
def alert(db: str, alert_id: int) -> dict:
    return mstore.get_alert(get_store(db), int(alert_id))


@st.cache_data(ttl=QUERY_TTL, show_spinner=False)
def events(db: str, alert_id: int) -> pd.DataFrame:
    return mstore.alert_events(get_store(db), int(alert_id))


@st.cache_data(ttl=QUERY_TTL, show_spinner=False)
def sources(db: str) -> pd.DataFrame:
    return mstore.source_status(get_store(db))


@st.cache_data(ttl=QUERY_TTL, show_spinner=False)
def verdicts(db: str) -> pd.DataFrame:
    """What people marked alerts as (``monitor.store.verdicts``)."""
    from monitor.store.verdicts import list_verdicts

    return list_verdicts(get_store(db))


@st.cache_data(ttl=QUERY_TTL, show_spinner=False)
def truth_file(db: str) -> tuple[pd.DataFrame, dict]:
    """The confirmed change alerts as a truth file, with counts."""
    from monitor.store.verdicts import truth_from_verdicts

    return truth_from_verdicts(get_store(db))


def clear_queries() -> None:
    """Forget every cached query result (after a write, or on the refresh button)."""
    for fn in (latest, summary, sparklines, history, alerts, alert, events, sources, verdicts,
               truth_file):
        fn.clear()


def change_alert(db: str, alert_id: int, action: str, note: str | None, who: str | None) -> None:
    """Acknowledge, resolve or mark (``confirmed`` / ``false_alarm``) an alert through the
    store (its own writable connection).

    Refused unless the dashboard was started with actions enabled, and without a name: the
    store records who acted.
    """
    if not app_settings()["actions"]:
        raise PermissionError("this dashboard is read-only: start it with "
                              "'elmon dashboard --allow-actions' to acknowledge or resolve")
    if action not in ("acknowledge", "resolve", "confirmed", "false_alarm"):
        raise ValueError(f"action {action!r}: must be 'acknowledge', 'resolve', 'confirmed' "
                         "or 'false_alarm'")
    if not (who or "").strip():
        raise ValueError("give your name: the store records who acknowledged or resolved")
    store = mstore.open_store(db, readonly=False)
    try:
        if action in ("confirmed", "false_alarm"):
            from monitor.store.verdicts import mark_alert

            mark_alert(store, int(alert_id), action, who=who, note=note or None)
        else:
            fn = mstore.acknowledge_alert if action == "acknowledge" else mstore.resolve_alert
            fn(store, int(alert_id), note=note or None, who=who or None)
    finally:
        close = getattr(store, "close", None)
        if callable(close):
            close()
    clear_queries()
