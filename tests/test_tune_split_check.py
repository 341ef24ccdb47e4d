"""``elmon tune LOG --arl0 A`` without a truth file checks the default split likelihood-ratio
detector (issue 12 item 3): false alerts per 10,000 observations of each kind on in-control logs
resampled from the log, against 10,000 / A, with a verdict per kind.

Logs come from the detection grid (simulators/change_grid.py), no change in them. What the
pipeline itself does on such data, measured on 300 series x 2,000 observations per pattern at
ARL0 2,000 (alerts per 10,000 / design, elasticity_change / level_shift; the detector with the
label rule of commit 9f870e6, measured 19:05 UTC on 4 December 2026): independent errors 1.04 /
1.23; error sd growing with price (g = 3, log-price sd 0.2) 2.60 / 0.12; AR(1) errors of 0.9
0.47 / 3.11. (Before the label rule: 1.00 / 0.95, 1.74 / 2.92, 0.49 / 1.83.) Since commit
b0cf54d (5 December 2026: each row winsorized at its own sd, a short after sample tested with
the variance its own prices give it) the slope chart keeps its design under error sd growing
with price: 0.85 at ARL0 2,000 in the pipeline (was 1.72 on the detection grid's pattern).
Since the level chart's scale freezes at the design's point (split_glr.HOT_LEVEL, 5 December
2026), AR(1) errors of 0.9 keep the level chart's design as well (0.92 in the pipeline, 500
series, seed 12; 3.28 with the freeze at half the threshold)."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from monitor.cli import main
from monitor.replay.health import health_of_arrays
from monitor.settings import validate
from monitor.tuning.alert_check import KINDS, alert_rates, fit_variance, verdict
from monitor.tuning.calibrate import calibrate
from simulators.change_grid import Scenario, simulate
from tests.grid_logs import write_grid_log

pytestmark = pytest.mark.slow
NOW = pd.Timestamp("2030-01-01", tz="UTC").value
ARL0 = 2000.0
BUDGET = 400_000          # resampled observations: 200 alerts per kind expected at the design


def _agrees(kind: dict, rate: float, alerts: int) -> bool:
    """The check's ratio for one kind agrees with the pipeline's own measured ``rate`` (from
    ``alerts`` alerts): the two differ by at most 2 sd of their difference, each estimate with
    its own Monte Carlo error (the check's from its 95% interval, the pipeline's Poisson,
    ``rate / sqrt(alerts)``). Until 5 December 2026 the pipeline's rate had to sit inside the
    check's interval, which took it as exact: with the cap of 18:55 UTC the AR(1) 0.9 level
    rate is 0.874 (435 alerts) and the check's interval tops at 0.872, a difference of 1.8 of
    that sd."""
    se = (kind["ratio_hi"] - kind["ratio_lo"]) / (2.0 * 1.96)
    return abs(kind["ratio"] - rate) <= 2.0 * (se ** 2 + rate ** 2 / alerts) ** 0.5


def _log(path, **kw):
    sim = simulate(Scenario("tune-check", n_obs=2000, **kw), n_series=6, seed=11)
    write_grid_log(sim, path)


def test_iid_errors_keep_the_design_and_the_command_says_so(tmp_path, capsys):
    _log(tmp_path / "iid.csv")
    rc = main(["tune", str(tmp_path / "iid.csv"), "--arl0", "2000", "--out", str(tmp_path / "o"),
               "--bootstrap-obs", str(BUDGET), "--quiet"])
    assert rc == 0
    out = capsys.readouterr().out
    s = json.loads((tmp_path / "o" / "calibration.json").read_text())
    a = s["alert_rates"]
    assert a["checked"] and s["unchecked"] == {} and s["checks"] == {}
    assert a["observations"] >= BUDGET and a["health"]["price_linked_variance"] == 0
    for kind in KINDS:
        k = a["kinds"][kind]
        assert k["verdict"] == "holds" and not k["flagged"], k["message"]
        # the estimate is within the band of issue 12 (+-25% of the design)
        assert k["ratio_lo"] < k["ratio"] < k["ratio_hi"] and 0.75 < k["ratio"] < 1.25
        assert k["alerts"] == round(k["rate_per_10k"] * k["observations"] / 1e4)
        assert f"ok:   {kind}" in out and "design holds" in k["message"]
    assert not s["flagged"] and "NOT CHECKED" not in out and "FLAG" not in out
    assert "design holds" in (tmp_path / "o" / "recommended.toml").read_text()
    html = (tmp_path / "o" / "report.html").read_text()
    assert "False alerts on resampled in-control logs" in html and "design holds" in html


def test_variance_growing_with_price_keeps_the_slope_design_and_names_the_link(tmp_path):
    _log(tmp_path / "grow.csv", errors="growing", price_sd=0.2)
    s = calibrate(tmp_path / "grow.csv", tmp_path / "o", config=validate({}), arl0=ARL0,
                  n_steps=BUDGET, progress=False, now_ns=NOW)
    a = s["alert_rates"]
    slope, level = a["kinds"]["elasticity_change"], a["kinds"]["level_shift"]
    # the pipeline raised 2.6 times the designed elasticity_change alerts on such data before
    # commit b0cf54d, and the check said "breaks"; the slope chart now scales each after
    # sample's slope by the variance its own prices give it, and the check sees the design hold
    # (measured 0.86, 95% interval 0.73-1.02, 173 alerts; 5 December 2026). Since the level
    # chart's statistic freezes the shared noise scale only above 4.0 (split_glr.HOT_LEVEL,
    # 5 December 2026) the scale takes in a little more of each excursion and the slope chart
    # runs below its design here: 0.68 of it in the pipeline on this pattern (0.74 with the
    # freeze at half the level threshold, when this check's 0.86 passed 0.75 by its own
    # sampling error; direct replays of the pattern, seed 12, helper of 07:47 UTC), a
    # conservative cell recorded under issue 12. The check must see what the pipeline does:
    # not above the design, and an interval that holds the pipeline's own rate. Since the slope
    # alarm's label margin follows the ARL0 (1.01 at 2,000) and its threshold was redesigned
    # for it (4.68 -> 4.79), the pipeline's own rate on this pattern is 0.62 (500 series x 2,000
    # rows, seed 12, 309 alerts; 17:30 UTC on 5 December 2026), and the check says 0.55, 95%
    # interval 0.45-0.68, 111 alerts (0.68, 0.55-0.83 before). Since the slope score's
    # autocorrelation is capped by the prices' times the errors' and the thresholds were
    # regenerated for it (4.79 -> 4.83 at 2,000), the pipeline's own rate is 0.66 (329 alerts,
    # same series; 18:55 UTC) and the check says 0.75, 95% interval 0.63-0.89, 150 alerts: the
    # two must agree within their combined Monte Carlo error. With the sieve refitted per group
    # of paths (the fit's error in the interval) the check says 0.60, 0.49-0.72, 119 alerts.
    # With the level label's per-alternative variances and the thresholds regenerated for them
    # (5 December 2026, 22:00 UTC) the pipeline's own rate is 0.64 (320 alerts, same series)
    # and the check says 0.65, 95% interval 0.40-0.89, 129 alerts
    assert slope["verdict"] == "holds" and not slope["flagged"], slope["message"]
    assert slope["ratio"] < 1.25 and slope["ratio_lo"] < 1.0, slope["message"]
    assert _agrees(slope, 0.643, 320), slope["message"]
    assert "design holds" in slope["message"]
    # the level chart stays conservative there (0.21 in the pipeline since the level label's
    # variances, 0.12 before; 0.38 in the check, 95% interval 0.21-0.54)
    assert level["verdict"] == "holds" and not level["flagged"] and level["ratio_hi"] < 0.75
    assert "conservative" in level["message"]
    # the same prices with independent normal errors keep the design too
    assert 0.75 < slope["reference"]["ratio"] < 1.25
    # the series' health still names the link of the error size to the price
    assert a["health"]["price_linked_variance"] == a["health"]["series"] == 6
    assert not s["flagged"]
    # the same seed gives the same answer
    again = calibrate(tmp_path / "grow.csv", tmp_path / "o2", config=validate({}), arl0=ARL0,
                      n_steps=BUDGET, progress=False, now_ns=NOW)
    assert again["alert_rates"]["kinds"] == a["kinds"]


def test_strongly_autocorrelated_errors_keep_the_level_design(tmp_path):
    """AR(1) errors of 0.9: the pipeline raised 3.11 times the designed level_shift alerts on
    such data (module docstring) while the level chart's scale froze at half its threshold;
    with the freeze at the design's point (split_glr.HOT_LEVEL) it raises 0.92 times (500
    series x 2,000 observations, seed 12, 458 alerts; 3.28 times, 1,634 alerts, with the old
    freeze on the same series). The check follows: the level kind holds (0.82, 95% interval
    0.70-0.96, 164 alerts; it said "breaks" at 3.1 times before), and the series' health still
    names the autocorrelation. Since the slope alarm's label margin follows the ARL0 (5 December
    2026, 17:30 UTC) the pipeline raises 0.86 times (500 series, seed 12, 427 alerts) and the
    check says 0.75, 95% interval 0.63-0.89, 150 alerts: the check's interval must hold the
    pipeline's own rate, and the check must not call the level chart conservative. With the
    slope score's autocorrelation capped by the prices' times the errors' and the thresholds
    regenerated (5 December 2026, 18:55 UTC) the pipeline raises 0.87 times (435 alerts) and
    the check says 0.74, 95% interval 0.61-0.87, 147 alerts: they must agree within their
    combined Monte Carlo error (:func:`_agrees`). That interval held the resampling's error
    only; on six logs of this process (seeds 11-16) the check's level ratio ranged 0.59-1.06
    and two intervals missed the pipeline's rate, the error of the AR sieve one log fixes. Since
    the paths come in groups, each with the sieve fitted again to a path drawn from it, and
    the groups' spread beyond their counts widens the interval (5 December 2026, evening), this
    log's check says 0.94, 95% interval 0.67-1.20, 187 alerts (fit sd 0.12), and the interval
    holds the pipeline's own rate again (on the six logs 0.75-1.06, all six). With the level
    label's per-alternative variances and the thresholds regenerated for them (22:00 UTC) the
    pipeline raises 0.87 times (431 alerts) and the check says 0.94, 0.76-1.11 (fit sd 0.04)."""
    _log(tmp_path / "ar.csv", errors="ar1", rho=0.9)
    s = calibrate(tmp_path / "ar.csv", tmp_path / "o", config=validate({}), arl0=ARL0,
                  n_steps=BUDGET, progress=False, now_ns=NOW)
    a = s["alert_rates"]
    level, slope = a["kinds"]["level_shift"], a["kinds"]["elasticity_change"]
    assert level["verdict"] == "holds" and not level["flagged"], level["message"]
    assert level["ratio"] < 1.25 and _agrees(level, 0.866, 431), level["message"]
    assert level["ratio_lo"] <= 0.866 <= level["ratio_hi"] and "fit_sd" in level, level
    assert a["ar_orders"]["max"] >= 1
    assert "conservative" not in level["message"], level["message"]
    assert slope["verdict"] == "holds" and not slope["flagged"], slope["message"]
    assert a["health"]["autocorrelated"] == 6 and a["health"]["median_resid_ac1"] > 0.8


def test_rates_interval_and_verdicts():
    """Garwood's exact Poisson interval (checked against scipy's poisson quantiles) on the
    alert count; over-dispersed counts widen it."""
    from scipy.stats import poisson

    exposure = np.full(100, 2000.0)            # 200,000 observations: 100 alerts designed
    counts = np.ones(100)
    counts[:60] += 1                           # 160 alerts, spread evenly over the paths
    r = alert_rates(counts, exposure, 2000.0)
    assert r["alerts"] == 160 and r["ratio"] == pytest.approx(1.6) and r["dispersion"] == 1.0
    # Garwood's ends: the means whose upper / lower 2.5% tails hold the count (scipy)
    assert poisson.cdf(160, r["ratio_hi"] * 100) == pytest.approx(0.025, rel=1e-6)
    assert poisson.sf(159, r["ratio_lo"] * 100) == pytest.approx(0.025, rel=1e-6)
    assert verdict(r) == "breaks"
    lumpy = np.zeros(100)
    lumpy[:5] = 32                             # the same 160 alerts in 5 of 100 paths
    w = alert_rates(lumpy, exposure, 2000.0)
    assert w["dispersion"] > 10 and w["ratio_lo"] < r["ratio_lo"] and w["ratio"] == r["ratio"]
    assert verdict(w) == "unsettled"
    assert verdict(alert_rates(np.ones(100), exposure, 2000.0)) == "holds"


def test_fit_variance_is_the_dersimonian_laird_between_group_variance():
    """The sieve fit's variance (module docstring, step 3) is the between-group variance of the
    groups' ratios beyond their Poisson counts: with groups of equal exposure it equals
    DerSimonian & Laird's (1986) tau^2 as statsmodels computes it (``combine_effects``,
    ``method_re="dl"``) with each group's Poisson variance at the pooled ratio; it is 0 where
    the groups agree beyond chance, and it widens the interval in quadrature."""
    from statsmodels.stats.meta_analysis import combine_effects

    rng = np.random.default_rng(3)
    G, arl0 = 40, 2000.0
    E = np.full(G, 1e6)
    true = np.exp(0.2 * rng.standard_normal(G))       # each group's own rate, ratio units
    counts = rng.poisson(true * E / arl0).astype(float)
    group = np.arange(G)
    ratio = counts.sum() * arl0 / E.sum()
    ref = combine_effects(counts * arl0 / E, np.full(G, ratio * arl0 / E[0]), method_re="dl")
    tau2 = fit_variance(counts, E, group, arl0)
    assert tau2 == pytest.approx(ref.tau2, rel=1e-9) and tau2 > 0.02
    # groups that agree exactly: no fit variance, the interval is Garwood's alone
    even = np.full(G, 500.0)
    assert fit_variance(even, E, group, arl0) == 0.0
    assert alert_rates(even, E, arl0, group)["ratio_lo"] == alert_rates(even, E, arl0)["ratio_lo"]
    # paths of 8 groups whose rates differ: the interval holds the fit's sd in quadrature
    paths = np.repeat(np.arange(8), 25)
    exp_ = np.full(paths.size, 2000.0)
    lumpy = np.where(paths % 2 == 0, 2.0, 0.0)           # half the groups twice the rate
    plain, wide = alert_rates(lumpy, exp_, arl0), alert_rates(lumpy, exp_, arl0, paths)
    half = np.hypot((plain["ratio_hi"] - plain["ratio_lo"]) / 2, 1.959964 * wide["fit_sd"])
    assert wide["fit_sd"] > 0.5 and wide["ratio"] == plain["ratio"]
    assert wide["ratio_hi"] == pytest.approx(wide["ratio"] + half)


def test_health_of_autocorrelated_and_price_linked_errors_against_statsmodels():
    """The health figures equal statsmodels' acf and OLS slope of log e^2 on log price; the
    flags fire at the levels of monitor.replay.health (lag-1 autocorrelation 0.7, error sd
    ratio 1.45 one log-price sd apart) and not for independent errors of constant variance."""
    import statsmodels.api as sm
    from statsmodels.tsa.stattools import acf

    rng = np.random.default_rng(4)
    n = 3000
    x = np.log(10.0) + 0.2 * rng.standard_normal(n)
    u = rng.standard_normal(n)
    for t in range(1, n):
        u[t] += 0.85 * u[t - 1]
    e = u * np.exp(1.0 * (x - np.log(10.0)))
    h = health_of_arrays(e, x)
    assert h["resid_ac1"] == pytest.approx(acf(e, nlags=1)[1], abs=2e-3)
    fit = sm.OLS(np.log(e * e), sm.add_constant(x)).fit()
    assert h["var_price_slope"] == pytest.approx(fit.params[1], rel=1e-9)
    assert h["var_price_slope_se"] == pytest.approx(fit.bse[1], rel=1e-9)
    assert health_of_arrays(u, x)["flags"] == "autocorrelated"             # r1 about 0.85
    grow = rng.standard_normal(n) * np.exp(3.0 * (x - np.log(10.0)))      # sd ratio 1.8
    assert health_of_arrays(grow, x)["flags"] == "price_linked_variance"
    mild = rng.standard_normal(n) * np.exp(1.0 * (x - np.log(10.0)))      # sd ratio 1.2
    assert health_of_arrays(mild, x)["flags"] == ""
    assert health_of_arrays(rng.standard_normal(n), x)["flags"] == ""


def test_the_check_shows_its_progress_unless_quiet(tmp_path, capsys):
    """A progress line on stderr names the resampled observations done (the last one when the
    budget is spent); --quiet prints none."""
    _log(tmp_path / "iid.csv")
    args = ["tune", str(tmp_path / "iid.csv"), "--arl0", "2000", "--bootstrap-obs", "50000"]
    assert main(args + ["--out", str(tmp_path / "a")]) == 0
    err = capsys.readouterr().err
    assert "tune check: " in err and "observations (100% of input)" in err and "(done)" in err
    assert main(args + ["--out", str(tmp_path / "b"), "--quiet"]) == 0
    assert "tune check" not in capsys.readouterr().err
