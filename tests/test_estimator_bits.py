"""The estimator's fast paths give the same numbers, to the bit, as the forms they replaced
(issue 15).

- :func:`monitor.estimators.kernel.step_two_band` (packed divisions, the exponential last)
  against its previous form, kept verbatim in benchmarks/estimator_previous.py, on rows that
  reach every branch: the excitation guard pausing, a price held constant (log price
  unidentified), low variation, forgetting 1, a prior, bands hc and classic;
- :func:`monitor.estimators.kernel.linear_step` (any k, every band; its moment tensors updated
  and read row by row with side-by-side sums) against its previous form, kept verbatim in
  benchmarks/estimator_previous_general.py, with controls that are dependent for a while;
- the batch loop's k = 2 rows four series at a time (:func:`monitor.estimators.kernel.
  step_two_lanes`, one series per vector lane) against the same loop one row at a time
  (benchmarks/estimator_previous.py ``rows_rls_run_two``) on a batch that mixes both paths;
- the packed division and square root (:mod:`monitor.estimators.packed`) against numpy's
  scalar IEEE operations, special values included;
- ``ElasticityRLS.learn_one`` (compiled entry, inline checks) against ``run_batch``, and its
  messages for bad input.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from numba import njit

from benchmarks.estimator_previous import previous_rls_run_two, rows_rls_run_two
from benchmarks.estimator_previous_general import previous_rls_run_general
from monitor.errors import ValidationError
from monitor.estimators import ElasticityRLS, run_batch
from monitor.estimators import kernel as K
from monitor.estimators.packed import (div2, div4, sqrt4, vadd, vand, vdiv, veq, vgt, vlt, vmul,
                                       vnot, vor, vsel, vsqrt, vsub)


def _bits(a: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(a).view(np.int64)


def _hard_rows(rng, n_series: int, T: int):
    """Rows in arrival order: prices that vary, prices held for spells (the guard pauses), a
    price constant for the first half of some series (unidentified), small price moves."""
    sid = np.tile(np.arange(n_series), T)
    step = np.repeat(np.arange(T), n_series)
    lp0 = np.log(rng.uniform(2.0, 8.0, n_series))
    lp = lp0[sid] + rng.normal(0.0, 0.1, sid.size)
    held = (sid % 3 == 0) & ((step // 40) % 2 == 1)
    lp[held] = np.round(lp[held], 1)
    lp[(sid % 5 == 1) & (step < T // 2)] = 1.5
    small = sid % 7 == 2
    lp[small] = lp0[sid[small]] + rng.normal(0.0, 0.005, small.sum())
    y = 4.0 - 2.0 * lp + rng.normal(0.0, 0.2, sid.size)
    X = np.column_stack([np.ones(sid.size), lp])
    return sid, X, y


def _previous(est, sid, X, y):
    states = np.tile(est.initial_state(), (int(sid.max()) + 1, 1))
    out = np.empty((sid.size, K.NOUT))
    band, _, lam, guard, guard_lam, mps, mneff, tq = est.kernel_args
    previous_rls_run_two(states, sid, X, y, band, lam, guard, guard_lam, mps, mneff, tq, out)
    return out, states


SETTINGS = [
    {},
    {"band": "classic"},
    {"excitation_guard": False},
    {"forgetting": 1.0},
    {"forgetting": 0.9, "band": "classic", "min_price_sd": 0.05},
    {"prior_mean": -1.5, "prior_sd": 1.0, "level": 0.9},
]


@pytest.mark.parametrize("settings", SETTINGS)
def test_k2_step_equals_its_previous_form_to_the_bit(rng, settings):
    sid, X, y = _hard_rows(rng, 30, 200)
    est = ElasticityRLS(**{"forgetting": 0.97, **settings})
    res = run_batch(est, sid, X, y)
    out, states = _previous(est, sid, X, y)
    np.testing.assert_array_equal(_bits(res.out), _bits(out))
    np.testing.assert_array_equal(_bits(res.states), _bits(states))
    status = res.status
    # the rows reached the branches they were built for
    assert (status == K.ST_OK).any() and (status == K.ST_LOW_VARIATION).any()
    assert (status == K.ST_WARMING_UP).any()
    if est.prior_sd is None:   # a prior on b identifies it while the price is held
        assert np.isnan(res.beta[(sid % 5 == 1) & (np.arange(sid.size) > 30)]).any()
    if est.excitation_guard:
        assert res.states[:, K.I_NPAUSED].sum() > 0


def test_k2_step_one_long_series_to_the_bit(rng):
    """One series: every row reads the state the row before wrote."""
    sid, X, y = _hard_rows(rng, 1, 4000)
    est = ElasticityRLS(forgetting=0.995)
    res = run_batch(est, np.zeros(sid.size, dtype=np.int64), X, y)
    out, states = _previous(est, np.zeros(sid.size, dtype=np.int64), X, y)
    np.testing.assert_array_equal(_bits(res.out), _bits(out))
    np.testing.assert_array_equal(_bits(res.states), _bits(states))


def _burst_order(rng, sid: np.ndarray) -> np.ndarray:
    """A permutation of the rows of interleaved ``sid`` that keeps each series' rows in time
    order but delivers them in bursts of 1 to 6 consecutive rows of the same series."""
    queues = [list(np.flatnonzero(sid == s)) for s in range(int(sid.max()) + 1)]
    order: list[int] = []
    while any(queues):
        live = [s for s, q in enumerate(queues) if q]
        s = live[int(rng.integers(len(live)))]
        take = int(rng.integers(1, 7))
        order += queues[s][:take]
        del queues[s][:take]
    return np.asarray(order, dtype=np.int64)


BURST_SETTINGS = [
    {},
    {"band": "classic", "forgetting": 0.9},
    {"excitation_guard": False, "forgetting": 0.99},
]


@pytest.mark.parametrize("settings", BURST_SETTINGS)
def test_k2_step_bursts_and_nan_rows_to_the_bit(rng, settings):
    """Rows of one series in bursts (the state a row wrote is read by the next row at once)
    and rows with a NaN quantity or log price: every output column and state slot, NaN's bits
    included (compared as int64), equals the previous form's. A NaN row poisons its series'
    sums from then on, so the NaN paths of every later step (comparisons, the packed
    divisions' NaN lanes, the t lookup) are compared too."""
    sid0, X0, y0 = _hard_rows(rng, 16, 250)
    order = _burst_order(rng, sid0)
    sid, X, y = sid0[order], X0[order].copy(), y0[order].copy()
    step = np.empty(sid.size, dtype=np.int64)
    for s in range(16):
        rows = np.flatnonzero(sid == s)
        step[rows] = np.arange(rows.size)
    y[(sid == 4) & (step == 150)] = np.nan
    X[(sid == 7) & (step == 200), 1] = np.nan
    y[(sid == 11) & (step == 0)] = np.nan          # from the first row (the centring reference)
    est = ElasticityRLS(**{"forgetting": 0.97, **settings})
    res = run_batch(est, sid, X, y)
    out, states = _previous(est, sid, X, y)
    for c in range(K.NOUT):
        np.testing.assert_array_equal(_bits(res.out[:, c]), _bits(out[:, c]),
                                      err_msg=f"column {c}")
    np.testing.assert_array_equal(_bits(res.states), _bits(states))
    # the premises: bursts, and NaN reaching the outputs after the NaN rows only
    assert (sid[1:] == sid[:-1]).mean() > 0.5
    assert np.isnan(res.beta[(sid == 4) & (step > 150)]).all()
    assert np.isfinite(res.beta[(sid == 4) & (step > 100) & (step < 150)]).all()
    assert np.isnan(res.beta[(sid == 7) & (step > 200)]).all()
    assert np.isnan(res.out[sid == 11, K.O_INTERCEPT]).all()



def _mixed_order(rng, ns: int) -> np.ndarray:
    """An order of the rows of ``_hard_rows(rng, ns, 150)`` (row of series s at step t is
    ``t * ns + s``) that keeps each series' rows in time order and mixes the batch loop's two
    k = 2 paths: steps 0-49 in arrival order (groups of four different series: the lane
    path), steps 50-99 in bursts of one series, steps 100-149 of series 0-2 cycling among
    themselves (every group of four repeats a series: the row path) and then the other
    series' steps 100-149 in arrival order."""
    order = [t * ns + s for t in range(50) for s in range(ns)]
    mid = np.array([t * ns + s for t in range(50, 100) for s in range(ns)])
    order += mid[_burst_order(rng, mid % ns)].tolist()
    order += [t * ns + s for t in range(100, 150) for s in range(3)]
    order += [t * ns + s for t in range(100, 150) for s in range(3, ns)]
    return np.asarray(order, dtype=np.int64)


def _lane_rows(sid: np.ndarray) -> int:
    """How many rows :func:`monitor.estimators.kernel.run_two_lanes` takes four at a time (its
    rule: four consecutive rows of four different series)."""
    j, lanes, s = 0, 0, sid.tolist()
    while j + 4 <= len(s):
        if len(set(s[j:j + 4])) == 4:
            lanes += 4
            j += 4
        else:
            j += 1
    return lanes


LANE_SETTINGS = [
    {},
    {"band": "classic"},
    {"excitation_guard": False, "forgetting": 1.0},
    {"prior_mean": -1.5, "prior_sd": 1.0, "level": 0.9, "band": "classic"},
]


@pytest.mark.parametrize("settings", LANE_SETTINGS)
def test_k2_lane_path_equals_row_path_to_the_bit(rng, settings):
    """The batch loop (``run_batch``: four different series' rows in one vector step where it
    can) gives every output column and state slot, NaN's bits included, of the same loop one
    row at a time, on a batch that takes both paths: series starting in a lane (the centring
    reference), the guard pausing, prices held, NaN rows, bursts, three series cycling."""
    ns = 37
    sid0, X0, y0 = _hard_rows(rng, ns, 150)
    order = _mixed_order(rng, ns)
    sid, X, y = sid0[order], X0[order].copy(), y0[order].copy()
    step = order // ns
    y[(sid == 4) & (step == 120)] = np.nan
    X[(sid == 7) & (step == 60), 1] = np.nan
    y[(sid == 11) & (step == 0)] = np.nan
    est = ElasticityRLS(**{"forgetting": 0.97, **settings})
    res = run_batch(est, sid, X, y)
    states = np.tile(est.initial_state(), (ns, 1))
    out = np.empty((sid.size, K.NOUT))
    band, _, lam, guard, guard_lam, mps, mneff, tq = est.kernel_args
    rows_rls_run_two(states, sid, X, y, band, lam, guard, guard_lam, mps, mneff, tq, out)
    for c in range(K.NOUT):
        np.testing.assert_array_equal(_bits(res.out[:, c]), _bits(out[:, c]),
                                      err_msg=f"column {c}")
    np.testing.assert_array_equal(_bits(res.states), _bits(states))
    # the premises: both paths taken, every status reached, NaN after the NaN rows only
    assert 0.5 * sid.size < _lane_rows(sid) < 0.9 * sid.size
    status = res.status
    assert (status == K.ST_OK).any() and (status == K.ST_LOW_VARIATION).any()
    assert (status == K.ST_WARMING_UP).any()
    if est.excitation_guard:
        assert res.states[:, K.I_NPAUSED].sum() > 0
    assert np.isnan(res.beta[(sid == 4) & (step > 120)]).all()
    assert np.isfinite(res.beta[(sid == 4) & (step > 100) & (step < 120)]).all()
    assert np.isnan(res.out[sid == 11, K.O_INTERCEPT]).all()


def _control_rows(rng, n_series: int, T: int, n_controls: int):
    """Rows of :func:`_hard_rows` with controls: a 30% promotion flag, normal controls, and in
    some series a control held at 0 for the first 30 steps (dependent on the intercept: the
    factor drops it) and, for one series, the log price equal to a control (b unidentified)."""
    sid, X, y = _hard_rows(rng, n_series, T)
    step = np.repeat(np.arange(T), n_series)
    C = rng.normal(0.0, 1.0, (sid.size, n_controls))
    C[:, 0] = rng.random(sid.size) < 0.3
    if n_controls > 1:
        C[(sid % 4 == 2) & (step < 30), 1] = 0.0
        C[sid == 3, n_controls - 1] = X[sid == 3, 1]
    y = y + C @ np.full(n_controls, 0.2)
    return sid, np.column_stack([X, C]), y


GENERAL = [
    (1, {"band": "classic"}),
    (1, {"band": "hc"}),
    (1, {"band": "hac"}),
    (4, {"band": "classic"}),
    (4, {"band": "hc"}),
    (4, {"band": "hc", "forgetting": 1.0}),
    (4, {"band": "hac"}),
    (4, {"band": "hac", "hac_lags": 3, "excitation_guard": False}),
]


@pytest.mark.parametrize("n_controls, settings", GENERAL)
def test_general_step_equals_its_previous_form_to_the_bit(rng, n_controls, settings):
    sid, X, y = _control_rows(rng, 12, 150, n_controls)
    names = [f"c{i}" for i in range(n_controls)]
    est = ElasticityRLS(**{"forgetting": 0.97, "controls": names, **settings})
    res = run_batch(est, sid, X, y)
    states = np.tile(est.initial_state(), (12, 1))
    out = np.empty((sid.size, K.NOUT))
    band, lags, lam, guard, guard_lam, mps, mneff, tq = est.kernel_args
    k = X.shape[1]
    previous_rls_run_general(states, sid, X, y, band, lags, lam, guard, guard_lam, mps, mneff,
                             tq, out, np.empty(k * k + 8 * k))
    np.testing.assert_array_equal(_bits(res.out), _bits(out))
    np.testing.assert_array_equal(_bits(res.states), _bits(states))
    # the rows reached the branches they were built for
    status = res.status
    assert (status == K.ST_OK).any() and (status == K.ST_WARMING_UP).any()
    assert np.isnan(res.beta[sid == 3][-1]) == (n_controls > 1)
    assert np.isfinite(res.out[:, K.O_SE]).sum() > sid.size // 2


@njit(cache=True)
def _packed(a, b):
    out = np.empty((a.shape[0], 7))
    for i in range(0, a.shape[0] - 3, 4):
        q0, q1, q2, q3 = div4((a[i], a[i + 1], a[i + 2], a[i + 3]),
                              (b[i], b[i + 1], b[i + 2], b[i + 3]))
        r0, r1 = div2((a[i], a[i + 1]), (b[i], b[i + 1]))
        s0, s1, s2, s3 = sqrt4((a[i], a[i + 1], a[i + 2], a[i + 3]))
        out[i, 0], out[i + 1, 0], out[i + 2, 0], out[i + 3, 0] = q0, q1, q2, q3
        out[i, 1], out[i + 1, 1] = r0, r1
        out[i, 2], out[i + 1, 2], out[i + 2, 2], out[i + 3, 2] = s0, s1, s2, s3
    return out


def _operands(rng):
    """Pairs of operands for the lane-wise operation tests: 4,000 random values over 60
    decades, then every pair of special values (zeros, infinities, NaN, subnormals, extremes);
    ``n`` the count in whole groups of four lanes."""
    special = np.array([0.0, -0.0, 1.0, -1.0, np.inf, -np.inf, np.nan, 5e-324, 2.2e-308,
                        1.7e308, 3.0, 1e-300])
    a = np.concatenate([rng.normal(0, 1, 4000) * 10.0 ** rng.integers(-30, 30, 4000),
                        np.repeat(special, special.size)])
    b = np.concatenate([rng.normal(0, 1, 4000) * 10.0 ** rng.integers(-30, 30, 4000),
                        np.tile(special, special.size)])
    return a, b, a.size - a.size % 4


def test_packed_division_and_sqrt_equal_scalar_ieee_operations(rng):
    """Lane by lane equal to numpy's float64 division and square root (IEEE 754 correctly
    rounded), with zeros, infinities, NaN, negative and subnormal values among the operands."""
    a, b, n = _operands(rng)
    got = _packed(a[:n], b[:n])
    with np.errstate(all="ignore"):
        q = a[:n] / b[:n]
        s = np.sqrt(a[:n])
    np.testing.assert_array_equal(np.isnan(got[:, 0]), np.isnan(q))
    ok = ~np.isnan(q)
    np.testing.assert_array_equal(_bits(got[ok, 0]), _bits(q[ok]))
    ok2 = (np.arange(n) % 4 < 2) & ~np.isnan(q)
    np.testing.assert_array_equal(_bits(got[ok2, 1]), _bits(q[ok2]))
    np.testing.assert_array_equal(np.isnan(got[:, 2]), np.isnan(s))
    ok3 = ~np.isnan(s)
    np.testing.assert_array_equal(_bits(got[ok3, 2]), _bits(s[ok3]))


def test_learn_one_equals_run_batch_to_the_bit(rng):
    est = ElasticityRLS(forgetting=0.98)
    n = 600
    price = np.round(5.0 * np.exp(rng.normal(0, 0.1, n)), 2)
    qty = np.exp(3.0 - 1.8 * np.log(price) + rng.normal(0, 0.2, n))
    outs = np.empty((n, K.NOUT))
    for j in range(n):
        est.learn_one({"price": float(price[j])}, float(qty[j]))
        outs[j] = est._out
    # learn_one logs with math.log (numpy's log may differ from it in the last bit)
    X = np.column_stack([np.ones(n), [math.log(v) for v in price.tolist()]])
    res = run_batch(est.clone(), np.zeros(n, dtype=np.int64), X,
                    np.array([math.log(v) for v in qty.tolist()]))
    np.testing.assert_array_equal(_bits(outs), _bits(res.out))
    np.testing.assert_array_equal(_bits(est._state), _bits(res.states[0]))
    # numpy scalars and ints go the same way as floats
    e2 = ElasticityRLS(forgetting=0.98)
    for j in range(n):
        e2.learn_one({"price": price[j]}, qty[j])
    np.testing.assert_array_equal(_bits(e2._state), _bits(est._state))


@pytest.mark.parametrize("x, q, field, rule", [
    ({"price": -1.0}, 5.0, "price", None),
    ({"price": "abc"}, 5.0, "price", None),
    ({}, 5.0, "price", "missing"),
    ({"price": math.nan}, 5.0, "price", None),
    ({"price": math.inf}, 5.0, "price", None),
    ({"price": 2.0}, 0.0, "quantity", "zero"),
    ({"price": 2.0}, -3.0, "quantity", "non_negative"),
    ({"price": 2.0}, None, "quantity", None),
    ({"price": 2.0}, math.inf, "quantity", None),
])
def test_learn_one_bad_input_names_field_and_leaves_the_state(x, q, field, rule):
    est = ElasticityRLS()
    est.learn_one({"price": 2.0}, 10.0)
    before = est._state.copy()
    with pytest.raises(ValidationError) as err:
        est.learn_one(x, q)
    assert err.value.field == field
    if rule is not None:
        assert err.value.rule == rule
    assert field in str(err.value)
    np.testing.assert_array_equal(_bits(est._state), _bits(before))


@njit
def _lane_ops(a, b, out):
    for j in range(0, a.shape[0], 4):
        u = (a[j], a[j + 1], a[j + 2], a[j + 3])
        v = (b[j], b[j + 1], b[j + 2], b[j + 3])
        lt = vlt(u, v)
        gt = vgt(u, v)
        eq = veq(u, v)
        m = vor(vand(lt, vgt(v, (0.0, 0.0, 0.0, 0.0))), vnot(vnot(eq)))
        ne = vnot(eq)
        res = (vadd(u, v), vsub(u, v), vmul(u, v), vdiv(u, v), vsqrt(u), vsel(m, u, v))
        for i in range(4):
            for c in range(6):
                out[j + i, c] = res[c][i]
            out[j + i, 6] = 1.0 if lt[i] else 0.0
            out[j + i, 7] = 1.0 if gt[i] else 0.0
            out[j + i, 8] = 1.0 if eq[i] else 0.0
            out[j + i, 9] = 1.0 if ne[i] else 0.0


@njit(error_model="numpy")
def _scalar_ops(a, b, out):
    for j in range(a.shape[0]):
        u = a[j]
        v = b[j]
        out[j, 0] = u + v
        out[j, 1] = u - v
        out[j, 2] = u * v
        out[j, 3] = u / v
        out[j, 4] = np.sqrt(u)
        out[j, 5] = u if (u < v and v > 0.0) or u == v else v
        out[j, 6] = 1.0 if u < v else 0.0
        out[j, 7] = 1.0 if u > v else 0.0
        out[j, 8] = 1.0 if u == v else 0.0
        out[j, 9] = 0.0 if u == v else 1.0


def test_lane_operations_equal_scalar_operations(rng):
    """The lane-wise operations of :func:`monitor.estimators.kernel.step_two_lanes` (add,
    subtract, multiply, divide, square root, comparisons, masks and their negation, select)
    equal the scalar operations of compiled code lane by lane, to the bit (NaN's bits
    included), with zeros, infinities, NaN, negative and subnormal operands."""
    a, b, n = _operands(rng)
    got = np.empty((n, 10))
    want = np.empty((n, 10))
    _lane_ops(a[:n], b[:n], got)
    _scalar_ops(a[:n], b[:n], want)
    for c in range(10):
        np.testing.assert_array_equal(_bits(got[:, c]), _bits(want[:, c]),
                                      err_msg=f"operation {c}")
    assert np.isnan(want[:, 3]).any() and np.isinf(want[:, 3]).any()
    assert 0 < want[:, 6].sum() < n
