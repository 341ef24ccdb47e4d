"""Groups in the store (monitor.store.groups): attributes, pooled latest estimates, grouped
alerts folded under one ``group_change`` alert and delivered once per sink. SQLite files on
disk and the real log sink, no mocks."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from monitor import store as mstore
from monitor.groups.attributes import group_resolver
from monitor.groups.grouped import GROUP_KIND, GroupAlertSettings
from monitor.groups.keys import key_attributes
from monitor.groups.pooling import pool_snapshot
from monitor.live.sinks import LogSink, deliver_due
from monitor.store import groups as sgroups

T0 = pd.Timestamp("2024-03-01T00:00:00Z")
NOW = pd.Timestamp("2026-01-05T12:00:00Z")


def names(n_groups=4, per=50):
    return [f"item{i:02d}/depot{g}" for g in range(n_groups) for i in range(per)]


def seed_latest(store, series, seed=3):
    rng = np.random.default_rng(seed)
    n = len(series)
    beta = np.array([-1.0 - 0.5 * int(s[-1]) for s in series]) + rng.normal(0, 0.4, n)
    se = rng.uniform(0.2, 0.6, n)
    est = pd.DataFrame({"series": series, "ts": T0, "beta": beta, "beta_se": se,
                        "beta_lo": beta - 2 * se, "beta_hi": beta + 2 * se, "n_eff": 40.0,
                        "status": "ok", "intercept": 3.0, "resid_sd": 0.2, "innovation": 0.0,
                        "z": 0.0})
    est.loc[0, ["beta", "beta_se", "beta_lo", "beta_hi"]] = np.nan
    est.loc[0, "status"] = "warming_up"
    obs = pd.DataFrame({"series": series, "ts": T0, "price": 5.0, "quantity": 20.0})
    mstore.write_batch(store, observations=obs, estimates=est, latest_estimates=est, now=NOW)
    return est


def test_attributes_round_trip_and_pooled_latest(store):
    series = names()
    seed_latest(store, series)
    attrs = key_attributes(series, ["item", "depot"])
    assert sgroups.write_attributes(store, attrs, source="key", now=NOW) == 2 * len(series)
    back = sgroups.series_attributes(store)
    assert back[attrs.columns].sort_values("series").reset_index(drop=True).equals(
        attrs.sort_values("series").reset_index(drop=True))
    assert sgroups.attribute_names(store) == ["depot", "item"]
    assert sgroups.update_pooled(store, ["depot"]) == len(series)
    latest = mstore.latest_estimates(store).set_index("series")
    cur = pd.DataFrame({"series": latest.index, "group": [s.split("/")[1] for s in latest.index],
                        "beta": latest["beta"].to_numpy(), "beta_se": latest["beta_se"].to_numpy()})
    ref, groups = pool_snapshot(cur)
    assert np.allclose(latest["beta_pooled"].to_numpy(dtype=float),
                       ref["beta_pooled"].to_numpy(), equal_nan=True, atol=1e-12)
    assert latest["group"].tolist() == cur["group"].tolist()
    # the warming-up series has a group but no pooled estimate (NULL, explained by its status)
    first = latest.loc[series[0]]
    assert first["status"] == "warming_up" and pd.isna(first["beta_pooled"])
    assert groups["n_pooled"].tolist() == [49, 50, 50, 50]
    with pytest.raises(ValueError, match="no such attribute"):
        sgroups.pool_latest(store, ["region"])


def _open_members(store, series, ts, kind="elasticity_change"):
    ids = []
    for s, t in zip(series, ts):
        ids.append(mstore.open_alert(store, s, kind, t, -2.1, -2.5, -1.7,
                                     f"{s}: elasticity changed", "warning",
                                     {"beta_before": -1.4}, now=NOW))
    return ids


def test_group_change_is_one_alert_and_one_notification_per_sink(store, tmp_path):
    series = names()
    seed_latest(store, series)
    sgroups.write_attributes(store, key_attributes(series, ["item", "depot"]), now=NOW)
    settings = GroupAlertSettings(hold_s=300.0)
    resolve = group_resolver(["depot"], ["item", "depot"])
    store.sinks = ("log", "ops")
    store.notify_hold = sgroups.member_hold(resolve, settings)
    hit = [s for s in series if s.endswith("depot1")]
    member_ids = _open_members(store, hit, [T0 + pd.Timedelta(hours=i) for i in range(50)])
    lone = _open_members(store, ["item07/depot2"], [T0])[0]
    # member notifications wait in the outbox for a group to form
    held = store.rows("SELECT next_attempt_at FROM outbox")
    assert len(held) == 2 * 51 and all(r["next_attempt_at"] > mstore.wall_ts(NOW) for r in held)
    done = sgroups.fold_group_alerts(store, ["depot"], resolve, settings, now=NOW)
    assert len(done["opened"]) == 1 and sorted(done["folded"]) == sorted(member_ids)
    gid = done["opened"][0]
    alert = mstore.get_alert(store, gid)
    assert alert["kind"] == GROUP_KIND and alert["series"] == "group:depot=depot1"
    assert sorted(alert["details"]["members"]) == sorted(hit)
    assert alert["beta"] == pytest.approx(-2.1)
    assert "50 of 50 series" in alert["message"] and "-1.40 -> -2.10" in alert["message"]
    members = sgroups.group_alert_members(store, gid)
    assert sorted(members["id"].tolist()) == sorted(member_ids)
    # folding again changes nothing
    again = sgroups.fold_group_alerts(store, ["depot"], resolve, settings, now=NOW)
    assert again == {"opened": [], "extended": [], "folded": [], "resolved": []}
    # deliver everything that is due after the hold: one group message per sink, plus the lone
    # member of another group whose hold ran out without a group
    sinks = {"log": LogSink(tmp_path / "log.jsonl"), "ops": LogSink(tmp_path / "ops.jsonl")}
    deliver_due(store, sinks, now=NOW + pd.Timedelta(seconds=301))
    for name in sinks:
        lines = [json.loads(x) for x in (tmp_path / f"{name}.jsonl").read_text().splitlines()]
        kinds = sorted((m["kind"], m["series"]) for m in lines)
        assert kinds == [("elasticity_change", "item07/depot2"),
                         (GROUP_KIND, "group:depot=depot1")], kinds
    # a later member alert of the group folds under the open group alert, with no message
    mstore.resolve_alert(store, member_ids[0], note="test", now=NOW)
    extra = _open_members(store, ["item00/depot1"], [T0 + pd.Timedelta(days=2)])[0]
    more = sgroups.fold_group_alerts(store, ["depot"], resolve, settings, now=NOW)
    assert more["extended"] == [gid] and more["folded"] == [extra]
    assert store.scalar("SELECT count(*) FROM outbox WHERE alert_id = ?", (extra,)) == 0
    # the group alert resolves when every member has resolved
    for aid in member_ids[1:] + [extra]:
        mstore.resolve_alert(store, aid, auto=True, ts=T0 + pd.Timedelta(days=3), now=NOW)
    last = sgroups.fold_group_alerts(store, ["depot"], resolve, settings, now=NOW)
    assert last["resolved"] == [gid]
    assert mstore.get_alert(store, gid)["state"] == "resolved"
    assert lone not in done["folded"]


def test_status_group_by_lists_every_group(store, capsys):
    from monitor.cli import main

    series = names()
    seed_latest(store, series)
    sgroups.write_attributes(store, key_attributes(series, ["item", "depot"]), now=NOW)
    path = str(store.path)
    store.close()
    assert main(["status", "--db", path, "--group-by", "depot"]) == 0
    out = capsys.readouterr().out
    assert "groups by depot (4;" in out
    for g in range(4):
        assert f"depot{g}" in out
    ref = sgroups.pool_latest(path, ["depot"])[1].set_index("group")
    assert f"{ref.loc['depot2', 'mean']:.2f}" in out
    assert main(["status", "--db", path, "--group-by", "region"]) == 2
    assert "no such attribute" in capsys.readouterr().err
