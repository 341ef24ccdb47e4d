"""ElasticityRLS behaviour: windup guard, validation, state round trip, batch equals streaming,
property tests. References are named beside each check."""

from __future__ import annotations

import json
import math
import types

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as hst
from numba import njit

from monitor.errors import ValidationError
from monitor.estimators import ElasticityRLS, run_batch
from monitor.estimators import kernel as K
from monitor.estimators.dispatch import estimator_discount
from tests.conftest import simulate_loglog


def _rows(lp, y, extra=None):
    for i in range(len(y)):
        x = {"price": float(np.exp(lp[i]))}
        if extra:
            x.update({k: float(v[i]) for k, v in extra.items()})
        yield x, float(np.exp(y[i]))


# ----------------------------------------------------------------------------- windup
def _flat_then_move(rng, guard, lam=0.98, n_var=300, n_flat=400):
    lp, y = simulate_loglog(rng, n_var + n_flat + 1)
    lp[n_var:n_var + n_flat] = np.log(10.0)          # flat price
    lp[-1] = np.log(10.0) + 0.3                        # the first price change afterwards
    y = 5.0 - 1.5 * lp + rng.normal(0, 0.2, lp.size)
    est = ElasticityRLS(forgetting=lam, excitation_guard=guard)
    pbb, status, beta = [], [], []
    for x, q in _rows(lp, y):
        est.learn_one(x, q)
        pbb.append(est._P[1, 1])
        status.append(est.status)
        beta.append(est.elasticity)
    return np.array(pbb), status, np.array(beta), n_var, n_flat


def test_unguarded_covariance_winds_up_like_lambda_power(rng):
    pbb, status, beta, n_var, n_flat = _flat_then_move(rng, guard=False)
    # without the guard, P along the unexcited direction grows by 1/lam per flat step
    # (common practice: RLS windup, e.g. Astrom & Wittenmark 1995; from memory):
    # 0.98^-200 = 56.9; over flat steps 50..399 the growth is 0.98^-350 = 1180.
    growth = pbb[n_var + n_flat - 1] / pbb[n_var + 49]
    assert growth == pytest.approx(0.98 ** -350, rel=0.02)
    # the EW sd of log price (0.1 before) falls below 0.02 once 0.98^n < 0.04, n near 160
    assert status[n_var + 100] == "ok"
    assert status[n_var + 220] == "low_variation"


def test_guard_bounds_covariance_and_marks_low_variation(rng):
    pbb_g, status_g, beta_g, n_var, n_flat = _flat_then_move(rng, guard=True)
    pbb_u, _, beta_u, _, _ = _flat_then_move(np.random.default_rng(20261201), guard=False)
    # the guard's short window (0.8: about 9 obs) sees the flat prices within ~20 steps
    # (0.1^2 0.8^n < 0.02^2 for n > 14); from then on forgetting is paused and P stops growing
    flat = slice(n_var + 25, n_var + n_flat)
    assert np.all(np.diff(pbb_g[flat]) <= 1e-15)
    assert pbb_g[n_var + n_flat - 1] < 2.0 * pbb_g[n_var - 1]
    assert pbb_g[n_var + n_flat - 1] < pbb_u[n_var + n_flat - 1] / 100
    # the status reports the flat prices once the estimator's own window sees them
    assert all(s == "low_variation" for s in status_g[n_var + 220:n_var + n_flat])
    # the first price change afterwards (+0.3 in log price, 3x the usual spread) moves b by far
    # less with the guard: unguarded, P_bb d^2 >> 1 and b jumps to fit that one point (e / d)
    jump_g = abs(beta_g[-1] - beta_g[-2])
    jump_u = abs(beta_u[-1] - beta_u[-2])
    assert jump_g < jump_u / 3, (jump_g, jump_u)


# ----------------------------------------------------------------------------- validation
@pytest.mark.parametrize("x, y, field, rule", [
    ({"price": -1.0}, 5.0, "price", "positive"),
    ({"price": 0.0}, 5.0, "price", "positive"),
    ({"price": float("nan")}, 5.0, "price", "finite"),
    ({"price": float("inf")}, 5.0, "price", "finite"),
    ({"price": "abc"}, 5.0, "price", "number"),
    ({}, 5.0, "price", "missing"),
    ({"price": 2.0}, -1.0, "quantity", "non_negative"),
    ({"price": 2.0}, float("nan"), "quantity", "finite"),
    ({"price": 2.0}, float("inf"), "quantity", "finite"),
    ({"price": 2.0}, 0.0, "quantity", "zero"),
    ({"price": 2.0}, 3.0, "promo", "missing"),
])
def test_invalid_input_raises_naming_field_value_and_rule(x, y, field, rule):
    est = ElasticityRLS(controls=["promo"]) if field == "promo" or "promo" in x else ElasticityRLS()
    if field == "promo":
        x = dict(x)
    with pytest.raises(ValidationError) as info:
        est.learn_one(x, y)
    assert info.value.field == field and info.value.rule == rule
    assert field in str(info.value)
    assert est.n_obs == 0          # nothing was learned from the bad row


@pytest.mark.parametrize("kwargs, name", [
    ({"forgetting": 0.0}, "forgetting"), ({"forgetting": 1.5}, "forgetting"),
    ({"level": 1.0}, "level"), ({"prior_sd": 0.0}, "prior_sd"), ({"min_price_sd": -1}, "min_price_sd"),
])
def test_constructor_validation_names_parameter_and_range(kwargs, name):
    with pytest.raises(ValueError, match=rf"{name} = .*must be in"):
        ElasticityRLS(**kwargs)


def test_prior_on_elasticity_is_used():
    est = ElasticityRLS(prior_mean=-1.5, prior_sd=1.0)
    assert est.elasticity == -1.5
    est.learn_one({"price": 10.0}, 30.0)
    # one observation cannot identify b: it stays near its prior (within the prior sd)
    assert abs(est.elasticity + 1.5) < 1.0


# ----------------------------------------------------------------------------- state
def test_state_round_trip_continues_bit_for_bit(rng):
    lp, y = simulate_loglog(rng, 500)
    promo = rng.integers(0, 2, 500).astype(float)
    a = ElasticityRLS(forgetting=0.97, controls=["promo"])
    rows = list(_rows(lp, y, {"promo": promo}))
    for x, q in rows[:250]:
        a.learn_one(x, q)
    b = ElasticityRLS.from_state(json.loads(json.dumps(a.to_state())))
    for x, q in rows[250:]:
        a.learn_one(x, q)
        b.learn_one(x, q)
    assert a.to_state() == b.to_state()
    assert a.elasticity == b.elasticity and a.stderr == b.stderr


def test_clone_is_fresh_with_same_hyperparameters(rng):
    a = ElasticityRLS(forgetting=0.9, log_controls=["temp"])
    a.learn_one({"price": 3.0, "temp": 20.0}, 10.0)
    c = a.clone()
    assert c.n_obs == 0 and c.forgetting == 0.9 and c.log_controls == ("temp",)


# ----------------------------------------------------------------------------- batch = stream
@pytest.mark.parametrize("controls", [(), ("promo", "weekend")])
def test_batch_equals_streaming_interleaved_series(rng, controls):
    n_series, T = 5, 200
    sid = np.tile(np.arange(n_series), T)                  # rows of series interleaved
    lp, y = simulate_loglog(rng, n_series * T)
    extra = {c: rng.integers(0, 2, n_series * T).astype(float) for c in controls}
    X = np.column_stack([np.ones(sid.size), lp] + [extra[c] for c in controls])
    proto = ElasticityRLS(forgetting=0.97, controls=controls)
    res = run_batch(proto, sid, X, y)
    streams = [proto.clone() for _ in range(n_series)]
    outs = np.empty_like(res.out)
    for j, (x, q) in enumerate(_rows(lp, y, extra)):
        e = streams[sid[j]]
        e.learn_one(x, q)
        outs[j] = e._out
    # identical compiled step on both paths; the 1e-10 bound of the issue holds with margin
    np.testing.assert_array_equal(np.isnan(outs), np.isnan(res.out))
    np.testing.assert_allclose(outs, res.out, rtol=0, atol=1e-10, equal_nan=True)
    for i in range(n_series):
        np.testing.assert_allclose(streams[i]._state, res.states[i], atol=1e-10, equal_nan=True)


@pytest.mark.parametrize("band", ["hc", "classic", "hac"])
@pytest.mark.parametrize("controls", [(), ("promo",)])
def test_batch_loop_learn_one_and_the_bare_step_agree_to_the_bit(rng, band, controls):
    """run_batch (rls_run: no reference counting, step form chosen once), learn_one (packed
    settings, inline checks) and rls_step called row by row with its fifteen arguments (the
    previous form of both) give the same outputs and states, bit for bit."""
    n_series, T = 3, 150
    sid = np.tile(np.arange(n_series), T)
    lp, y = simulate_loglog(rng, n_series * T)
    promo = rng.integers(0, 2, sid.size).astype(float)
    X = np.column_stack([np.ones(sid.size), lp] + ([promo] if controls else []))
    proto = ElasticityRLS(forgetting=0.97, controls=controls, band=band)
    res = run_batch(proto, sid, X, y)
    streams = [proto.clone() for _ in range(n_series)]
    bare = [proto.initial_state() for _ in range(n_series)]
    out_stream = np.empty_like(res.out)
    out_bare = np.empty_like(res.out)
    w = np.empty(K.work_size(X.shape[1]))
    for j in range(sid.size):
        x = {"price": float(np.exp(lp[j]))}
        if controls:
            x["promo"] = float(promo[j])
        streams[sid[j]].learn_one(x, float(np.exp(y[j])))
        out_stream[j] = streams[sid[j]]._out
        K.rls_step(bare[sid[j]], X[j], y[j], X.shape[1], *proto.kernel_args, out_bare[j], w)
    # learn_one takes the quantity and the price and logs them: compare it with the batch on
    # the same logged values
    X2 = X.copy()
    X2[:, 1] = np.log(np.exp(lp))
    res2 = run_batch(proto, sid, X2, np.log(np.exp(y)))
    np.testing.assert_array_equal(out_stream, res2.out)
    np.testing.assert_array_equal(out_bare, res.out)
    for i in range(n_series):
        np.testing.assert_array_equal(streams[i]._state, res2.states[i])
        np.testing.assert_array_equal(bare[i], res.states[i])


def test_learn_one_takes_numeric_text_and_numpy_numbers_like_design_row():
    """The inline checks of learn_one accept what design_row accepts (float() of it)."""
    a, b = ElasticityRLS(), ElasticityRLS()
    for p, q in (("2.5", "10"), (np.float32(3.0), np.int64(7)), (4, 9.5), (True, 3.0)):
        a.learn_one({"price": p}, q)
        b.learn_one({"price": float(p)}, float(q))
    a.learn_one(types.MappingProxyType({"price": 2.75}), 6.0)    # a Mapping, not a dict
    b.learn_one({"price": 2.75}, 6.0)
    np.testing.assert_array_equal(a._state, b._state)
    assert a.n_obs == 5


@njit
def _general_loop(st, X, y, band, lam, tq, out, w):
    for j in range(X.shape[0]):
        K.linear_step(st, X[j], y[j], X.shape[1], band, 0, lam, True, 0.8, 0.02, 10.0, tq,
                      out[j], w)


@pytest.mark.parametrize("band", ["classic", "hc"])
def test_written_out_two_parameter_step_equals_general_step(rng, band):
    lp, y = simulate_loglog(rng, 2000)
    X = np.column_stack([np.ones(2000), lp])
    proto = ElasticityRLS(forgetting=0.98, band=band)
    fast = run_batch(proto, np.zeros(2000, dtype=np.int64), X, y)
    st = proto.initial_state()
    out = np.empty_like(fast.out)
    _general_loop(st, X, y, proto._band, 0.98, proto._tq, out, np.empty(K.work_size(2)))
    np.testing.assert_allclose(out, fast.out, rtol=1e-9, atol=1e-9, equal_nan=True)


# ----------------------------------------------------------------------------- long runs
def test_ten_million_updates_stay_finite_and_symmetric():
    rng = np.random.default_rng(3)
    n = 10_000_000
    lp = np.log(4.0) + rng.normal(0, 0.1, n)
    y = 2.0 - 0.8 * lp + rng.normal(0, 0.3, n)
    X = np.column_stack([np.ones(n), lp])
    res = run_batch(ElasticityRLS(forgetting=0.999), np.zeros(n, dtype=np.int64), X, y)
    assert np.isnan(res.beta[0]) and not np.isnan(res.beta[1:]).any()  # diffuse start
    assert not np.isnan(res.beta_se[100:]).any()
    st = res.states[0]
    A = st[K.NS + 2:K.NS + 6].reshape(2, 2)      # the information matrix
    assert A[0, 1] == A[1, 0] and np.all(np.linalg.eigvalsh(A) > 0)
    assert abs(res.beta[-1] + 0.8) < 0.1


# ----------------------------------------------------------------------------- properties
@settings(max_examples=60, deadline=None)
@given(hst.lists(hst.tuples(hst.floats(1e-3, 1e4), hst.floats(1e-3, 1e6)), min_size=1, max_size=80),
       hst.floats(0.5, 1.0))
def test_random_positive_inputs_never_give_nan_or_asymmetric_covariance(rows, lam):
    est = ElasticityRLS(forgetting=lam)
    for p, q in rows:
        est.learn_one({"price": p}, q)
        assert math.isfinite(est.n_eff)
        # b is reported exactly when the log price is identified; otherwise the status says why
        identified = np.linalg.matrix_rank(est._A, tol=1e-9 * est._A.max()) == 2
        assert math.isfinite(est.elasticity) or est.status in ("warming_up", "low_variation")
        A = est._A
        assert A[0, 1] == A[1, 0]
        if est.status == "ok":
            assert identified
        if est.status != "warming_up" and math.isfinite(est.elasticity):
            assert math.isfinite(est.stderr) and est.stderr >= 0
            lo, hi = est.interval()
            assert lo <= est.elasticity <= hi


# ----------------------------------------------------------------------------- prediction
def test_predict_one_retransforms_to_the_mean(rng):
    # log-normal errors with s = 0.5: the mean of q is exp(mu + s^2/2), 1.133x the median
    # (standard log-normal moments; common practice)
    n = 20000
    lp = np.log(10.0) + rng.normal(0, 0.1, n)
    y = 5.0 - 1.5 * lp + rng.normal(0, 0.5, n)
    est = ElasticityRLS(forgetting=1.0)
    for x, q in _rows(lp, y):
        est.learn_one(x, q)
    pred = est.predict_one({"price": 10.0})
    true_mean = math.exp(5.0 - 1.5 * math.log(10.0) + 0.125)
    assert pred == pytest.approx(true_mean, rel=0.02)
    naive = math.exp(est.intercept + est.elasticity * math.log(10.0))
    assert pred / naive == pytest.approx(math.exp(0.5 * est.residual_sd ** 2), rel=1e-12)


# ----------------------------------------------------------------------------- discount
@njit
def _discount(model, st, k, band, lags, f):
    estimator_discount(model, st, k, band, lags, f)


@pytest.mark.parametrize("model, band", [("loglinear", "classic"), ("loglinear", "hc"),
                                         ("loglinear", "hac"), ("poisson", "hc")])
def test_discount_keeps_theta_and_neff_and_equals_forgetting_the_past(rng, model, band):
    # reference: a discount by f at row m equals running the rows with weights f lam^(t-s)
    # for s <= m, i.e. the same weighted least squares / likelihood (common practice:
    # exponential forgetting is a product of step factors)
    from monitor.estimators import make_estimator
    from monitor.estimators.dispatch import model_code

    n, m, f = 400, 250, 0.05
    lp = np.log(4.0) + rng.normal(0, 0.15, n)
    if model == "poisson":
        y = rng.poisson(3.0 * np.exp(-1.5 * (lp - np.log(4.0)))).astype(float)
    else:
        y = 2.0 - 1.5 * lp + rng.normal(0, 0.2, n)
    X = np.column_stack([np.ones(n), lp])
    kw = {"hac_lags": 3} if model == "loglinear" else {}
    est = make_estimator(model, forgetting=0.99, band=band, excitation_guard=False, **kw)
    sid = np.zeros(n, dtype=np.int64)
    first = run_batch(est, sid[:m], X[:m], y[:m])
    st = first.states[0].copy()
    theta = st[K.NS:K.NS + 2].copy()
    neff = st[K.I_W] ** 2 / st[K.I_W2]
    _discount(model_code(model), st, 2, K.BANDS[band], est._lags, f)
    np.testing.assert_array_equal(st[K.NS:K.NS + 2], theta)
    assert st[K.I_W] ** 2 / st[K.I_W2] == pytest.approx(neff, rel=1e-12)
    rest = run_batch(est, sid[m:], X[m:], y[m:], states=st[None, :].copy())
    if model == "loglinear":
        # after the discount the fit is weighted least squares with the old rows down-weighted
        t = n - 1
        w = 0.99 ** (t - np.arange(n)) * np.where(np.arange(n) < m, f, 1.0)
        ref = sm.WLS(y, X, weights=w).fit()
        np.testing.assert_allclose(rest.beta[-1], ref.params[1], rtol=1e-9)
    else:
        from monitor.estimators import poisson_fit

        w = 0.99 ** (n - 1 - np.arange(n)) * np.where(np.arange(n) < m, f, 1.0)
        ref = poisson_fit(X, y, weights=w)
        assert abs(rest.beta[-1] - ref.params[1]) < 0.05 * ref.bse_hc1[1]
