"""The pipeline's compiled loops, one per (estimator step form, detector family).

A configuration compiles only its own loop (:data:`monitor.pipeline.kernel.LOOPS`), so these
tests check that the loops agree with each other and with the estimator's own batch path
wherever they run the same steps:

- the estimator columns of every loop equal the estimator alone (``run_batch``, whose loop
  chooses the step at run time, or ``run_iv``) to the bit, up to each series' first
  elasticity alarm (the split detector then discounts the estimator's past);
- default settings and the same settings written out take the same loop and give identical
  results; keeping the signals changes nothing else;
- ``step_form`` makes the choice :func:`monitor.estimators.kernel.rls_step` makes at run time;
- a step form known only at run time is refused when compiling, not silently compiled for
  every form.

Seeded invented data, a few thousand rows: each test runs in well under a second once the
loops are compiled (tests/warm_numba.py compiles them before the test workers start).
"""

from __future__ import annotations

import numpy as np
import pytest
from numba import njit
from numba.core.errors import TypingError

from monitor.detectors.kernels import F_ALARM
from monitor.estimators import ElasticityPoisson, ElasticityRLS, run_batch
from monitor.estimators import kernel as K
from monitor.estimators.dispatch import (FORM_IV, FORM_LINEAR, FORM_POISSON, FORM_TWO,
                                         form_step, step_form)
from monitor.estimators.iv import ElasticityIV, run_iv
from monitor.pipeline.kernel import LOOPS, S_LEVEL_FLAGS, S_SLOPE_FLAGS
from monitor.pipeline.run import Pipeline
from monitor.pipeline.settings import BoundsSettings, DetectorSettings, RuleSettings
from monitor.settings import default_config
from tests.pipeline_helpers import simulate

N_SERIES = 4


def _rows(seed: int = 11, controls: int = 0, counts: bool = False):
    """4 series x 700 hours, b -1.4 -> -2.4 at hour 450; ``controls`` extra standard-normal
    columns (effect 0.1 each); ``counts``: Poisson counts with mean exp(log q - 2) times an
    exposure of 2, and the log exposure per row."""
    sid, X, y, ts = simulate(N_SERIES, 700, beta=-1.4, change_at=450, beta_after=-2.4,
                             seed=seed)
    rng = np.random.default_rng(seed + 1)
    extra = rng.standard_normal((len(y), controls))
    X = np.column_stack([X, extra])
    y = y + 0.1 * extra.sum(axis=1)
    off = None
    if counts:
        off = np.full(len(y), np.log(2.0))
        y = rng.poisson(np.exp(y - 2.0 + off)).astype(np.float64)
    return sid, X, y, ts, off


def _before_first_alarm(sid: np.ndarray, signals: np.ndarray) -> np.ndarray:
    """Rows up to and including each series' first slope or level alarm (the estimator's
    output of that row is written before the pipeline discounts its past; it does after
    either alarm of the split detector)."""
    alarm = ((signals[:, S_SLOPE_FLAGS].astype(np.int64) |
              signals[:, S_LEVEL_FLAGS].astype(np.int64)) & F_ALARM) != 0
    keep = np.ones(len(sid), dtype=bool)
    for s in np.unique(sid):
        rows = np.flatnonzero(sid == s)
        hit = rows[alarm[rows]]
        if hit.size:
            keep[rows[rows > hit[0]]] = False
    return keep


CASES = {
    # name: (estimator, extra columns, counts, expected form)
    "loglinear k=2 hc": (lambda: ElasticityRLS(forgetting=0.99), 0, False, FORM_TWO),
    "loglinear k=2 classic": (lambda: ElasticityRLS(forgetting=0.99, band="classic"), 0, False,
                              FORM_TWO),
    "loglinear k=2 hac": (lambda: ElasticityRLS(forgetting=0.99, band="hac", hac_lags=4), 0,
                          False, FORM_LINEAR),
    "loglinear k=3 hc": (lambda: ElasticityRLS(forgetting=0.99, controls=["c1"]), 1, False,
                         FORM_LINEAR),
    "poisson k=2": (lambda: ElasticityPoisson(forgetting=0.99, exposure="e"), 0, True,
                    FORM_POISSON),
}


@pytest.mark.parametrize("split", [True, False], ids=["split_glr", "charts"])
@pytest.mark.parametrize("case", list(CASES))
def test_every_loop_runs_the_estimator_of_the_batch_path_to_the_bit(case, split):
    make, controls, counts, form = CASES[case]
    est = make()
    sid, X, y, ts, off = _rows(controls=controls, counts=counts)
    det = DetectorSettings(change_detector="split_glr" if split else "charts")
    assert step_form(est.model, X.shape[1], est.band) == form
    res = Pipeline(est, det).run(sid, X, y, N_SERIES, ts=ts, keep_signals=True, offset=off)
    alone = run_batch(est, sid, X, y, offset=off)
    keep = _before_first_alarm(sid, res.signals)
    # the check can fail: most rows are compared, and some rows have estimates
    assert keep.mean() > 0.5 and (res.out[keep, K.O_STATUS] == K.ST_OK).sum() > 500
    np.testing.assert_array_equal(res.out[keep], alone.out[keep])


@pytest.mark.parametrize("split", [True, False], ids=["split_glr", "charts"])
def test_the_iv_loops_run_the_iv_estimator_to_the_bit(split):
    sid, X, y, ts, _ = _rows(seed=5)
    rng = np.random.default_rng(6)
    R = np.column_stack([X, X[:, 1] + 0.05 * rng.standard_normal(len(y))])  # an instrument
    est = ElasticityIV(instruments=["z"], forgetting=0.99)
    assert step_form(est.model, R.shape[1]) == FORM_IV
    det = DetectorSettings(change_detector="split_glr" if split else "charts")
    res = Pipeline(est, det).run(sid, R, y, N_SERIES, ts=ts, keep_signals=True)
    alone = run_iv(est, sid, R, y)
    keep = _before_first_alarm(sid, res.signals)
    assert keep.mean() > 0.5 and (res.out[keep, K.O_STATUS] == K.ST_OK).sum() > 500
    np.testing.assert_array_equal(res.out[keep], alone.out[keep])


def _everything(res) -> list[np.ndarray]:
    return [res.out, res.status, res.records, res.states, res.feedback]


@pytest.mark.parametrize("split", [True, False], ids=["split_glr", "charts"])
def test_default_and_written_out_settings_give_identical_results(split):
    sid, X, y, ts, _ = _rows(seed=3)
    est = ElasticityRLS()
    if split:
        implicit = Pipeline(est)
        cfg = default_config()
        explicit = Pipeline.from_config(cfg, est)
        spelled = Pipeline(est, DetectorSettings(change_detector="split_glr", arl0=20000.0),
                           BoundsSettings(), RuleSettings())
    else:
        implicit = Pipeline(est, DetectorSettings(change_detector="charts"))
        explicit = Pipeline(est, DetectorSettings(change_detector="charts", level_chart="cusum",
                                                  slope_chart="cusum"))
        spelled = explicit
    runs = [p.run(sid, X, y, N_SERIES, ts=ts) for p in (implicit, explicit, spelled)]
    assert (runs[0].records.shape[0] > 0), "no events: the comparison would be weak"
    for other in runs[1:]:
        for a, b in zip(_everything(runs[0]), _everything(other)):
            np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("split", [True, False], ids=["split_glr", "charts"])
def test_keeping_the_signals_changes_no_result(split):
    sid, X, y, ts, _ = _rows(seed=8)
    pipe = Pipeline(ElasticityRLS(forgetting=0.99),
                    DetectorSettings(change_detector="split_glr" if split else "charts"))
    plain = pipe.run(sid, X, y, N_SERIES, ts=ts)
    kept = pipe.run(sid, X, y, N_SERIES, ts=ts, keep_signals=True)
    assert plain.records.shape[0] > 0 and np.isfinite(kept.signals[:, 4:]).any()
    for a, b in zip(_everything(plain), _everything(kept)):
        np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("model, k, band, form", [
    ("loglinear", 2, "classic", FORM_TWO), ("loglinear", 2, "hc", FORM_TWO),
    ("loglinear", 2, "hac", FORM_LINEAR), ("loglinear", 3, "hc", FORM_LINEAR),
    ("loglinear", 5, "classic", FORM_LINEAR), ("poisson", 2, "hc", FORM_POISSON),
    ("poisson", 4, "classic", FORM_POISSON), ("iv", 3, "hc", FORM_IV)])
def test_step_form_is_the_choice_rls_step_makes(model, k, band, form):
    # rls_step takes the written-out k = 2 step exactly when k == 2 and the band is not hac
    assert step_form(model, k, band) == form


def test_there_is_one_loop_per_form_and_family():
    forms = (FORM_TWO, FORM_LINEAR, FORM_POISSON, FORM_IV)
    assert set(LOOPS) == {(f, s) for f in forms for s in (True, False)}
    assert len({id(f) for f in LOOPS.values()}) == len(LOOPS)


def test_a_form_known_only_at_run_time_is_refused_when_compiling():
    @njit
    def step_any(form, st, x, out, w):
        form_step(form, st, x, 0.0, 0.0, 2, 1, 0, 0.99, True, 0.8, 0.02, 10.0, w, out, w)

    with pytest.raises(TypingError, match="form_step"):
        step_any(FORM_TWO, np.zeros(80), np.ones(2), np.zeros(K.NOUT), np.zeros(40))
