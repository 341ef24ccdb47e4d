"""EWMA chart (Roberts 1959) on a standardized signal.

For standardized values ``x_t`` and smoothing ``lam`` in (0, 1]::

    Z_t = (1 - lam) Z_{t-1} + lam x_t,   Z_0 = 0

an alarm when ``|Z_t| > L sqrt(lam / (2 - lam))`` (the asymptotic limit, in the Z scale), after
which Z restarts at 0. A side is "at rest" while Z is on the other side of 0.

Default limit: ``L`` gives in-control ARL ``arl0`` for iid N(0, 1) values, solved by
:func:`monitor.detectors.arl.ewma_L_for_arl0` (Lucas & Saccucci 1990 tabulate the same ARLs). On the
estimator's innovations or the slope statistic the pipeline designs L by simulation.

>>> import numpy as np
>>> det = EWMAChart(lam=0.1, arl0=500)
>>> round(det.L, 3)                      # Lucas & Saccucci (1990): L = 2.814 for ARL0 500
2.814
>>> x = np.r_[np.random.default_rng(3).normal(0, 1, 300), np.full(50, 1.5)]  # mean 1.5 from 300
>>> alarms = [i for i, v in enumerate(x) if det.update(v).drift_detected]
>>> alarms[:3]                           # 181: a false alarm (ARL0 500)
[181, 305, 311]
"""

from __future__ import annotations

import math

import numpy as np

from monitor.detectors.base import Detector, check_number
from monitor.detectors.kernels import (C_ALARMS, C_UP, CHART_EWMA, CHART_PARAMS, CHART_SIZE, P_A,
                                       P_BURN, P_THRESHOLD, ewma_step)
from monitor.detectors.spec import DEFAULT_ARL0


class EWMAChart(Detector):
    """Two-sided EWMA chart with asymptotic limits (see the module docstring).

    Parameters
    ----------
    lam : float in (0, 1]
        Smoothing constant (1 is the Shewhart chart).
    L : float > 0, optional
        Limit width in standard deviations of Z. Default: designed from ``arl0``.
    arl0 : float
        In-control ARL (observations) the default L is designed for (iid N(0, 1) values).
    burn_in : int >= 0
        Number of first non-NaN values ignored.
    """

    _SIZE = CHART_SIZE
    _KIND = CHART_EWMA

    def __init__(self, lam: float = 0.1, L: float | None = None, arl0: float = DEFAULT_ARL0,
                 burn_in: int = 0):
        self.lam = check_number("lam", lam, 0.0, 1.0, low_open=True)
        self.arl0 = check_number("arl0", arl0, 2.0, 1e9)
        self.burn_in = int(check_number("burn_in", burn_in, 0, 1e9, integer=True))
        if L is None:
            from monitor.detectors.arl import ewma_L_for_arl0

            L = ewma_L_for_arl0(self.lam, self.arl0)
        self.L = check_number("L", L, 0.0, 1e6, low_open=True)
        self._init_state()

    @property
    def limit(self) -> float:
        """The control limit on Z, ``L sqrt(lam / (2 - lam))``."""
        return self.L * math.sqrt(self.lam / (2.0 - self.lam))

    def _params(self) -> dict:
        return {"lam": self.lam, "L": self.L, "arl0": self.arl0, "burn_in": self.burn_in}

    def _pack(self) -> np.ndarray:
        p = np.zeros(CHART_PARAMS)
        p[P_BURN], p[P_THRESHOLD], p[P_A] = self.burn_in, self.limit, self.lam
        return p

    def _step(self, x) -> int:
        return ewma_step(self._state, 0, float(x), self._p)

    @property
    def statistic(self) -> float:
        """Current Z."""
        return float(self._state[C_UP])

    @property
    def n_alarms(self) -> int:
        return int(self._state[C_ALARMS])

    def expected_arl(self, shift: float = 0.0) -> float:
        """ARL at a mean shift of ``shift`` sd for iid normal values (:func:`monitor.detectors.arl.ewma_arl`)."""
        from monitor.detectors.arl import ewma_arl

        return float(ewma_arl(self.lam, self.L, shift))
