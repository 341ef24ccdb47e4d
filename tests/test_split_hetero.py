"""The split GLR under errors whose variance depends on the price (issue 12, in-control
calibration): each row is winsorized at its own standard deviation, and the after sample's
slope variance is the one given its own prices (monitor.detectors.split_glr, "Scale,
autocorrelation and heteroskedasticity"). Small seeded simulations; the benchmark's grid
(``make bench``, detection) has the larger ones."""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from numba import njit
from scipy import integrate, stats
from statsmodels.stats.sandwich_covariance import _HCCM

from monitor.detectors import split_glr as SG
from monitor.estimators import ElasticityRLS
from monitor.estimators import kernel as K
from tests.pipeline_helpers import restores_without_block

LP0 = math.log(10.0)
#: the error variance grows as exp(A t) with the standardized log price t (the benchmark's
#: "variance grows with price" pattern: sd exp(3 (x - xbar)) at price sd 0.15, A = 0.9)
A = 0.9


def _rows(rng, n, a=A, sd=0.15, noise=0.15):
    """log p, log q and the true errors: b = -1, error variance noise^2 exp(a t - a^2 / 2)."""
    t = rng.standard_normal(n)
    e = noise * np.exp(0.5 * a * t - a * a / 4.0) * rng.standard_normal(n)
    return LP0 + sd * t, 2.0 - sd * t + e, e, t


@njit(cache=True)
def _feed(st, x, y, e, p, kap):  # pragma: no cover - numba
    for i in range(x.size):
        SG.split_step(st, 0, x[i], y[i], e[i], float(i), float(i), p)
        d = st[SG.D_S2] * st[SG.D_XX]
        kap[i] = st[SG.D_UU] / d if d > 0.0 else np.nan


@njit(cache=True)
def _after(st, j, weighted):  # pragma: no cover - numba
    o = SG.SLOT0 + SG.SLOT_W * j
    na = st[SG.C0] - st[o]
    mxa, _, cxa, _ = SG._moments(na, st[SG.C0 + 1] - st[o + 1], st[SG.C0 + 2] - st[o + 2],
                                 st[SG.C0 + 3] - st[o + 3], st[SG.C0 + 4] - st[o + 4])
    s2 = st[SG.D_S2] / SG.WINSOR_K
    g1, g2, sx = SG._var_coef(st, 0)
    return na, SG._after_var(st, 0, j, na, mxa, cxa, s2, weighted), s2, g1, g2, sx


def test_sandwich_factor_is_unbiased_when_the_variance_grows_with_price():
    # population value of kappa = E[t^2 v] / E[v] for v = exp(A t), t ~ N(0, 1): 1 + A^2
    # (the normal's moment generating function), checked by quadrature (scipy)
    num = integrate.quad(lambda t: t * t * math.exp(A * t) * stats.norm.pdf(t), -12, 12)[0]
    den = integrate.quad(lambda t: math.exp(A * t) * stats.norm.pdf(t), -12, 12)[0]
    pop = num / den
    assert pop == pytest.approx(1.0 + A * A, rel=1e-9)
    x, y, e, _ = _rows(np.random.default_rng(5), 20000)
    st, kap = np.zeros(SG.SPLIT_SIZE), np.zeros(x.size)
    _feed(st, x, y, e, SG.params(1e9, 1e9), kap)
    got = float(np.nanmean(kap[1000:]))
    # winsorized at 4 average sigmas (before) the high-price rows lost their squares: 1.61
    # here (11% low); at each row's own sigma 1.75
    assert abs(got / pop - 1.0) < 0.06, (got, pop)


def test_after_sample_variance_is_the_sandwich_given_its_prices():
    """For each checkpoint that keeps the sums of x^3, x^4, the after sample's slope variance
    is the sandwich (X'X)^-1 X' diag(v) X (X'X)^-1 of its own regression on (1, x) with the
    detector's variance function v as the meat (White 1980; statsmodels' HC covariance with
    the known variances in place of squared residuals)."""
    rng = np.random.default_rng(11)
    x, y, e, _ = _rows(rng, 1500)
    st, kap = np.zeros(SG.SPLIT_SIZE), np.zeros(x.size)
    _feed(st, x, y, e, SG.params(1e9, 1e9), kap)
    assert st[SG.HX_ON] == 1.0
    checked = 0
    for j in range(3, SG.NHX):
        na, va, s2, g1, g2, sx = _after(st, j, False)
        n = int(round(na))
        assert g1 != 0.0 and g2 != 0.0                       # significant at these sizes
        xa = x[-n:] - st[SG.D_X0]                             # the detector's coordinates
        t = (xa - st[SG.D_MX]) / sx
        v = s2 * (1.0 + g1 * t + g2 * (t * t - 1.0))
        res = sm.OLS(y[-n:], sm.add_constant(xa)).fit()
        want = _HCCM(res, v)[1, 1]
        assert va == pytest.approx(want, rel=1e-7), (j, n)
        checked += 1
    assert checked == SG.NHX - 3
    # the youngest checkpoints without the sums, and working weights, use the average's
    assert _after(st, SG.NHX, False)[1] == -1.0
    assert _after(st, 3, True)[1] == -1.0


def test_homoskedastic_rows_keep_the_average_variance_to_the_bit():
    # constant variance: neither coefficient of the variance function is significant, so the
    # after sample's variance and the row's winsorizing limit are the average's (split_glr)
    rng = np.random.default_rng(12)
    x, y, e, _ = _rows(rng, 1500, a=0.0)
    st, kap = np.zeros(SG.SPLIT_SIZE), np.zeros(x.size)
    _feed(st, x, y, e, SG.params(1e9, 1e9), kap)
    for j in range(3, SG.NHX):
        na, va, s2, g1, g2, _ = _after(st, j, False)
        assert (g1, g2, va) == (0.0, 0.0, -1.0)


T0 = np.datetime64("2026-01-05T00:00:00", "ns").astype(np.int64)
DAY = 86_400 * 10**9


def _pipeline(arl0=2000.0):
    from monitor.pipeline.run import Pipeline
    from monitor.pipeline.settings import DetectorSettings
    return Pipeline(ElasticityRLS(forgetting=0.99),
                    DetectorSettings(arl0=arl0, change_detector="split_glr"))


def _panel(n_series, n, seed):
    rng = np.random.default_rng(seed)
    cols = [_rows(rng, n) for _ in range(n_series)]
    x = np.column_stack([c[0] for c in cols])
    y = np.column_stack([c[1] for c in cols])
    sid = np.tile(np.arange(n_series), n).astype(np.int64)
    X = np.column_stack([np.ones(n * n_series), x.ravel()])
    return sid, X, y.ravel(), np.repeat(T0 + np.arange(n) * DAY, n_series)


@pytest.mark.slow
def test_in_control_slope_alarms_hold_the_design_when_variance_grows_with_price():
    """ARL0 2,000: slope alarms per row within Monte Carlo error of 1 / 2,000 (count sd ~
    sqrt(count), the design's own about 5%). Before the row's own winsorizing limit and the
    after sample's own variance this panel's rate was about 1.7x the design."""
    from monitor.pipeline.kernel import S_LEVEL_FLAGS, S_SLOPE_FLAGS
    n_series, n = 150, 2000
    sid, X, y, ts = _panel(n_series, n, seed=23)
    res = _pipeline().run(sid, X, y, n_series, ts=ts, keep_signals=True)
    live = res.out[:, 5] != 0                      # rows past the estimator's warm-up
    expected = live.sum() / 2000.0
    got = int(((res.signals[:, S_SLOPE_FLAGS].astype(np.int64) & 1) != 0).sum())
    level = int(((res.signals[:, S_LEVEL_FLAGS].astype(np.int64) & 1) != 0).sum())
    print(f"slope {got}, level {level} alarms, {expected:.0f} expected")
    assert abs(got / expected - 1.0) < 4.0 * math.sqrt(1.0 / expected + 0.05 ** 2)


def test_a_state_of_the_previous_layout_resumes_with_the_variance_sums_off():
    # a row of the layout without the sums of x^3, x^4 (HX_SIZE floats fewer) is upgraded
    # with zeros (flag off); it runs on, and the flag comes on when the window restarts
    from monitor.pipeline.run import L_SPLIT
    pipe = _pipeline()
    sid, X, y, ts = _panel(1, 400, seed=4)
    res = pipe.run(sid, X, y, 1, ts=ts)
    row = res.states[0]
    at = int(pipe._layout[L_SPLIT]) + SG.HX0
    assert row[at] == 1.0                                  # charts started: flag on
    # (that layout had no aligned level candidates nor the prices' lag-1 moments either:
    # they follow the sums of x^3, x^4)
    up = restores_without_block(pipe, row, at, SG.HX_SIZE + SG.AL_SIZE + SG.PX_SIZE)
    st = up.copy()
    SG.reanchor_slope(st, int(pipe._layout[L_SPLIT]), SG.params(1.0, 1.0))  # restart
    assert st[at] == 1.0
    more = pipe.run(sid, X, y, 1, ts=ts + 400 * DAY, states=up[None, :].copy())
    assert np.all(np.isfinite(more.out[-100:, K.O_BETA]))


def test_a_streaming_detector_saved_before_resumes_with_the_variance_sums_off():
    from monitor.detectors.split_class import SplitGLR
    rng = np.random.default_rng(6)
    x, y, e, _ = _rows(rng, 300)
    det = SplitGLR(arl0=20000)
    for i in range(x.size):
        det.update(x[i], y[i], e[i], ts=float(i))
    saved = det.to_state()
    full = np.array(saved["state"], dtype=float)
    # the layout before the sums of x^3, x^4 had no controls' sums either
    old = dict(saved, state=list(full[:SG.HX0]))
    back = SplitGLR.from_state(old)
    assert np.array_equal(back._state[:SG.HX0], full[:SG.HX0], equal_nan=True)
    assert np.all(back._state[SG.HX0:] == 0.0)
    same = SplitGLR.from_state(saved)
    assert np.array_equal(same._state, full, equal_nan=True)
    alarms = 0
    for i in range(50):                                  # both run on
        alarms += back.update(x[i], y[i], e[i], ts=300.0 + i).alarm is not None
        same.update(x[i], y[i], e[i], ts=300.0 + i)
    assert np.isfinite(back.statistics[0]) and np.isfinite(same.statistics[0])
    assert same._state[SG.HX_ON] == 1.0
    # off until the window restarts (an alarm re-anchors it)
    assert alarms > 0 or back._state[SG.HX_ON] == 0.0
