"""Price-feedback diagnostic: the regression against statsmodels, and its verdicts on the
observational scenario (prices follow demand) and on randomized price tests.

Without an instrument the elasticity estimator's innovations feed the diagnostic; it must
flag at least 95 % of observational series and at most 5 % of randomized-price series.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from monitor.estimators import feedback as F
from monitor.estimators import kernel as K
from monitor.estimators.batch import run_batch
from monitor.estimators.rls import ElasticityRLS
from simulators import observational, retail
from simulators.base import CHANGE_KINDS


def naive_innovations(sim, controls):
    """Rows the pipeline would accept (positive quantity, outside unit-error / stock-out /
    outage windows), the least-squares estimator's innovations and its warming-up flags."""
    log = sim.log
    keep = np.array(log["quantity"] > 0)
    for ch in sim.changes[sim.changes["kind"].isin(["unit_error", "stockout", "outage"])].itertuples():
        end = ch.end_ts or ch.ts
        keep &= ~((log["series"] == ch.series) & (log["ts"] >= ch.ts) & (log["ts"] <= end)).to_numpy()
    log = log[keep]
    sid = log["series"].astype("category").cat.codes.to_numpy().astype(np.int64)
    X = np.column_stack([np.ones(len(log)), np.log(log["price"])]
                        + [log[c].to_numpy(float) for c in controls])
    y = np.log(log["quantity"].to_numpy(float))
    out = run_batch(ElasticityRLS(forgetting=0.99, controls=controls), sid, X, y).out
    return sid, X[:, 1], out[:, K.O_E], out[:, K.O_STATUS] != K.ST_WARMING_UP


def test_statistic_equals_statsmodels_ols_with_hc1_at_forgetting_one():
    # the regression dlp_t = a + h lp_{t-1} + g e_{t-1}: coefficient, HC1 se and t of g
    # against statsmodels OLS(cov_type="HC1") on the same rows
    rng = np.random.default_rng(5)
    n = 500
    e = rng.normal(0, 0.2, n)
    lp = np.empty(n)
    lp[0] = 1.0
    for t in range(1, n):
        lp[t] = 0.7 + 0.3 * lp[t - 1] + 0.1 * e[t - 1] + rng.normal(0, 0.03 + 0.05 * (t % 3 == 0))
    res = F.run_feedback(np.zeros(n, np.int64), lp, e, forgetting=1.0)
    X = sm.add_constant(np.column_stack([lp[:-1], e[:-1]]))
    ref = sm.OLS(np.diff(lp), X).fit(cov_type="HC1")
    last = res.out[-1]
    assert last[F.FB_COEF] == pytest.approx(ref.params[2], rel=1e-9)
    assert last[F.FB_SE] == pytest.approx(ref.bse[2], rel=1e-9)
    assert last[F.FB_T] == pytest.approx(ref.tvalues[2], rel=1e-9)
    assert F.VERDICTS[int(last[F.FB_VERDICT])] == "feedback"


def test_unusable_rows_are_skipped_as_regressors():
    rng = np.random.default_rng(6)
    n = 200
    lp, e = rng.normal(1, 0.1, n), rng.normal(0, 0.2, n)
    use = np.ones(n, bool)
    use[:20] = False
    res = F.run_feedback(np.zeros(n, np.int64), lp, e, use, forgetting=1.0)
    # rows 0..20 give no regression row (row 21 is the first with a usable previous row)
    assert np.isnan(res.out[:21, F.FB_COEF]).all()
    X = sm.add_constant(np.column_stack([lp[20:-1], e[20:-1]]))
    ref = sm.OLS(np.diff(lp[20:]), X).fit(cov_type="HC1")
    assert res.out[-1, F.FB_T] == pytest.approx(ref.tvalues[2], rel=1e-9)
    assert F.VERDICTS[int(res.out[-1, F.FB_VERDICT])] == "none"


def test_flags_observational_series_and_says_biased_toward_zero():
    sim = observational(seed=7, n_series=200)
    sid, lp, e, use = naive_innovations(sim, ["weekend"])
    res = F.run_feedback(sid, lp, e, use)
    hit = res.flagged(sid)
    assert hit.mean() >= 0.95, hit.mean()
    last = len(sid) - 1 - np.unique(sid[::-1], return_index=True)[1]     # each series' last row
    # the manager raises prices after busy days and shocks persist: biased up (toward zero)
    assert (res.out[last, F.FB_DIRECTION] == 1).mean() >= 0.95


def test_randomized_price_tests_are_rarely_flagged():
    sim = retail(seed=7, n_series=200)
    assert sim.meta["randomized"] is True
    sid, lp, e, use = naive_innovations(sim, ["promo", "weekend"])
    res = F.run_feedback(sid, lp, e, use)
    hit = res.flagged(sid)
    assert hit.mean() <= 0.05, hit.mean()
    assert (res.out[:, F.FB_VERDICT] == F.V_WARMING_UP).any()       # early rows: no verdict


def test_streaming_class_message_and_checks():
    rng = np.random.default_rng(8)
    fb = F.PriceFeedback(forgetting=0.98)
    u = 0.0
    for _ in range(400):
        lp = 1.5 - 0.4 * u + rng.normal(0, 0.02)      # price cut after busy days
        u = 0.8 * u + rng.normal(0, 0.1)
        fb.learn_one(lp, u)
    assert fb.verdict == "feedback" and fb.direction == "down" and fb.t < -4
    msg = F.feedback_message("harbor-st/oat-bar", fb.t, fb.coefficient, -1)
    assert "away from zero" in msg and "--instrument" in msg and "Randomize" in msg
    with pytest.raises(ValueError, match="t_off"):
        F.PriceFeedback(t_on=2.0, t_off=3.0)
    assert "unit_error" in CHANGE_KINDS


def test_verdict_events_open_once_and_resume_across_batches():
    sim = observational(seed=9, n_series=5)
    sid, lp, e, use = naive_innovations(sim, ["weekend"])
    whole = F.run_feedback(sid, lp, e, use)
    ev = F.verdict_events(whole.out, sid, np.zeros(5))
    opens = [x for x in ev if x[2] == "open"]
    assert sorted({x[1] for x in opens}) == list(range(5))       # every series opens
    # in two batches with the states carried over: the same rows and the same events
    cut = len(sid) // 2
    a = F.run_feedback(sid[:cut], lp[:cut], e[:cut], use[:cut])
    before = a.states[:, F.F_VERDICT].copy()
    b = F.run_feedback(sid[cut:], lp[cut:], e[cut:], use[cut:], states=a.states)
    np.testing.assert_array_equal(np.vstack([a.out, b.out]), whole.out)
    ev2 = F.verdict_events(a.out, sid[:cut], np.zeros(5)) + [
        (j + cut, *rest) for j, *rest in F.verdict_events(b.out, sid[cut:], before)]
    assert ev2 == ev
    assert "1. prices that follow demand" in F.sign_flip_causes(F.V_FEEDBACK, 1)
    assert F.sign_flip_causes(F.V_NONE, 0).startswith("likely causes, most likely first: 1. bad data")


def test_an_empty_batch_opens_nothing():
    """A batch whose rows were all rejected reaches the diagnostic with no rows (the crash
    test's warm-up did): no event, no error."""
    res = np.empty((0, F.FB_NOUT))
    assert F.verdict_events(res, np.zeros(0, dtype=np.int64), np.zeros(3)) == []


def test_one_row_at_a_time_gives_the_batch_events():
    """The one-row shortcut of verdict_events (the live path's Monitor.observe) opens and clears
    on exactly the rows the batch form does, with the same values."""
    sim = observational(seed=9, n_series=5)
    sid, lp, e, use = naive_innovations(sim, ["weekend"])
    whole = F.run_feedback(sid, lp, e, use)
    ev = F.verdict_events(whole.out, sid, np.zeros(5))
    verdict = np.zeros(5)
    one = []
    for j in range(len(sid)):
        one += [(j, *rest) for _, *rest in F.verdict_events(whole.out[j:j + 1], sid[j:j + 1],
                                                              verdict)]
        verdict[sid[j]] = whole.out[j, F.FB_VERDICT]
    assert len(ev) >= 5 and one == ev               # every series opens at least once


def test_batch_loop_equals_one_step_per_row_to_the_bit():
    """``feedback_run`` (compiled without reference counting, work-space parts made once per
    batch) gives the states and outputs of :func:`feedback_step` called row by row, to the bit,
    on interleaved series with unusable and NaN rows and a series that feeds back."""
    rng = np.random.default_rng(11)
    S, T = 7, 400
    n = S * T
    sid = np.tile(np.arange(S), T).astype(np.int64)
    u = np.zeros(S)
    lp, e = np.empty(n), np.empty(n)
    for t in range(T):
        sl = slice(t * S, (t + 1) * S)
        lp[sl] = np.log(4.0) + 0.3 * u * (np.arange(S) % 2) + rng.normal(0.0, 0.05, S)
        u = 0.8 * u + rng.normal(0.0, 0.1, S)
        e[sl] = u
    e[rng.random(n) < 0.02] = np.nan
    use = (rng.random(n) > 0.05) & np.isfinite(e)
    st_b = np.zeros((S, F.STATE_SIZE))
    out_b = np.empty((n, F.FB_NOUT))
    F.feedback_run(st_b, sid, lp, e, use, 0.99, 4.0, 2.0, 60.0, out_b, np.empty(F.WORK_SIZE))
    st_r = np.zeros((S, F.STATE_SIZE))
    out_r = np.empty((n, F.FB_NOUT))
    w = np.empty(F.WORK_SIZE)
    for j in range(n):
        F.feedback_step(st_r[sid[j]], lp[j], e[j], bool(use[j]), 0.99, 4.0, 2.0, 60.0, out_r[j], w)
    assert np.array_equal(st_b.view(np.int64), st_r.view(np.int64))
    assert np.array_equal(out_b.view(np.int64), out_r.view(np.int64))
    assert (out_b[:, F.FB_VERDICT] == F.V_FEEDBACK).any()     # the check reached a verdict
