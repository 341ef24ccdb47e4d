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
from tests.pipeline_helpers import restores_without_block


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
        SC.fit_add(st, SG.CFIT0, np.r_[1.0, x[i], z[i]], y[i], kc, 1.0)


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


def test_identified_is_the_price_variance_inflation_rule():
    # reference: statsmodels' variance_inflation_factor of log price in (1, log p, z) (the
    # centred VIF, 1 / (1 - R^2) of log price on the intercept and the controls)
    from statsmodels.stats.outliers_influence import variance_inflation_factor

    rng = np.random.default_rng(5)
    x, z, y = _rows(rng, 2000, kc=2)
    W = np.column_stack([np.ones_like(x), x, z])
    for n in (12, 20, 40, 60, 200, 2000):
        st = np.zeros(SG.SPLIT_SIZE)
        _feed(st, x[:n], z[:n], y[:n])
        _, work = _coef(st, 2)
        vif = variance_inflation_factor(W[:n], 1)
        for eps in (0.1, 0.3):
            want = bool(vif - 1.0 <= eps * eps * n) and n >= SC.MIN_FIT_ROWS
            got = SC.fit_identified(st, SG.CFIT0, work, 0, 2, eps, st[SG.CFIT0])
            assert got == want, (n, eps, vif)
    # log price that is 0.2 x a 30% flag plus noise of sd 0.1 has VIF_x about 1.1: identified
    # by 2,000 rows at the default, not by 12
    assert SC.fit_identified(st, SG.CFIT0, work, 0, 2, SC.IDENT_EPS, st[SG.CFIT0])
    st = np.zeros(SG.SPLIT_SIZE)
    _feed(st, x[:12], z[:12], y[:12])
    _, work = _coef(st, 2)
    assert not SC.fit_identified(st, SG.CFIT0, work, 0, 2, 0.01, st[SG.CFIT0])


def test_a_control_the_others_determine_is_not_identified():
    # hourly load in its first hours: the price is one tariff block, a control copies another
    # column; the factor drops the dependent control, which must not pass for VIF_x = 1
    rng = np.random.default_rng(6)
    n = 60
    x = rng.normal(0.0, 0.1, n)
    z = np.column_stack([rng.normal(0.0, 1.0, n), np.zeros(n)])
    z[:, 1] = 2.0 * z[:, 0]                                        # dependent on the first
    y = 1.0 - x + z[:, 0] + rng.normal(0.0, 0.1, n)
    st = np.zeros(SG.SPLIT_SIZE)
    _feed(st, x, z, y)
    _, work = _coef(st, 2)
    assert not SC.fit_identified(st, SG.CFIT0, work, 0, 2, SC.IDENT_EPS, st[SG.CFIT0])
    st = np.zeros(SG.SPLIT_SIZE)
    _feed(st, x, z[:, :1], y)
    _, work = _coef(st, 1)
    assert SC.fit_identified(st, SG.CFIT0, work, 0, 1, SC.IDENT_EPS, st[SG.CFIT0])


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
    # the fit holds every row, the estimator's warm-up included (N_00 is the row count, no
    # alarm here partialled the intercept out); the detector was fed from the row the
    # controls were identified, which for a flag drawn apart from the price is soon after the
    # warm-up's end: its chance collinearity R^2 ~ chi2(1) / n must fall below 0.01 n, i.e.
    # n of 10 to 30 rows (here 16 rows after the 10 of the warm-up)
    assert states[0, at + SG.CFIT0] == len(y)
    assert past_warmup - 30 <= states[0, at + SG.D_NF] <= past_warmup


@pytest.mark.parametrize("old", PREVIOUS_CONTROL_BLOCKS)
def test_an_older_checkpoint_resumes_with_the_control_fit_fresh(old):
    # split blocks of earlier layouts (99 floats; 111 with the slow control means) are
    # upgraded on resume: the control block becomes the new fit's, as zeros
    pipe, X, y, states, _ = _run_with_controls()
    row = states[0]
    at = int(pipe._layout[L_SPLIT]) + SG.CFIT_ON
    new = SG.SPLIT_SIZE - SG.CFIT_ON
    assert np.any(row[at:at + new] != 0.0)                # the fit was in use
    up = restores_without_block(pipe, row, at, new, filler=np.full(old, 0.25))
    # the upgraded row runs on, and feeds its charts again once the controls are identified
    more = pipe.run(np.zeros(len(y), np.int64), X, y, 1, states=up[None, :].copy())
    assert np.all(np.isfinite(more.out[:, K.O_BETA]))
    assert more.states[0, at] == 1.0
    with pytest.raises(ConfigError, match="layout changed"):
        pipe.checked_state(np.concatenate([row[:at], np.full(old, 0.25), row[at + new:-1]]))


def test_at_identification_the_earlier_rows_seed_the_window_sums():
    # the detector's window sums start from every row before the identifying one, with y*
    # for the fit's c at that row (numpy least squares and sums on the same rows)
    rng = np.random.default_rng(8)
    x, z, y = _rows(rng, 400, kc=2)
    st = np.zeros(SG.SPLIT_SIZE)
    work = np.zeros(SC.SCRATCH)
    est = np.zeros(64)
    for j in range(len(x)):
        xj = np.r_[1.0, x[j], z[j]]
        _, ready = SC.fit_response(st, 0, xj, y[j], 4, est, work, 0, np.nan)
        if ready:
            break
    assert SC.MIN_FIT_ROWS - 1 <= j < len(x) - 1
    W = np.column_stack([np.ones(j + 1), x[:j + 1], z[:j + 1]])
    c = np.linalg.lstsq(W, y[:j + 1], rcond=None)[0]
    ys = (y - z @ c[2:])[:j]                      # rows before the identifying one
    xc = x[:j] - x[j]                             # the detector's origin: the current price
    want = [j, xc.sum(), (xc * xc).sum(), ys.sum(), (xc * ys).sum()]
    np.testing.assert_allclose(st[SG.C0:SG.C0 + 5], want, rtol=1e-9, atol=1e-9)


def _poisson_run(seed, n=400):
    """One invented kiosk series of counts (mean about 1, zeros common) with a 25% promotion
    flag drawn apart from the price and an exposure, through the Poisson pipeline; no change."""
    from monitor.estimators import ElasticityPoisson

    rng = np.random.default_rng(seed)
    x = rng.normal(0.0, 0.3, n)
    z = (rng.random(n) < 0.25).astype(float)
    off = np.log(rng.choice([4.0, 6.0, 8.0, 12.0], n) / 8.0)
    q = rng.poisson(np.exp(-0.2 - 1.5 * x + 0.3 * z + off)).astype(float)
    X = np.column_stack([np.ones(n), x, z])
    pipe = Pipeline(ElasticityPoisson(forgetting=0.995, controls=["promo"]))
    res = pipe.run(np.zeros(n, np.int64), X, q, 1, offset=off)
    return pipe, X, q, res


def test_under_the_poisson_model_the_fit_is_weighted_least_squares_with_weights_mu():
    # reference: statsmodels WLS (weights mu, the estimator's predicted mean of each row) of
    # the working responses x' theta + (q - mu) / mu on (1, log p, promo), every row of the
    # series, the estimator's warm-up included (the IRLS weights: McCullagh & Nelder 1989,
    # sec. 2.5). The unweighted fit of the same rows (main before 5 December, 08:00) misses
    # it by far more than the tolerance.
    pipe, X, q, res = _poisson_run(11)
    assert len(_opens_of(res)) == 0                   # no alarm: no regime was partialled out
    mu = q - res.out[:, K.O_E]
    z = res.out[:, K.O_YLOG]
    assert np.all(mu > 0.0) and np.all(np.isfinite(z))
    st = res.states[0]
    at = int(pipe._layout[L_SPLIT])
    got, _ = _coef(st[at:], 1)
    wls = sm.WLS(z, X, weights=mu).fit().params
    np.testing.assert_allclose(got[:3], wls, rtol=1e-8, atol=1e-10)
    ols = sm.OLS(z, X).fit().params
    assert abs(ols[2] - wls[2]) > 1e-3
    # N_00 is the sum of the weights, not the row count
    np.testing.assert_allclose(st[at + SG.CFIT0], mu.sum(), rtol=1e-12)


def _first_identified(x, z, w):
    """Index of the first row at which ``VIF_x - 1 <= IDENT_EPS^2 n`` (n: rows) with the
    VIF of log price in a least-squares fit weighted by ``w`` (statsmodels WLS: the weighted
    residual sum of squares of log price on the intercept over that on the intercept and the
    flag), from ``MIN_FIT_ROWS`` rows on."""
    for j in range(int(SC.MIN_FIT_ROWS) - 1, len(x)):
        s = slice(0, j + 1)
        one = np.ones(j + 1)
        sxx = sm.WLS(x[s], one, weights=w[s]).fit().ssr
        rss = sm.WLS(x[s], np.column_stack([one, z[s]]), weights=w[s]).fit().ssr
        if sxx / rss - 1.0 <= SC.IDENT_EPS ** 2 * (j + 1):
            return j
    return None


def test_under_the_poisson_model_identification_is_the_weighted_vif_over_rows():
    # with weights the rule's VIF is the weighted fit's and its n the estimator's row count
    # (not sum mu: MIN_FIT_ROWS and the noise the rule is in units of stay one row's). The
    # detector is fed from the first row at which the weighted rule holds (statsmodels WLS);
    # the unweighted rule (main before 5 December, 08:00) holds at another row in this seed
    pipe, X, q, res = _poisson_run(17)
    mu = q - res.out[:, K.O_E]
    st = res.states[0]
    at = int(pipe._layout[L_SPLIT])
    assert st[at + SG.CFIT_ON] == 1.0
    want = _first_identified(X[:, 1], X[:, 2], mu)
    assert want is not None
    assert len(q) - st[at + SG.D_NF] == want          # rows before the first one fed
    assert _first_identified(X[:, 1], X[:, 2], np.ones(len(q))) != want


def _opens_of(res):
    ev = res.events
    if ev is None or len(ev) == 0:
        return []
    return ev[(ev["action"] == "open") & ev["kind"].isin(["elasticity_change", "level_shift"])]
