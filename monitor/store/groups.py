"""Groups in the store: series attributes, pooled latest estimates, grouped alerts.

Tables (migration "series groups" in :mod:`monitor.store.schema`):

- ``series_attributes (series, name, value, source, updated_at)``: one row per series and
  attribute; ``source`` is ``key`` (a part of a composite id) or ``file`` (an attributes file);
- ``alert_members (alert_id, group_alert_id)``: a member alert folded under a ``group_change``
  alert;
- ``latest_estimates`` gains ``beta_pooled``, ``beta_pooled_se`` and ``"group"``, filled by
  :func:`update_pooled` after each batch (NULL where the series has no group, no standard error
  yet, or its group has fewer than three series with one).

The computations are in :mod:`monitor.groups`; this module only reads and writes.
"""

from __future__ import annotations

import datetime as _dt
import json
from typing import Any, Callable, Iterable, Sequence

import numpy as np
import pandas as pd

from monitor.groups.attributes import attributes_long, attributes_wide, group_labels
from monitor.groups.grouped import (GROUP_KIND, GroupAlertSettings, group_details,
                                    group_message, group_series_id, plan_group_alerts)
from monitor.groups.pooling import pool_snapshot
from monitor.store.alerts import add_note, get_alert, open_alert, resolve_alert
from monitor.store.codec import parse_ts, to_json, wall_ts
from monitor.store.core import Store, accepts_path


@accepts_path(readonly=False)
def write_attributes(store: Store, attrs: pd.DataFrame, source: str = "key",
                     now: Any = None) -> int:
    """Insert or update attributes (wide frame: ``series`` + one column per attribute).

    Missing values are not written (an existing value stays). Returns the rows written.
    """
    if source not in ("key", "file"):
        raise ValueError(f"source {source!r}: must be 'key' or 'file'")
    triples = attributes_long(attrs)
    if not triples:
        return 0
    now = wall_ts(now)
    with store.atomic():
        store.conn.executemany(
            "INSERT INTO series_attributes (series, name, value, source, updated_at) "
            "VALUES (?, ?, ?, ?, ?) ON CONFLICT (series, name) DO UPDATE SET "
            "value = excluded.value, source = excluded.source, updated_at = excluded.updated_at "
            "WHERE value != excluded.value OR source != excluded.source",
            [(s, n, v, source, now) for s, n, v in triples])
    return len(triples)


@accepts_path(readonly=True)
def series_attributes(store: Store) -> pd.DataFrame:
    """All attributes, one row per series (``series`` + one column per attribute name)."""
    rows = store.conn.execute("SELECT series, name, value FROM series_attributes "
                              "ORDER BY series, name").fetchall()
    return attributes_wide(rows)


@accepts_path(readonly=True)
def attribute_names(store: Store) -> list[str]:
    """Names of the stored attributes (for ``--group-by`` choices)."""
    return [r[0] for r in store.conn.execute(
        "SELECT DISTINCT name FROM series_attributes ORDER BY name")]


def _current(store: Store, group_by: Sequence[str]) -> pd.DataFrame:
    cur = store.frame("SELECT s.series, l.beta, l.beta_se, l.beta_lo, l.beta_hi, "
                      "coalesce(l.status, 'warming_up') "
                      "AS status FROM series s LEFT JOIN latest_estimates l "
                      "ON l.series = s.series ORDER BY s.series")
    attrs = series_attributes(store)
    labels = (group_labels(attrs, group_by) if len(attrs) and all(c in attrs.columns
                                                                   for c in group_by)
              else None)
    if labels is None:
        missing = [c for c in group_by if c not in attrs.columns]
        raise ValueError(f"group column(s) {missing}: no such attribute in the store (known: "
                         f"{[c for c in attrs.columns if c != 'series']})")
    cur["group"] = cur["series"].map(labels.to_dict()).astype(object)
    cur["group"] = cur["group"].where(cur["group"].notna(), None)
    return cur


@accepts_path(readonly=True)
def pool_latest(store: Store, group_by: Sequence[str], level: float = 0.95,
                fdr: float = 0.05) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Pool every series' newest estimate in the groups of ``group_by`` (any stored attributes).

    Returns :func:`monitor.groups.pooling.pool_snapshot`'s two frames; the per-series one also
    has the stored band ``beta_lo, beta_hi`` and ``status``.
    """
    cur = _current(store, list(group_by))
    per_series, per_group = pool_snapshot(cur, level=level, fdr=fdr)
    for col in ("beta_lo", "beta_hi", "status"):
        per_series[col] = cur[col].to_numpy()
    return per_series, per_group


@accepts_path(readonly=False)
def update_pooled(store: Store, group_by: Sequence[str], fdr: float = 0.05) -> int:
    """Write ``beta_pooled``, ``beta_pooled_se`` and ``group`` into ``latest_estimates``.

    Every series is recomputed (one member's new estimate moves its whole group); returns the
    number of rows updated.
    """
    per_series, _ = pool_latest(store, group_by, fdr=fdr)

    def num(v: float) -> float | None:
        return float(v) if np.isfinite(v) else None
    rows = [(num(b), num(se), g, s) for s, b, se, g in zip(
        per_series["series"], per_series["beta_pooled"], per_series["beta_pooled_se"],
        per_series["group"])]
    with store.atomic():
        store.conn.executemany('UPDATE latest_estimates SET beta_pooled = ?, beta_pooled_se = ?, '
                               '"group" = ? WHERE series = ?', rows)
    return len(rows)


def _hold_until(now: str, seconds: float) -> str:
    return wall_ts(parse_ts(now) + _dt.timedelta(seconds=float(seconds)))


def member_hold(resolve: Callable[[str], str | None],
                settings: GroupAlertSettings) -> Callable[[dict, str], float]:
    """The store's ``notify_hold`` hook: seconds an outbox row of ``alert`` waits.

    ``opened`` notifications of member kinds on grouped series wait ``settings.hold_s`` so a
    group alert forming meanwhile can take their place; everything else goes at once.
    """
    def hold(alert: dict, event: str) -> float:
        if event == "opened" and alert.get("kind") in settings.member_kinds \
                and resolve(str(alert.get("series"))) is not None:
            return float(settings.hold_s)
        return 0.0
    return hold


@accepts_path(readonly=False)
def fold_group_alerts(store: Store, group_by: Sequence[str], resolve: Callable[[str], str | None],
                      settings: GroupAlertSettings, now: Any = None) -> dict:
    """Open, extend and resolve ``group_change`` alerts from the members' active alerts.

    One transaction: new group alerts are opened through :func:`~monitor.store.open_alert` (so
    they are delivered like any alert, one outbox row per sink); each folded member gets an
    ``alert_members`` row and a note, and its notifications not yet attempted are removed from
    the outbox (the group alert's message lists it). A group alert whose members have all
    resolved is resolved.

    Returns
    -------
    dict
        ``opened`` and ``extended`` (group alert ids), ``folded`` (member alert ids),
        ``resolved`` (group alert ids).
    """
    now = wall_ts(now)
    group_by = list(group_by)
    out = {"opened": [], "extended": [], "folded": [], "resolved": []}
    with store.atomic():
        kinds = list(settings.member_kinds)
        marks = ",".join("?" * len(kinds))
        cand = store.frame(
            f"SELECT a.id AS key, a.series, a.kind, a.opened_ts AS ts, a.beta, a.details "
            f"FROM alerts a LEFT JOIN alert_members m ON m.alert_id = a.id "
            f"WHERE a.state != 'resolved' AND a.kind IN ({marks}) AND m.alert_id IS NULL "
            f"ORDER BY a.id", kinds)
        names = [r[0] for r in store.conn.execute("SELECT series FROM series")]
        group_of = {s: resolve(s) for s in set(names) | set(cand["series"])}
        sizes = pd.Series([g for g in group_of.values() if g is not None],
                          dtype=object).value_counts().to_dict()
        prefix = group_series_id("", group_by)
        open_rows = store.rows("SELECT id, series FROM alerts WHERE kind = ? AND "
                               "state != 'resolved' AND series LIKE ? ESCAPE '!'",
                               (GROUP_KIND, _like_prefix(prefix)))
        open_groups = {r["series"][len(prefix):]: r["id"] for r in open_rows}
        if len(cand):
            cand["beta_before"] = [_before(d) for d in cand["details"]]
            plans = plan_group_alerts(cand, group_of, sizes, settings, open_groups=open_groups)
        else:
            plans = []
        for plan in plans:
            n = int(sizes.get(plan.group, 0))
            if plan.key is None:
                gid = open_alert(store, group_series_id(plan.group, group_by), GROUP_KIND,
                                 plan.ts, plan.beta, None, None,
                                 group_message(plan, n, group_by), "warning",
                                 group_details(plan, n, group_by), now=now)
                out["opened"].append(gid)
            else:
                gid = int(plan.key)
                alert = get_alert(store, gid)
                det = alert["details"] or {}
                det["members"] = list(det.get("members", [])) + plan.members
                det["member_alerts"] = list(det.get("member_alerts", [])) + [
                    int(k) for k in plan.member_keys]
                store.conn.execute("UPDATE alerts SET details = ?, updated_at = ? WHERE id = ?",
                                   (to_json(det, finite=True), now, gid))
                # a notification not sent yet goes out with every member known by then
                for oid, body in store.conn.execute(
                        "SELECT id, payload FROM outbox WHERE alert_id = ? AND status = "
                        "'pending' AND attempts = 0", (gid,)).fetchall():
                    msg = json.loads(body)
                    msg["details"] = det
                    store.conn.execute("UPDATE outbox SET payload = ? WHERE id = ?",
                                       (to_json(msg, finite=True), oid))
                out["extended"].append(gid)
            for key in plan.member_keys:
                _fold(store, int(key), gid, now)
                out["folded"].append(int(key))
        out["resolved"] = _resolve_finished(store, prefix, now)
    return out


def _like_prefix(prefix: str) -> str:
    return prefix.replace("!", "!!").replace("%", "!%").replace("_", "!_") + "%"


def _before(details: Any) -> float:
    d = details if isinstance(details, dict) else (json.loads(details) if details else {})
    for k in ("beta_before", "old_beta", "before"):
        v = d.get(k) if isinstance(d, dict) else None
        if isinstance(v, (int, float)):
            return float(v)
        if isinstance(v, dict) and isinstance(v.get("beta"), (int, float)):
            return float(v["beta"])
    return float("nan")


def _fold(store: Store, alert_id: int, group_alert_id: int, now: str) -> None:
    store.conn.execute("INSERT OR IGNORE INTO alert_members (alert_id, group_alert_id) "
                       "VALUES (?, ?)", (alert_id, group_alert_id))
    dropped = store.conn.execute("DELETE FROM outbox WHERE alert_id = ? AND status = 'pending' "
                                 "AND attempts = 0", (alert_id,)).rowcount
    add_note(store, alert_id, f"folded into group alert {group_alert_id}; {dropped} pending "
                              f"notification(s) replaced by the group's", who="elmon", now=now)


def _resolve_finished(store: Store, prefix: str, now: str) -> list[int]:
    done = store.rows(
        "SELECT g.id, max(a.resolved_ts) AS ts FROM alerts g "
        "JOIN alert_members m ON m.group_alert_id = g.id JOIN alerts a ON a.id = m.alert_id "
        "WHERE g.kind = ? AND g.state != 'resolved' AND g.series LIKE ? ESCAPE '!' "
        "GROUP BY g.id HAVING sum(a.state != 'resolved') = 0", (GROUP_KIND, _like_prefix(prefix)))
    for r in done:
        resolve_alert(store, r["id"], note="every member alert resolved", ts=r["ts"], auto=True,
                      now=now)
    return [int(r["id"]) for r in done]


@accepts_path(readonly=True)
def group_alert_members(store: Store, alert_id: int) -> pd.DataFrame:
    """The member alerts folded under a group alert: ``id, series, kind, state, opened_ts,
    beta, beta_lo, beta_hi, message``."""
    return store.frame("SELECT a.id, a.series, a.kind, a.state, a.opened_ts, a.beta, a.beta_lo,"
                       " a.beta_hi, a.message FROM alert_members m JOIN alerts a "
                       "ON a.id = m.alert_id WHERE m.group_alert_id = ? ORDER BY a.series",
                       (int(alert_id),), ts_columns=("opened_ts",))


def group_alert_of(store: Store, alert_ids: Iterable[int]) -> dict[int, int]:
    """Member alert id -> its group alert id, for the ids given that are folded."""
    ids = [int(i) for i in alert_ids]
    if not ids:
        return {}
    rows = store.conn.execute("SELECT alert_id, group_alert_id FROM alert_members WHERE "
                              "alert_id IN (SELECT value FROM json_each(?))",
                              (json.dumps(ids),)).fetchall()
    return {int(a): int(g) for a, g in rows}
