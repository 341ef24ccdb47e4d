"""Bounds on the elasticity with persistence and hysteresis.

The elasticity must stay within ``[low, high]``. An update *breaches* when

- ``mode="interval"`` (default, a confident breach): the confidence interval lies wholly
  outside, ``beta_lo > high`` or ``beta_hi < low``;
- ``mode="point"``: the point estimate does, ``beta > high`` or ``beta < low``;

and is *back inside* when the point estimate is within ``[low, high]``. The detector opens
(``drift_detected``) after ``persistence`` consecutive breaching updates and clears
(``cleared``) after ``clear_after`` consecutive updates back inside. In interval mode this is
hysteresis in value as well as in time: opening needs the whole interval outside, clearing
needs the estimate itself back inside, so a series whose estimate hovers at a bound does not
flap between open and clear.

>>> det = BoundsDetector(low=-3.0, high=-0.5, persistence=2, clear_after=2)
>>> seq = [(-1.0, -1.3, -0.7), (-0.2, -0.4, 0.0), (-0.2, -0.4, 0.0), (-0.6, -0.9, -0.3),
...        (-0.7, -1.0, -0.4)]
>>> [(det.update(x).drift_detected, det.cleared, det.active) for x in seq]
[(False, False, False), (False, False, False), (True, False, True), (False, False, True), (False, True, False)]
"""

from __future__ import annotations

import math
from typing import Mapping

import numpy as np

from monitor.detectors.base import Detector, check_number
from monitor.detectors.bounds_kernel import (B_ACTIVE, B_SIDE, BOUNDS_PARAMS, BOUNDS_SIZE, MODES,
                                             Q_BURN, Q_CLEAR, Q_HIGH, Q_LOW, Q_MODE, Q_PERSIST,
                                             bounds_run, bounds_step)
from monitor.detectors.kernels import F_CLEAR


class BoundsDetector(Detector):
    """Elasticity bounds with persistence and hysteresis (see the module docstring).

    Parameters
    ----------
    low, high : float
        Allowed range of the elasticity (``-inf`` / ``inf`` for a one-sided bound).
    mode : {"interval", "point"}
        What must lie outside for a breach: the confidence interval, or the point estimate.
    persistence : int >= 1
        Consecutive breaching updates before the detector opens.
    clear_after : int >= 1
        Consecutive updates back inside before it clears.
    burn_in : int >= 0
        Number of first non-NaN updates ignored.

    ``update(x)`` takes ``(beta, beta_lo, beta_hi)``, a mapping with those keys, or (point
    mode only) a single float.
    """

    _SIZE = BOUNDS_SIZE

    def __init__(self, low: float = -math.inf, high: float = math.inf, mode: str = "interval",
                 persistence: int = 3, clear_after: int = 5, burn_in: int = 0):
        self.low = check_number("low", low, allow_inf=True)
        self.high = check_number("high", high, allow_inf=True)
        if not self.low < self.high:
            raise ValueError(f"low = {low!r}, high = {high!r}: low must be below high")
        if mode not in MODES:
            raise ValueError(f"mode = {mode!r}: must be 'interval' or 'point'")
        self.mode = mode
        self.persistence = int(check_number("persistence", persistence, 1, 1e9, integer=True))
        self.clear_after = int(check_number("clear_after", clear_after, 1, 1e9, integer=True))
        self.burn_in = int(check_number("burn_in", burn_in, 0, 1e9, integer=True))
        self._init_state()

    def _params(self) -> dict:
        return {"low": self.low, "high": self.high, "mode": self.mode,
                "persistence": self.persistence, "clear_after": self.clear_after,
                "burn_in": self.burn_in}

    def to_state(self) -> dict:
        out = super().to_state()
        out["params"] = {**out["params"], "low": _inf_json(self.low), "high": _inf_json(self.high)}
        return out

    def _pack(self) -> np.ndarray:
        p = np.zeros(BOUNDS_PARAMS)
        p[Q_BURN], p[Q_LOW], p[Q_HIGH] = self.burn_in, self.low, self.high
        p[Q_MODE], p[Q_PERSIST], p[Q_CLEAR] = MODES[self.mode], self.persistence, self.clear_after
        return p

    def _step(self, x) -> int:
        if isinstance(x, Mapping):
            b, lo, hi = x["beta"], x.get("beta_lo", math.nan), x.get("beta_hi", math.nan)
        elif np.ndim(x) == 0:
            if self.mode == "interval":
                raise ValueError("BoundsDetector(mode='interval').update needs (beta, beta_lo, "
                                 f"beta_hi); got the single value {x!r}")
            b = lo = hi = x
        else:
            b, lo, hi = x
        p = self._p
        return bounds_step(self._state, 0, float(b), float(lo), float(hi), p[Q_BURN], p[Q_LOW],
                           p[Q_HIGH], p[Q_MODE] == 1.0, p[Q_PERSIST], p[Q_CLEAR])

    def _many(self, values) -> np.ndarray:
        """``values``: an ``(n, 3)`` array of ``(beta, beta_lo, beta_hi)`` (point mode: also
        a 1-D array of estimates)."""
        v = np.array(values, dtype=np.float64)
        if v.ndim == 1:
            if self.mode == "interval":
                raise ValueError("BoundsDetector(mode='interval').update_many needs rows of "
                                 "(beta, beta_lo, beta_hi)")
            v = np.column_stack([v, v, v])
        out = np.empty(v.shape[0], dtype=np.int64)
        bounds_run(self._state, np.ascontiguousarray(v[:, 0]), np.ascontiguousarray(v[:, 1]),
                   np.ascontiguousarray(v[:, 2]), self._p, out)
        return out

    @property
    def active(self) -> bool:
        """True from the update that opened until the one that cleared."""
        return bool(self._state[B_ACTIVE])

    @property
    def cleared(self) -> bool:
        """True right after the update that cleared an open breach."""
        return bool(self._flags & F_CLEAR)

    @property
    def side(self) -> str | None:
        """``'above'`` or ``'below'`` for an open breach, else None."""
        if not self.active:
            return None
        return "below" if self._state[B_SIDE] < 0 else "above"


def _inf_json(v: float):
    return v if math.isfinite(v) else ("inf" if v > 0 else "-inf")
