"""The split GLR's own fit of the control coefficients (monitor.detectors.split_controls,
issue 12).

The fit's coefficients are checked against statsmodels OLS on the same rows (least squares on
``(1, log p, z)``, with regime dummies for the intercept and slope after the partialling that
follows an alarm: the within estimator, Frisch & Waugh 1933); the identification rule against
a direct numpy inverse. The checkpoint upgrade (older split blocks of 99 and 111 floats) is
checked field by field.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from monitor.detectors import split_controls as SC
from monitor.detectors import split_glr as SG
from monitor.errors import ConfigError
from monitor.estimators import ElasticityRLS
from monitor.estimators import kernel as K
from monitor.pipeline.run import L_SPLIT, PREVIOUS_CONTROL_BLOCKS, Pipeline


def _rows(rng, n, kc=3, b=-1.0, a=2.0, c=(0.3, -0.2, 0.5)):
    z = np.column_stack([(rng.random(n) < 0.3).astype(float), rng.normal(0.0, 1.0, n),
                         np.zeros(n)])[:, :kc]
    # log price collinear with the first control (a tariff block / promotion)
    x = 0.2 * z[:, 0] + rng.normal(0.0, 0.1, n)
    y = a + b * x + z @ np.asarray(c[:kc]) + rng.normal(0.0, 0.1, n)
    return x, z, y


def _feed(st, x, z, y):
    kc = z.shape[1]
    for i in range(len(x)):
        SC.fit_add(st, SG.CFIT0, np.r_[1.0, x[i], z[i]], y[i], kc)


def _coef(st, kc):
    work = np.zeros(SC.SCRATCH)
    SC.fit_solve(st, SG.CFIT0, work, 0, kc)
    return work[SC.M * SC.M:SC.M * SC.M + 2 + kc], work


def test_the_fit_is_least_squares_and_an_empty_control_gets_zero():
    rng = np.random.default_rng(3)
    x, z, y = _rows(rng, 400)
    st = np.zeros(SG.SPLIT_SIZE)
    _feed(st, x, z, y)
    got, _ = _coef(st, 3)
    # statsmodels OLS on the controls seen (the third is zero on every row)
    ols = sm.OLS(y, np.column_stack([np.ones_like(x), x, z[:, :2]])).fit().params
    np.testing.assert_allclose(got[:4], ols, rtol=1e-9, atol=1e-10)
    assert got[4] == 0.0


def test_after_alarms_the_fit_has_each_regimes_level_and_slope():
    rng = np.random.default_rng(4)
    x1, z1, y1 = _rows(rng, 300, kc=2, a=2.0, b=-1.0)
    x2, z2, y2 = _rows(rng, 300, kc=2, a=2.4, b=-1.0)        # level shift
    x3, z3, y3 = _rows(rng, 300, kc=2, a=2.4, b=-1.8)        # elasticity change
    st = np.zeros(SG.SPLIT_SIZE)
    _feed(st, x1, z1, y1)
    SC.fit_partial(st, SG.CFIT0, 0)                             # after a level alarm
    _feed(st, x2, z2, y2)
    got, _ = _coef(st, 2)
    X = np.column_stack([np.r_[np.ones(300), np.zeros(300)], np.r_[np.zeros(300), np.ones(300)],
                         np.r_[x1, x2], np.r_[z1, z2]])
    ols = sm.OLS(np.r_[y1, y2], X).fit().params                 # own intercepts, common b, c
    np.testing.assert_allclose(got[1:], ols[2:], rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(got[0], ols[1], rtol=1e-8)
    SC.fit_partial(st, SG.CFIT0, 0)                             # after a slope alarm
    SC.fit_partial(st, SG.CFIT0, 1)
    _feed(st, x3, z3, y3)
    got, _ = _coef(st, 2)
    d = [np.r_[np.ones(300), np.zeros(600)], np.r_[np.zeros(300), np.ones(300), np.zeros(300)],
         np.r_[np.zeros(600), np.ones(300)]]
    xs = np.r_[x1, x2, x3]
    X = np.column_stack([*d, xs * (d[0] + d[1]), xs * d[2], np.r_[z1, z2, z3]])
    ols = sm.OLS(np.r_[y1, y2, y3], X).fit().params            # b of the last regime its own
    np.testing.assert_allclose(got[2:], ols[5:], rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(got[:2], [ols[2], ols[4]], rtol=1e-8)


def test_identified_is_the_variance_inflation_rule():
    rng = np.random.default_rng(5)
    x, z, y = _rows(rng, 2000, kc=2)
    W = np.column_stack([np.ones_like(x), x, z])
    for n in (20, 40, 60, 200, 2000):
        st = np.zeros(SG.SPLIT_SIZE)
        _feed(st, x[:n], z[:n], y[:n])
        _, work = _coef(st, 2)
        N = W[:n].T @ W[:n]
        vif = np.diag(np.linalg.inv(N))[2:] * np.diag(N)[2:]     # numpy inverse
        for eps in (0.1, 0.3):
            want = bool(np.all(vif - 1.0 <= eps * eps * n)) and n >= SC.MIN_FIT_ROWS
            assert SC.fit_identified(st, SG.CFIT0, work, 0, 2, eps) == want
    # by 2,000 rows these controls are identified at the default, by 20 they are not
    assert SC.fit_identified(st, SG.CFIT0, work, 0, 2, SC.IDENT_EPS)


def _run_with_controls():
    pipe = Pipeline(ElasticityRLS(forgetting=0.99, controls=["promo"]))
    rng = np.random.default_rng(2)
    n = 600
    x = rng.normal(0.0, 0.15, n)
    z = (rng.random(n) < 0.3).astype(float)
    X = np.column_stack([np.ones(n), x, z])
    y = 2.0 - 1.2 * x + 0.3 * z + rng.normal(0.0, 0.1, n)
    res = pipe.run(np.zeros(n, np.int64), X, y, 1)
    return pipe, X, y, res.states, int(np.sum(res.status != K.ST_WARMING_UP))


def test_a_series_with_controls_is_fed_once_they_are_identified():
    pipe, X, y, states, past_warmup = _run_with_controls()
    at = int(pipe._layout[L_SPLIT])
    assert states[0, at + SG.CFIT_ON] == 1.0
    # the fit holds the rows past the estimator's warm-up (N_00 is the row count; rows while
    # the detector holds its scale are left out); the detector was fed from the row the
    # controls were identified
    assert 0.0 < states[0, at + SG.CFIT0] <= past_warmup
    assert 0.0 < states[0, at + SG.D_NF] < past_warmup


@pytest.mark.parametrize("old", PREVIOUS_CONTROL_BLOCKS)
def test_an_older_checkpoint_resumes_with_the_control_fit_fresh(old):
    # split blocks of earlier layouts (99 floats; 111 with the slow control means) are
    # upgraded on resume: the control block becomes the new fit's, as zeros
    pipe, X, y, states, _ = _run_with_controls()
    row = states[0]
    at = int(pipe._layout[L_SPLIT]) + SG.CFIT_ON
    new = SG.SPLIT_SIZE - SG.CFIT_ON
    assert np.any(row[at:at + new] != 0.0)                # the fit was in use
    vec = np.concatenate([row[:at], np.full(old, 0.25), row[at + new:]])
    up = pipe.checked_state(vec)
    assert up.shape == row.shape
    assert np.array_equal(up[:at], row[:at], equal_nan=True)
    assert np.array_equal(up[at + new:], row[at + new:], equal_nan=True)
    assert np.all(up[at:at + new] == 0.0)
    assert np.array_equal(pipe.state_from_json(pipe.state_to_json(vec)), up, equal_nan=True)
    # the upgraded row runs on, and feeds its charts again once the controls are identified
    more = pipe.run(np.zeros(len(y), np.int64), X, y, 1, states=up[None, :].copy())
    assert np.all(np.isfinite(more.out[:, K.O_BETA]))
    assert more.states[0, at] == 1.0
    with pytest.raises(ConfigError, match="layout changed"):
        pipe.checked_state(vec[:-1])
