"""The split GLR's response with controls: ``y* = log q - cbar' z`` with ``cbar_i`` the slow mean
of the estimator's coefficient of control ``i`` over the rows where that control is non-zero
(monitor.pipeline.split_events.slow_control, issue 12).

The mean is checked against a direct numpy computation (plain mean of the first ``N_SLOW``
non-zero rows, then exponential weights ``1 / N_SLOW``; common practice). The effect on the
load demo (false alerts 91 -> 54 over seeds 1-3 at ARL0 20,000, all true changes found) and
the check that series without controls are bit-identical to before are measured in
scratch/detect_eval/FINDINGS.md (18:55), not here: the demo takes minutes.
"""

from __future__ import annotations

import numpy as np

from monitor.detectors import split_glr as SG
from monitor.estimators import kernel as K
from monitor.pipeline.split_events import N_SLOW, slow_control


def _reference(c, z):
    """cbar after each row by the stated rule, computed directly."""
    out, m, n = [], 0.0, 0
    for ci, zi in zip(c, z):
        if zi != 0.0 and ci == ci:
            n += 1
            m = float(np.mean(c[:len(out) + 1][z[:len(out) + 1] != 0])) if n <= N_SLOW \
                else m + (ci - m) / N_SLOW
        out.append(m)
    return np.array(out)


def test_slow_control_is_the_mean_over_rows_where_the_control_moves():
    rng = np.random.default_rng(7)
    T = int(N_SLOW) + 400
    c = 0.3 + np.cumsum(rng.normal(0.0, 0.01, T))          # a wandering estimator coefficient
    z = (rng.random(T) < 0.2).astype(float)                  # an event-like control (20% rows)
    z[:50] = 0.0                                            # zero at the start (learned late)
    at = K.NS + 40
    st = np.zeros(at + SG.SPLIT_SIZE)
    got = np.empty(T)
    for t in range(T):
        st[K.NS + 2] = c[t]
        slow_control(st, at, 2, z[t])
        got[t] = st[at + SG.CF0]
    ref = _reference(c, z)
    assert np.allclose(got, ref, rtol=0, atol=1e-12)
    assert got[49] == 0.0                                   # untouched while the control is 0
    assert int(st[at + SG.CN0]) == int(z.sum())            # counts only non-zero rows
    # slower than the estimator's coefficient: the mean moves far less row to row
    assert np.std(np.diff(got[z != 0][100:])) < 0.2 * np.std(np.diff(c[z != 0][100:]))


def test_slow_control_ignores_nan_coefficients_and_other_controls():
    at = K.NS + 10
    st = np.zeros(at + SG.SPLIT_SIZE)
    st[K.NS + 2], st[K.NS + 3] = 0.5, np.nan
    slow_control(st, at, 2, 1.0)
    slow_control(st, at, 3, 1.0)          # NaN coefficient (dependent column): mean kept
    assert st[at + SG.CF0] == 0.5 and st[at + SG.CF0 + 1] == 0.0
    assert st[at + SG.CN0] == 1.0 and st[at + SG.CN0 + 1] == 0.0


def test_a_checkpoint_from_before_the_slow_means_resumes_with_them_fresh(tmp_path):
    # stores checkpointed before the slow control means (split block 99 floats, now 111) are
    # upgraded on resume: the 2 * NCF new floats are inserted as zeros, the rest is kept
    import pytest

    from monitor.errors import ConfigError
    from monitor.pipeline.run import L_SPLIT, Pipeline
    from monitor.estimators import ElasticityRLS

    pipe = Pipeline(ElasticityRLS(forgetting=0.99, controls=["promo"]))
    rng = np.random.default_rng(2)
    n = 400
    x = rng.normal(0.0, 0.15, n)
    z = (rng.random(n) < 0.3).astype(float)
    X = np.column_stack([np.ones(n), x, z])
    y = 2.0 - 1.2 * x + 0.3 * z + rng.normal(0.0, 0.1, n)
    states = pipe.run(np.zeros(n, np.int64), X, y, 1).states
    row = states[0]
    at = int(pipe._layout[L_SPLIT]) + SG.SPLIT_SIZE - 2 * SG.NCF
    assert np.any(row[at:at + 2 * SG.NCF] != 0.0)        # the means were in use
    old = np.concatenate([row[:at], row[at + 2 * SG.NCF:]])
    up = pipe.checked_state(old)
    assert up.shape == row.shape
    assert np.array_equal(up[:at], row[:at], equal_nan=True)
    assert np.array_equal(up[at + 2 * SG.NCF:], row[at + 2 * SG.NCF:], equal_nan=True)
    assert np.all(up[at:at + 2 * SG.NCF] == 0.0)
    assert np.array_equal(pipe.state_from_json(pipe.state_to_json(old)), up, equal_nan=True)
    # the upgraded row runs on
    more = pipe.run(np.zeros(50, np.int64), X[:50], y[:50], 1, states=up[None, :].copy())
    assert np.all(np.isfinite(more.out[:, K.O_BETA]))
    with pytest.raises(ConfigError, match="layout changed"):
        pipe.checked_state(old[:-1])
