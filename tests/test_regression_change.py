"""The split GLR detector of a change in the elasticity or the level (issue 12).

Small seeded simulations with known truth; the information bound is Lorden's (1971)
``log(ARL0) / I`` with ``I = db^2 Var(log p) / (2 sigma^2)``. The larger grid is in
``make bench`` (benchmarks/, section "detection").
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

from monitor.detectors import split_glr as S
from monitor.detectors.split_class import SplitGLR
from monitor.detectors.split_design import (information, information_bound, split_thresholds)
from monitor.estimators import ElasticityRLS

LP0 = math.log(10.0)


def _prices(rng, n, sd=0.15, pattern="iid"):
    if pattern == "iid":
        return LP0 + rng.normal(0.0, sd, n)
    x = np.empty(n)
    i = 0
    while i < n:
        hold = int(rng.integers(7, 29))
        x[i:i + hold] = LP0 + rng.normal(0.0, sd)
        i += hold
    return x


def _series(rng, n, t0=None, b0=-1.0, b1=-1.8, pivot=True, level=0.0, sd=0.15, noise=0.15,
            pattern="iid"):
    """log p, log q with b stepping at t0 (pivot: demand at the typical price unchanged)."""
    x = _prices(rng, n, sd, pattern)
    b = np.full(n, b0)
    a = np.full(n, 4.0)
    if t0 is not None:
        b[t0:] = b1
        if pivot:
            a[t0:] = 4.0 + (b0 - b1) * LP0
        a[t0:] += level
    return x, a + b * x + rng.normal(0.0, noise, n)


def _run(x, y, arl0=20000.0, start=0):
    """Feed one series through ElasticityRLS + SplitGLR; list of (row, kind, report)."""
    est, det = ElasticityRLS(forgetting=0.99), SplitGLR(arl0=arl0)
    out = []
    for t in range(x.size):
        est.learn_one({"price": math.exp(x[t])}, math.exp(y[t]))
        det.observe(est, x[t], y[t], ts=float(t))
        if det.alarm and t >= start:
            out.append((t, det.alarm, det.report))
    return out, est, det


def test_winsorized_variance_constant_matches_scipy():
    # E[min(Z^2, c^2)] by numerical integration of scipy's normal density
    v = integrate.quad(lambda z: min(z * z, S.WINSOR_C ** 2) * stats.norm.pdf(z), -20, 20,
                       points=[-S.WINSOR_C, S.WINSOR_C])[0]
    assert S.WINSOR_K == pytest.approx(v, abs=2e-5)


def test_margin_is_half_the_chi2_quantile():
    # scipy: the 0.99 quantile of chi-square(1), halved (log-likelihood-ratio units)
    assert S.MARGIN == pytest.approx(stats.chi2.ppf(0.99, 1) / 2.0, abs=1e-3)


def test_information_bound_of_the_issue():
    # issue 12: db 0.8, log-price sd 0.15, noise 0.15, ARL0 20,000 -> about 31 observations
    assert information(0.8, 0.15, 0.15) == pytest.approx(0.32)
    assert information_bound(0.8, 0.15, 0.15, 20000) == pytest.approx(31.0, abs=0.5)


@pytest.mark.slow
def test_slope_change_detected_near_the_bound_labelled_and_timed():
    """b from -1.0 to -1.8 pivoting at the typical price: every series finds it as an
    elasticity change, median delay within 2x the bound (31 rows), and the estimated change
    time within half the median delay."""
    rng = np.random.default_rng(11)
    bound = information_bound(0.8, 0.15, 0.15, 20000)
    delays, errors, kinds, after, covered = [], [], [], [], 0
    for _ in range(16):
        x, y = _series(rng, 1700, t0=1400)
        alarms, est, _ = _run(x, y, start=1400)
        assert alarms, "change not detected"
        t, kind, rep = alarms[0]
        delays.append(t - 1400 + 1)
        errors.append(abs(rep["change_ts"] - 1400))
        kinds.append(kind)
        after.append(rep["beta_after"])
        covered += rep["beta_before_lo"] < -1.0 < rep["beta_before_hi"]
    med = float(np.median(delays))
    assert kinds.count("elasticity_change") == len(kinds)
    assert med <= 2.0 * bound, (med, bound)
    assert max(delays) <= 5.0 * bound
    assert float(np.median(errors)) <= 0.5 * med
    assert abs(float(np.median(after)) + 1.8) < 0.3
    assert covered >= 13  # 95% intervals: at least 13 of 16 (binomial tail below 1%)


@pytest.mark.slow
def test_pure_level_shift_is_a_level_shift():
    """Demand -20% at every price (b unchanged), step prices held 7-28 rows: level_shift
    found in every series, no elasticity_change. (Before the label rule of 9f870e6 one of
    these 12 series opened an elasticity_change 9 rows after the shift: with two held prices
    in the after sample a level step tilted its slope; this test was an xfail then.)"""
    rng = np.random.default_rng(12)
    kinds = []
    for _ in range(12):
        x, y = _series(rng, 1600, t0=1200, b1=-1.0, pivot=False, level=math.log(0.8),
                       pattern="step")
        alarms, _, _ = _run(x, y, start=1200)
        kinds += [k for _, k, _ in alarms]
    assert kinds.count("level_shift") >= 12
    assert kinds.count("elasticity_change") == 0


@pytest.mark.slow
def test_intercept_held_change_gives_both_kinds():
    """b -1.0 -> -1.5 with the intercept held: demand at the typical price moves too, so a
    level shift is reported at once and the elasticity change follows within 5x the bound.

    The streaming class fed by an outside estimator (which it cannot re-anchor after the level
    alarm, as the pipeline does) is slow here: an expected failure until 5 December 2026 (one
    of six series at 5.6 bounds); since the slope score's autocorrelation is capped by the
    prices' times the errors' (18:55 UTC) the six take 4.4 / 3.8 / 2.2 / 0.4 / 0.7 / 4.2
    bounds (79 rows each)."""
    rng = np.random.default_rng(13)
    bound = information_bound(0.5, 0.15, 0.15, 20000)
    for _ in range(6):
        x, y = _series(rng, 1900, t0=1400, b1=-1.5, pivot=False)
        alarms, est, _ = _run(x, y, start=1400)
        kinds = [k for _, k, _ in alarms]
        assert "level_shift" in kinds
        t = [t for t, k, _ in alarms if k == "elasticity_change"]
        assert t and t[0] - 1400 < 5 * bound


@pytest.mark.slow
def test_second_change_while_first_is_recent_is_found():
    """Two slope changes 250 rows apart: both found, each with its own change time, and the
    estimator's b follows the new regime within a few dozen rows of each alarm."""
    rng = np.random.default_rng(14)
    x = _prices(rng, 2300)
    b = np.where(np.arange(2300) < 1500, -1.0, np.where(np.arange(2300) < 1750, -1.8, -1.0))
    a = 4.0 + (-1.0 - b) * LP0
    y = a + b * x + rng.normal(0.0, 0.15, 2300)
    alarms, est, _ = _run(x, y, start=1500)
    slope = [(t, r["change_ts"]) for t, k, r in alarms if k == "elasticity_change"]
    assert len(slope) >= 2
    assert 1500 <= slope[0][0] < 1600 and abs(slope[0][1] - 1500) < 50
    assert 1750 <= slope[1][0] < 1900 and abs(slope[1][1] - 1750) < 80
    assert abs(est.elasticity + 1.0) < 0.25


def test_state_round_trip_continues_bit_for_bit():
    rng = np.random.default_rng(15)
    x, y = _series(rng, 600)
    det = SplitGLR(arl0=2000)
    for t in range(300):
        det.update(x[t], y[t], y[t] - 4.0 + x[t], ts=float(t))
    copy = SplitGLR.from_state(det.to_state())
    for t in range(300, 600):
        det.update(x[t], y[t], y[t] - 4.0 + x[t], ts=float(t))
        copy.update(x[t], y[t], y[t] - 4.0 + x[t], ts=float(t))
    assert np.array_equal(det._state, copy._state)
    assert det.statistics == copy.statistics


def test_thresholds_rise_with_arl0_and_delay_follows_information():
    lo, hi = split_thresholds(2000), split_thresholds(20000)
    assert lo.slope < hi.slope and lo.level < hi.level
    det = SplitGLR(arl0=20000)
    rng = np.random.default_rng(16)
    x, y = _series(rng, 800, sd=0.15, noise=0.15)
    for t in range(800):
        det.update(x[t], y[t], y[t] - 4.0 + x[t], ts=float(t))
    d = det.delay(0.5)
    # I = 0.25 * 0.15^2 / (2 * 0.15^2) = 0.125 per row; delay = factor * h / I
    assert 0.5 * hi.slope / 0.125 < d < 2.5 * hi.slope / 0.125


# ---------------------------------------------------------------- through the compiled pipeline
T0 = np.datetime64("2026-01-05T00:00:00", "ns").astype(np.int64)
DAY = 86_400 * 10**9


def _panel(n_series, n, seed, pattern="iid", ar=0.0, changes=(), sd=0.15, noise=0.15):
    """Rows time-major (then series): ``sid, X, y, ts``; ``changes``: (row, new b) pivoting at
    the typical price; errors AR(1) with lag-1 autocorrelation ``ar`` (unit variance scaled)."""
    rng = np.random.default_rng(seed)
    x = np.column_stack([_prices(rng, n, sd, pattern) for _ in range(n_series)])
    e = rng.normal(0.0, noise, (n, n_series))
    if ar:
        for t in range(1, n):
            e[t] = ar * e[t - 1] + math.sqrt(1.0 - ar * ar) * e[t]
    b = np.full((n, n_series), -1.0)
    for row, b_new in changes:
        b[row:] = b_new
    y = 4.0 + b * (x - LP0) + e
    sid = np.tile(np.arange(n_series), n).astype(np.int64)
    X = np.column_stack([np.ones(n * n_series), x.ravel()])
    ts = np.repeat(T0 + np.arange(n) * DAY, n_series)
    return sid, X, y.ravel(), ts


def _pipeline(arl0=2000.0, **rules):
    from monitor.pipeline.run import Pipeline
    from monitor.pipeline.settings import DetectorSettings, RuleSettings
    return Pipeline(ElasticityRLS(forgetting=0.99),
                    DetectorSettings(arl0=arl0, change_detector="split_glr"),
                    rules=RuleSettings(**rules))


KNOWN_STEP_RATE = pytest.mark.xfail(
    strict=False, reason="issue 12 open: with prices held 7-28 rows the level chart raises too FEW "
    "alarms at ARL0 2,000: 59 vs 180 expected (0.33x; the level label must beat a change of b, "
    "and while the price is held the two are tied); the slope chart's 129 (0.72x) is within "
    "this test's tolerance since its label margin follows the ARL0 (96 before, 0.53x; measured "
    "18:55 UTC on 5 December 2026 on this panel)")


@pytest.mark.slow
@pytest.mark.parametrize("pattern, ar", [("iid", 0.0), pytest.param("step", 0.0, marks=KNOWN_STEP_RATE),
                                         ("iid", 0.6)])
def test_in_control_alarm_rates_hold_the_design(pattern, ar):
    """ARL0 2,000 per chart: alarms per row of each chart (it restarts after each) within
    Monte Carlo error of 1 / 2,000 on independent prices, prices held 7-28 rows and AR(1)
    errors 0.6. Count sd ~ sqrt(count); the design's own sd (500 paths) about 5%. AR(1) 0.6:
    slope 166, level 147 of 180 expected (0.92x, 0.82x; slope 139 before the slope score's
    autocorrelation was capped by the prices' times the errors', 18:55 UTC); the slope chart's
    112 (0.62x) made it an expected failure until its label margin followed the ARL0 (5
    December 2026)."""
    from monitor.pipeline.kernel import S_LEVEL_FLAGS, S_SLOPE_FLAGS
    n_series, n = 60, 6000
    sid, X, y, ts = _panel(n_series, n, seed=21 + int(10 * ar), pattern=pattern, ar=ar)
    res = _pipeline().run(sid, X, y, n_series, ts=ts, keep_signals=True)
    live = (res.out[:, 5] != 0)  # rows past the estimator's warm-up
    expected = live.sum() / 2000.0
    tol = 4.0 * math.sqrt(1.0 / expected + 0.05 ** 2)
    for col in (S_SLOPE_FLAGS, S_LEVEL_FLAGS):
        got = ((res.signals[:, col].astype(np.int64) & 1) != 0).sum()
        print(f"{pattern} ar={ar} {'slope' if col == S_SLOPE_FLAGS else 'level'}: {got} alarms, "
              f"{expected:.0f} expected")
        assert abs(got / expected - 1.0) < tol


@pytest.mark.slow
def test_no_burst_when_the_charts_start():
    """400 series of 300 rows: alarms in the first rows (the charts start after 30 rows and a
    precise enough b) no more frequent than the designed rate allows (Poisson, 4 sd)."""
    sid, X, y, ts = _panel(400, 300, seed=31, pattern="step")
    res = _pipeline().run(sid, X, y, 400, ts=ts)
    opens = res.events[res.events["action"] == "open"]
    n = (opens["kind"].isin(["elasticity_change", "level_shift"])).sum()
    expected = 2 * 400 * 300 / 2000.0        # two charts, every row at most
    assert n <= expected + 4.0 * math.sqrt(expected)


@pytest.mark.slow
def test_second_change_while_the_first_alert_is_open_is_a_new_alert():
    """b -1.0 -> -1.8 at row 1500 and back to -1.0 at row 1750, alerts kept open 1,000 quiet
    rows: the second change closes the first alert as superseded and opens a new one with its
    own change time, in every series."""
    sid, X, y, ts = _panel(8, 2300, seed=41, changes=((1500, -1.8), (1750, -1.0)))
    res = _pipeline(arl0=20000.0, clear_after=1000).run(sid, X, y, 8, ts=ts)
    ev = res.events[res.events["kind"] == "elasticity_change"]
    row = np.repeat(np.arange(2300), 8)
    for s in range(8):
        e = ev[ev["sid"] == s]
        e = e[row[e["row"].to_numpy()] >= 1500]
        opens = e[e["action"] == "open"]
        assert len(opens) >= 2, e[["row", "action"]]
        first, second = opens.iloc[0]["details"], opens.iloc[1]["details"]
        assert abs(first["change_observation"] - 1501) < 60
        assert abs(second["change_observation"] - 1751) < 80
        assert second["beta_after"] > first["beta_after"]
        sup = e[(e["action"] == "clear") & e["details"].map(lambda d: d.get("superseded", False))]
        assert len(sup) >= 1 and "superseded" in sup.iloc[0]["message"]


@pytest.mark.slow
def test_elmon_arl_split_agrees_with_simulation(capsys):
    """`elmon arl split` prints the designed thresholds and the expected delay; the delay of
    the compiled pipeline on simulated series (b -1.0 -> -1.8, sd 0.15 / 0.15) is within 40%
    of it, and the thresholds are the ones the pipeline uses."""
    import json

    from monitor.cli import main
    assert main(["arl", "split", "--arl0", "20000", "--db", "0.8", "--price-sd", "0.15",
                 "--noise-sd", "0.15", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    pipe = _pipeline(arl0=20000.0)
    assert out["h_slope"] == pytest.approx(pipe.designs["slope"].threshold)
    assert out["delays"][0]["bound"] == pytest.approx(31.0, abs=0.5)
    sid, X, y, ts = _panel(30, 1800, seed=51, changes=((1400, -1.8),))
    res = pipe.run(sid, X, y, 30, ts=ts)
    ev = res.events
    row = np.repeat(np.arange(1800), 30)
    delays = []
    for s in range(30):
        e = ev[(ev["sid"] == s) & (ev["kind"] == "elasticity_change") & (ev["action"] == "open")]
        r = row[e["row"].to_numpy()]
        r = r[r >= 1400]
        delays.append(r[0] - 1400 + 1 if r.size else 10**6)
    med = float(np.median(delays))
    print(f"median delay {med}, expected {out['delays'][0]['expected_delay']:.1f}")
    assert abs(med / out["delays"][0]["expected_delay"] - 1.0) < 0.4
    d50 = pipe.delay50_obs(res.states)
    assert np.all(np.isfinite(d50)) and np.all(d50 > 0)
