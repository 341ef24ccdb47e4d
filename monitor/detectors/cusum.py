"""Two-sided tabular CUSUM (Page 1954) on a standardized signal.

For standardized values ``x_t`` (in-control mean 0, sd 1), reference value ``k`` and decision
interval ``h`` (both in standard deviations)::

    S+_t = max(0, S+_{t-1} + x_t - k)        S-_t = max(0, S-_{t-1} - x_t - k)

both starting at 0; an alarm when ``S+_t > h`` or ``S-_t > h``, after which both restart at 0.
The last observation at which a side was 0 estimates where a change on that side began.

Default threshold: ``h`` is chosen so that the in-control ARL (mean observations between false
alarms) is ``arl0`` for independent N(0, 1) values, solved exactly by
:func:`monitor.detectors.arl.cusum_h_for_arl0` (integral equation). On the estimator's standardized
innovations the pipeline designs h by simulation instead (forgetting makes them slightly
negatively autocorrelated; see :mod:`monitor.detectors.design`).

>>> import numpy as np
>>> det = CUSUM(k=0.5, arl0=1000)
>>> round(det.h, 3)                      # monitor.detectors.arl.cusum_h_for_arl0(0.5, 1000)
5.757
>>> x = np.r_[np.random.default_rng(3).normal(0, 1, 300), np.full(50, 2.0)]  # mean 2 from 300
>>> alarms = [i for i, v in enumerate(x) if det.update(v).drift_detected]
>>> alarms[:3]                           # then every 4 observations (restart after each alarm)
[303, 307, 311]
"""

from __future__ import annotations

import numpy as np

from monitor.detectors.base import Detector, check_number
from monitor.detectors.kernels import (C_ALARMS, C_DN, C_UP, CHART_CUSUM, CHART_PARAMS, CHART_SIZE,
                                       P_A, P_BURN, P_THRESHOLD, cusum_step)
from monitor.detectors.spec import DEFAULT_ARL0


class CUSUM(Detector):
    """Two-sided tabular CUSUM on standardized values (see the module docstring).

    Parameters
    ----------
    k : float >= 0
        Reference value in standard deviations (half the shift to detect fastest).
    h : float > 0, optional
        Decision interval in standard deviations. Default: designed from ``arl0``.
    arl0 : float
        In-control ARL (observations) the default h is designed for (iid N(0, 1) values).
    burn_in : int >= 0
        Number of first non-NaN values ignored (they do not enter the statistic).
    """

    _SIZE = CHART_SIZE
    _KIND = CHART_CUSUM

    def __init__(self, k: float = 0.5, h: float | None = None, arl0: float = DEFAULT_ARL0,
                 burn_in: int = 0):
        self.k = check_number("k", k, 0.0, 20.0)
        self.arl0 = check_number("arl0", arl0, 2.0, 1e9)
        self.burn_in = int(check_number("burn_in", burn_in, 0, 1e9, integer=True))
        if h is None:
            from monitor.detectors.arl import cusum_h_for_arl0

            h = cusum_h_for_arl0(self.k, self.arl0)
        self.h = check_number("h", h, 0.0, 1e6, low_open=True)
        self._init_state()

    def _params(self) -> dict:
        return {"k": self.k, "h": self.h, "arl0": self.arl0, "burn_in": self.burn_in}

    def _pack(self) -> np.ndarray:
        p = np.zeros(CHART_PARAMS)
        p[P_BURN], p[P_THRESHOLD], p[P_A] = self.burn_in, self.h, self.k
        return p

    def _step(self, x) -> int:
        return cusum_step(self._state, 0, float(x), self._p)

    @property
    def statistic(self) -> tuple[float, float]:
        """Current ``(S+, S-)`` in standard deviations."""
        return float(self._state[C_UP]), float(self._state[C_DN])

    @property
    def n_alarms(self) -> int:
        return int(self._state[C_ALARMS])

    def expected_arl(self, shift: float = 0.0) -> float:
        """ARL at a mean shift of ``shift`` sd for iid normal values (:func:`monitor.detectors.arl.cusum_arl`)."""
        from monitor.detectors.arl import cusum_arl

        return float(cusum_arl(self.k, self.h, shift))
