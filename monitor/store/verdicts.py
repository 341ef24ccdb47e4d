"""What people found an alert to be: a confirmed change or a false alarm (issue 16, item 9).

A verdict is one row of ``alert_verdicts`` per alert (the latest mark wins; each mark is also
kept in the alert's history as a ``note`` event, so nothing is overwritten silently). The
confirmed change alerts become a truth file of known change points that ``elmon tune`` and
``elmon replay --truth`` read (columns ``series, ts, kind``): alerts marked as false alarms are
left out of it, so the tuning scores an alarm near them as false.
"""

from __future__ import annotations

from typing import Any

import pandas as pd

from monitor.errors import StoreError
from monitor.store.alerts import get_alert
from monitor.store.codec import wall_ts
from monitor.store.core import Store, accepts_path

#: The verdicts a person can give.
VERDICTS = ("confirmed", "false_alarm")

#: Alert kinds that are changes, with the truth-file kind they become.
CHANGE_KINDS = {"elasticity_change": "elasticity_change", "level_shift": "level_shift"}


@accepts_path(readonly=False)
def mark_alert(store: Store, alert_id: int, verdict: str, who: str | None = None,
               note: str | None = None, now: Any = None) -> dict:
    """Record ``verdict`` (``'confirmed'`` or ``'false_alarm'``) for an alert; returns it as
    ``{'alert_id', 'verdict', 'who', 'at', 'note'}``."""
    if verdict not in VERDICTS:
        raise StoreError(f"verdict {verdict!r}: must be one of {list(VERDICTS)}")
    now = wall_ts(now)
    with store.atomic():
        alert = get_alert(store, int(alert_id))
        store.conn.execute(
            "INSERT INTO alert_verdicts (alert_id, verdict, who, at, note) "
            "VALUES (?, ?, ?, ?, ?) ON CONFLICT (alert_id) DO UPDATE SET "
            "verdict = excluded.verdict, who = excluded.who, at = excluded.at, "
            "note = excluded.note", (alert["id"], verdict, who, now, note))
        words = "confirmed change" if verdict == "confirmed" else "false alarm"
        store.conn.execute("INSERT INTO alert_events (alert_id, event, at, who, note) "
                           "VALUES (?, 'note', ?, ?, ?)",
                           (alert["id"], now, who,
                            f"marked as {words}" + (f": {note}" if note else "")))
    return {"alert_id": int(alert["id"]), "verdict": verdict, "who": who, "at": now,
            "note": note}


@accepts_path(readonly=True)
def list_verdicts(store: Store) -> pd.DataFrame:
    """Every verdict with its alert: ``alert_id, verdict, who, at, note, series, kind,
    opened_ts, change_ts``."""
    return pd.read_sql_query(
        "SELECT v.alert_id, v.verdict, v.who, v.at, v.note, a.series, a.kind, a.opened_ts, "
        "a.change_ts FROM alert_verdicts v JOIN alerts a ON a.id = v.alert_id "
        "ORDER BY v.alert_id", store.conn)


@accepts_path(readonly=True)
def truth_from_verdicts(store: Store) -> tuple[pd.DataFrame, dict]:
    """The confirmed change alerts as a truth file (``series, ts, kind``, sorted), and counts
    ``{'confirmed', 'false_alarm', 'not_a_change', 'unmarked'}``.

    ``ts`` is the alert's estimated change time where the detector gives one, else the data
    time the alert opened (then the truth is late by the detection delay: a tuning scores
    delays from it a little short).
    """
    v = list_verdicts(store)
    n_alerts = store.conn.execute(
        "SELECT COUNT(*) FROM alerts WHERE kind IN (%s)" % ",".join("?" * len(CHANGE_KINDS)),
        tuple(CHANGE_KINDS)).fetchone()[0]
    conf = v.loc[v["verdict"] == "confirmed"]
    change = conf.loc[conf["kind"].isin(list(CHANGE_KINDS))]
    truth = pd.DataFrame({
        "series": change["series"].astype(str),
        "ts": change["change_ts"].where(change["change_ts"].notna(), change["opened_ts"]),
        "kind": change["kind"].map(CHANGE_KINDS)}).sort_values(["series", "ts"], kind="stable")
    marked_changes = int(v["kind"].isin(list(CHANGE_KINDS)).sum())
    counts = {"confirmed": int(len(change)),
              "false_alarm": int((v["verdict"] == "false_alarm").sum()),
              "not_a_change": int(len(conf) - len(change)),
              "unmarked": int(n_alerts - marked_changes)}
    return truth.reset_index(drop=True), counts
