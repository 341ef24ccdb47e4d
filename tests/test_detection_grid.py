"""Small seeded versions of issue 12's detection checks, and the change-grid simulator's truth.

The full grid (every price and error pattern, both ARL0, hundreds of series per cell) runs in
``make bench`` (benchmarks/detection_grid.py); here each check uses one cell at ARL0 2,000
(alerts are ten times as frequent as at 20,000, so a rate is measured to the same relative
error from ten times fewer observations) with a tolerance set from the Monte Carlo error at the
size used, stated beside it.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from benchmarks.detection_grid import KINDS, Runner, oracle_delays, outcome
from simulators.change_grid import Scenario, simulate

ARL0 = 2000.0


# ---------------------------------------------------------------------------- the simulator

def _series(sim, s):
    T, S = sim.n_obs, sim.n_series
    return sim.X.reshape(T, S, -1)[:, s], sim.y.reshape(T, S)[:, s]


def test_slope_changes_are_what_they_say():
    """OLS (statsmodels) on each side of the change recovers b before and after, and a pivot
    change leaves demand at the typical price where it was while a held intercept moves it by
    size * log(p0)."""
    for form in ("slope_pivot", "slope_held"):
        sc = Scenario("t", change=form, size=0.5, n_obs=4000, change_at=2000)
        sim = simulate(sc, 2, seed=4)
        for s in range(2):
            X, y = _series(sim, s)
            mu = math.log(sc.p0)
            Xc = np.column_stack([np.ones(len(y)), X[:, 1] - mu])   # level at the typical price
            pre = sm.OLS(y[:2000], Xc[:2000]).fit()
            post = sm.OLS(y[2000:], Xc[2000:]).fit()
            db = sim.sign[s] * 0.5
            # 2000 rows, sd(log p) 0.15, noise 0.15: se(b) = 0.15 / (0.15 sqrt(2000)) = 0.022;
            # se(level) = 0.15 / sqrt(2000) = 0.0034; 5 se
            assert abs(pre.params[1] - sc.b0) < 0.12
            assert abs(post.params[1] - (sc.b0 + db)) < 0.12
            level_move = post.params[0] - pre.params[0]
            expected = 0.0 if form == "slope_pivot" else db * mu
            assert abs(level_move - expected) < 0.025


def test_level_shift_moves_only_the_level():
    sc = Scenario("t", change="level", size=-0.5, n_obs=4000, change_at=2000)
    sim = simulate(sc, 1, seed=5)
    X, y = _series(sim, 0)
    pre = sm.OLS(y[:2000], X[:2000]).fit()
    post = sm.OLS(y[2000:], X[2000:]).fit()
    assert abs(post.params[1] - pre.params[1]) < 0.17          # 2 x 0.022 se, 4 se
    # the log level moves by log(0.5); se of the difference of the two levels at the typical
    # price about 0.0048: 5 se
    mu = math.log(sc.p0)
    moved = (post.params[0] + post.params[1] * mu) - (pre.params[0] + pre.params[1] * mu)
    assert abs(moved - math.log(0.5)) < 0.025


def test_error_and_price_patterns():
    """AR(1) errors have the stated lag-1 autocorrelation (statsmodels acf); step prices are
    held 7 to 28 observations; the collinear stretch puts the price on the control."""
    sc = Scenario("t", errors="ar1", rho=0.6, n_obs=20000)
    sim = simulate(sc, 1, seed=6)
    X, y = _series(sim, 0)
    u = y - (4.0 - sc.b0 * math.log(sc.p0)) - sc.b0 * X[:, 1]
    from statsmodels.tsa.stattools import acf

    assert abs(acf(u, nlags=1)[1] - 0.6) < 0.03        # se about 1 / sqrt(20000) x 1.3: 4 se
    assert abs(u.std() - sc.noise_sd) < 0.01
    st = simulate(Scenario("t", prices="steps", n_obs=3000), 3, seed=7)
    for s in range(3):
        x = _series(st, s)[0][:, 1]
        cuts = np.flatnonzero(np.diff(x) != 0) + 1
        runs = np.diff(cuts)
        assert runs.min() >= 7 and runs.max() <= 28
    co = simulate(Scenario("t", prices="collinear", n_obs=2000, change_at=1000), 2, seed=8)
    X = co.X.reshape(2000, 2, 3)
    a = 1000 // 2 - 150
    np.testing.assert_allclose(X[a:a + 300, :, 1] - math.log(10.0), X[a:a + 300, :, 2])


def test_information_matches_the_formula():
    """I = db^2 sd^2 / (2 sigma^2) for independent prices (Lorden 1971 with the normal
    Kullback-Leibler information), and with AR(1) errors the pre-whitened price gives
    db^2 sd^2 (1 + rho^2) / (2 sigma^2 (1 - rho^2)) (the GLS information; common practice)."""
    sim = simulate(Scenario("t", change="slope_pivot", size=0.5, n_obs=6000, change_at=1000),
                   20, seed=9)
    want = 0.25 * 0.0225 / (2 * 0.0225)
    # 5000 rows x 20 series: the sample variance of x is within about 0.3% (1 se)
    assert abs(sim.information().mean() / want - 1) < 0.02
    assert abs(sim.bound(20000) - math.log(20000) / want) / (math.log(20000) / want) < 0.02
    ar = simulate(Scenario("t", change="slope_pivot", size=0.5, errors="ar1", rho=0.5,
                           n_obs=6000, change_at=1000), 20, seed=9)
    want_ar = 0.25 * 0.0225 * 1.25 / (2 * 0.0225 * 0.75)
    assert abs(ar.information().mean() / want_ar - 1) < 0.02


def test_outcome_scores_delays_labels_and_rates():
    """The scoring of alert openings on a hand-made case."""
    sim = simulate(Scenario("t", change="slope_pivot", size=0.5, n_obs=50, change_at=20), 3,
                   seed=1)
    S = 3
    # series 0: level shift at 22 then elasticity change at 25; series 1: elasticity at 10
    # (before the change) and 30; series 2: nothing
    rows = np.array([22 * S + 0, 25 * S + 0, 10 * S + 1, 30 * S + 1])
    kinds = np.array([1, 0, 0, 0])
    cobs = np.array([np.nan, 19.0, 5.0, 24.0])
    o = outcome(sim, rows, kinds, cobs, 20, start=np.array([0, 0, 0]))
    np.testing.assert_array_equal(o.delay[KINDS[0]], [5.0, 10.0, np.inf])
    np.testing.assert_array_equal(o.delay[KINDS[1]], [2.0, np.inf, np.inf])
    np.testing.assert_array_equal(o.first_kind, [1, 0, -1])
    np.testing.assert_array_equal(o.change_err[:2], [1.0, 4.0])
    assert o.counts == {KINDS[0]: 3, KINDS[1]: 1} and o.obs == 150
    # the last elasticity_change before the change (elmon starts again there): series 1 at 10
    np.testing.assert_array_equal(o.last_ec_before, [-1, 10, -1])


def test_known_time_oracle_matches_two_regressions():
    """The bench's known-time oracle against statsmodels: b before and after the change from
    two OLS fits (each with its own intercept), variances sigma^2 (X'X)^-1 with the true sigma
    (normalized_cov_params), first row where (b_A - b_B)^2 / (2 (v_A + v_B)) passes h; with
    the before sample starting at a given row per series."""
    sim = simulate(Scenario("t", prices="steps", change="slope_held", size=0.8, n_obs=400,
                            change_at=250), 4, seed=3)
    T, S, at, h = sim.n_obs, sim.n_series, 250, 4.68
    first = np.array([0, 200, 150, 225])
    got = oracle_delays(sim, at, h, first, T - at)
    x = sim.X[:, 1].reshape(T, S)
    y = sim.y.reshape(T, S)
    sig2 = sim.sigma.reshape(T, S) ** 2

    def fit(xs, ys):
        if np.ptp(xs) == 0.0:
            return np.nan, np.nan
        r = sm.OLS(ys, sm.add_constant(xs, has_constant="add")).fit()
        return r.params[1], r.normalized_cov_params[1, 1]

    for s in range(S):
        bb, cb = fit(x[first[s]:at, s], y[first[s]:at, s])
        want = np.inf
        for na in range(2, T - at + 1):
            ba, ca = fit(x[at:at + na, s], y[at:at + na, s])
            if np.isfinite(ba) and (ba - bb) ** 2 / (2 * (sig2[at, s] * ca + sig2[at - 1, s] * cb)) > h:
                want = float(na - 1)
                break
        assert got[s] == want, (s, got[s], want)
    assert np.isfinite(got).sum() >= 2          # the check is not vacuous


# ---------------------------------------------------------------------------- detection

@pytest.fixture(scope="module")
def runner():
    return Runner(log=lambda *a: None)


def _poisson_hi(expected: float, p: float = 0.999) -> float:
    return float(stats.poisson.ppf(p, expected))


@pytest.mark.slow
def test_in_control_rate_holds_on_independent_prices(runner):
    """Alerts of each kind per observation near 1 / ARL0 with independent prices.

    400 series x 1,500 observations at ARL0 2,000: about 290 alerts expected per kind after
    warm-up, Poisson sd 6%; the +-25% band of the issue is about 4 sd wide, so a correct design
    fails it with probability about 1e-4.
    """
    sim = simulate(Scenario("ic", n_obs=1500), 400, seed=21)
    o, _, _ = runner.run(sim, ARL0, sim.n_obs)
    for k in KINDS:
        ratio = o.counts[k] / (o.obs / ARL0)
        assert 0.75 <= ratio <= 1.25, (k, o.counts[k], o.obs / ARL0)


@pytest.mark.slow
def test_level_chart_keeps_its_design_with_autocorrelated_errors(runner):
    """Level alerts per observation at most 1.25 / ARL0 with AR(1) errors of 0.3 and 0.6.

    The level chart's scale froze while its statistic was above half its threshold (2.54 at
    ARL0 2,000), not at the design's 4.0 (split_glr.HOT_LEVEL). 300 series x 2,000
    observations (about 300 alerts expected per cell at the design rate), measured over seeds
    1-8: 1.39 / 1.73 (sd over seeds 0.09 / 0.06) with the freeze at half the threshold, 0.97 /
    0.83 (sd 0.06 / 0.06) at the design's point. Seed 12 gives 0.99 / 0.93 (1.46 / 1.81
    with the level point at half the threshold on the same code, set through the parameter
    vector); its AR(1) 0.6 draw holds the series of the next test, which raised 53 level alerts
    before the hold after an alarm waited for split_glr.FREEZE_MIN_W (then 1.11).
    """
    for rho in (0.3, 0.6):
        sim = simulate(Scenario(f"AR(1) {rho}", errors="ar1", rho=rho), 300, seed=12)
        o, _, _ = runner.run(sim, ARL0, sim.n_obs)
        ratio = o.counts[KINDS[1]] / (o.obs / ARL0)
        assert ratio <= 1.25, (rho, o.counts[KINDS[1]], o.obs / ARL0)


def test_a_scale_frozen_early_does_not_loop(runner):
    """A series whose scale froze after 37 rows at 0.45 times the others' (AR(1) errors 0.6)
    raised 53 level alerts, one every 30-40 rows to its end: the low scale kept the level
    statistic hot and each alarm re-armed the hold, so the scale never updated again. An
    alarm now holds the scale only once it rests on split_glr.FREEZE_MIN_W of weight (57 rows);
    a hot statistic freezes it at any weight, as in the design runs."""
    sim = simulate(Scenario("AR(1) 0.6", errors="ar1", rho=0.6), 300, seed=12)
    one = sim.sid == 266
    est, pipe = runner.pipeline(ARL0, 0)
    res = pipe.run(np.zeros(int(one.sum()), np.int64), sim.X[one], sim.y[one], n_series=1,
                   ts=sim.ts()[one])
    ev = res.events
    level = int(np.sum((ev["action"] == "open") & (ev["kind"] == KINDS[1])))
    # 2,000 rows at ARL0 2,000: 1 alert expected, 5 has Poisson probability 0.004
    assert level <= 5, level


@pytest.mark.slow
def test_no_burst_when_the_charts_start(runner):
    """Alerts in the first 200 observations after warm-up at no more than the design rate:
    the count is below the 99.9% Poisson quantile of 1.25 x the design expectation."""
    sim = simulate(Scenario("start", n_obs=300), 1000, seed=22)
    o, _, _ = runner.run(sim, ARL0, sim.n_obs)
    for k in KINDS:
        exp = 1.25 * o.start_obs / ARL0             # about 125 x 1.25
        assert o.start_counts[k] <= _poisson_hi(exp), (k, o.start_counts[k], exp)


@pytest.mark.slow
def test_slope_change_near_the_bound(runner):
    """A pivot change of 0.8 in b, independent prices sd 0.15: median delay <= 2 bounds and
    >= 95% found within 5 bounds. 120 series: the sample median's relative error is about
    1.25 / sqrt(120) x (spread of delays / median, about 0.6) = 7%, and a 95% target has a
    binomial sd of 2%: the checks allow 2x bound + 7% and 91% (2 sd)."""
    sc = Scenario("slope", change="slope_pivot", size=0.8, n_obs=900, change_at=600)
    sim = simulate(sc, 120, seed=23)
    bound = sim.bound(ARL0)
    o, _, _ = runner.run(sim, ARL0, sc.change_at)
    d = o.delay[KINDS[0]]
    assert np.median(d) <= 2.0 * 1.07 * bound, (np.median(d), bound)
    assert np.mean(d <= 5 * bound) >= 0.91
    first = o.first_delay <= 5 * bound
    assert np.mean(o.first_kind[first] == 0) >= 0.91                 # labelled a slope change
    err = np.nanmedian(o.change_err[d <= 5 * bound])
    assert err <= 0.5 * np.median(d) * 1.15


@pytest.mark.slow
def test_level_shift_is_not_an_elasticity_change(runner):
    """A -50% level shift under step prices (the case that raised elasticity_change in 74% of
    series before issue 12) raises it at no more than the in-control rate: the count in the
    500 observations after the shift is below the 99.9% Poisson quantile of 1.25 x design."""
    sc = Scenario("lvl", prices="steps", change="level", size=-0.5, n_obs=1100, change_at=600)
    sim = simulate(sc, 400, seed=24)
    o, _, _ = runner.run(sim, ARL0, sc.change_at)
    exp = 1.25 * 400 * 500 / ARL0
    assert o.window_counts[KINDS[0]] <= _poisson_hi(exp), (o.window_counts[KINDS[0]], exp)


@pytest.mark.slow
def test_level_shift_is_found_at_once(runner):
    """A -50% level shift carries about 10 nats per observation (log(0.5)^2 / (2 x 0.15^2)):
    the level chart should open within a few observations in nearly every series; >= 90% within
    50 observations (400 series: binomial sd 1.5%). Measured 14:30 UTC: 398 of 400 (88% at
    11:40, before the level-only alternatives of the slope alarm included the shift's first
    rows and before the cooldown stopped dropping alarms)."""
    sc = Scenario("lvl", prices="steps", change="level", size=-0.5, n_obs=1100, change_at=600)
    sim = simulate(sc, 400, seed=24)
    o, _, _ = runner.run(sim, ARL0, sc.change_at)
    assert np.mean(o.delay[KINDS[1]] <= 50) >= 0.9


@pytest.mark.slow
def test_second_change_while_the_first_alert_is_open(runner):
    """b moves by 0.8 and back 150 observations later: the second change is found about as
    fast as the same change in a fresh series (median within 1.3x; 120 series each, medians
    to about 7%)."""
    a = Scenario("two", change="two_slopes", size=0.8, change_at=600, second_gap=150,
                 n_obs=1100)
    b = a.with_(change="second_only")
    meds = []
    for sc in (a, b):
        sim = simulate(sc, 120, seed=25)
        o, _, _ = runner.run(sim, ARL0, sim.second_at)
        meds.append(float(np.median(o.delay[KINDS[0]])))
    assert meds[0] <= 1.3 * meds[1], meds
