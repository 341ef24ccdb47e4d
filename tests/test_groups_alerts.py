"""Grouped alerts, the decision part (monitor.groups.grouped); the store and the sinks are
tested in tests/test_groups_store.py."""

from __future__ import annotations

import pandas as pd
import pytest

from monitor.groups.grouped import (GROUP_KIND, GroupAlertSettings, group_details,
                                    group_message, group_series_id, plan_group_alerts)


def member_alerts(series, ts, kind="elasticity_change", beta=-2.0, start_key=0):
    return pd.DataFrame({"key": range(start_key, start_key + len(series)), "series": series,
                         "kind": kind, "ts": ts, "beta": beta, "beta_before": -1.4})


def fleet(n_groups=4, per=50):
    group_of = {f"g{g}/s{i:02d}": f"g{g}" for g in range(n_groups) for i in range(per)}
    return group_of, {f"g{g}": per for g in range(n_groups)}


def test_change_across_a_group_is_one_group_alert_with_every_member():
    group_of, sizes = fleet()
    series = [f"g1/s{i:02d}" for i in range(50)]
    ts = [pd.Timestamp("2024-03-01T00:00Z") + pd.Timedelta(hours=3 * i) for i in range(50)]
    alerts = pd.concat([member_alerts(series, ts),
                        member_alerts(["g2/s07"], [pd.Timestamp("2024-03-02T00:00Z")],
                                      start_key=100)])   # one lone alert in another group
    plans = plan_group_alerts(alerts, group_of, sizes, GroupAlertSettings())
    assert len(plans) == 1
    plan = plans[0]
    assert plan.group == "g1" and plan.key is None
    assert sorted(plan.members) == series and sorted(plan.member_keys) == list(range(50))
    # opens when the 25th series (50% of 50) raised its alert
    assert pd.Timestamp(plan.ts) == ts[24]
    assert plan.beta == pytest.approx(-2.0) and plan.beta_before == pytest.approx(-1.4)
    text = group_message(plan, 50, ["category"])
    assert "50 of 50 series" in text and "-1.40 -> -2.00" in text and "g1/s00" in text
    det = group_details(plan, 50, ["category"])
    assert det["members"] == plan.members and det["n_series"] == 50
    assert group_series_id("g1", ["category"]) == "group:category=g1"


def test_too_few_members_or_too_spread_out_makes_no_group_alert():
    group_of, sizes = fleet()
    few = member_alerts([f"g0/s{i:02d}" for i in range(24)],
                        [pd.Timestamp("2024-03-01T00:00Z")] * 24)
    assert plan_group_alerts(few, group_of, sizes, GroupAlertSettings()) == []
    # 30 series, but one a week apart: never 25 inside one 7-day window
    spread = member_alerts([f"g0/s{i:02d}" for i in range(30)],
                           [pd.Timestamp("2024-01-01T00:00Z") + pd.Timedelta(days=8 * i)
                            for i in range(30)])
    assert plan_group_alerts(spread, group_of, sizes, GroupAlertSettings()) == []
    # other kinds do not count
    lvl = member_alerts([f"g0/s{i:02d}" for i in range(50)],
                        [pd.Timestamp("2024-03-01T00:00Z")] * 50, kind="level_shift")
    assert plan_group_alerts(lvl, group_of, sizes, GroupAlertSettings()) == []
    # series without a group never count
    assert plan_group_alerts(member_alerts(["loose"] * 5, ["2024-03-01T00:00Z"] * 5),
                             group_of, sizes, GroupAlertSettings(min_fraction=0.01)) == []


def test_open_group_alert_takes_later_members_and_repeated_episodes_split():
    group_of, sizes = fleet()
    late = member_alerts(["g3/s01", "g3/s02"], ["2024-05-01T00:00Z"] * 2)
    plans = plan_group_alerts(late, group_of, sizes, GroupAlertSettings(), open_groups={"g3": 77})
    assert len(plans) == 1 and plans[0].key == 77 and plans[0].members == ["g3/s01", "g3/s02"]
    first = member_alerts([f"g0/s{i:02d}" for i in range(30)], ["2024-01-01T00:00Z"] * 30)
    second = member_alerts([f"g0/s{i:02d}" for i in range(30)], ["2024-06-01T00:00Z"] * 30,
                           start_key=30)
    plans = plan_group_alerts(pd.concat([first, second]), group_of, sizes, GroupAlertSettings())
    assert [len(p.members) for p in plans] == [30, 30]


def test_settings_are_checked_with_the_parameter_named():
    with pytest.raises(ValueError, match="min_members 1"):
        GroupAlertSettings(min_members=1)
    with pytest.raises(ValueError, match="min_fraction 0"):
        GroupAlertSettings(min_fraction=0)
    with pytest.raises(ValueError, match="window_s"):
        GroupAlertSettings(window_s=0)
    with pytest.raises(ValueError, match="cannot be a member kind"):
        GroupAlertSettings(member_kinds=(GROUP_KIND,))
    assert GroupAlertSettings(min_members=3, min_fraction=0.5).needed(4) == 3
    assert GroupAlertSettings(min_members=3, min_fraction=0.5).needed(51) == 26
