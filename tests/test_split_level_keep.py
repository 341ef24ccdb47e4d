"""After a level alarm the split GLR keeps the new regime's rows in its window, split at the
data-placed change time (issue 12: "the intercept and controls may change at the same time";
a change of b with the intercept held is how many real changes look).

Before 5 December 14:00 a level alarm retired the level of every row in the window, those
after the change time too, and the slope chart started again from the rows after the alarm:
under step prices one price step there is explained as well by a second level shift at that
step as by a change of b, so the ``elasticity_change`` waited for the 3rd-5th price step of
the new regime (traced, grid cell steps sd0.15 held db0.8 at ARL0 2,000: 3.15 times the
information bound, 84% within 5 times). Now the rows since the change time of the level
alarm's best data-placed candidate (the last reset of a CUSUM of the innovations; Page 1954,
Hinkley 1971) stay in the window with their level, so the candidate at the window start is the
two-sample slope test at the change time with a free level on each side (Chow 1960), fed by
every row of the new regime.
"""

from __future__ import annotations

import numpy as np
import pytest

from benchmarks.detection_grid import KINDS, Runner, slope_cells
from monitor.detectors import split_glr as SG
from simulators.change_grid import simulate


def _sums(x, y):
    return np.array([len(x), x.sum(), (x * x).sum(), y.sum(), (x * y).sum()])


def test_a_level_alarm_keeps_the_rows_since_the_aligned_change_time():
    """Sums after the re-anchoring, against numpy on the raw rows: the window holds exactly
    the rows since the aligned candidate's change time, every checkpoint younger than it holds
    the rows since it up to the checkpoint (older ones are empty), the level-free part holds
    the centred sums of the rows before it, and the reference is empty; the rows that come
    after keep entering the window. A -1.0 level shift at row 400 (6.7 noise sd) with prices
    held 20 rows: the CUSUM places the change at the shift."""
    rng = np.random.default_rng(5)
    n, r = 460, 400
    x = np.repeat(rng.normal(0.0, 0.15, n // 20 + 1), 20)[:n]
    y = 2.0 - 1.0 * x + rng.normal(0.0, 0.15, n)
    y[r:] -= 1.0
    st = np.zeros(SG.state_size())
    p = SG.params(h_slope=1e9, h_level=6.0)
    alarm = -1
    for t in range(n):
        f = SG.split_step(st, 0, x[t], y[t], y[t] - (2.0 - 1.0 * x[t]), float(t), float(t), p)
        if f & SG.SG_LEVEL:
            alarm = t
            break
    assert r <= alarm < r + 25, alarm
    s2, kap, rs, rl = SG._scales(st, 0)
    g = [SG._level_o(st, 0, SG.AL0 + SG.AL_W * d + 2, s2, kap, rs, rl, 1.0, False)
         if st[SG.AL0 + SG.AL_W * d + 1] else -1.0 for d in range(SG.NAL)]
    d = int(np.argmax(g))
    assert g[d] > SG.KEEP_LEVEL * p[SG.Q_HL]          # a strong alarm: the rows are kept
    tau = alarm + 1 - int(st[SG.C0] - st[SG.AL0 + SG.AL_W * d + 2])
    assert tau == r                                   # the CUSUM placed it at the shift
    SG.reanchor_level(st, 0, p)
    xs, ys = x - x[0], y
    np.testing.assert_allclose(st[SG.C0:SG.C0 + 5], _sums(xs[tau:alarm + 1], ys[tau:alarm + 1]),
                               rtol=1e-10, atol=1e-9)
    assert np.all(st[SG.R0:SG.R0 + 5] == 0.0)
    xb, yb = xs[:tau], ys[:tau]
    np.testing.assert_allclose(st[SG.L0:SG.L0 + 3],
                               [tau, ((xb - xb.mean()) ** 2).sum(),
                                ((xb - xb.mean()) * (yb - yb.mean())).sum()], rtol=1e-9)
    for j in range(SG.NSLOT):
        o = SG.SLOT0 + SG.SLOT_W * j
        k = int(round(st[o]))
        np.testing.assert_allclose(st[o:o + 5], _sums(xs[tau:tau + k], ys[tau:tau + k]),
                                   rtol=1e-10, atol=1e-9)
        assert st[o + 5] <= alarm and (k > 0 or st[o + 5] == tau)   # rows evenly spaced
    for t in range(alarm + 1, n):                     # the rows keep coming into the window
        SG.split_step(st, 0, x[t], y[t], y[t] - (1.0 - 1.0 * x[t]), float(t), float(t), p)
    np.testing.assert_allclose(st[SG.C0:SG.C0 + 5], _sums(xs[tau:], ys[tau:]), rtol=1e-10,
                               atol=1e-9)


def test_a_weak_level_alarm_still_retires_the_after_sample():
    """An alarm whose data-placed level statistic is below twice the level threshold (an
    in-control false alarm is one) keeps the earlier re-anchoring: every sum of the window
    leaves it (the after sample's level is the selected, overshooting one)."""
    rng = np.random.default_rng(11)
    n, r = 700, 400
    x = rng.normal(0.0, 0.15, n)
    y = 2.0 - 1.0 * x + rng.normal(0.0, 0.15, n)
    y[r:] += 0.12                                     # 0.8 noise sd
    st = np.zeros(SG.state_size())
    p = SG.params(h_slope=1e9, h_level=6.0)
    for t in range(n):
        f = SG.split_step(st, 0, x[t], y[t], y[t] - (2.0 - 1.0 * x[t]), float(t), float(t), p)
        if f & SG.SG_LEVEL:
            break
    assert f & SG.SG_LEVEL
    s2, kap, rs, rl = SG._scales(st, 0)
    g = max(SG._level_o(st, 0, SG.AL0 + SG.AL_W * d + 2, s2, kap, rs, rl, 1.0, False)
            for d in range(SG.NAL) if st[SG.AL0 + SG.AL_W * d + 1])
    assert g < 2.0 * p[SG.Q_HL], g
    SG.reanchor_level(st, 0, p)
    assert np.all(st[SG.C0:SG.C0 + 5] == 0.0) and np.all(st[SG.R0:SG.R0 + 5] == 0.0)


@pytest.fixture(scope="module")
def runner():
    return Runner(log=lambda *a: None)


def test_a_change_of_b_with_the_intercept_held_under_step_prices(runner):
    """The grid's cell steps sd0.15 held db0.8 at ARL0 2,000 (bound 24 rows), 200 series,
    seed 12: ``elasticity_change`` after a median of at most 70 rows and within 5 bounds (120
    rows) in at least 88% of series. Measured: before the change 75 rows and 84%; with it 66.5
    and 91%. The level_shift still opens first (at the first price step after the change)."""
    sc = next(c for c in slope_cells() if c.name == "steps sd0.15 held db0.8")
    sc = sc.with_(change_at=600, n_obs=1600)
    sim = simulate(sc, 200, seed=12)
    o, _, _ = runner.run(sim, 2000.0, sc.change_at)
    ec = o.delay[KINDS[0]]
    assert np.median(ec) <= 70.0, np.median(ec)
    assert np.mean(ec <= 120.0) >= 0.88, np.mean(ec <= 120.0)
    assert np.median(o.delay[KINDS[1]]) < np.median(ec)
