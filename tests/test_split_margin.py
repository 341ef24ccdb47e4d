"""The slope alarm's likelihood margin grows with ln(ARL0) (monitor.detectors.split_glr,
"Labels"; issue 12).

A slope alarm must beat every level-only change by a margin. A pure level shift that the slope
candidates explain as well as the level-only ones takes the slope label by chance with a
probability that falls about as exp(-margin), once per shift, while the budget that label error
must keep to (no more ``elasticity_change`` after a level shift than in control) falls as
1 / ARL0; so the margin is MARGIN (chi-square(1) 0.99 / 2, checked against scipy in
tests/test_regression_change.py) from ARL0 20,000 up and MARGIN + ln(ARL0 / 20,000), at least 1,
below. With the whole margin at ARL0 2,000, a change of
b under prices held for weeks waited for price steps that could no longer be explained by a
level shift, and the held-price in-control cells spent half their budget.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchmarks.detection_grid import KINDS, Runner
from monitor.detectors import split_glr as SG
from monitor.detectors.split_design import split_thresholds
from simulators.change_grid import Scenario, simulate


def test_the_margin_grows_with_log_arl0_and_reaches_the_whole_margin_at_20000():
    for arl0 in (20000.0, 50000.0, 1e6):
        assert SG.slope_margin(arl0) == SG.MARGIN
    assert SG.slope_margin(2000.0) == pytest.approx(SG.MARGIN - math.log(10.0))
    assert SG.slope_margin(5000.0) == pytest.approx(SG.MARGIN - math.log(4.0))
    assert SG.slope_margin(1000.0) == SG.slope_margin(20.0) == SG.MARGIN_MIN
    a = [SG.slope_margin(x) for x in np.geomspace(20.0, 1e6, 200)]
    assert np.all(np.diff(a) >= 0.0)


def test_the_pipeline_and_the_detector_class_carry_the_margin_of_their_arl0():
    from monitor.detectors.split_class import SplitGLR

    r = Runner(log=lambda *a: None)
    for arl0 in (2000.0, 20000.0):
        _, pipe = r.pipeline(arl0, 0)
        assert pipe._gp[SG.Q_SMARGIN] == SG.slope_margin(arl0)
        assert pipe._gp[SG.Q_LMARGIN] == SG.MARGIN             # the level alarm's is whole
        assert SplitGLR(arl0=arl0)._p[SG.Q_SMARGIN] == SG.slope_margin(arl0)


def test_the_design_uses_the_smaller_margin_below_20000():
    """The slope statistic is 0 or at least its margin: with the whole margin the ARL at
    threshold 3.32 was already above 1,000, so the table's slope thresholds for 500 and 1,000
    sat at 3.32. With the margin of ARL0 1,000 (1.0) the statistic is non-zero more often and the
    designed threshold is above that floor (simulated, 500 paths: 4.02)."""
    t = split_thresholds(1000.0)
    assert t.method == "precomputed"
    assert t.slope > SG.MARGIN + 0.4, t.slope


def test_a_change_of_b_under_held_prices_is_found_sooner_at_arl0_2000():
    """b moves by 0.8 with the intercept held under prices held 7-28 rows (the detection
    grid's 'steps' pattern), ARL0 2,000 (bound about 25 rows), 120 seeded series: the pipeline
    with the margin of its ARL0 (1.01) against the same pipeline, same thresholds, with the
    whole margin (3.32, the rule before). Measured on this seed: median delay 57.5 rows with the
    whole margin, 45 with 1.01; within 5 bounds 88% and 91% (the grid's cell, 200 series and the
    thresholds designed for each margin: 2.77 -> 2.33 bounds, 91% -> 92.5%)."""
    sc = Scenario("steps held", prices="steps", price_sd=0.15, change="slope_held", size=0.8,
                  change_at=600, n_obs=900)
    sim = simulate(sc, 120, seed=41)
    bound = sim.bound(2000.0)
    out = {}
    for name, margin in (("arl0", SG.slope_margin(2000.0)), ("whole", SG.MARGIN)):
        r = Runner(log=lambda *a: None)
        _, pipe = r.pipeline(2000.0, 0)
        pipe._gp[SG.Q_SMARGIN] = margin
        o, _, _ = r.run(sim, 2000.0, sc.change_at)
        out[name] = o.delay[KINDS[0]]
    new, old = out["arl0"], out["whole"]
    assert np.median(new) < np.median(old) - 6, (np.median(new), np.median(old))
    assert np.mean(new <= 5 * bound) >= np.mean(old <= 5 * bound)
