"""The level alarm's label under errors whose variance depends on the price: the level-only and
the slope-only ("pivot") alternatives of :func:`monitor.detectors.split_glr._level_vs_pivot`
each get the error variance its own score has given the after sample's prices
(:func:`monitor.detectors.split_glr._label_vars`; module docstring, "Labels").

Checked against the heteroskedasticity-robust score statistic of the same rows, ``G = theta^2 /
(2 Var_V(theta))`` with ``theta`` the change's coefficient in the least-squares fit of ``y`` on
``(1, x, z)`` and ``Var_V`` its sandwich variance with the detector's variance function as the
meat (White 1980; statsmodels' HC covariance with the known variances in place of squared
residuals, as tests/test_split_hetero.py does for the slope): by Frisch-Waugh-Lovell ``theta =
z'My / z'Mz`` and ``Var_V(theta) = z'MVMz / (z'Mz)^2``, so ``G = (z'My)^2 / (2 z'MVMz)``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from numba import njit
from statsmodels.stats.sandwich_covariance import _HCCM

from monitor.detectors import split_glr as SG

LP0 = math.log(10.0)
#: error variance exp(A t) in the standardized log price t: the benchmark's "variance grows
#: with price" pattern (sd 0.15 exp(3 (x - xbar)) at price sd 0.15)
A = 0.9


def _rows(rng, t, a=A, noise=0.15, sd=0.15):
    e = noise * np.exp(0.5 * a * t - a * a / 4.0) * rng.standard_normal(t.size)
    return LP0 + sd * t, 2.0 - sd * t + e, e


@njit(cache=True)
def _feed(st, x, y, e, p, out, first):  # pragma: no cover - numba
    """Feed the rows; from row ``first`` on (none if negative), after each row, add the
    level-only and pivot statistics of checkpoints 3 .. NHX - 1 (8-127 rows after) with r = 0
    to ``out[0, j]``, ``out[1, j]`` and count them in ``out[2, j]`` (one compiled function:
    each compile of the inlined step takes a while)."""
    for i in range(x.size):
        SG.split_step(st, 0, x[i], y[i], e[i], float(i), float(i), p)
        if first < 0 or i < first:
            continue
        s2 = st[SG.D_S2] / SG.WINSOR_K
        for j in range(3, SG.NHX):
            _, _, na, nb, gl0, gp = SG._candidate(st, 0, j, s2, 1.0, 0.0, 0.0, 0.0, 1.0,
                                                  False)
            out[0, j] += gl0
            out[1, j] += gp
            out[2, j] += 1.0


@njit(cache=True)
def _label(st, j):  # pragma: no cover - numba
    """Checkpoint j: (n_A, n_B, xbar_B, v_level, v_pivot, G_level, G_pivot, s2, g1, g2, sd(x)),
    no autocorrelation factor (r = 0), so the variances are the label's own."""
    o = SG.SLOT0 + SG.SLOT_W * j
    s2 = st[SG.D_S2] / SG.WINSOR_K
    na = st[SG.C0] - st[o]
    mxa, mya, cxa, cya, nb, mxb, myb, cxb, cyb = SG._samples(st, 0, o, na)
    vl, vp = SG._label_vars(st, 0, j, na, mxa, cxa, mxa - mxb, s2, False)
    _, _, _, _, gl0, gp = SG._candidate(st, 0, j, s2, 1.0, 0.0, 0.0, 0.0, 1.0, False)
    g1, g2, sx = SG._var_coef(st, 0)
    return na, nb, mxb, vl, vp, gl0, gp, s2, g1, g2, sx


def _state(tail_t, seed=11, n=1500, a=A):
    """A state fed ``n`` rows of independent prices then rows at the standardized prices
    ``tail_t``; thresholds out of reach (no alarm, no re-anchoring: B is every row before A)."""
    rng = np.random.default_rng(seed)
    t = np.r_[rng.standard_normal(n), tail_t]
    x, y, e = _rows(rng, t, a=a)
    st = np.zeros(SG.SPLIT_SIZE)
    _feed(st, x, y, e, SG.params(1e9, 1e9), np.zeros((3, SG.NHX)), -1)
    return st, x, y


def _robust_g(x, y, z, v):
    """The robust score statistic of regressor z (statsmodels' HC covariance, meat diag(v))."""
    res = sm.OLS(y, np.column_stack([np.ones_like(x), x, z])).fit()
    return 0.5 * res.params[2] ** 2 / _HCCM(res, v)[2, 2]


def test_label_statistics_are_the_robust_score_statistics_of_the_rows():
    # the after samples at high prices (t about 1.2), where the noise is largest: a pivot's
    # regressor x - xbar_B is largest at the farthest of them
    rng = np.random.default_rng(2)
    st, x, y = _state(1.2 + 0.6 * rng.standard_normal(64))
    checked = 0
    for j in range(3, SG.NHX):
        na, nb, mxb, vl, vp, gl0, gp, s2, g1, g2, sx = _label(st, j)
        n_a = int(round(na))
        assert g1 != 0.0 and g2 != 0.0 and nb == x.size - n_a    # significant; B = the rest
        xs = x - st[SG.D_X0]                                      # the detector's coordinates
        ts = (xs - st[SG.D_MX]) / sx
        v = s2 * (1.0 + g1 * ts + g2 * (ts * ts - 1.0))          # the model's variance function
        a = np.r_[np.zeros(x.size - n_a), np.ones(n_a)]
        zp = a * (xs - xs[:-n_a].mean())
        assert math.isclose(mxb, xs[:-n_a].mean(), rel_tol=1e-9, abs_tol=1e-12)
        # the weighted means of v over A: exact algebra from the moment sums (numpy)
        va, za = v[-n_a:], zp[-n_a:]
        assert vl == pytest.approx(va.mean(), rel=1e-7)
        assert vp == pytest.approx((za * za * va).sum() / (za * za).sum(), rel=1e-7)
        # and the statistics are the robust ones up to what the approximation drops (the
        # projection of z on the null line, of order n_A / n: measured 0.3-0.9 of it, the
        # robust statistic the larger; 0.7% for 13 rows after, 3.3% for 61)
        tol = 1.5 * n_a / x.size
        assert gl0 == pytest.approx(_robust_g(xs, y, a, v), rel=tol), j
        assert gp == pytest.approx(_robust_g(xs, y, zp, v), rel=tol), j
        # the old constant variance: the pivot's statistic 2.6-2.8x the robust one here
        assert gp * vp / s2 > 2.0 * _robust_g(xs, y, zp, v)
        # where the constant variance was far off (the pivot's 2.2-2.8 sigma^2 here)
        assert vp > 2.0 * s2 and vl > s2
        checked += 1
    assert checked == SG.NHX - 3


def test_a_held_after_price_keeps_the_tie_of_level_and_pivot():
    """A price held since the change: both variances are v(x1), the statistics tie exactly
    (module docstring, "Labels": neither label is earned)."""
    st, x, y = _state(np.full(40, 1.4))
    checked = 0
    for j in range(SG.NHX):
        na, nb, mxb, vl, vp, gl0, gp, s2, g1, g2, sx = _label(st, j)
        if na > 40.0:                                             # not held since its time
            continue
        checked += 1
        t1 = (x[-1] - st[SG.D_X0] - st[SG.D_MX]) / sx
        v1 = s2 * (1.0 + g1 * t1 + g2 * (t1 * t1 - 1.0))
        assert vl == pytest.approx(v1, rel=1e-9) and vp == pytest.approx(v1, rel=1e-9)
        assert vl > 2.0 * s2                                      # a far, noisy price
        assert gl0 > 0.0 and gp == pytest.approx(gl0, rel=1e-9), (j, gl0, gp)
    assert checked >= 5


def test_homoskedastic_rows_keep_the_label_statistics_to_the_bit():
    # no significant variance function: the one variance s2 (times the AR factor) as before
    st, x, y = _state(np.random.default_rng(3).standard_normal(64), a=0.0)
    for j in range(SG.NSLOT):
        na, nb, mxb, vl, vp, gl0, gp, s2, g1, g2, sx = _label(st, j)
        assert (vl, vp) == (-1.0, -1.0)
        o = SG.SLOT0 + SG.SLOT_W * j
        mxa, mya, cxa, cya, nb, mxb, myb, cxb, cyb = SG._samples(st, 0, o, na)
        want = SG._level_vs_pivot(na, nb, mxa - mxb, mya - myb, cxa, cya, cxb, cyb,
                                  s2 * SG._lrf(0.0, na), s2 * SG._lrf(0.0, na))
        assert (gl0, gp) == want


def test_in_control_pivot_statistic_has_its_null_mean_when_variance_grows_with_price():
    """Under no change each G is half a chi-square(1) variable, mean 1/2. With one variance
    the pivot's was inflated where its regressor is large, at the far prices where the noise
    is (measured on these rows with the old code: mean 0.820 for the pivot, 0.465 for the
    level); with its own variance 0.461 and 0.469."""
    rng = np.random.default_rng(17)
    out = np.zeros((3, SG.NHX))
    p = SG.params(1e9, 1e9)
    for _ in range(12):
        t = rng.standard_normal(2500)
        x, y, e = _rows(rng, t)
        _feed(np.zeros(SG.SPLIT_SIZE), x, y, e, p, out, 500)
    lev = out[0, 3:].sum() / out[2, 3:].sum()
    piv = out[1, 3:].sum() / out[2, 3:].sum()
    print(f"mean G level {lev:.3f}, pivot {piv:.3f}")
    assert abs(lev - 0.5) < 0.06 and abs(piv - 0.5) < 0.06
