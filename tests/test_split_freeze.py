"""The split GLR's scale freeze (monitor/detectors/split_glr.py, HOT_LEVEL, FREEZE_MIN_W, HOLD).

A change early in a series (60 rows of history) must not enter the noise scale before either
chart crosses: the scale freezes while a statistic is hot at any weight, as in the design runs
(monitor/detectors/split_design.py); only the hold after an alarm waits for FREEZE_MIN_W.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from monitor.detectors import split_glr as SG
from monitor.pipeline.run import Pipeline
from monitor.settings import estimator_from_config, validate

N_SERIES, LENGTH, AT = 12, 120, 60


def _early_change(seed):
    """Hourly rows like tests/test_replay_outputs_same.py's hostile log: log price N(0.3,
    0.2^2), noise sd 0.1, b from -1.5 to -0.6 after 60 rows (information about 1.6 per row)."""
    rng = np.random.default_rng(seed)
    x = rng.normal(0.3, 0.2, (N_SERIES, LENGTH))
    b = np.where(np.arange(LENGTH) < AT, -1.5, -0.6)
    y = 5.0 + b * x + rng.normal(0.0, 0.1, (N_SERIES, LENGTH))
    sid = np.tile(np.arange(N_SERIES), LENGTH)          # row-major in time
    X = np.column_stack([np.ones(sid.size), x.T.ravel()])
    ts = pd.Timestamp("2024-03-01", tz="UTC").value + np.repeat(np.arange(LENGTH), N_SERIES) \
        * 3_600_000_000_000
    return sid, X, y.T.ravel(), ts


def test_a_large_change_sixty_rows_in_is_not_taken_into_the_scale():
    """36 series (seeds 15-17), default ARL0 20,000: at most 6 go 60 rows past the change
    without an alert, and none alerts before it.

    Measured on these draws: 5 missed (median delay 12 rows) with the freeze at any weight and
    the hold after an alarm gated on FREEZE_MIN_W, as on main before HOT_LEVEL; 11 missed
    (median 18) with the freeze itself gated on FREEZE_MIN_W (commit be1ed59), which let the
    change into the scale (hot at a weight of about 47 < 50) and left the hostile log of
    tests/test_replay_outputs_same.py without any alert. The 5 left are the same series on
    main: the change reaches the scale and its lag-1 autocorrelation (0.1 -> 0.55) in the rows
    before any statistic is hot (a limitation, not this rule's)."""
    cfg = validate({}, source="test")
    pipe = Pipeline.from_config(cfg, estimator_from_config(cfg))
    assert pipe._gp[SG.Q_HOTL] == SG.HOT_LEVEL
    missed = 0
    for seed in (15, 16, 17):
        sid, X, y, ts = _early_change(seed)
        ev = pipe.run(sid, X, y, n_series=N_SERIES, ts=ts).events
        ev = ev[(ev["action"] == "open") & ev["kind"].isin(["elasticity_change", "level_shift"])]
        t = ev["row"].to_numpy() // N_SERIES
        assert not np.any(t < AT), "no alert before the change"
        missed += N_SERIES - np.unique(ev["row"].to_numpy() % N_SERIES).size
    assert missed <= 6, missed
