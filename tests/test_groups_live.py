"""Groups in the live path: composite keys through the Monitor (the service's engine) and
``elmon ingest``, pooled latest estimates in the store, and a change across a group delivered
as one ``group_change`` notification per sink (real log sinks writing files)."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from monitor import store as mstore
from monitor.cli import main
from monitor.groups.grouped import GROUP_KIND
from monitor.groups.keys import split_key
from monitor.live.monitor import Monitor
from monitor.live.sinks import LogSink, deliver_due
from monitor.settings import validate
from monitor.store import groups as sgroups

SKUS = [f"snack-{i}" for i in range(6)] + ["1/2 litre milk"]
STORES = ["elm-cross", "north-quay", "mill-lane"]
T0 = pd.Timestamp("2024-01-01T00:00:00Z")


def feed(n=220, change_store="north-quay", change_at=110, seed=4):
    rng = np.random.default_rng(seed)
    rows = []
    for t in range(n):
        for si, store in enumerate(STORES):
            for sku in SKUS:
                b = -1.2 - 0.3 * si
                if store == change_store and change_at is not None and t >= change_at:
                    b = -3.2
                lp = np.log(4.0) + rng.normal(0, 0.15)
                rows.append({"sku": sku, "store": store, "ts": T0 + pd.Timedelta(days=t),
                             "price": float(np.exp(lp)),
                             "quantity": float(np.exp(5.0 + b * (lp - np.log(4.0))
                                                       + rng.normal(0, 0.05)))})
    return pd.DataFrame(rows)


def config(tmp_path, **extra):
    text = {"series": {"key": ["sku", "store"], "groups": ["store"]},
            "estimator": {"forgetting": 0.97}, "detectors": {"arl0": 2000.0},
            "sinks": {"log": {"path": str(tmp_path / "log.jsonl")},
                      "ops": {"type": "log", "path": str(tmp_path / "ops.jsonl")}}}
    text.update(extra)
    return validate(text)


@pytest.mark.slow
def test_change_across_a_group_is_one_notification_per_sink(tmp_path):
    frame = feed()
    cfg = config(tmp_path)
    with Monitor(tmp_path / "live.sqlite", cfg) as mon:
        days = frame["ts"].drop_duplicates().tolist()
        for lo in range(0, len(days), 10):                   # ten days per batch, as a feed would
            part = frame[frame["ts"].isin(days[lo:lo + 10])]
            mon.observe_many(part.assign(ts=part["ts"].dt.strftime("%Y-%m-%dT%H:%M:%SZ")))
        store = mon.store
        groups = mstore.list_alerts(store, kind=GROUP_KIND)
        assert groups["series"].tolist() == ["group:store=north-quay"]
        gid = int(groups["id"].iloc[0])
        members = sgroups.group_alert_members(store, gid)
        assert len(members) >= 4
        assert {split_key(s, 2)[1] for s in members["series"]} == {"north-quay"}
        latest = mstore.latest_estimates(store)
        assert {"beta_pooled", "beta_pooled_se", "group"} <= set(latest.columns)
        assert (latest["group"] == latest["series"].map(lambda s: split_key(s, 2)[1])).all()
        assert latest["beta_pooled"].notna().all()
        sinks = {"log": LogSink(tmp_path / "log.jsonl"), "ops": LogSink(tmp_path / "ops.jsonl")}
        deliver_due(store, sinks, now=pd.Timestamp.now(tz="UTC") + pd.Timedelta(hours=1))
    member_ids = set(members["id"].tolist())
    for name in ("log", "ops"):
        msgs = [json.loads(x) for x in (tmp_path / f"{name}.jsonl").read_text().splitlines()]
        opened_groups = [m for m in msgs if m["kind"] == GROUP_KIND and m["event"] == "opened"]
        assert len(opened_groups) == 1, name
        assert sorted(opened_groups[0]["details"]["members"]) == sorted(members["series"])
        assert not [m for m in msgs if m["alert_id"] in member_ids], name
        # no member of the changed group reached the sink on its own
        assert not [m for m in msgs if m["kind"] == "elasticity_change"
                    and m["series"].endswith("/north-quay")], name


def test_ingest_composite_keys_and_a_blank_part_is_a_reject(tmp_path):
    frame = feed(n=40, change_at=None)
    frame["ts"] = frame["ts"].dt.strftime("%Y-%m-%dT%H:%M:%SZ")
    bad = pd.DataFrame([{"sku": "snack-1", "store": "", "ts": "2024-03-01T00:00:00Z",
                         "price": 4.0, "quantity": 20.0}])
    pd.concat([frame, bad]).to_csv(tmp_path / "log.csv", index=False)
    rc = main(["ingest", str(tmp_path / "log.csv"), "--db", str(tmp_path / "s.sqlite"),
               "--series-col", "sku", "--series-col", "store", "--group-col", "store"])
    assert rc == 0
    with mstore.open_store(tmp_path / "s.sqlite", readonly=True) as store:
        latest = mstore.latest_estimates(store)
        assert len(latest) == len(SKUS) * len(STORES)
        assert "1\\/2 litre milk/mill-lane" in set(latest["series"])
        rej = mstore.list_rejects(store) if hasattr(mstore, "list_rejects") else store.frame(
            "SELECT row, field, value, reason FROM rejects")
        assert len(rej) == 1
        assert rej["field"].iloc[0] == "store" and "empty key part" in rej["reason"].iloc[0]
        assert int(rej["row"].iloc[0]) == len(frame) + 1
        attrs = sgroups.series_attributes(store)
        assert set(attrs.columns) == {"series", "sku", "store"}
        assert latest["beta_pooled"].notna().any()
