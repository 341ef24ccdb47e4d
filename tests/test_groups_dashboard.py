"""The Groups page: its shaping functions on their own, and the page under AppTest on a store
seeded through the store API."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from dashboard import group_shaping
from monitor.groups.pooling import pool_snapshot


def frames(seed=1):
    rng = np.random.default_rng(seed)
    n = 30
    cur = pd.DataFrame({"series": [f"s{i:02d}/{'ab'[i % 2]}" for i in range(n)],
                        "group": ["a" if i % 2 == 0 else "b" for i in range(n)],
                        "beta": rng.normal(-1.5, 0.4, n), "beta_se": rng.uniform(0.1, 0.4, n)})
    cur.loc[3, ["beta", "beta_se"]] = np.nan
    per_series, per_group = pool_snapshot(cur)
    per_series["beta_lo"] = per_series["beta"] - 2 * per_series["beta_se"]
    per_series["beta_hi"] = per_series["beta"] + 2 * per_series["beta_se"]
    per_series["status"] = np.where(per_series["beta"].isna(), "warming_up", "ok")
    return per_series, per_group


def test_members_sorted_by_own_b_with_pooled_band():
    per_series, per_group = frames()
    m = group_shaping.members_table(per_series, "b")
    assert len(m) == 15
    b = m["beta"].to_numpy()
    assert np.all(np.diff(b[np.isfinite(b)]) >= 0)
    assert m["series"].iloc[-1] == "s03/b"             # the series without an estimate is last
    ok = m["beta_pooled"].notna()
    assert np.allclose(m.loc[ok, "pooled_hi"] - m.loc[ok, "beta_pooled"],
                       m.loc[ok, "beta_pooled"] - m.loc[ok, "pooled_lo"])
    t = group_shaping.group_table(per_group)
    assert t["mean"].is_monotonic_increasing and set(t["group"]) == {"a", "b"}


def test_charts_carry_both_estimates_and_the_group_mean():
    per_series, per_group = frames()
    m = group_shaping.members_table(per_series, "a")
    summary = per_group.set_index("group").loc["a"].to_dict()
    spec = group_shaping.comparison_chart(m, summary).to_dict()
    text = json.dumps(spec)
    assert "own estimate" in text and "pooled estimate" in text
    assert len(spec["layer"]) == 4                    # mean strip, mean rule, bands, points
    dist = group_shaping.distribution_chart(m, summary)
    assert dist is not None
    assert group_shaping.distribution_chart(m.assign(beta=np.nan), summary) is None


APP = Path(__file__).resolve().parents[1] / "dashboard" / "app.py"


@pytest.fixture()
def grouped_store(tmp_path, monkeypatch):
    """A store with 24 composite-key series in 3 stores (invented names), attributes and
    latest estimates written through the store API."""
    from monitor import store as mstore
    from monitor.groups.keys import key_attributes
    from monitor.store import groups as sgroups

    rng = np.random.default_rng(5)
    names = [f"biscuit-{i}/{s}" for s in ("elm-cross", "north-quay", "mill-lane")
             for i in range(8)]
    ts = pd.Timestamp("2024-03-01T00:00:00Z")
    beta = np.array([-1.0 - 0.5 * (k // 8) for k in range(24)]) + rng.normal(0, 0.2, 24)
    beta[5] = 1.5                                     # one series far from its group
    se = rng.uniform(0.1, 0.3, 24)
    est = pd.DataFrame({"series": names, "ts": ts, "beta": beta, "beta_se": se,
                        "beta_lo": beta - 2 * se, "beta_hi": beta + 2 * se, "n_eff": 50.0,
                        "status": "ok", "intercept": 3.0, "resid_sd": 0.1, "innovation": 0.0,
                        "z": 0.0})
    obs = pd.DataFrame({"series": names, "ts": ts, "price": 3.0, "quantity": 10.0})
    path = tmp_path / "g.sqlite"
    with mstore.Store.open(path) as st:
        mstore.write_batch(st, observations=obs, estimates=est, latest_estimates=est)
        sgroups.write_attributes(st, key_attributes(names, ["product", "store"]))
        sgroups.update_pooled(st, ["store"])
    monkeypatch.setenv("ELMON_DB", str(path))
    monkeypatch.delenv("ELMON_TRUTH", raising=False)
    return names


def test_groups_page_under_apptest(grouped_store):
    from streamlit.testing.v1 import AppTest

    at = AppTest.from_file(str(APP), default_timeout=30)
    at.run()
    at.switch_page("views/groups.py")
    at.run()
    assert not at.exception, [e.value for e in at.exception]
    assert not at.error, [e.value for e in at.error]
    assert at.title[0].value == "Groups"
    at.multiselect(key="gr_by").set_value(["store"]).run()
    groups = at.dataframe[0].value
    assert sorted(groups["group"]) == ["elm-cross", "mill-lane", "north-quay"]
    assert groups["n_series"].tolist() == [8, 8, 8]
    at.selectbox(key="gr_group").set_value("elm-cross").run()
    members = at.dataframe[1].value
    assert len(members) == 8 and members["beta"].is_monotonic_increasing
    assert bool(members.set_index("series").loc["biscuit-5/elm-cross", "differs"])
    specs = [json.loads(c.proto.spec) for c in at.get("vega_lite_chart")]
    assert len(specs) == 2
    assert any("pooled estimate" in json.dumps(s) for s in specs)
    assert any("Pooled b" in c.value for c in at.caption)


def test_composite_ids_round_trip_through_overview_and_series_detail(grouped_store, tmp_path):
    """An id holding an escaped '/' (a key part '1/2 litre') is listed and opens its detail."""
    from streamlit.testing.v1 import AppTest

    from monitor import store as mstore
    from monitor.groups.keys import join_key

    sid = join_key(["1/2 litre", "elm-cross"])
    import os
    db = os.environ["ELMON_DB"]
    ts = pd.date_range("2024-03-01", periods=40, freq="D", tz="UTC")
    est = pd.DataFrame({"series": sid, "ts": ts, "beta": -1.2, "beta_se": 0.2, "beta_lo": -1.6,
                        "beta_hi": -0.8, "n_eff": 30.0, "status": "ok", "intercept": 3.0,
                        "resid_sd": 0.1, "innovation": 0.0, "z": 0.0})
    obs = pd.DataFrame({"series": sid, "ts": ts, "price": 3.0, "quantity": 10.0})
    with mstore.Store.open(db) as st:
        mstore.write_batch(st, observations=obs, estimates=est, latest_estimates=est)
    at = AppTest.from_file(str(APP), default_timeout=30)
    at.run()
    assert not at.exception, [e.value for e in at.exception]
    assert sid in at.dataframe[0].value["series"].tolist()
    at.switch_page("views/series.py")
    at.query_params["series"] = sid
    at.run()
    assert not at.exception, [e.value for e in at.exception]
    assert at.selectbox(key="sd_series").value == sid
