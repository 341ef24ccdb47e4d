"""Detectors: one conformance suite over every detector, pinned alarm indices on seeded streams,
and checks against outside references (published ARL tables, river's PageHinkley)."""

from __future__ import annotations

import inspect
import json
import math

import numpy as np
import pytest

from monitor.detectors import (CUSUM, BoundsDetector, EWMAChart, FastSlowSlope, PageHinkley,
                               RiverDetector, SlopeChangeDetector)
from monitor.detectors.arl import cusum_arl, cusum_h_for_arl0, ewma_L_for_arl0
from monitor.detectors.kernels import F_ALARM, F_CLEAR
from monitor.estimators import ElasticityRLS


def _shifted(seed, n=400, at=300, shift=2.0):
    x = np.random.default_rng(seed).normal(0.0, 1.0, n)
    x[at:] += shift
    return x


def _bounds_rows(seed, n=400):
    """Estimates that walk out of [-3, -0.5] from t = 200 (invented, for the detector only)."""
    rng = np.random.default_rng(seed)
    b = np.r_[np.full(200, -1.2), np.linspace(-1.2, 0.2, n - 200)] + rng.normal(0, 0.05, n)
    half = 0.3 + 0.05 * rng.random(n)
    return np.column_stack([b, b - half, b + half])


# every detector with the input stream it expects; thresholds given where a default would be
# designed by simulation (the design has its own tests below)
CASES = {
    "cusum": (lambda: CUSUM(k=0.5, h=5.0), _shifted(1)),
    "cusum_burn_in": (lambda: CUSUM(k=0.5, h=6.0, burn_in=25), _shifted(2)),
    "ewma": (lambda: EWMAChart(lam=0.2, L=3.3), _shifted(3, shift=1.5)),
    "page_hinkley": (lambda: PageHinkley(delta=0.5, threshold=6.0, min_instances=10), _shifted(4)),
    "page_hinkley_fading": (lambda: PageHinkley(delta=0.5, threshold=8.0, alpha=0.999),
                            _shifted(5, shift=-2.0)),
    "bounds_interval": (lambda: BoundsDetector(-3.0, -0.5, persistence=3, clear_after=4),
                        _bounds_rows(6)),
    "bounds_point": (lambda: BoundsDetector(-3.0, -0.5, mode="point", persistence=2),
                     _bounds_rows(7)),
    "slope": (lambda: SlopeChangeDetector(k=1.0, h=30.0), _shifted(8, shift=1.5)),
    "river_adwin": (lambda: RiverDetector("ADWIN", delta=0.01), _shifted(9, shift=3.0)),
    "river_kswin": (lambda: RiverDetector("KSWIN", alpha=0.001, seed=3), _shifted(10, shift=3.0)),
    "river_ph": (lambda: RiverDetector("PageHinkley", delta=0.5, threshold=8.0), _shifted(11)),
}


def _with_nan(x):
    x = np.array(x, dtype=float)
    x[[5, 50, 320]] = np.nan   # gaps: skipped without moving the state
    return x


def _feed(det, xs):
    return [bool(det.update(v).drift_detected) for v in xs]


@pytest.fixture(params=sorted(CASES))
def case(request):
    make, xs = CASES[request.param]
    return request.param, make, xs


def test_docstring_present(case):
    _, make, _ = case
    det = make()
    assert inspect.getdoc(type(det)) and len(inspect.getdoc(type(det))) > 80
    assert inspect.getdoc(type(det).update)


def test_fires_on_its_stream_and_not_before_the_change(case):
    name, make, xs = case
    fired = np.flatnonzero(_feed(make(), xs))
    assert fired.size > 0, name
    # bounds streams leave the range from t = 200, the others shift at t = 300
    assert fired[0] >= (200 if name.startswith("bounds") else 300), (name, fired[:5])


def test_state_round_trip_through_json_continues_bit_for_bit(case):
    _, make, xs = case
    ref = make()
    want = _feed(ref, xs)
    det = make()
    first = _feed(det, xs[:317])
    state = json.loads(json.dumps(det.to_state()))
    again = type(det).from_state(state)
    assert first + _feed(again, xs[317:]) == want
    assert json.dumps(again.to_state()) == json.dumps(ref.to_state())


def test_reset_equals_fresh_and_clone_is_fresh(case):
    _, make, xs = case
    det = make()
    want = _feed(make(), xs)
    _feed(det, xs[:350])
    twin = det.clone()
    assert _feed(twin, xs) == want            # the clone did not inherit learned state
    assert _feed(det.reset(), xs) == want
    assert repr(det).startswith(type(det).__name__)


def test_inputs_not_mutated_and_nan_skipped(case):
    name, make, xs = case
    xs = _with_nan(xs)
    before = xs.copy()
    det = make()
    flags = []
    for v in xs:
        det.update(v if xs.ndim == 1 else tuple(v))
        flags.append(det.drift_detected)
    np.testing.assert_array_equal(xs, before)
    if xs.ndim == 1:
        # a NaN changes nothing: the stream without the NaNs raises the same alarms
        keep = ~np.isnan(xs)
        assert [f for f, k in zip(flags, keep) if k] == _feed(make(), xs[keep])


def test_batch_equals_streaming(case):
    _, make, xs = case
    want = _feed(make(), xs)
    det = make()
    flags = det.update_many(xs)
    got = [(bool(f & F_ALARM) if not isinstance(det, RiverDetector) else bool(f)) for f in flags]
    assert got == want
    assert det.drift_detected == want[-1]


@pytest.mark.parametrize("make, message", [
    (lambda: CUSUM(k=-1.0, h=4.0), r"k = -1.0: must be in \[0, 20\]"),
    (lambda: CUSUM(k=0.5, h=0.0), r"h = 0.0: must be in \(0, 1e\+06\]"),
    (lambda: CUSUM(k=0.5, h=4.0, burn_in=2.5), r"burn_in = 2.5: must be a whole number"),
    (lambda: EWMAChart(lam=1.5, L=3.0), r"lam = 1.5: must be in \(0, 1\]"),
    (lambda: PageHinkley(delta=0.5, threshold=5.0, alpha=0.0), r"alpha = 0.0: must be in \(0, 1\]"),
    (lambda: PageHinkley(delta=0.5, threshold=5.0, min_instances=0), r"min_instances = 0"),
    (lambda: BoundsDetector(-1.0, -2.0), r"low = -1.0, high = -2.0: low must be below high"),
    (lambda: BoundsDetector(-3.0, -1.0, mode="ci"), r"mode = 'ci': must be 'interval' or 'point'"),
    (lambda: BoundsDetector(-3.0, -1.0, persistence=0), r"persistence = 0: must be in \[1"),
    (lambda: SlopeChangeDetector(h=5.0, fast_forgetting=0.999), r"fast_forgetting = 0.999"),
    (lambda: RiverDetector("DDM"), r"name = 'DDM': must be one of ADWIN, KSWIN, PageHinkley"),
    (lambda: RiverDetector("ADWIN", window=3), r"ADWIN parameters"),
])
def test_validation_names_parameter_value_and_range(make, message):
    with pytest.raises(ValueError, match=message):
        make()


def test_interval_bounds_refuse_a_bare_number():
    with pytest.raises(ValueError, match="needs \\(beta, beta_lo, beta_hi\\)"):
        BoundsDetector(-3.0, -0.5).update(-1.0)


# ----------------------------------------------------------------------------- pinned indices
def test_seeded_streams_pin_the_first_alarm():
    # regression pins on seeded streams (computed once; each lies after the change at 300)
    assert np.flatnonzero(_feed(CUSUM(k=0.5, h=5.0), _shifted(1)))[:3].tolist() == [304, 307, 310]
    assert np.flatnonzero(_feed(EWMAChart(lam=0.2, L=3.3), _shifted(3, shift=1.5)))[0] == 309
    ph = PageHinkley(delta=0.5, threshold=6.0, min_instances=10)
    assert np.flatnonzero(_feed(ph, _shifted(4))).tolist() == [304]
    b = BoundsDetector(-3.0, -0.5, persistence=3, clear_after=4)
    assert np.flatnonzero(_feed(b, _bounds_rows(6))).tolist() == [353]
    assert np.flatnonzero(_feed(SlopeChangeDetector(k=1.0, h=30.0), _shifted(8, shift=1.5)))[0] == 375


def test_cusum_default_h_is_the_exact_design_and_its_arl_matches_lucas_crosier():
    det = CUSUM(k=0.5, arl0=168.0)
    assert det.h == pytest.approx(cusum_h_for_arl0(0.5, 168.0), rel=1e-12)
    # Lucas & Crosier (1982), Table 1: two-sided k = 0.5, h = 4 has ARL 168 in control. The
    # class on 400k seeded iid N(0, 1) values restarts after each alarm, so the alarm count is
    # a renewal count with mean n / ARL and sd about sqrt(n / ARL) (run lengths are close to
    # geometric): allow 4 sd.
    x = np.random.default_rng(12).standard_normal(400_000)
    flags = CUSUM(k=0.5, h=4.0).update_many(x)
    alarms = int(np.count_nonzero(flags & F_ALARM))
    expected = x.size / 168.0
    assert abs(alarms - expected) < 4.0 * math.sqrt(expected)
    assert CUSUM(k=0.5, h=4.0).expected_arl() == pytest.approx(cusum_arl(0.5, 4.0), rel=1e-12)


def test_ewma_default_l_is_lucas_saccucci_and_alarm_rate_matches():
    # Lucas & Saccucci (1990), Table 3: lam = 0.1, L = 2.814 gives ARL0 = 500
    det = EWMAChart(lam=0.1, arl0=500.0)
    assert det.L == pytest.approx(2.814, abs=1e-3)
    assert det.L == pytest.approx(ewma_L_for_arl0(0.1, 500.0), rel=1e-12)
    x = np.random.default_rng(13).standard_normal(500_000)
    alarms = int(np.count_nonzero(EWMAChart(lam=0.1, L=2.814).update_many(x) & F_ALARM))
    # EWMA run lengths are not geometric (a restart needs time to build up), their sd is
    # a bit below the mean, so 4 sqrt(count) is a generous 4-sigma band
    assert abs(alarms - x.size / 500.0) < 4.0 * math.sqrt(x.size / 500.0)


def test_page_hinkley_equals_river():
    river = pytest.importorskip("river.drift")
    for seed, (delta, thr, alpha, m) in enumerate([(0.5, 6.0, 1.0, 30), (0.25, 4.0, 0.999, 10),
                                                    (1.0, 3.0, 0.99, 1)]):
        x = np.random.default_rng(100 + seed).normal(0, 1, 20_000)
        x[5000:9000] += 0.8
        x[12000:] -= 1.0
        ours = PageHinkley(delta=delta, threshold=thr, alpha=alpha, min_instances=m)
        ref = river.PageHinkley(min_instances=m, delta=delta, threshold=thr, alpha=alpha,
                                mode="both")
        want = []
        for v in x.tolist():        # river 0.26 PageHinkley, the outside reference
            ref.update(v)
            want.append(ref.drift_detected)
        got = (ours.update_many(x) & F_ALARM) != 0
        assert np.flatnonzero(got).tolist() == np.flatnonzero(want).tolist()
        assert np.count_nonzero(got) > 3


def test_river_adapter_equals_river_and_skips_burn_in():
    river = pytest.importorskip("river.drift")
    x = _shifted(21, n=2000, at=1000, shift=2.0)
    ref = river.ADWIN(delta=0.01)
    want = []
    for v in x.tolist():
        ref.update(v)
        want.append(ref.drift_detected)
    assert _feed(RiverDetector("ADWIN", delta=0.01), x) == want
    late = RiverDetector("ADWIN", delta=0.01, burn_in=100)
    got = _feed(late, x)
    assert not any(got[:100])


def test_bounds_hysteresis_does_not_flap_at_a_bound():
    # an estimate hovering at the upper bound -0.5 with sd 0.1, its interval +-0.2
    rng = np.random.default_rng(31)
    b = -0.5 + 0.1 * rng.standard_normal(5000)
    rows = np.column_stack([b, b - 0.2, b + 0.2])
    naive = BoundsDetector(-3.0, -0.5, mode="point", persistence=1, clear_after=1)
    opens_naive = int(np.count_nonzero(naive.update_many(rows) & F_ALARM))
    det = BoundsDetector(-3.0, -0.5, persistence=3, clear_after=5)
    flags = det.update_many(rows)
    opens, clears = int(np.count_nonzero(flags & F_ALARM)), int(np.count_nonzero(flags & F_CLEAR))
    assert opens_naive > 1000                 # about every other update flips
    assert opens <= 10 and clears <= opens    # the interval must be wholly above -0.5
    # a clear breach is still caught and held while it lasts
    up = np.column_stack([np.full(50, 0.0), np.full(50, -0.2), np.full(50, 0.2)])
    f2 = BoundsDetector(-3.0, -0.5, persistence=3, clear_after=5).update_many(up)
    assert np.flatnonzero(f2 & F_ALARM).tolist() == [2]


def test_slope_statistic_is_standardized_in_control_and_moves_with_b():
    rng = np.random.default_rng(41)
    est, sig = ElasticityRLS(forgetting=0.99), FastSlowSlope()
    d = []
    for t in range(6000):
        p = 10.0 * math.exp(rng.normal(0.0, 0.1))
        b = -1.2 if t < 5000 else -2.0
        q = 60.0 * (p / 10.0) ** b * math.exp(rng.normal(0.0, 0.2))
        d.append(sig.observe(est.learn_one({"price": p}, q), math.log(p), math.log(q)))
    d = np.array(d)
    calm = d[1000:5000]
    # about N(0, 1) at each t (strongly autocorrelated, so loose bounds on 4000 values)
    assert abs(calm.mean()) < 0.35 and 0.7 < calm.std() < 1.3
    assert d[5040:5100].mean() < -2.5       # b fell by 0.8: d drifts by about -0.8 / sd
    b_f, se_f, lo_f, hi_f = sig.fast_estimate
    assert lo_f < b_f < hi_f and se_f > 0
    st = json.loads(json.dumps(sig.to_state()))
    assert FastSlowSlope.from_state(st).to_state() == sig.to_state()


def test_river_detectors_run_on_pipeline_signals():
    from monitor.detectors import false_alarm_rate, run_per_series
    from monitor.estimators import kernel as K
    from monitor.pipeline.run import Pipeline
    from monitor.pipeline.settings import DetectorSettings
    from tests.pipeline_helpers import simulate

    sid, X, y, ts = simulate(2, 1500, level_at=1000, level=-0.5, seed=51)
    # the previous charts (the level CUSUM compared below)
    res = Pipeline(ElasticityRLS(), DetectorSettings(change_detector="charts", cusum_h=8.0,
                                                     slope_h=85.0)).run(
        sid, X, y, 2, keep_signals=True)
    z = res.out[:, K.O_Z]
    hits = run_per_series(RiverDetector("ADWIN", delta=0.002, burn_in=50), sid, z)
    hour = np.repeat(np.arange(1500), 2)
    assert hits.any() and hour[hits].min() >= 1000      # the level drop, nothing before
    # the same helper runs elmon's own detectors; the batch pipeline's chart matches it
    ours = run_per_series(CUSUM(k=0.5, h=8.0, burn_in=20), sid,
                          np.where(res.out[:, K.O_STATUS] == 0, np.nan, z))
    from monitor.pipeline.kernel import S_LEVEL_FLAGS
    flags = res.signals[:, S_LEVEL_FLAGS].astype(np.int64)
    np.testing.assert_array_equal(ours, (flags & F_ALARM) != 0)
    # river's PageHinkley at its defaults on iid N(0, 1) values: the issue measured 636 alarms
    # per 1M (6.4e-4 per observation), more than 12 times the default budget 1 / 20,000
    rate = false_alarm_rate(RiverDetector("PageHinkley"), n=100_000, seed=1)
    assert 4e-4 < rate < 9e-4
