"""Issue 16 (first use): what the dashboard reads is recorded by the engine, and drawn.

The bounds in effect (``[bounds]`` or a series' own) and the forgetting factor are written to
the store's ``series`` record by :class:`monitor.live.monitor.Monitor`; the dashboard pages
draw/read them (checked with streamlit's AppTest on a seeded store).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from monitor import store as mstore
from monitor.live.monitor import Monitor
from monitor.settings import validate


def _frame(n: int = 60, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    ts = pd.date_range("2024-01-01", periods=n, freq="h", tz="UTC")
    price = 5.0 * np.exp(rng.normal(0, 0.1, n))
    qty = np.exp(3.0 - 1.5 * np.log(price) + rng.normal(0, 0.05, n))
    return pd.concat([pd.DataFrame({"series": s, "ts": ts, "price": price, "quantity": qty})
                      for s in ("shop1/tea", "shop2/oats")], ignore_index=True)


def test_engine_records_bounds_in_effect_and_forgetting(tmp_path):
    cfg = validate({"bounds": {"low": -3.0, "high": -0.2}, "estimator": {"forgetting": 0.97}})
    store = mstore.open_store(tmp_path / "s.db", create=True)
    # shop2/oats has its own low bound; its high side keeps [bounds]
    mstore.write_batch(store, series=[{"series": "shop2/oats", "low": -2.5}])
    mon = Monitor(store, cfg)
    mon.observe_many(_frame())
    lat = mstore.latest_estimates(store).set_index("series")
    assert lat.loc["shop1/tea", "forgetting"] == 0.97
    assert lat.loc["shop1/tea", ["bound_low", "bound_high"]].tolist() == [-3.0, -0.2]
    assert lat.loc["shop2/oats", ["bound_low", "bound_high"]].tolist() == [-2.5, -0.2]
    # the series' own bounds are untouched: shop1 has none, shop2 only its low side
    assert pd.isna(lat.loc["shop1/tea", "low"]) and pd.isna(lat.loc["shop1/tea", "high"])
    assert lat.loc["shop2/oats", "low"] == -2.5 and pd.isna(lat.loc["shop2/oats", "high"])


def test_no_bounds_configured_records_null_bounds(tmp_path):
    store = mstore.open_store(tmp_path / "s.db", create=True)
    Monitor(store, validate({})).observe_many(_frame(30))
    lat = mstore.latest_estimates(store)
    assert lat["bound_low"].isna().all() and lat["bound_high"].isna().all()
    assert (lat["forgetting"] == 0.99).all()          # the [estimator] default
