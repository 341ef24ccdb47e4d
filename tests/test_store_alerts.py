"""Alert lifecycle in a real store file: dedupe, transitions, silences, reminders, cooldown,
and the outbox rows each event enqueues."""

from __future__ import annotations

import sqlite3

import pandas as pd
import pytest

from monitor import store as ms
from monitor.errors import StoreError, ValidationError
from monitor.types import Alert

NOW = pd.Timestamp("2024-06-01T09:00:00Z")          # wall clock used by every call here
TS = "2024-05-31T23:00:00Z"                          # data time


def at(minutes: float) -> str:
    return ms.wall_ts(NOW + pd.Timedelta(minutes=minutes))


@pytest.fixture
def store(store):
    """The shared store fixture (tests/conftest.py) with two sinks configured."""
    store.sinks = ("log", "ops")
    return store


def open_one(store, series="p1", kind="out_of_bounds", minutes=0, **kw):
    return ms.open_alert(store, series, kind, TS, -0.1, -0.3, 0.1, f"{kind} on {series}",
                         now=at(minutes), **kw)


def outbox(store):
    return store.rows("SELECT alert_id, event, sink FROM outbox ORDER BY id")


def test_open_is_deduplicated_per_series_and_kind(store):
    first = open_one(store, details={"threshold": -0.2, "stat": float("nan")})
    assert open_one(store, minutes=5) == first                  # same pair: nothing added
    other = open_one(store, kind="sign_flip")
    assert other != first and open_one(store, series="p2") not in (first, other)
    assert store.scalar("SELECT count(*) FROM alerts") == 3
    assert ms.alert_events(store, first)["event"].tolist() == ["opened"]
    assert outbox(store)[:2] == [{"alert_id": first, "event": "opened", "sink": "log"},
                                 {"alert_id": first, "event": "opened", "sink": "ops"}]
    assert len(outbox(store)) == 6
    alert = ms.get_alert(store, first)
    assert alert["details"] == {"stat": None, "threshold": -0.2}   # NaN never stored
    assert alert["opened_ts"] == TS and alert["opened_at"] == at(0)
    # the partial unique index refuses a second active alert even from raw SQL
    with pytest.raises(sqlite3.IntegrityError):
        store.execute("INSERT INTO alerts (series, kind, severity, state, opened_at, updated_at,"
                      " message) VALUES ('p1', 'out_of_bounds', 'info', 'open', 'x', 'x', 'm')")


def test_lifecycle_open_ack_resolve_and_reopen(store):
    aid = open_one(store)
    a = ms.acknowledge_alert(store, aid, note="checking promo calendar", who="ana", now=at(1))
    assert a["state"] == "acknowledged"
    assert open_one(store, minutes=2) == aid                    # acknowledged still dedupes
    a = ms.resolve_alert(store, aid, note="promo ended", who="ana", now=at(3))
    assert a["state"] == "resolved" and a["resolved_at"] == at(3) and a["resolved_ts"] is None
    ev = ms.alert_events(store, aid)
    assert ev["event"].tolist() == ["opened", "acknowledged", "resolved"]
    assert ev["who"].tolist() == ["elmon", "ana", "ana"]
    assert ev["note"].tolist()[1:] == ["checking promo calendar", "promo ended"]
    assert ev["ts"].isna().tolist() == [False, True, True]    # human actions carry no data time
    assert [r["event"] for r in outbox(store)] == ["opened"] * 2 + ["acknowledged"] * 2 + \
        ["resolved"] * 2
    again = open_one(store, minutes=4)
    assert again != aid and ms.get_alert(store, again)["state"] == "open"


def test_invalid_transitions_raise_clear_errors(store):
    aid = open_one(store)
    ms.acknowledge_alert(store, aid, now=at(1))
    with pytest.raises(StoreError, match=f"alert {aid} is acknowledged; only an open alert"):
        ms.acknowledge_alert(store, aid)
    ms.resolve_alert(store, aid, now=at(2))
    with pytest.raises(StoreError, match=f"alert {aid} is already resolved"):
        ms.resolve_alert(store, aid)
    with pytest.raises(StoreError, match=f"alert {aid} is resolved; only an open"):
        ms.acknowledge_alert(store, aid)
    with pytest.raises(StoreError, match="no alert with id 404"):
        ms.acknowledge_alert(store, 404)
    with pytest.raises(StoreError, match="no alert with id 404"):
        ms.resolve_alert(store, 404)
    with pytest.raises(StoreError, match="reminders are for open alerts"):
        ms.record_reminder(store, aid)
    with pytest.raises(ValidationError, match="severity 'urgent'"):
        open_one(store, severity="urgent")
    with pytest.raises(ValidationError, match="kind 'Out Of Bounds'"):
        open_one(store, kind="Out Of Bounds")
    assert len(ms.alert_events(store, aid)) == 3                # failures added nothing


def test_auto_resolve_when_the_rule_clears(store):
    aid = open_one(store)
    ms.acknowledge_alert(store, aid, now=at(1))
    assert ms.auto_resolve(store, "p1", "out_of_bounds", "2024-06-01T05:00:00Z",
                           now=at(2)) == aid
    a = ms.get_alert(store, aid)
    assert a["state"] == "resolved" and a["resolved_ts"] == "2024-06-01T05:00:00Z"
    last = ms.alert_events(store, aid).iloc[-1]
    assert (last["who"], last["note"]) == ("elmon", "rule cleared")
    assert ms.auto_resolve(store, "p1", "out_of_bounds", "2024-06-01T06:00:00Z") is None
    assert ms.last_resolved(store, "p1", "out_of_bounds")["id"] == aid


def test_cooldown_after_resolution(store):
    aid = open_one(store)
    ms.auto_resolve(store, "p1", "out_of_bounds", "2024-06-01T00:00:00Z", now=at(1))
    soon = ms.open_alert(store, "p1", "out_of_bounds", "2024-06-01T00:30:00Z", -0.1, -0.3, 0.1,
                         "again", cooldown="1h", now=at(2))
    assert soon is None and store.scalar("SELECT count(*) FROM alerts") == 1
    later = ms.open_alert(store, "p1", "out_of_bounds", "2024-06-01T01:00:00Z", -0.1, -0.3,
                          0.1, "again", cooldown=3600, now=at(3))
    assert later not in (None, aid)
    # a manual resolution has no data time: the cooldown then runs on wall time
    ms.resolve_alert(store, later, now=at(10))
    assert open_one(store, minutes=20, cooldown="30min") is None
    assert open_one(store, minutes=41, cooldown="30min") is not None


def test_silences_stop_deliveries_and_reminders_until_they_end(store):
    sid = ms.silence(store, "p1", "*", "2h", note="planned price test", who="ana", now=at(0))
    aid = open_one(store, minutes=1)
    bid = open_one(store, series="p2", minutes=1)
    assert [r["alert_id"] for r in outbox(store)] == [bid, bid]      # p1 recorded, not sent
    ev = ms.alert_events(store, aid)
    assert ev["event"].tolist() == ["opened", "silenced"]
    assert f"silence {sid} until" in ev["note"].iloc[1]
    assert [a["id"] for a in ms.due_reminders(store, at(90), "1h")] == [bid]
    assert [a["id"] for a in ms.due_reminders(store, at(125), "1h")] == [aid, bid]
    assert ms.active_silence(store, "p1", "stale", now=at(30))["id"] == sid
    assert ms.active_silence(store, "p1", "stale", now=at(121)) is None
    # silencing covers alerts already open too, and is listed while it runs
    ms.silence(store, "*", "out_of_bounds", "2024-06-01T12:00:00Z", now=at(2))
    assert ms.alert_events(store, bid)["event"].tolist() == ["opened", "silenced"]
    assert len(ms.list_silences(store, now=at(3))) == 2
    assert len(ms.list_silences(store, now=at(200))) == 0
    with pytest.raises(ValidationError, match="not in the future"):
        ms.silence(store, "p1", "*", "2024-01-01T00:00:00Z", now=at(0))
    with pytest.raises(ValidationError, match="not understood"):
        ms.silence(store, "p1", "*", "3 fortnights", now=at(0))


def test_reminders_repeat_for_open_alerts_only(store):
    aid = open_one(store)
    bid = open_one(store, kind="stale")
    ms.acknowledge_alert(store, bid, now=at(1))            # someone is on it: no reminders
    assert ms.due_reminders(store, at(59), "1h") == []
    assert [a["id"] for a in ms.due_reminders(store, at(60), "1h")] == [aid]
    assert ms.send_reminders(store, "1h", now=at(61)) == [aid]
    assert ms.get_alert(store, aid)["last_reminded_at"] == at(61)
    assert ms.due_reminders(store, at(100), "1h") == []    # counted from the last reminder
    assert ms.send_reminders(store, pd.Timedelta(hours=1), now=at(121)) == [aid]
    assert ms.alert_events(store, aid)["event"].tolist() == ["opened", "reminded", "reminded"]
    assert [r["event"] for r in outbox(store) if r["alert_id"] == aid] == \
        ["opened", "opened", "reminded", "reminded", "reminded", "reminded"]


def test_notes_in_any_state(store):
    aid = open_one(store)
    ms.resolve_alert(store, aid, now=at(1))
    ms.add_note(store, aid, "supplier changed the pack size", who="li", now=at(2))
    last = ms.alert_events(store, aid).iloc[-1]
    assert (last["event"], last["who"]) == ("note", "li")
    with pytest.raises(ValidationError, match="needs some text"):
        ms.add_note(store, aid, "  ")
    assert [r["event"] for r in outbox(store)].count("note") == 0


def test_alert_changes_inside_a_batch(store):
    decision = Alert(series="p9", ts="2024-06-01T01:00:00Z", rule="elasticity_change",
                     beta=-0.4, beta_lo=-0.6, beta_hi=-0.2, message="elasticity moved")
    out = ms.write_batch(store, alert_changes=[decision], now=at(0))
    (aid,) = out["alerts_opened"]
    out = ms.write_batch(store, alert_changes=[decision,
                                               {"action": "resolve", "series": "p9",
                                                "kind": "elasticity_change",
                                                "ts": "2024-06-01T04:00:00Z"},
                                               {"action": "resolve", "series": "p9",
                                                "kind": "stale", "ts": "2024-06-01T04:00:00Z"}],
                         now=at(1))
    assert out["alerts_unchanged"] == [aid] and out["alerts_resolved"] == [aid]
    assert ms.get_alert(store, aid)["resolved_ts"] == "2024-06-01T04:00:00Z"
    with pytest.raises(ValidationError, match="action 'escalate'"):
        ms.write_batch(store, alert_changes=[{"action": "escalate"}])
