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
