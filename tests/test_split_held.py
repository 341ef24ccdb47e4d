"""A change of b with the intercept held (issue 12, "held" cells): the level at the typical
price moves by ``db log p0`` together with the slope, the level chart opens ``level_shift`` at
once, and the ``elasticity_change`` must follow near the information bound.

Cause of the miss before 5 December: the split GLR's scale is learnt from the estimator's
one-step innovations. The pipeline discounted the estimator after an elasticity change only,
so after the level alarm the estimator kept the old level (forgetting 0.995: about 200 rows to
absorb a step), and once the detector's 50-row scale hold ended its innovations carried the
step itself: the scale grew 3-4x the noise variance, and the slope statistic shrank by as
much (measured on seeded series of the sd 0.1, db 0.5 cell: the statistic at a third of the
GLR with the true change time and the true variance). The pipeline now discounts the estimator
after a level alarm too (monitor/pipeline/kernel.py).

References: Lorden (1971) for the bound ``ln(ARL0) / I`` with ``I = db^2 Var(x~) / (2 sigma^2)``
(computed from the simulated design by simulators.change_grid.Simulation.information).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchmarks.detection_grid import KINDS, Runner
from monitor.detectors import split_glr as SG
from simulators.change_grid import Scenario, simulate


@pytest.fixture(scope="module")
def runner():
    return Runner(log=lambda *a: None)


def _held(price_sd: float, size: float, n_after: int, prices: str = "independent"):
    return Scenario("held", prices=prices, price_sd=price_sd, change="slope_held", size=size,
                    change_at=600, n_obs=600 + n_after)


def test_held_change_is_found_near_the_bound(runner):
    """b moves by 0.5 with the intercept held, independent log prices sd 0.1, noise sd 0.15,
    ARL0 20,000 (bound about 178 rows): the level chart opens at once, and the elasticity
    change is found within 5 bounds in >= 20 of 24 series, median <= 2 bounds.

    Measured on this seed: before the fix 11 of 24 within 5 bounds, median 5.0 bounds (the
    benchmark's cell: 49% and 5.04x over 200 series); after it 22 of 24, median 1.05 (98% and
    1.02x over 40 series in the benchmark's cell). A detector at 95% within 5 bounds has a
    0.6% chance of fewer than 20 of 24 (binomial, scipy); the median of 24 delays is to about
    15%."""
    sc = _held(0.1, 0.5, 1000)
    sim = simulate(sc, 24, seed=31)
    bound = sim.bound(20000.0)
    assert 150 < bound < 210                  # ln(20000) / (0.25 x 0.01 / (2 x 0.0225)) = 178
    o, _, _ = runner.run(sim, 20000.0, sc.change_at)
    ec = o.delay[KINDS[0]]
    assert np.median(o.delay[KINDS[1]]) <= 5                      # the level moved by 1.15
    assert int(np.sum(ec <= 5 * bound)) >= 20, np.sort(ec)
    assert np.median(ec) <= 2.0 * bound, (np.median(ec), bound)


def test_scale_stays_at_the_noise_after_the_level_alarm(runner):
    """The split detector's scale (its winsorized mean square of the innovations, which the
    slope statistic divides by) 200 rows after a held change of 0.5 is near the noise variance
    0.15^2: median over 12 series below 1.5x (measured on this seed: 1.10 after the fix, 3.90
    before it, the innovations carrying the level step the estimator had not absorbed). Its
    sampling error is small: about 400 effective rows, sd about 7%."""
    sc = _held(0.1, 0.5, 200)
    sim = simulate(sc, 12, seed=32)
    est, pipe = runner.pipeline(20000.0, 0)
    res = pipe.run(sim.sid, sim.X, sim.y, n_series=sim.n_series, ts=sim.ts())
    ev = res.events
    opened = ev[(ev["action"] == "open") & (ev["kind"] == KINDS[1])]
    assert len(opened) >= 10                                      # the level alarm came first
    at = pipe.layout()["split"][0]
    ratio = res.states[:, at + SG.D_S2] / SG.WINSOR_K / 0.15 ** 2
    assert np.all(np.isfinite(ratio))
    assert float(np.median(ratio)) < 1.5, np.round(ratio, 2)


def test_held_change_under_step_prices_is_found(runner):
    """Step prices (held 7 to 28 rows), sd 0.15, b moves by 0.8 with the intercept held, ARL0
    2,000 (bound about 24 rows): the level alarm waits for the price to move after the change,
    the slope change needs a move or two more. Within 5 bounds in >= 16 of 24 series.

    Measured on this seed: before the fix 14 of 24 (the benchmark's cell over 40 series: 70%),
    after it 19 of 24 (82% over 40 series in the benchmark's cell, still short of the issue's
    95%: the slope information after the level alarm comes only from later price moves). A
    detector at 85% has a 0.6% chance of fewer than 16 of 24 (binomial, scipy)."""
    sc = _held(0.15, 0.8, 400, prices="steps")
    sim = simulate(sc, 24, seed=33)
    bound = sim.bound(2000.0)
    assert 15 < bound < 35
    o, _, _ = runner.run(sim, 2000.0, sc.change_at)
    ec = o.delay[KINDS[0]]
    assert int(np.sum(ec <= 5 * bound)) >= 16, (np.sort(ec), bound)
    assert math.isfinite(float(np.median(ec)))
