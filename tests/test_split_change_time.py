"""The change-time error in detection.csv (issue 12): the detector's estimate of when a change
began, scored against the truth by monitor.replay.detection.score. Expected values are counted
by hand from the definitions in that module's docstring."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from monitor.pipeline.run import Pipeline
from monitor.replay.detection import DETECTION_COLUMNS, score, summarize, truth_frame
from monitor.settings import estimator_from_config, validate
from tests.pipeline_helpers import simulate

T0 = np.datetime64("2025-03-01T00:00:00", "ns").astype(np.int64)
HOUR = 3_600_000_000_000


def _iso(i: int) -> str:
    return str(np.datetime64(int(T0 + i * HOUR) // 10**9, "s")) + "Z"


def _ns_iso(v: int) -> str:
    return str(np.datetime64(int(v), "ns")) + "Z"


def test_change_error_counts_observations_from_the_true_change():
    ts = T0 + np.arange(300) * HOUR
    sid = np.zeros(300, np.int64)
    truth = truth_frame(pd.DataFrame({"series": ["a", "a"], "ts": [_iso(100), _iso(200)],
                                      "kind": ["elasticity_change", "level_shift"]}))
    alerts = pd.DataFrame({"series": ["a", "a", "a"],
                           "ts": [_iso(130), _iso(150), _iso(204)],
                           "rule": ["elasticity_change", "elasticity_change", "level_shift"],
                           # the first alert says the change began at 96 (4 early), the level
                           # alert carries no estimate
                           "change_ts": [_iso(96), _iso(140), None]})
    s = score(sid, ts, ["a"], alerts, truth, horizon=60)
    assert list(s.changes.columns) == DETECTION_COLUMNS
    ec = s.changes[s.changes["kind"] == "elasticity_change"].iloc[0]
    assert ec["delay_obs"] == 30.0 and ec["change_ts"] == _iso(96)
    assert ec["change_error_obs"] == -4.0 and ec["change_error_s"] == -4 * 3600.0
    ls = s.changes[s.changes["kind"] == "level_shift"].iloc[0]
    assert ls["delay_obs"] == 4.0 and math.isnan(ls["change_error_obs"]) and ls["change_ts"] == ""
    summ = s.summary()
    assert summ["median_abs_change_error_obs"] == 4.0     # one detected change with an estimate
    # frames without the column (alerts of the previous charts): empty, and a null median
    s2 = score(sid, ts, ["a"], alerts.drop(columns="change_ts"), truth, horizon=60)
    assert s2.changes["change_error_obs"].isna().all()
    assert s2.summary()["median_abs_change_error_obs"] is None
    assert summarize(s2.changes.drop(columns=["change_error_obs"]), s2.quiet)[
        "median_abs_change_error_obs"] is None


def test_split_detector_change_time_from_pipeline_events_is_near_the_truth():
    """20 series, b -1.2 -> -2.0 at hour 1500 (pivot at the base price), price sd 0.1, noise
    0.2 (tests.pipeline_helpers.simulate), the default detector at ARL0 20,000: the alerts'
    change_ts scored against the truth. Issue 12 asks for a median |error| of at most half the
    median delay; the information is 0.08 per observation (delay bound ln(20000) / 0.08 = 124
    observations), and the error's median, measured, is far below half of the delay."""
    n, S = 2500, 20
    sid, X, y, ts = simulate(S, n, beta=-1.2, change_at=1500, seed=31)
    cfg = validate({}, source="test")
    pipe = Pipeline.from_config(cfg, estimator_from_config(cfg))
    names = [f"depot-{i}/rye" for i in range(S)]
    res = pipe.run(sid, X, y, S, ts=ts, names=names)
    ev = res.events[(res.events["action"] == "open")]
    alerts = pd.DataFrame({"series": [names[s] for s in ev["sid"]],
                           "ts": ts[ev["row"].to_numpy()].astype(np.int64),
                           "rule": ev["kind"].to_numpy(dtype=object),
                           "change_ts": [d.get("change_ts") for d in ev["details"]]})
    change = int(ts.reshape(n, S)[1500, 0])
    truth = truth_frame(pd.DataFrame({"series": names, "ts": [_ns_iso(change)] * S,
                                      "kind": ["elasticity_change"] * S}))
    s = score(sid, ts.astype(np.int64), names, alerts, truth, horizon=1000)
    summ = s.summary()
    assert summ["detected"] >= 19, summ
    assert summ["median_abs_change_error_obs"] <= 0.5 * summ["median_delay_obs"], summ
    det = s.changes[s.changes["status"] == "detected"]
    assert det["change_error_obs"].notna().all()
