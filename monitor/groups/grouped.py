"""Grouped alerts: a change that hits a whole group is one ``group_change`` alert.

When many series of one group raise a change alert together, the likely story is one cause (a
competitor, a category-wide promotion, a tariff change) rather than two hundred separate ones.
The rule, per group, in data time:

- a *member alert* is an alert of a kind in ``member_kinds`` (default ``elasticity_change``)
  on a series of the group;
- when member alerts of at least ``max(min_members, ceil(min_fraction * n))`` distinct series
  of the group (``n`` = the group's series) open within ``window_s`` seconds of each other, one
  ``group_change`` alert opens at the time of the alert that completed the count; those member
  alerts are *folded* under it;
- while that group alert is open (live) or, in a replay, while further member alerts keep
  arriving within ``window_s`` of the previous one, each new member alert folds under it too.

A folded alert stays a full alert of its series (its own estimate, message and lifecycle), but
the sinks are told once, by the group alert, whose message and details list the members. In
the live service member notifications wait ``hold_s`` wall-clock seconds in the outbox so a
group forming over several batches still yields one notification; a member alert that is not
folded by then is delivered on its own. Members folded after their own notification went out
are still listed under the group alert.

This module decides; it does no I/O (the store side is :mod:`monitor.store.groups`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

#: Alert kind of a group alert.
GROUP_KIND = "group_change"
#: Prefix of the pseudo series a group alert is filed under (``group:category=snacks``).
GROUP_SERIES_PREFIX = "group:"


@dataclass(frozen=True)
class GroupAlertSettings:
    """When member alerts make a group alert.

    Parameters
    ----------
    member_kinds : tuple of str
        Alert kinds that count as a member's change.
    min_members : int
        Fewest distinct member series (>= 2).
    min_fraction : float
        Fraction of the group's series, in (0, 1].
    window_s : float
        Data-time seconds within which member alerts count together (> 0).
    hold_s : float
        Live only: wall-clock seconds a member alert's notification waits for a group (>= 0).
    """

    member_kinds: tuple[str, ...] = ("elasticity_change",)
    min_members: int = 3
    min_fraction: float = 0.5
    window_s: float = 7 * 86400.0
    hold_s: float = 300.0

    def __post_init__(self):
        if not self.member_kinds or not all(isinstance(k, str) and k for k in self.member_kinds):
            raise ValueError(f"member_kinds {self.member_kinds!r}: must name at least one kind")
        if GROUP_KIND in self.member_kinds:
            raise ValueError(f"member_kinds: {GROUP_KIND!r} cannot be a member kind")
        if isinstance(self.min_members, bool) or not isinstance(self.min_members, int) \
                or self.min_members < 2:
            raise ValueError(f"min_members {self.min_members!r}: must be a whole number >= 2")
        if not 0.0 < float(self.min_fraction) <= 1.0:
            raise ValueError(f"min_fraction {self.min_fraction!r}: must be in (0, 1]")
        if not float(self.window_s) > 0.0:
            raise ValueError(f"window_s {self.window_s!r}: must be > 0 seconds")
        if not float(self.hold_s) >= 0.0:
            raise ValueError(f"hold_s {self.hold_s!r}: must be >= 0 seconds")

    def needed(self, n_series: int) -> int:
        """Member series needed in a group of ``n_series``."""
        return max(self.min_members, math.ceil(self.min_fraction * n_series - 1e-12))


def group_series_id(group: str, group_by: Sequence[str]) -> str:
    """The pseudo series a group alert is filed under.

    >>> group_series_id("snacks", ["category"])
    'group:category=snacks'
    """
    return GROUP_SERIES_PREFIX + "/".join(group_by) + "=" + group


@dataclass
class GroupPlan:
    """One group alert to open (``key is None``) or to extend (``key`` of the open one)."""

    group: str
    key: Any
    ts: Any
    members: list[str] = field(default_factory=list)
    member_keys: list[Any] = field(default_factory=list)
    betas: list[float] = field(default_factory=list)
    betas_before: list[float] = field(default_factory=list)
    first_ts: Any = None

    @property
    def beta(self) -> float:
        """Members' mean b after the change (plain mean of their alerts' b; NaN if none)."""
        v = [b for b in self.betas if b is not None and math.isfinite(b)]
        return float(np.mean(v)) if v else float("nan")

    @property
    def beta_before(self) -> float:
        v = [b for b in self.betas_before if b is not None and math.isfinite(b)]
        return float(np.mean(v)) if v else float("nan")


def _seconds(ts: Any) -> float:
    return pd.Timestamp(ts).value / 1e9


def plan_group_alerts(alerts: pd.DataFrame, group_of: Mapping[str, str | None],
                      group_sizes: Mapping[str, int], settings: GroupAlertSettings,
                      open_groups: Mapping[str, Any] | None = None) -> list[GroupPlan]:
    """Which group alerts to open or extend, and which member alerts fold under each.

    Parameters
    ----------
    alerts : pandas.DataFrame
        Candidate member alerts, not yet folded: ``key`` (any id), ``series``, ``kind``, ``ts``
        (opening data time, ISO text or Timestamp), ``beta``; optional ``beta_before``.
    group_of : mapping
        Series -> group label.
    group_sizes : mapping
        Group label -> number of series in the group.
    open_groups : mapping, optional
        Group label -> key of its open ``group_change`` alert (live): every candidate of that
        group folds under it.

    Returns
    -------
    list of GroupPlan
        In order of the group alerts' times.
    """
    open_groups = dict(open_groups or {})
    if alerts is None or not len(alerts):
        return []
    a = alerts[alerts["kind"].isin(settings.member_kinds)].copy()
    a["group"] = [group_of.get(s) for s in a["series"]]
    a = a[a["group"].notna()]
    if not len(a):
        return []
    a["t_s"] = [_seconds(t) for t in a["ts"]]
    if "beta_before" not in a.columns:
        a["beta_before"] = np.nan
    a = a.sort_values(["t_s", "series"], kind="stable")
    plans: list[GroupPlan] = []
    for g, rows in a.groupby("group", sort=False):
        need = settings.needed(int(group_sizes.get(g, 0)))
        episode: GroupPlan | None = None
        last_t = 0.0
        live_open = g in open_groups       # an open group alert takes every candidate
        if live_open:
            episode = GroupPlan(group=g, key=open_groups[g], ts=None)
            plans.append(episode)
        pending: list = []
        for r in rows.itertuples(index=False):
            if episode is not None and (live_open or r.t_s - last_t <= settings.window_s):
                _add(episode, r)
                last_t = r.t_s
                continue
            episode, live_open = None, False
            pending = [p for p in pending if r.t_s - p.t_s <= settings.window_s]
            pending.append(r)
            if len({p.series for p in pending}) >= need:
                episode = GroupPlan(group=g, key=None, ts=r.ts, first_ts=pending[0].ts)
                for p in pending:
                    _add(episode, p)
                plans.append(episode)
                pending, last_t = [], r.t_s
    plans = [p for p in plans if p.member_keys]
    return sorted(plans, key=lambda p: (p.ts is not None, _seconds(p.ts) if p.ts is not None
                                        else 0.0, p.group))


def _add(plan: GroupPlan, r) -> None:
    plan.members.append(r.series)
    plan.member_keys.append(r.key)
    plan.betas.append(float(r.beta) if r.beta is not None else float("nan"))
    plan.betas_before.append(float(r.beta_before) if r.beta_before is not None
                             else float("nan"))


def group_message(plan: GroupPlan, n_series: int, group_by: Sequence[str]) -> str:
    """The text of a group alert: the group, how many members changed, their mean b, the
    members, and the caution."""
    who = ", ".join(f"{c}" for c in group_by)
    members = sorted(set(plan.members))
    shown = ", ".join(members[:12]) + (f" and {len(members) - 12} more" if len(members) > 12
                                        else "")
    now = plan.beta
    before = plan.beta_before
    change = (f"members' mean b {before:.2f} -> {now:.2f}" if math.isfinite(before)
              and math.isfinite(now) else
              (f"members' mean b now {now:.2f}" if math.isfinite(now) else "b not available"))
    when = f" from {plan.first_ts}" if plan.first_ts is not None else ""
    return (f"Group {who} = {plan.group}: {len(members)} of {n_series} series changed "
            f"elasticity together{when} (opened {plan.ts}); {change}. Members (alerts folded "
            f"here, not sent one by one): {shown}. One cause across the group is likely; check "
            f"it before acting on any one series. Estimates are statistical evidence, not "
            f"decisions.")


def group_details(plan: GroupPlan, n_series: int, group_by: Sequence[str]) -> dict:
    """JSON-able details of a group alert (members and their alert keys)."""
    def fin(v):
        return float(v) if v is not None and math.isfinite(v) else None
    return {"group": plan.group, "group_by": list(group_by), "n_series": int(n_series),
            "members": list(plan.members), "member_alerts": [_plain(k) for k in plan.member_keys],
            "beta_mean": fin(plan.beta), "beta_mean_before": fin(plan.beta_before),
            "first_ts": None if plan.first_ts is None else str(plan.first_ts)}


def _plain(k: Any) -> Any:
    if isinstance(k, (np.integer,)):
        return int(k)
    return k
