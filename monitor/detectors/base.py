"""Common machinery of the drift detectors: parameter checks, flat state, river's verbs.

Every detector in :mod:`monitor.detectors` keeps its learned state in one small float64 vector
and advances it with a numba-compiled step function; the batch pipeline
(:mod:`monitor.pipeline.kernel`) calls the very same step functions on slices of each series'
state row, so a detector class fed one value at a time raises its alarms at exactly the same
observations as the compiled pipeline (tests/test_detectors.py checks this).

Verbs (river's drift-detector shape):

- ``update(x)`` feeds one value and returns the detector; a NaN value is skipped (no
  information: the state does not move and ``drift_detected`` is False);
- ``drift_detected`` (read-only) is True right after the update that raised an alarm;
- ``reset()`` returns to the freshly constructed state (burn-in included);
- ``to_state()`` / ``from_state()`` give plain JSON-able data (NaN as None) and continue bit
  for bit; ``clone()`` gives a fresh detector with the same hyperparameters.

The step flags every compiled step returns (``F_ALARM``, ``F_DOWN``, ...) and the charts'
state layout are in :mod:`monitor.detectors.kernels`.
"""

from __future__ import annotations

import math
from typing import Any, Mapping

import numpy as np

from monitor.detectors.kernels import F_ALARM, chart_run


def check_number(name: str, value: Any, low: float = -math.inf, high: float = math.inf, *,
                 low_open: bool = False, high_open: bool = False, integer: bool = False,
                 allow_inf: bool = False) -> float:
    """``float(value)`` or ValueError naming the parameter, the value and the allowed range.

    >>> check_number("k", 0.5, 0.0)
    0.5
    >>> check_number("h", -1, 0.0, low_open=True)
    Traceback (most recent call last):
    ...
    ValueError: h = -1: must be in (0, inf)
    """
    if isinstance(value, bool):
        raise ValueError(f"{name} = {value!r}: must be a number")
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} = {value!r}: must be a number") from None
    finite_ok = math.isfinite(v) or (allow_inf and not math.isnan(v))
    ok = finite_ok and (v > low if low_open else v >= low) and (v < high if high_open else v <= high)
    if ok and integer and v != int(v):
        raise ValueError(f"{name} = {value!r}: must be a whole number")
    if not ok:
        lb = "(" if low_open or math.isinf(low) else "["
        rb = ")" if high_open or math.isinf(high) else "]"
        raise ValueError(f"{name} = {value!r}: must be in {lb}{low:g}, {high:g}{rb}")
    return v


def floats_to_json(a) -> list:
    """A float vector as a JSON-safe list: NaN as None, infinities as strings, exact floats."""
    out = []
    for v in np.asarray(a, dtype=np.float64).tolist():
        if v != v:
            out.append(None)
        elif math.isinf(v):
            out.append("inf" if v > 0 else "-inf")
        else:
            out.append(v)
    return out


def floats_from_json(values) -> np.ndarray:
    """Inverse of :func:`floats_to_json`."""
    return np.array([math.nan if v is None else float(v) for v in values], dtype=np.float64)


class Detector:
    """Base class: subclasses set ``_SIZE`` (state length) and implement ``_params``,
    ``_pack`` (parameter vector for the compiled step) and ``_step(x) -> flags``."""

    _SIZE = 8

    def _init_state(self) -> None:
        self._state = np.zeros(self._SIZE)
        self._flags = 0
        self._p = self._pack()

    # -------------------------------------------------------------- river's verbs
    def update(self, x) -> "Detector":
        """Feed one value (NaN: skipped). Returns the detector."""
        self._flags = int(self._step(x))
        return self

    def update_many(self, values) -> np.ndarray:
        """Batch form: feed ``values`` in order through the compiled loop; returns each
        update's flags (``flags & F_ALARM`` marks the alarms). Equal to calling
        :meth:`update` value by value (tests/test_detectors.py)."""
        flags = self._many(values)
        if len(flags):
            self._flags = int(flags[-1])
        return flags

    @property
    def drift_detected(self) -> bool:
        """True right after the update that raised an alarm (read-only)."""
        return bool(self._flags & F_ALARM)

    @property
    def flags(self) -> int:
        """The bit flags of the last update (see :mod:`monitor.detectors.base`)."""
        return self._flags

    def reset(self) -> "Detector":
        """Back to the freshly constructed state (burn-in counts again)."""
        self._state[:] = 0.0
        self._flags = 0
        return self

    # -------------------------------------------------------------- state
    def _params(self) -> dict:  # pragma: no cover - abstract
        raise NotImplementedError

    def _pack(self) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def _step(self, x) -> int:  # pragma: no cover - abstract
        raise NotImplementedError

    def _many(self, values) -> np.ndarray:
        """Chart detectors: the compiled loop of :func:`monitor.detectors.kernels.chart_run`."""
        v = np.array(values, dtype=np.float64).ravel()
        out = np.empty(v.size, dtype=np.int64)
        chart_run(self._KIND, self._state, v, self._p, out)
        return out

    def to_state(self) -> dict:
        """Plain JSON-able state; :meth:`from_state` continues bit for bit."""
        return {"detector": type(self).__name__, "params": self._params(),
                "state": floats_to_json(self._state), "flags": self._flags}

    @classmethod
    def from_state(cls, state: Mapping) -> "Detector":
        if state.get("detector") not in (None, cls.__name__):
            raise ValueError(f"state is for {state.get('detector')!r}, not {cls.__name__}")
        det = cls(**state["params"])
        vec = floats_from_json(state["state"])
        if vec.shape != det._state.shape:
            raise ValueError(f"state has length {vec.size}, expected {det._state.size}")
        det._state[:] = vec
        det._flags = int(state.get("flags", 0))
        return det

    def clone(self) -> "Detector":
        """A fresh detector with the same hyperparameters."""
        return type(self)(**self._params())

    @property
    def n_seen(self) -> int:
        """Values received that were not NaN (burn-in included)."""
        return int(self._state[2])

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self._params().items())
        return f"{type(self).__name__}({args})"
