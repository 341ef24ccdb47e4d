"""The split GLR's threshold design (monitor.detectors.split_design): the simulation that makes
thresholds outside the precomputed table agrees with the table, and the table serves the
estimator forgetting factors it was measured for."""

from __future__ import annotations

import math

import pytest

from monitor.detectors import split_glr as S
from monitor.detectors.split_design import (FORGETTING_RANGE, HOT, information,
                                            information_bound, split_thresholds)
from monitor.detectors.split_table import PRECOMPUTED


def test_simulated_design_agrees_with_the_table():
    """A fresh simulation (other seed, 250 paths) at ARL0 500 gives the table's thresholds.

    The ARL's relative standard error at 250 paths is about 1 / sqrt(250) = 6%; h moves by
    about d log(ARL) / dh = 1 per unit near these values (ARL ~ exp(h) for a CUSUM-like
    statistic), so h to about 0.06: 0.3 is 5 se. This failed when the simulation started the
    estimator from a state of the previous (covariance-form) layout: the level threshold came
    out near 1, not 4.3."""
    t = split_thresholds(500.0, n_paths=250, seed=11)
    assert t.method == "simulation"
    hs, hl, _ = PRECOMPUTED[500.0]
    assert abs(t.level - hl) < 0.3, (t.level, hl)
    # at ARL0 500 the slope chart sits at its floor, the likelihood margin (see split_table)
    assert abs(t.slope - hs) < 0.3, (t.slope, hs)


def test_detector_freezes_the_scale_where_the_design_did():
    """The level chart's scale freezes at the statistic the thresholds were simulated with
    (split_design.HOT), whatever the threshold: at half the threshold (2.54 at ARL0 2,000) the
    scale froze on far more in-control rows than in the design, and the level chart alarmed
    1.2-1.8x its design at ARL0 2,000 (tests/test_detection_grid.py holds the rate)."""
    for arl0 in (500.0, 2000.0, 20000.0, 100000.0):
        t = split_thresholds(arl0)
        p = S.params(t.slope, t.level)
        assert p[S.Q_HOTL] == HOT
        assert p[S.Q_HOTS] == 0.5 * t.slope


def test_table_serves_the_measured_forgetting_range():
    at = split_thresholds(20000.0)
    for f in (FORGETTING_RANGE[0], 0.97, 0.995, 1.0):
        t = split_thresholds(20000.0, forgetting=f)
        assert t.method == "precomputed" and (t.slope, t.level) == (at.slope, at.level)
    assert (at.slope, at.level) == PRECOMPUTED[20000.0][:2]


def test_information_bound_is_lordens():
    # Lorden (1971): delay ~ ln(ARL0) / I, I = db^2 sd^2 / (2 sigma^2) (normal errors); the
    # issue's example: db 0.8, sd 0.15, noise 0.15 at ARL0 20,000 gives about 31 observations
    assert information(0.8, 0.15, 0.15) == pytest.approx(0.32)
    assert information_bound(0.8, 0.15, 0.15, 20000.0) == pytest.approx(math.log(20000) / 0.32)
    assert 30 < information_bound(0.8, 0.15, 0.15, 20000.0) < 32
