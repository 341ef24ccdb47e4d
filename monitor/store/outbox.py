"""The alert-delivery outbox: the SQL behind :func:`monitor.live.sinks.deliver_due`.

Rows are enqueued in the same transaction as the alert event they deliver
(:mod:`monitor.store.alerts`); here they are read when due and their outcome recorded, each
outcome in its own transaction, outside any network call.
"""

from __future__ import annotations

from typing import Any, Iterable

from monitor.store.codec import wall_ts
from monitor.store.core import Store, accepts_path


def due_deliveries(store: Store, now_s: str, limit: int) -> list:
    """Outbox rows with ``status = 'pending'``, ``next_attempt_at <= now_s`` and no claim
    running past ``now_s``, oldest first: ``id, alert_id, event, sink, payload, attempts``."""
    return store.rows("SELECT id, alert_id, event, sink, payload, attempts FROM outbox WHERE "
                      "status = 'pending' AND next_attempt_at <= ? AND (claimed_until IS NULL "
                      "OR claimed_until <= ?) ORDER BY id LIMIT ?", (now_s, now_s, int(limit)))


def claim_deliveries(store: Store, ids: list[int], now_s: str, until_s: str) -> list[int]:
    """Claim outbox rows for one delivery attempt until ``until_s`` (a lease, in one
    transaction): only rows still pending and unclaimed at ``now_s`` are taken, so a row that
    another round or process claimed meanwhile is not sent twice. Returns the ids claimed."""
    got = []
    with store.atomic():
        for i in ids:
            cur = store.execute("UPDATE outbox SET claimed_until = ? WHERE id = ? AND status = "
                                "'pending' AND (claimed_until IS NULL OR claimed_until <= ?)",
                                (until_s, int(i), now_s))
            if cur.rowcount == 1:
                got.append(int(i))
    return got


def release_claims(store: Store, ids: list[int]) -> None:
    """End the claim of rows that were not attempted (their sink stopped at an earlier row):
    they are due again at once, unchanged."""
    if not ids:
        return
    with store.atomic():
        store.execute(f"UPDATE outbox SET claimed_until = NULL WHERE id IN "
                      f"({', '.join('?' * len(ids))})", [int(i) for i in ids])


def record_failure(store: Store, delivery_id: int, attempts: int, status: str, next_at: str,
                   error: str) -> None:
    """A failed try: the attempt count, ``pending`` (retry at ``next_at``) or ``failed``, and
    the error text."""
    with store.atomic():
        store.execute("UPDATE outbox SET attempts = ?, status = ?, next_attempt_at = ?,"
                      " last_error = ?, claimed_until = NULL WHERE id = ?",
                      (attempts, status, next_at, error, delivery_id))


def record_delivered(store: Store, delivery_id: int, now_s: str) -> None:
    """A delivered row: one more attempt, ``delivered`` at ``now_s``, no error."""
    with store.atomic():
        store.execute("UPDATE outbox SET attempts = attempts + 1, status = 'delivered', "
                      "delivered_at = ?, last_error = NULL, claimed_until = NULL WHERE id = ?",
                      (now_s, delivery_id))


@accepts_path(readonly=False)
def requeue_failed(store: Store, now: Any = None, ids: Iterable[int] | None = None,
                   sink: str | None = None) -> int:
    """Put ``failed`` outbox rows back to ``pending``, due at ``now``, with their attempts
    reset; returns how many. ``ids`` / ``sink`` limit it to those rows / that sink. The last
    error is kept until the next try replaces it."""
    sql, params = ("UPDATE outbox SET status = 'pending', attempts = 0, next_attempt_at = ?, "
                   "claimed_until = NULL WHERE status = 'failed'"), [wall_ts(now)]
    if sink is not None:
        sql += " AND sink = ?"
        params.append(str(sink))
    if ids is not None:
        ids = [int(i) for i in ids]
        sql += f" AND id IN ({', '.join('?' * len(ids))})" if ids else " AND 0"
        params += ids
    with store.atomic():
        cur = store.execute(sql, params)
    return cur.rowcount


@accepts_path(readonly=True)
def failed_deliveries(store: Store, sink: str | None = None) -> list:
    """``failed`` outbox rows, oldest first: ``id, alert_id, event, sink, attempts,
    next_attempt_at, last_error``."""
    sql, params = ("SELECT id, alert_id, event, sink, attempts, next_attempt_at, last_error "
                   "FROM outbox WHERE status = 'failed'"), []
    if sink is not None:
        sql += " AND sink = ?"
        params.append(str(sink))
    return store.rows(sql + " ORDER BY id", params)


def alert_sinks(store: Store, alert_id: int) -> tuple[str, ...]:
    """The sinks that earlier events of an alert were queued for, in first-use order.

    An acknowledgement or resolution made where no sinks are configured (``elmon alerts ack``,
    the dashboard) goes to the sinks that were told of the alert's opening.
    """
    rows = store.conn.execute("SELECT sink FROM outbox WHERE alert_id = ? GROUP BY sink "
                              "ORDER BY MIN(id)", (int(alert_id),)).fetchall()
    return tuple(r[0] for r in rows)
