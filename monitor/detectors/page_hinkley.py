"""Page-Hinkley test (Page 1954; Hinkley 1971), two-sided, in river's formulation.

With the running mean ``m_t`` of the values since the last reset (``m_t`` includes ``x_t``),
allowance ``delta`` and fading factor ``alpha`` (1: none)::

    U_t = alpha U_{t-1} + (x_t - m_t) - delta      alarm up   when U_t - min_{s<=t} U_s > lambda
    D_t = alpha D_{t-1} + (x_t - m_t) + delta      alarm down when max_{s<=t} D_s - D_t > lambda

tested once ``min_instances`` values have been seen since the reset; after an alarm everything
restarts (mean included). With a known mean this is the CUSUM with ``k = delta``; estimating the
mean from the values since the reset makes the statistic non-iid, so the default threshold
``lambda`` is designed by simulation of iid N(0, 1) values for the target ``arl0``
(:mod:`monitor.detectors.design`), not from the normal-theory CUSUM tables.

The update equals ``river.drift.PageHinkley`` with the same ``delta, threshold, alpha,
min_instances`` and ``mode="both"`` (tests/test_detectors.py checks the alarm indices). Note
that river's defaults (``delta=0.005, threshold=50``) are in the units of the raw input; here
inputs are standardized and ``delta`` is in standard deviations.

>>> import numpy as np
>>> det = PageHinkley(delta=0.5, threshold=8.0)
>>> x = np.r_[np.random.default_rng(3).normal(0, 1, 300), np.full(50, 2.0)]
>>> [i for i, v in enumerate(x) if det.update(v).drift_detected][:1]
[305]
"""

from __future__ import annotations

import numpy as np

from monitor.detectors.base import Detector, check_number
from monitor.detectors.kernels import (C_ALARMS, C_DN, C_MAX_DN, C_MIN_UP, C_RUN, C_UP,
                                       CHART_PARAMS, CHART_PH, CHART_SIZE, P_A, P_B, P_BURN, P_C,
                                       P_THRESHOLD, ph_step)
from monitor.detectors.spec import DEFAULT_ARL0


class PageHinkley(Detector):
    """Two-sided Page-Hinkley test on standardized values (see the module docstring).

    Parameters
    ----------
    delta : float >= 0
        Allowance in standard deviations (like the CUSUM's k).
    threshold : float > 0, optional
        lambda, in standard deviations. Default: designed by simulation from ``arl0``.
    alpha : float in (0, 1]
        Fading factor of the cumulative sums (1: none).
    min_instances : int >= 1
        Values since the last reset before the test can fire.
    arl0 : float
        In-control ARL (observations) the default threshold is designed for.
    burn_in : int >= 0
        Number of first non-NaN values ignored.
    """

    _SIZE = CHART_SIZE
    _KIND = CHART_PH

    def __init__(self, delta: float = 0.5, threshold: float | None = None, alpha: float = 1.0,
                 min_instances: int = 30, arl0: float = DEFAULT_ARL0, burn_in: int = 0):
        self.delta = check_number("delta", delta, 0.0, 20.0)
        self.alpha = check_number("alpha", alpha, 0.0, 1.0, low_open=True)
        self.min_instances = int(check_number("min_instances", min_instances, 1, 1e9,
                                              integer=True))
        self.arl0 = check_number("arl0", arl0, 2.0, 1e9)
        self.burn_in = int(check_number("burn_in", burn_in, 0, 1e9, integer=True))
        if threshold is None:
            from monitor.detectors.design import iid_threshold

            threshold = iid_threshold("page_hinkley", self.arl0, delta=self.delta,
                                      alpha=self.alpha, min_instances=self.min_instances)
        self.threshold = check_number("threshold", threshold, 0.0, 1e9, low_open=True)
        self._init_state()

    def _params(self) -> dict:
        return {"delta": self.delta, "threshold": self.threshold, "alpha": self.alpha,
                "min_instances": self.min_instances, "arl0": self.arl0, "burn_in": self.burn_in}

    def _pack(self) -> np.ndarray:
        p = np.zeros(CHART_PARAMS)
        p[P_BURN], p[P_THRESHOLD], p[P_A] = self.burn_in, self.threshold, self.delta
        p[P_B], p[P_C] = self.alpha, self.min_instances
        return p

    def _step(self, x) -> int:
        return ph_step(self._state, 0, float(x), self._p)

    @property
    def statistic(self) -> tuple[float, float]:
        """Current ``(U - min U, max D - D)`` (0 before the first value)."""
        s = self._state
        if s[C_RUN] == 0:
            return 0.0, 0.0
        return float(s[C_UP] - s[C_MIN_UP]), float(s[C_MAX_DN] - s[C_DN])

    @property
    def n_alarms(self) -> int:
        return int(self._state[C_ALARMS])
