"""The observational scenario (prices follow demand) with its cost instrument.

The scenario's manager raises prices after busy days and the demand shock persists, so the
least-squares elasticity is biased toward zero by about +0.9 (checked here as the contrast).
Its ``unit_cost`` column moves the price and not demand; instrumenting log price by the log
cost must remove the bias (mean within +-0.1) and give a 95 % band that covers the true b
95 +- 2 % of the time. 400 series x 365 days: rows of one series are strongly dependent (an
effective window of about 200 days), so about 700 nearly independent windows: the coverage
estimate has a standard error of about 0.8 %, and +-2 % is an honest tolerance. The
elasticity is held constant (``change_size=0``): the claim is about endogeneity, not about
tracking a change.
"""

from __future__ import annotations

import numpy as np
import pytest

from monitor.estimators import kernel as K
from monitor.estimators.batch import run_batch
from monitor.estimators.iv import ElasticityIV, run_iv, status_label
from monitor.estimators.rls import ElasticityRLS
from simulators import observational


def arrays(sim):
    log = sim.log
    sid = log["series"].astype("category").cat.codes.to_numpy().astype(np.int64)
    R = np.column_stack([np.ones(len(log)), np.log(log["price"]), log["weekend"],
                         np.log(log["unit_cost"])])
    return sid, R, np.log(log["quantity"].to_numpy(float)), sim.path["beta"].to_numpy()


@pytest.fixture(scope="module")
def scenario():
    return observational(seed=11, n_series=400, change_size=0.0)


def test_scenario_records_its_instrument_truth(scenario):
    truth = scenario.meta["instrument_truth"]["unit_cost"]
    assert scenario.meta["instruments"] == ["unit_cost"]
    assert truth["demand_effect"] == 0.0 and truth["pass_through"] > 0.0
    assert scenario.changes.empty


def test_cost_instrument_removes_the_bias_and_the_band_covers(scenario):
    sid, R, y, b = arrays(scenario)
    est = ElasticityIV(log_instruments=["unit_cost"], controls=["weekend"], forgetting=0.99)
    out = run_iv(est, sid, R, y).out
    ok = out[:, K.O_STATUS] == K.ST_OK
    assert ok.mean() > 0.7            # most rows past warm-up with a strong first stage
    err = out[ok, K.O_BETA] - b[ok]
    cover = ((out[ok, K.O_LO] <= b[ok]) & (b[ok] <= out[ok, K.O_HI])).mean()
    assert abs(err.mean()) <= 0.1, err.mean()
    assert 0.93 <= cover <= 0.97, cover
    # contrast: least squares on the same rows is biased upward and its band rarely covers
    ols = run_batch(ElasticityRLS(forgetting=0.99, controls=["weekend"]), sid, R[:, :3], y).out
    ok2 = ols[:, K.O_STATUS] == K.ST_OK
    assert (ols[ok2, K.O_BETA] - b[ok2]).mean() > 0.5
    assert ((ols[ok2, K.O_LO] <= b[ok2]) & (b[ok2] <= ols[ok2, K.O_HI])).mean() < 0.3


def test_an_irrelevant_cost_is_flagged_weak_and_a_relevant_one_is_not():
    # pass_through = 0: the cost column does not move the price; the first stage has nothing
    sim = observational(seed=12, n_series=20, change_size=0.0, pass_through=0.0)
    sid, R, y, _ = arrays(sim)
    est = ElasticityIV(log_instruments=["unit_cost"], controls=["weekend"], forgetting=0.99)
    res = run_iv(est, sid, R, y)
    late = np.arange(len(y)) >= len(y) // 2
    labels = np.array(res.status_labels())
    assert (labels[late] == "weak_instrument").mean() > 0.9
    assert np.nanmedian(res.first_stage_f[late]) < 10.0
    sim = observational(seed=12, n_series=20, change_size=0.0)
    sid, R, y, _ = arrays(sim)
    res = run_iv(est, sid, R, y)
    labels = np.array(res.status_labels())
    assert (labels[late] == "ok").mean() > 0.9
    assert status_label(5) == "weak_instrument"
