"""The split GLR's slope score under serially correlated errors with prices that move freely
(issue 12, in-control calibration): the score ``u = (x - xbar) e`` of independent prices and
errors has lag-1 autocorrelation ``rho_x rho_e``, so its variance factor is capped by the prices'
own lag-1 autocorrelation times the errors' (monitor.detectors.split_glr, "Scale,
autocorrelation and heteroskedasticity"). Small seeded simulations; the benchmark's grid
(``make bench``, detection) has the larger ones."""

from __future__ import annotations

import math

import numpy as np
from numba import njit
from statsmodels.tsa.stattools import acf

from monitor.detectors import split_glr as SG

LP0 = math.log(10.0)


def _ar1(rng, n, r):
    """A stationary AR(1) path of unit variance with lag-1 autocorrelation ``r``."""
    z = rng.standard_normal(n)
    out = np.empty(n)
    out[0] = z[0]
    q = math.sqrt(1.0 - r * r)
    for t in range(1, n):
        out[t] = r * out[t - 1] + q * z[t]
    return out


@njit(cache=True)
def _feed(st, x, y, e, p):  # pragma: no cover - numba
    for i in range(x.size):
        SG.split_step(st, 0, x[i], y[i], e[i], float(i), float(i), p)


@njit(cache=True)
def _scales(st):  # pragma: no cover - numba
    return SG._scales(st, 0)


def _state(rng, n, rho_x, rho_e, sd=0.15, noise=0.15):
    """A split state fed ``n`` in-control rows (b = -1, the true errors as innovations) with
    AR(1) log prices (``rho_x``) and AR(1) errors (``rho_e``), independent of each other."""
    x = LP0 + sd * _ar1(rng, n, rho_x)
    e = noise * _ar1(rng, n, rho_e)
    st = np.zeros(SG.SPLIT_SIZE)
    _feed(st, x, 2.0 - (x - LP0) + e, e, SG.params(np.inf, np.inf))
    return st


def test_the_slope_score_of_independent_prices_and_errors_has_the_product_autocorrelation():
    # the identity the cap rests on: for independent zero-mean stationary x and e,
    # E[x_t x_{t-1} e_t e_{t-1}] = E[x_t x_{t-1}] E[e_t e_{t-1}] (from memory: independence),
    # so corr(u_t, u_{t-1}) = rho_x rho_e; checked on one long path with statsmodels' acf
    rng = np.random.default_rng(3)
    n = 200_000
    x, e = _ar1(rng, n, 0.7), _ar1(rng, n, 0.6)
    r_u = acf(x * e, nlags=1, fft=True)[1]
    r_x, r_e = acf(x, nlags=1, fft=True)[1], acf(e, nlags=1, fft=True)[1]
    # the product's acf estimate has se about sqrt((1 + 2 r^2 / (1 - r^2)) / n) < 0.004 here
    assert abs(r_u - r_x * r_e) < 0.015
    assert abs(r_u - 0.42) < 0.015


def test_the_prices_lag1_moment_follows_the_prices():
    # the state's EW lag-1 moment of the centred prices over their EW variance reads the
    # prices' lag-1 autocorrelation (EW weight 0.995: about 400 effective rows, se ~0.05)
    for rho_x in (0.0, 0.5, 0.9):
        st = _state(np.random.default_rng(11), 4000, rho_x, 0.0)
        assert st[SG.PX_ON] == 1.0
        assert abs(st[SG.PX_W] - 1.0 / (1.0 - 0.995)) < 1.0     # its own weight, saturated
        r = st[SG.PX_1] / st[SG.D_XX]
        assert abs(r - rho_x) < 0.15, (rho_x, r)


def _expected_rs(st):
    """The cap by hand: Bartlett's (1946) one-se raise, min(r_s, r_l, r_x r_l)."""
    def raise_(r, neff, top):
        if not r > 0.0:
            return 0.0
        se = math.sqrt(max(1.0 - r * r, 0.0) / neff)
        return min(r + min(r / (2.0 * se), 1.0) * se, top)
    m2 = st[SG.D_S2]
    neff = max(2.0 * st[SG.D_W] - 1.0, 1.0)
    rl = raise_(st[SG.D_E1] / m2, neff, SG.R_MAX)
    rs = min(raise_(st[SG.D_U1] / st[SG.D_UU], neff, SG.R_MAX), rl)
    rx = raise_(abs(st[SG.PX_1]) / st[SG.D_XX], max(2.0 * st[SG.PX_W] - 1.0, 1.0), 1.0)
    return min(rs, rx * rl), rl, rs


def test_the_slope_scores_autocorrelation_is_capped_by_the_prices_times_the_errors():
    rng = np.random.default_rng(5)
    # prices that move freely, AR(1) 0.6 errors: the errors' r_l is large, the prices' r_x
    # small, so the slope score's r_s is at most r_x r_l, well below r_l
    for _ in range(5):
        st = _state(rng, 3000, 0.0, 0.6)
        _, _, rs, rl = _scales(st)
        want, want_rl, _ = _expected_rs(st)
        assert rl == want_rl and rl > 0.45
        assert rs == want and rs <= 0.2 * rl
    # prices held for weeks (lag-1 autocorrelation near 1): the cap leaves r_s near the
    # errors' own, as before the prices' moments existed
    for _ in range(5):
        st = _state(rng, 3000, 0.97, 0.6)
        _, _, rs, rl = _scales(st)
        want, _, before = _expected_rs(st)
        assert rs == want and rs >= 0.9 * before
    # a state restored from the layout before (the prices' moments zero, flag off): the cap
    # is the errors' alone until the moments build up
    st = _state(rng, 3000, 0.0, 0.6)
    st[SG.PX0:SG.PX0 + SG.PX_SIZE] = 0.0
    _, _, rs, rl = _scales(st)
    assert rs == _expected_rs(st)[2]


def test_a_state_saved_before_the_prices_moments_resumes_with_them_off():
    # the layout just before (PX_SIZE floats fewer, before the controls' sums) restores with
    # them as zeros, flag off, every other number as it was; the moments then build up again
    from monitor.estimators import ElasticityRLS
    from monitor.pipeline.kernel import L_SPLIT
    from monitor.pipeline.run import Pipeline
    from monitor.pipeline.settings import DetectorSettings
    from tests.pipeline_helpers import restores_without_block
    pipe = Pipeline(ElasticityRLS(forgetting=0.99),
                    DetectorSettings(arl0=2000.0, change_detector="split_glr"))
    rng = np.random.default_rng(8)
    n = 700
    x = LP0 + 0.15 * rng.standard_normal(n)
    X = np.column_stack([np.ones(n), x])
    y = 2.0 - (x - LP0) + 0.15 * _ar1(rng, n, 0.6)
    sid = np.zeros(n, np.int64)
    row = pipe.run(sid[:400], X[:400], y[:400], 1).states[0]
    at = int(pipe._layout[L_SPLIT]) + SG.PX0
    assert row[at + SG.PX_ON - SG.PX0] == 1.0
    up = restores_without_block(pipe, row, at, SG.PX_SIZE)
    more = pipe.run(sid[400:], X[400:], y[400:], 1, states=up[None, :].copy()).states[0]
    assert more[at] == 1.0 and more[at + SG.PX_W - SG.PX0] > 100.0
    # the streaming class: the same layout (its state always has the controls' sums)
    from monitor.detectors.split_class import SplitGLR
    det = SplitGLR(arl0=20000)
    e = 0.15 * _ar1(rng, 300, 0.6)
    for i in range(300):
        det.update(x[i] - LP0, 2.0 - (x[i] - LP0) + e[i], e[i], ts=float(i))
    saved = det.to_state()
    full = np.array(saved["state"], dtype=float)
    assert full[SG.PX_ON] == 1.0
    old = np.concatenate([full[:SG.PX0], full[SG.ZS0:]])
    back = SplitGLR.from_state(dict(saved, state=list(old)))
    want = full.copy()
    want[SG.PX0:SG.ZS0] = 0.0
    assert np.array_equal(back._state, want, equal_nan=True)
    assert back.update(0.01, 2.0, 0.0, ts=300.0) is not None
    assert back._state[SG.PX_ON] == 1.0
