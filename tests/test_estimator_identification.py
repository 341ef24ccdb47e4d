"""Identification after the controls: a price that the controls explain is low variation, the
elasticity is not reported, and the pipeline raises no elasticity alert on it."""

from __future__ import annotations

import math

import numpy as np
import pytest

from monitor.estimators import ElasticityRLS
from monitor.estimators.transform import design_matrix, parse_controls


def _tariff_rows(rng, n_collinear, n_free):
    """Hourly rows whose price is 0.16 / 0.24 / 0.38 by tariff block (an exact function of the
    shoulder and peak dummies) for ``n_collinear`` rows, then also moved by a daily price level."""
    n = n_collinear + n_free
    hour = np.arange(n) % 24
    shoulder = ((hour >= 7) & (hour < 17)).astype(float)
    peak = ((hour >= 17) & (hour < 22)).astype(float)
    block = np.where(peak == 1, 0.38, np.where(shoulder == 1, 0.24, 0.16))
    level = np.ones(n)
    days = (np.arange(n) - n_collinear) // 24
    free = np.arange(n) >= n_collinear
    level[free] = rng.choice([0.8, 1.0, 1.25], days[free].max() + 1)[days[free]]
    price = block * level
    lq = 6.0 - 0.12 * np.log(price / 0.24) + 0.25 * shoulder + 0.45 * peak + \
        rng.normal(0, 0.05, n)
    return price, np.exp(lq), shoulder, peak


def test_price_explained_by_controls_is_low_variation_and_names_them(rng):
    price, q, shoulder, peak = _tariff_rows(rng, 72, 24 * 20)
    est = ElasticityRLS(forgetting=0.995, controls=["shoulder", "peak"])
    for i in range(72):
        est.learn_one({"price": price[i], "shoulder": shoulder[i], "peak": peak[i]}, q[i])
        if i >= 30:
            # raw log price varies a lot (sd 0.3), but none of it is left after the controls
            assert est.price_sd_after_controls < 1e-6
            assert est.status == "low_variation"
            assert math.isnan(est.elasticity) and math.isnan(est.stderr)
    assert np.std(np.log(price[:72])) > 0.3
    assert est.collinear_controls() == ["shoulder", "peak"]
    for i in range(72, price.size):
        est.learn_one({"price": price[i], "shoulder": shoulder[i], "peak": peak[i]}, q[i])
    # once the daily level moves the price on its own, b is identified and close to -0.12
    assert est.status == "ok"
    lo, hi = est.interval()
    assert lo < -0.12 < hi and hi - lo < 0.2


def test_partly_explained_price_uses_the_variation_left(rng):
    # price = tariff block x level with level sd ~ 1%: raw sd 0.3, left after controls ~ 0.01
    n = 2000
    hour = np.arange(n) % 24
    peak = ((hour >= 17) & (hour < 22)).astype(float)
    price = np.where(peak == 1, 0.38, 0.16) * np.exp(rng.normal(0, 0.01, n))
    q = np.exp(5.0 - 0.3 * np.log(price) + 0.4 * peak + rng.normal(0, 0.05, n))
    est = ElasticityRLS(forgetting=0.99, controls=["peak"], min_price_sd=0.02)
    for i in range(n):
        est.learn_one({"price": price[i], "peak": peak[i]}, q[i])
    assert 0.005 < est.price_sd_after_controls < 0.015
    assert est.status == "low_variation"
    # the sd left is also what the estimator's information matrix says: 1 / sqrt(P_bb W)
    w = est._state[0]
    assert est.price_sd_after_controls == pytest.approx(1 / math.sqrt(est._P[1, 1] * w), rel=1e-9)


@pytest.mark.slow
def test_load_scenario_collinear_stretch_raises_no_elasticity_alert():
    from simulators.load import load
    from monitor.pipeline.run import Pipeline

    sim = load(seed=0, length=480)
    log = sim.log
    controls = sim.meta["controls"]
    names = sorted(log["series"].unique())
    sid = log["series"].map({n: i for i, n in enumerate(names)}).to_numpy()
    keep = log["quantity"].to_numpy() > 0
    X = design_matrix(log["price"].to_numpy(), {c: log[c].to_numpy(float) for c in controls},
                      parse_controls(controls, []))
    pipe = Pipeline(ElasticityRLS(forgetting=0.995, controls=controls))
    res = pipe.run(sid[keep], X[keep], np.log(log["quantity"].to_numpy()[keep]), len(names),
                   names=names)
    s = sid[keep]
    price = log["price"].to_numpy()[keep]
    for i in range(len(names)):
        rows = np.flatnonzero(s == i)
        # the collinear stretch: the day's price level has not moved yet, so log price is
        # an exact function of the shoulder and peak dummies (residual sd 0)
        level = price[rows] / np.where(X[keep][rows, 6] == 1, 0.38,
                                       np.where(X[keep][rows, 5] == 1, 0.24, 0.16))
        stretch = rows[:np.argmax(np.abs(level - level[0]) > 1e-9)]
        assert stretch.size >= 24
        assert np.all(res.out[stretch, 5] != 1)             # never 'ok'
        assert np.all(np.isnan(res.out[stretch, 0]))         # no elasticity reported
        opened = res.events[(res.events["action"] == "open")
                            & res.events["kind"].isin(["elasticity_change", "out_of_bounds",
                                                       "sign_flip"])]
        assert not np.isin(opened["row"].to_numpy(), stretch).any()
        # its low_variation alert says why: the raw price moves, but only with the controls
        lv = res.events[(res.events["action"] == "open") & (res.events["kind"] == "low_variation")
                        & np.isin(res.events["row"].to_numpy(), stretch)]
        assert len(lv) == 1
        d = lv["details"].iloc[0]
        assert d["log_price_sd"] < 1e-6 < d["min_price_sd"] < 0.2 < d["raw_log_price_sd"]
        assert "moved only with the controls" in lv["message"].iloc[0]
