"""Detection metrics against known change points: windows, delays, quiet stretches, truth files.

Expected values are counted by hand from the definitions in monitor/detection.py's docstring
(invented toy series, one observation per day).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor.errors import SourceError, ValidationError
from monitor.replay.detection import Scores, read_truth, score, summarize, truth_frame


DAY = 86_400 * 10**9
T0 = pd.Timestamp("2025-03-01", tz="UTC").value


def _iso(day: int) -> str:
    return pd.Timestamp(T0 + day * DAY, tz="UTC").strftime("%Y-%m-%dT%H:%M:%SZ")


def _obs(names_days: dict[str, int]):
    sid, ts = [], []
    for code, (name, n) in enumerate(names_days.items()):
        sid += [code] * n
        ts += [T0 + d * DAY for d in range(n)]
    return np.array(sid), np.array(ts, dtype=np.int64), list(names_days)


def _alerts(rows):
    return pd.DataFrame(rows, columns=["series", "ts", "rule"])


def _truth(rows):
    return truth_frame(pd.DataFrame(rows))


def test_step_change_detected_with_delay_and_quiet_false_alarms():
    sid, ts, names = _obs({"a": 200, "b": 100})
    truth = _truth([{"series": "a", "ts": _iso(100), "kind": "elasticity_change"}])
    alerts = _alerts([("a", _iso(20), "elasticity_change"),    # before the change: false alarm
                      ("a", _iso(107), "elasticity_change"),   # detection, delay 7
                      ("a", _iso(130), "elasticity_change"),   # inside the window: neither
                      ("a", _iso(180), "level_shift"),         # after the zone: false alarm
                      ("b", _iso(50), "low_variation")])       # informational: not counted
    s = score(sid, ts, names, alerts, truth, horizon=60)
    ch = s.changes.iloc[0]
    assert ch["status"] == "detected" and ch["delay_obs"] == 7.0 and ch["delay_s"] == 7 * 86400
    assert ch["window_obs"] == 61          # observations 100 .. 160 (i0 + 1 + horizon)
    q = s.quiet.set_index("series")
    # a: 200 observations minus the zone [100, 161) = 139; b: all 100
    assert q.loc["a", "quiet_obs"] == 139 and q.loc["a", "false_alarms"] == 2
    assert q.loc["b", "quiet_obs"] == 100 and q.loc["b", "false_alarms"] == 0
    summ = s.summary()
    assert summ["detected"] == 1 and summ["detection_rate"] == 1.0
    assert summ["false_alarms_per_10k"] == pytest.approx(1e4 * 2 / 239)
    assert summ["median_delay_obs"] == 7.0


def test_wrong_rule_misses_and_window_stops_at_next_change():
    sid, ts, names = _obs({"a": 300})
    truth = _truth([{"series": "a", "ts": _iso(100), "kind": "level_shift"},
                    {"series": "a", "ts": _iso(120), "kind": "elasticity_change"}])
    alerts = _alerts([("a", _iso(101), "elasticity_change"),   # wrong rule for the level shift
                      ("a", _iso(125), "level_shift")])        # after the next change: too late
    s = score(sid, ts, names, alerts, truth, horizon=60)
    first, second = s.changes.iloc[0], s.changes.iloc[1]
    assert first["kind"] == "level_shift" and first["status"] == "missed"
    assert first["window_obs"] == 20       # cut at the next change point
    assert second["status"] == "missed"    # a level_shift alert does not detect a b change
    summ = s.summary()
    assert summ["detected"] == 0 and summ["median_delay_obs"] is None
    assert summ["median_delay_all_obs"] is None        # every change missed: infinite median


def test_stretch_kinds_drift_end_and_data_problems():
    sid, ts, names = _obs({"a": 400})
    truth = _truth([
        {"series": "a", "ts": _iso(50), "kind": "gradual_drift", "end_ts": _iso(150)},
        {"series": "a", "ts": _iso(250), "kind": "stockout", "end_ts": _iso(256)},
        {"series": "a", "ts": _iso(300), "kind": "flat_price", "end_ts": _iso(340)}])
    alerts = _alerts([("a", _iso(190), "elasticity_change"),   # within drift end + 60
                      ("a", _iso(258), "elasticity_change"),   # near the stock-out: false alarm
                      ("a", _iso(305), "low_variation")])      # flat prices flagged
    s = score(sid, ts, names, alerts, truth, horizon=60)
    ch = s.changes.set_index("kind")
    assert ch.loc["gradual_drift", "status"] == "detected" and ch.loc["gradual_drift", "delay_obs"] == 140
    assert ch.loc["stockout", "status"] == "not_scored"
    assert ch.loc["flat_price", "status"] == "detected"
    q = s.quiet.iloc[0]
    assert q["quiet_obs"] == 400 - (211 - 50) and q["false_alarms"] == 1
    summ = s.summary()
    assert summ["changes"] == 1             # only response changes count in the rate


def test_no_data_after_change_and_unknown_series():
    sid, ts, names = _obs({"a": 30})
    truth = _truth([{"series": "a", "ts": _iso(40), "kind": "elasticity_change"},
                    {"series": "zz", "ts": _iso(5), "kind": "level_shift"}])
    s = score(sid, ts, names, _alerts([]), truth)
    assert set(s.changes["status"]) == {"no_data"}
    assert s.summary()["changes"] == 0 and s.summary()["detection_rate"] is None


def test_merge_of_disjoint_series_equals_one_pass():
    sid, ts, names = _obs({"a": 200, "b": 150, "c": 90})
    truth = _truth([{"series": "a", "ts": _iso(100), "kind": "elasticity_change"},
                    {"series": "c", "ts": _iso(30), "kind": "level_shift"}])
    alerts = _alerts([("a", _iso(104), "elasticity_change"), ("b", _iso(10), "level_shift"),
                      ("c", _iso(33), "level_shift"), ("c", _iso(2), "elasticity_change")])
    whole = score(sid, ts, names, alerts, truth)
    m = sid != 1
    truth = pd.concat([truth, _truth([{"series": "gone", "ts": _iso(1), "kind": "level_shift"}])])
    whole = score(sid, ts, names, alerts, truth)
    part1 = score(sid[m] - (sid[m] == 2), ts[m], ["a", "c"], alerts, truth, partial=True)
    part2 = score(np.zeros((sid == 1).sum(), np.int64), ts[sid == 1], ["b"], alerts, truth,
                  partial=True)
    merged = Scores.merge([part2, part1], truth)
    assert len(merged.changes) == 3
    pd.testing.assert_frame_equal(merged.changes, whole.changes)
    assert merged.summary() == whole.summary()


def test_censored_median_counts_misses_as_infinite():
    ch = pd.DataFrame({"kind": ["elasticity_change"] * 3, "status": ["detected", "detected", "missed"],
                       "delay_obs": [4.0, 10.0, np.nan], "delay_s": [4.0, 10.0, np.nan]})
    q = pd.DataFrame({"series": ["a"], "n_obs": [10], "quiet_obs": [10], "false_alarms": [0]})
    s = summarize(ch, q)
    # numpy.median([4, 10]) = 7; with the miss as +inf the middle value of (4, 10, inf) is 10
    assert s["median_delay_obs"] == np.median([4.0, 10.0]) and s["median_delay_all_obs"] == 10.0
    assert s["p90_delay_obs"] == pytest.approx(np.percentile([4.0, 10.0], 90))


def test_hand_written_truth_file(tmp_path):
    p = tmp_path / "incidents.csv"
    p.write_text("series,ts,kind\nshop-1/tea,2025-03-05,elasticity_change\n"
                 "shop-2/tea,2025-03-09T12:00:00+02:00,level_shift\n")
    t = read_truth(p)
    assert list(t["series"]) == ["shop-1/tea", "shop-2/tea"]
    assert t["ts"].iloc[1] == pd.Timestamp("2025-03-09T10:00:00Z").value   # offset honoured
    assert np.isnan(t["beta_before"]).all()


def test_bad_truth_rows_are_named(tmp_path):
    p = tmp_path / "t.csv"
    p.write_text("series,ts,kind\na,2025-03-05,elasticity_change\n,2025-03-06,level_shift\n"
                 "b,yesterday,level_shift\nc,2025-03-07,price_war\n")
    with pytest.raises(ValidationError) as e:
        read_truth(p)
    msg = str(e.value)
    assert "row 2: field 'series'" in msg and "row 3: field 'ts' = 'yesterday'" in msg
    assert "row 4: field 'kind' = 'price_war': unknown kind" in msg
    (tmp_path / "u.csv").write_text("series,when\na,2025-01-01\n")
    with pytest.raises(SourceError, match="needs at least series, ts, kind"):
        read_truth(tmp_path / "u.csv")
