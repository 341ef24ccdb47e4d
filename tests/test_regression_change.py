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
    found in every series, no elasticity_change."""
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
    level shift is reported at once and the elasticity change follows within 5x the bound."""
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
