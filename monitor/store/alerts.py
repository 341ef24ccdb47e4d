"""Alert lifecycle in the store: open -> acknowledged -> resolved, silences, reminders, cooldown.

Everything public here is re-exported by :mod:`monitor.store`, which documents the whole store.

Rules
-----
- At most one alert per ``(series, kind)`` is not resolved (a partial unique index enforces
  it): :func:`open_alert` on a pair that has an open or acknowledged alert adds nothing and
  returns that alert's id.
- Transitions: ``open -> acknowledged -> resolved`` and ``open -> resolved``; anything else
  (acknowledging twice, resolving a resolved alert, an unknown id) raises :class:`StoreError`.
- Every change writes an ``alert_events`` row (opened, acknowledged, resolved, reminded, note,
  silenced) with wall time ``at``, data time ``ts`` (NULL for human actions), ``who``, ``note``.
- Events listed in ``store.notify_events`` enqueue one ``outbox`` row per name in
  ``store.sinks``, in the same transaction, unless a silence covers the alert at that moment.
- A silence (series or ``'*'``, kind or ``'*'``, until a wall time) does not stop alerts from
  being recorded; it stops their deliveries and reminders until it ends. Alerts opened under a
  silence get a ``silenced`` event.
"""

from __future__ import annotations

import dataclasses
import math
import re
from typing import Any

import pandas as pd

from monitor.errors import StoreError, ValidationError
from monitor.store.codec import format_ts, from_json, parse_ts, to_json, wall_ts
from monitor.store.core import Store, accepts_path
from monitor.store.outbox import alert_sinks


#: Alert kinds the rules raise (other lower-case names are accepted for new rules).
ALERT_KINDS = ("out_of_bounds", "elasticity_change", "level_shift", "sign_flip",
               "low_variation", "stale", "group_change", "price_feedback")
SEVERITIES = ("info", "warning", "critical")
ALERT_STATES = ("open", "acknowledged", "resolved")
#: The name written in ``who`` for actions the service takes by itself.
SYSTEM_WHO = "elmon"


def _seconds(value: Any) -> float:
    """Seconds from a number, a timedelta or a pandas duration string such as ``'2h'``."""
    if isinstance(value, str):
        value = pd.Timedelta(value)
    if hasattr(value, "total_seconds"):
        return float(value.total_seconds())
    return float(value)


def _num(value: Any) -> float | None:
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


@accepts_path(readonly=True)
def get_alert(store: Store, alert_id: int) -> dict:
    """One alert as a dict (``details`` parsed); :class:`StoreError` for an unknown id."""
    rows = store.rows("SELECT * FROM alerts WHERE id = ?", (int(alert_id),))
    if not rows:
        raise StoreError(f"no alert with id {alert_id}")
    row = rows[0]
    row["details"] = from_json(row["details"])
    return row


@accepts_path(readonly=True)
def active_silence(store: Store, series: str, kind: str, now: Any = None) -> dict | None:
    """The silence covering ``(series, kind)`` at wall time ``now`` that lasts longest, if any."""
    rows = store.rows("SELECT * FROM silences WHERE until > ? AND series IN (?, '*') AND "
                      "kind IN (?, '*') ORDER BY until DESC LIMIT 1",
                      (wall_ts(now), series, kind))
    return rows[0] if rows else None


def _event(store: Store, alert_id: int, event: str, now: str, ts: str | None = None,
           who: str | None = None, note: str | None = None) -> None:
    store.conn.execute("INSERT INTO alert_events (alert_id, event, at, ts, who, note) "
                       "VALUES (?, ?, ?, ?, ?, ?)", (alert_id, event, now, ts, who, note))


def _notify(store: Store, alert: dict, event: str, now: str, ts: str | None = None,
            who: str | None = None, note: str | None = None) -> int:
    """Enqueue one outbox row per configured sink; returns how many (0 when silenced).

    Where no sinks are configured (the CLI, the dashboard), the sinks told of the alert
    before (:func:`monitor.store.outbox.alert_sinks`) are told again."""
    sinks = store.sinks or alert_sinks(store, alert["id"])
    if event not in store.notify_events or not sinks:
        return 0
    if active_silence(store, alert["series"], alert["kind"], now):
        return 0
    payload = {"alert_id": alert["id"], "event": event, "series": alert["series"],
               "kind": alert["kind"], "severity": alert["severity"], "state": alert["state"],
               "ts": ts or alert["opened_ts"], "opened_ts": alert["opened_ts"],
               "beta": alert["beta"], "beta_lo": alert["beta_lo"], "beta_hi": alert["beta_hi"],
               "message": alert["message"], "details": from_json(alert["details"])
               if isinstance(alert["details"], str) else alert["details"],
               "who": who, "note": note}
    body = to_json(payload, finite=True)
    hold = store.notify_hold(alert, event) if store.notify_hold is not None else 0.0
    due = wall_ts(parse_ts(now) + pd.Timedelta(seconds=float(hold))) if hold else now
    store.conn.executemany(
        "INSERT INTO outbox (alert_id, event, sink, payload, next_attempt_at, created_at) "
        "VALUES (?, ?, ?, ?, ?, ?)", [(alert["id"], event, s, body, due, now) for s in sinks])
    return len(sinks)


@accepts_path(readonly=True)
def last_resolved(store: Store, series: str, kind: str) -> dict | None:
    """The most recently resolved alert of ``(series, kind)``: id, resolved_ts, resolved_at."""
    rows = store.rows("SELECT id, resolved_ts, resolved_at FROM alerts WHERE series = ? AND "
                      "kind = ? AND state = 'resolved' ORDER BY id DESC LIMIT 1", (series, kind))
    return rows[0] if rows else None


def _in_cooldown(store: Store, series: str, kind: str, ts: str, now: str, cooldown: Any) -> bool:
    last = last_resolved(store, series, kind)
    if cooldown is None or last is None:
        return False
    window = _seconds(cooldown)
    if last["resolved_ts"] is not None:   # data time against data time
        return (parse_ts(ts) - parse_ts(last["resolved_ts"])).total_seconds() < window
    return (parse_ts(now) - parse_ts(last["resolved_at"])).total_seconds() < window


def _open(store: Store, series: str, kind: str, ts: Any, beta: Any, beta_lo: Any, beta_hi: Any,
          message: str, severity: str = "warning", details: Any = None, *, cooldown: Any = None,
          now: Any = None) -> tuple[str, int | None]:
    if not series or not isinstance(series, str):
        raise ValidationError(f"alert series {series!r} must be a non-empty string",
                              field="series", value=series)
    if not kind or not isinstance(kind, str) or not kind.replace("_", "").isalnum() \
            or kind != kind.lower():
        raise ValidationError(f"alert kind {kind!r} must be a lower-case name such as "
                              f"{', '.join(ALERT_KINDS)}", field="kind", value=kind)
    if severity not in SEVERITIES:
        raise ValidationError(f"alert severity {severity!r} must be one of "
                              f"{', '.join(SEVERITIES)}", field="severity", value=severity)
    if not message:
        raise ValidationError("alert message is empty", field="message")
    ts, now = format_ts(ts), wall_ts(now)
    with store.atomic():
        existing = store.scalar("SELECT id FROM alerts WHERE series = ? AND kind = ? AND "
                                "state != 'resolved'", (series, kind))
        if existing is not None:
            return "unchanged", int(existing)
        if _in_cooldown(store, series, kind, ts, now, cooldown):
            return "unchanged", None
        d = details if isinstance(details, dict) else {}
        size = d.get("beta_change", d.get("level_shift_log"))
        cur = store.conn.execute(
            "INSERT INTO alerts (series, kind, severity, state, opened_ts, opened_at, updated_at,"
            " beta, beta_lo, beta_hi, message, details, change_ts, beta_before, beta_before_lo,"
            " beta_before_hi, beta_after, beta_after_lo, beta_after_hi, size) VALUES (?, ?, ?,"
            " 'open', ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (series, kind, severity, ts, now, now, _num(beta), _num(beta_lo), _num(beta_hi),
             str(message), to_json(details, finite=True), d.get("change_ts"),
             *[_num(d.get(c)) for c in ("beta_before", "beta_before_lo", "beta_before_hi",
                                        "beta_after", "beta_after_lo", "beta_after_hi")],
             _num(size)))
        alert_id = int(cur.lastrowid)
        _event(store, alert_id, "opened", now, ts=ts, who=SYSTEM_WHO)
        quiet = active_silence(store, series, kind, now)
        if quiet:
            _event(store, alert_id, "silenced", now, who=quiet["who"],
                   note=f"silence {quiet['id']} until {quiet['until']}: {quiet['note'] or ''}")
        _notify(store, get_alert(store, alert_id), "opened", now, ts=ts)
    return "opened", alert_id


@accepts_path(readonly=False)
def open_alert(store: Store, series: str, kind: str, ts: Any, beta: Any, beta_lo: Any,
               beta_hi: Any, message: str, severity: str = "warning", details: Any = None, *,
               cooldown: Any = None, now: Any = None) -> int | None:
    """Open an alert, or return the id of the one already open for ``(series, kind)``.

    Parameters
    ----------
    ts : timestamp
        Data time at which the rule fired (``opened_ts``).
    beta, beta_lo, beta_hi : float or None
        The elasticity and its confidence band at ``ts`` (NaN stored as NULL).
    details : JSON-able, optional
        Rule specifics (statistic, threshold, persistence ...).
    cooldown : seconds, timedelta or duration text, optional
        Do not reopen within this long after the last resolution of ``(series, kind)``
        (data time when that resolution has a ``resolved_ts``, else wall time).
    now : optional
        Wall time (default: the clock).

    Returns
    -------
    int or None
        The new or existing alert id; ``None`` when the cooldown suppressed it.
    """
    return _open(store, series, kind, ts, beta, beta_lo, beta_hi, message, severity, details,
                 cooldown=cooldown, now=now)[1]


@accepts_path(readonly=False)
def acknowledge_alert(store: Store, alert_id: int, note: str | None = None,
                      who: str | None = None, now: Any = None) -> dict:
    """Move an open alert to ``acknowledged``; returns the updated alert."""
    now = wall_ts(now)
    with store.atomic():
        alert = get_alert(store, alert_id)
        if alert["state"] != "open":
            raise StoreError(f"alert {alert_id} is {alert['state']}; only an open alert can be "
                             f"acknowledged")
        store.conn.execute("UPDATE alerts SET state = 'acknowledged', updated_at = ? WHERE id = ?",
                           (now, alert["id"]))
        _event(store, alert["id"], "acknowledged", now, who=who, note=note)
        alert = get_alert(store, alert_id)
        _notify(store, alert, "acknowledged", now, who=who, note=note)
    return alert


@accepts_path(readonly=False)
def resolve_alert(store: Store, alert_id: int, note: str | None = None, who: str | None = None,
                  ts: Any = None, auto: bool = False, now: Any = None) -> dict:
    """Resolve an open or acknowledged alert; returns the updated alert.

    ``auto=True`` marks a resolution by the service (``who`` defaults to ``'elmon'``, the note
    to "rule cleared"); ``ts`` is the data time at which the condition cleared, if known.
    """
    now = wall_ts(now)
    ts = None if ts is None else format_ts(ts)
    if auto:
        who = who or SYSTEM_WHO
        note = note or "rule cleared"
    with store.atomic():
        alert = get_alert(store, alert_id)
        if alert["state"] == "resolved":
            raise StoreError(f"alert {alert_id} is already resolved (at {alert['resolved_at']})")
        store.conn.execute("UPDATE alerts SET state = 'resolved', updated_at = ?, resolved_ts = ?,"
                           " resolved_at = ? WHERE id = ?", (now, ts, now, alert["id"]))
        _event(store, alert["id"], "resolved", now, ts=ts, who=who, note=note)
        alert = get_alert(store, alert_id)
        _notify(store, alert, "resolved", now, ts=ts, who=who, note=note)
    return alert


@accepts_path(readonly=False)
def auto_resolve(store: Store, series: str, kind: str, ts: Any, note: str | None = None,
                 now: Any = None) -> int | None:
    """Resolve the active alert of ``(series, kind)`` because its rule cleared at ``ts``.

    Returns the resolved alert's id, or ``None`` when none was open or acknowledged.
    """
    with store.atomic():
        alert_id = store.scalar("SELECT id FROM alerts WHERE series = ? AND kind = ? AND "
                                "state != 'resolved'", (series, kind))
        if alert_id is None:
            return None
        resolve_alert(store, alert_id, note=note, ts=ts, auto=True, now=now)
    return int(alert_id)


@accepts_path(readonly=False)
def add_note(store: Store, alert_id: int, note: str, who: str | None = None,
             now: Any = None) -> None:
    """Attach a note to an alert in any state (an ``alert_events`` row, no delivery)."""
    if not note or not str(note).strip():
        raise ValidationError("a note needs some text", field="note")
    with store.atomic():
        alert = get_alert(store, alert_id)
        _event(store, alert["id"], "note", wall_ts(now), who=who, note=str(note))


_DURATION = re.compile(r"^\s*\d+(\.\d+)?\s*[a-zA-Z]+\s*$")


def _until(until: Any, now: str) -> str:
    """A wall time from a timestamp or from a duration after ``now``."""
    is_duration = isinstance(until, (int, float)) or hasattr(until, "total_seconds") or (
        isinstance(until, str) and _DURATION.match(until) is not None)
    if is_duration:
        try:
            return wall_ts(parse_ts(now) + pd.Timedelta(seconds=_seconds(until)))
        except ValueError as exc:
            raise ValidationError(f"silence duration {until!r} is not understood ({exc})",
                                  field="until", value=until) from None
    return wall_ts(until)


@accepts_path(readonly=False)
def silence(store: Store, series: str, kind: str, until: Any, note: str | None = None,
            who: str | None = None, now: Any = None) -> int:
    """Silence deliveries and reminders for ``(series, kind)`` (``'*'`` = all) until a wall time.

    ``until`` is a timestamp, or a duration from ``now`` (seconds, timedelta or text such as
    ``'4h'``). Active alerts covered by the silence get a ``silenced`` event. Returns its id.
    """
    now = wall_ts(now)
    until = _until(until, now)
    if until <= now:
        raise ValidationError(f"silence until {until} is not in the future (now {now})",
                              field="until", value=until)
    if not series or not kind:
        raise ValidationError("a silence needs a series and a kind ('*' for all)",
                              field="series")
    with store.atomic():
        cur = store.conn.execute("INSERT INTO silences (series, kind, until, note, who, "
                                 "created_at) VALUES (?, ?, ?, ?, ?, ?)",
                                 (series, kind, until, note, who, now))
        silence_id = int(cur.lastrowid)
        covered = store.rows("SELECT id FROM alerts WHERE state != 'resolved' AND "
                             "(? = '*' OR series = ?) AND (? = '*' OR kind = ?)",
                             (series, series, kind, kind))
        for row in covered:
            _event(store, row["id"], "silenced", now, who=who,
                   note=f"silence {silence_id} until {until}: {note or ''}")
    return silence_id


@accepts_path(readonly=True)
def due_reminders(store: Store, now: Any, every: Any) -> list[dict]:
    """Open (not acknowledged) alerts last opened or reminded at least ``every`` ago.

    Alerts covered by an active silence at ``now`` are left out. ``every`` is seconds, a
    timedelta or duration text.
    """
    now = wall_ts(now)
    cutoff = wall_ts(parse_ts(now) - pd.Timedelta(seconds=_seconds(every)))
    rows = store.rows(
        "SELECT * FROM alerts a WHERE a.state = 'open' AND "
        "coalesce(a.last_reminded_at, a.opened_at) <= ? AND NOT EXISTS (SELECT 1 FROM silences s"
        " WHERE s.until > ? AND s.series IN (a.series, '*') AND s.kind IN (a.kind, '*')) "
        "ORDER BY a.id", (cutoff, now))
    for row in rows:
        row["details"] = from_json(row["details"])
    return rows


@accepts_path(readonly=False)
def record_reminder(store: Store, alert_id: int, now: Any = None) -> None:
    """Record that a reminder went out for an open alert (event + outbox rows)."""
    now = wall_ts(now)
    with store.atomic():
        alert = get_alert(store, alert_id)
        if alert["state"] != "open":
            raise StoreError(f"alert {alert_id} is {alert['state']}; reminders are for open "
                             f"alerts")
        store.conn.execute("UPDATE alerts SET last_reminded_at = ?, updated_at = ? WHERE id = ?",
                           (now, now, alert["id"]))
        _event(store, alert["id"], "reminded", now, who=SYSTEM_WHO)
        _notify(store, get_alert(store, alert_id), "reminded", now)


@accepts_path(readonly=False)
def send_reminders(store: Store, every: Any, now: Any = None) -> list[int]:
    """:func:`due_reminders` then :func:`record_reminder` for each, in one transaction."""
    now = wall_ts(now)
    with store.atomic():
        due = due_reminders(store, now, every)
        for alert in due:
            record_reminder(store, alert["id"], now=now)
    return [a["id"] for a in due]


def apply_alert_change(store: Store, change: Any, now: Any = None) -> tuple[str, int | None]:
    """Apply one alert decision; returns ``(outcome, alert_id)``.

    ``change`` is a :class:`monitor.types.Alert` (opened with ``kind = rule``) or a dict with
    ``action``: ``'open'`` (default; keys of :func:`open_alert`, ``rule`` accepted for
    ``kind``), ``'resolve'`` (``series, kind, ts``, optional ``note``: auto-resolution) or
    ``'remind'`` (``alert_id``). ``outcome`` is ``'opened'``, ``'resolved'``, ``'reminded'``
    or ``'unchanged'`` (deduplicated, cooled down, or nothing to resolve).
    """
    if dataclasses.is_dataclass(change):
        change = dataclasses.asdict(change)
    change = dict(change)
    action = change.pop("action", "open")
    if "rule" in change and "kind" not in change:
        change["kind"] = change.pop("rule")
    change.pop("rule", None)
    if action == "open":
        try:
            return _open(store, now=now, **change)
        except TypeError as exc:
            raise ValidationError(f"alert change {change!r}: {exc}") from None
    if action == "resolve":
        alert_id = auto_resolve(store, change["series"], change["kind"], change.get("ts"),
                                note=change.get("note"), now=now)
        return ("unchanged", None) if alert_id is None else ("resolved", alert_id)
    if action == "remind":
        record_reminder(store, change["alert_id"], now=now)
        return "reminded", int(change["alert_id"])
    raise ValidationError(f"alert change action {action!r} must be open, resolve or remind",
                          field="action", value=action)
