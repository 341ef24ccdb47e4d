"""``elmon replay --truth`` scores the change time each alert carries (issue 12): detection.csv's
``change_ts``, ``change_error_obs`` and ``change_error_s`` are filled for the detected elasticity
changes, locally and on the Dask engine's partitions (run here in-process, no cluster)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from monitor.ingest.logio import column_names
from monitor.replay.dask import log_blocks, read_split, run_partition
from monitor.replay.detection import Scores, read_truth
from monitor.replay.driver import make_setup, replay
from monitor.settings import validate
from simulators.change_grid import Scenario, simulate
from tests.grid_logs import DAY, write_grid_log

NOW = pd.Timestamp("2030-01-01", tz="UTC").value
CHANGE_AT = 700


def _log(tmp_path):
    # b -1.0 -> -1.8 (or -0.2) at day 700 with the intercept held, log-price sd 0.15, noise sd
    # 0.15: information 0.32 per observation, Lorden's (1971) delay bound ln(20000) / 0.32 = 31
    sc = Scenario("replay-change-time", change="slope_held", size=0.8, n_obs=1000,
                  change_at=CHANGE_AT)
    sim = simulate(sc, n_series=8, seed=5)
    write_grid_log(sim, tmp_path / "log.csv", tmp_path / "truth.csv")
    return sim


def test_replay_fills_the_change_time_error_of_detected_elasticity_changes(tmp_path):
    _log(tmp_path)
    s = replay(tmp_path / "log.csv", tmp_path / "out", validate({}, source="test"),
               truth=tmp_path / "truth.csv", progress=False, now_ns=NOW, horizon=200)
    det = pd.read_csv(tmp_path / "out" / "detection.csv")
    alerts = pd.read_csv(tmp_path / "out" / "alerts.csv")
    found = det[det["status"] == "detected"]
    assert len(found) >= 7, det[["series", "status", "delay_obs"]]
    # every detected change has the alert's own estimate of when it began ...
    assert found["change_ts"].notna().all() and found["change_error_obs"].notna().all()
    for row in found.itertuples():
        mine = alerts[(alerts["series"] == row.series) & (alerts["ts"] == row.alert_ts)
                      & (alerts["rule"] == row.alert_rule)]
        assert len(mine) == 1 and mine["change_ts"].iloc[0] == row.change_ts
        # ... and the error in seconds is the error in observations times a day (daily log)
        assert row.change_error_s == row.change_error_obs * DAY / 1e9
    # the estimate is near the truth: issue 12 asks for a median |error| of at most half the
    # median delay; with the intercept held the likelihood's argmax is within a few days
    err = found["change_error_obs"].abs()
    assert float(err.median()) <= 0.5 * float(found["delay_obs"].median())
    assert float(err.median()) <= 5.0 and float(err.max()) <= 30.0, found
    assert s["detection"]["median_abs_change_error_obs"] == float(err.median())


def test_dask_partitions_score_the_same_change_times(tmp_path):
    """The Dask engine's worker task (run_partition) over the log's series partitions gives the
    same detection rows, change-time columns included, as the local replay."""
    _log(tmp_path)
    cfg = validate({}, source="test")
    replay(tmp_path / "log.csv", tmp_path / "out", cfg, truth=tmp_path / "truth.csv",
           progress=False, now_ns=NOW, horizon=200)
    local = pd.read_csv(tmp_path / "out" / "detection.csv")
    truth = read_truth(tmp_path / "truth.csv")
    setup = make_setup(cfg, now_ns=NOW, keep_obs=True)
    log = str(tmp_path / "log.csv")
    (block,) = log_blocks(log, None, True)
    split = read_split(log, block, column_names(cfg), 2)
    parts = [run_partition([split[1][p]], [0], setup, truth, 200) for p in range(2)]
    assert all(len(p.opened) and "change_ts" in p.opened.columns for p in parts)
    merged = Scores.merge([p.scores for p in parts], truth).changes
    merged.to_csv(tmp_path / "dask_detection.csv", index=False)
    dist = pd.read_csv(tmp_path / "dask_detection.csv")
    pd.testing.assert_frame_equal(local, dist)
    assert dist["change_error_obs"].notna().sum() >= 7
    assert np.all(dist["change_ts"].notna() == dist["change_error_obs"].notna())
