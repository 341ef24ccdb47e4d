"""Groups through replay and ingest: composite keys from the command line and the config,
key errors, pooled columns in estimates.csv, group alerts in alerts.csv, and the store."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from monitor import store as mstore
from monitor.cli import main
from monitor.groups.keys import split_key

SKUS = ["rye-crackers", "oat-bar", "1/2 litre milk", "tea\\green"]
STORES = ["elm-cross", "north-quay", "mill-lane"]
T0 = pd.Timestamp("2024-01-01T00:00:00Z")


def write_log(path, n=60, seed=2, change_store=None, change_at=None, extra_rows=None,
              new_b=-3.2):
    """sku x store series with a store-level elasticity, daily observations."""
    rng = np.random.default_rng(seed)
    rows = []
    for si, store in enumerate(STORES):
        for sku in SKUS:
            b0 = -1.0 - 0.4 * si + rng.normal(0, 0.1)
            for t in range(n):
                b = new_b if (store == change_store and change_at is not None and t >= change_at) else b0
                lp = np.log(4.0) + rng.normal(0, 0.15)
                q = np.exp(5.0 + b * (lp - np.log(4.0)) + rng.normal(0, 0.05))
                rows.append({"sku": sku, "store": store,
                             "ts": (T0 + pd.Timedelta(days=t)).strftime("%Y-%m-%dT%H:%M:%SZ"),
                             "price": round(float(np.exp(lp)), 4), "quantity": round(float(q), 3),
                             "category": "bakery" if sku != "tea\\green" else "drinks"})
    frame = pd.DataFrame(rows + (extra_rows or []))
    frame.to_csv(path, index=False)
    return frame


def test_two_series_columns_make_one_composite_id(tmp_path):
    write_log(tmp_path / "log.csv")
    rc = main(["replay", str(tmp_path / "log.csv"), "--out", str(tmp_path / "o"), "--quiet",
               "--series-col", "sku", "--series-col", "store", "--forgetting", "1"])
    assert rc == 0
    summary = json.loads((tmp_path / "o" / "summary.json").read_text())
    assert summary["series"] == len(SKUS) * len(STORES)
    assert summary["rejected"] == 0
    est = pd.read_csv(tmp_path / "o" / "estimates.csv", dtype={"series": str})
    ids = set(est["series"])
    assert "1\\/2 litre milk/elm-cross" in ids and "tea\\\\green/mill-lane" in ids
    assert {split_key(s, 2) for s in ids} == {(a, b) for a in SKUS for b in STORES}
    assert "beta_pooled" not in est.columns        # no groups set: no pooled columns


def test_empty_key_part_is_a_reject_and_missing_key_column_an_error(tmp_path, capsys):
    bad = [{"sku": "", "store": "elm-cross", "ts": "2024-01-02T12:00:00Z", "price": 4.0,
            "quantity": 50.0, "category": "bakery"},
           {"sku": "oat-bar", "store": " ", "ts": "2024-01-02T12:00:00Z", "price": 4.0,
            "quantity": 50.0, "category": "bakery"}]
    write_log(tmp_path / "log.csv", n=20, extra_rows=bad)
    rc = main(["replay", str(tmp_path / "log.csv"), "--out", str(tmp_path / "o"), "--quiet",
               "--series-col", "sku", "--series-col", "store"])
    assert rc == 0
    rej = pd.read_csv(tmp_path / "o" / "rejects.csv", dtype=str, keep_default_na=False)
    assert len(rej) == 2
    assert rej["field"].tolist() == ["sku", "store"]
    assert all("empty key part" in r for r in rej["reason"])
    assert rej["row"].tolist() == [str(20 * 12 + 1), str(20 * 12 + 2)]
    rc = main(["replay", str(tmp_path / "log.csv"), "--out", str(tmp_path / "o2"), "--quiet",
               "--series-col", "sku", "--series-col", "shelf"])
    assert rc == 2
    assert "shelf" in capsys.readouterr().err


@pytest.mark.slow
def test_config_key_and_groups_give_pooled_columns_and_group_alert(tmp_path):
    write_log(tmp_path / "log.csv", n=160, change_store="north-quay", change_at=90)
    (tmp_path / "elmon.toml").write_text(
        '[series]\nkey = ["sku", "store"]\ngroups = ["store"]\ngroup_min_members = 3\n'
        '[estimator]\nforgetting = 0.97\n[detectors]\narl0 = 2000\n', encoding="utf-8")
    rc = main(["replay", str(tmp_path / "log.csv"), "--out", str(tmp_path / "o"), "--quiet",
               "--config", str(tmp_path / "elmon.toml")])
    assert rc == 0
    est = pd.read_csv(tmp_path / "o" / "estimates.csv", dtype={"series": str, "group": str})
    assert {"group", "beta_pooled", "beta_pooled_se"} <= set(est.columns)
    assert (est["group"] == est["series"].map(lambda s: split_key(s, 2)[1])).all()
    ok = est["status"] == "ok"
    assert est.loc[ok, "beta_pooled"].notna().mean() > 0.95
    assert est.loc[est["beta_se"].isna(), "beta_pooled"].isna().all()
    alerts = pd.read_csv(tmp_path / "o" / "alerts.csv", dtype=str, keep_default_na=False)
    groups = alerts[alerts["rule"] == "group_change"]
    assert groups["series"].tolist() == ["group:store=north-quay"], alerts[["series", "rule"]]
    members = alerts[alerts["group_alert"].str.startswith("group:store=north-quay")]
    assert len(members) >= 3
    assert set(members["series"].map(lambda s: split_key(s, 2)[1])) == {"north-quay"}
    attrs = pd.read_csv(tmp_path / "o" / "attributes.csv", dtype=str)
    assert set(attrs.columns) == {"series", "sku", "store"}
