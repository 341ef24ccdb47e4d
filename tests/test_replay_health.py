"""Per-series residual health in the replay's summary.json finals (issue 12 item 3): the lag-1
autocorrelation of the innovations and the link of their variance to the price, flagged where
the data break the detector's design (levels in monitor/replay/health.py)."""

from __future__ import annotations

import json

import pandas as pd
import pytest

from monitor.replay.driver import replay, run_replay
from monitor.settings import validate
from simulators.change_grid import Scenario, simulate
from tests.grid_logs import write_grid_log

NOW = pd.Timestamp("2030-01-01", tz="UTC").value


@pytest.mark.parametrize("errors, kw, flag", [
    ("iid", {}, ""),
    ("ar1", {"rho": 0.9}, "autocorrelated"),
    ("growing", {"price_sd": 0.2}, "price_linked_variance"),
])
def test_summary_finals_flag_the_series_whose_errors_break_the_design(tmp_path, errors, kw, flag):
    sim = simulate(Scenario("health", errors=errors, n_obs=1200, **kw), n_series=4, seed=3)
    names = write_grid_log(sim, tmp_path / "log.csv")
    cfg = validate({}, source="test")
    # chunked (several chunks per series): the sums carried from chunk to chunk
    s = replay(tmp_path / "log.csv", tmp_path / "out", cfg, progress=False, now_ns=NOW,
               chunk_rows=1000)
    assert s["timing"]["chunks"] > 1
    written = json.loads((tmp_path / "out" / "summary.json").read_text())
    for name in names:
        f = written["final"][name]
        assert f["health"] == flag, f
        assert -1 <= f["resid_ac1"] <= 1 and f["sd_ratio_per_price_sd"] > 0
    assert written["health_counts"].get(flag, 0) == (len(names) if flag else 0)
    if errors == "ar1":
        assert all(written["final"][n]["resid_ac1"] > 0.8 for n in names)
    # the whole-file replay reports the same figures
    whole = run_replay(tmp_path / "log.csv", tmp_path / "whole", cfg, now_ns=NOW)
    for name in names:
        a, b = written["final"][name], whole["final"][name]
        assert a["health"] == b["health"]
        for key in ("resid_ac1", "var_price_slope", "sd_ratio_per_price_sd"):
            assert a[key] == b[key]          # 4 significant digits, chunked or whole
