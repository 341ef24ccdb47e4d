"""Adapter: run any of river's drift detectors on one of elmon's standardized signals.

``RiverDetector("ADWIN", delta=0.002)`` builds ``river.drift.ADWIN(delta=0.002)`` and gives it
elmon's detector verbs: ``update(x)`` (NaN values skipped), ``drift_detected``, ``reset()``,
``burn_in``, ``clone()`` and ``to_state()`` / ``from_state()``. The learned state of a river
detector is a Python object graph (ADWIN's buckets, KSWIN's window), so ``to_state()`` holds it
as base64-encoded pickle text inside the JSON; restore it only from checkpoints elmon wrote.

Streaming path only: the compiled pipeline does not run river detectors. Feed them the
per-row signals of :class:`monitor.pipeline.run.PipelineResult` (``keep_signals=True``) or the
values of a streaming estimator. River's thresholds are not designed from an ARL: at its
defaults river's PageHinkley raised 636 alarms on 1M in-control values in the issue's
measurement, so check any river detector's false-alarm rate with
:func:`false_alarm_rate` before relying on it.

>>> import numpy as np
>>> det = RiverDetector("ADWIN", delta=0.002)
>>> x = np.r_[np.random.default_rng(3).normal(0, 1, 500), np.random.default_rng(4).normal(3, 1, 200)]
>>> [i for i, v in enumerate(x) if det.update(v).drift_detected][:1]
[511]
"""

from __future__ import annotations

import base64
import math
import pickle
from typing import Mapping

import numpy as np

from monitor.detectors.base import check_number


SUPPORTED = ("ADWIN", "KSWIN", "PageHinkley")


class RiverDetector:
    """One of river's drift detectors (ADWIN, KSWIN, PageHinkley) with elmon's verbs.

    Parameters
    ----------
    name : {"ADWIN", "KSWIN", "PageHinkley"}
        The class in ``river.drift``.
    burn_in : int >= 0
        Number of first non-NaN values ignored.
    **params
        Passed to the river class (validated by it; a bad one raises ValueError naming it).
    """

    def __init__(self, name: str = "ADWIN", burn_in: int = 0, **params):
        if name not in SUPPORTED:
            raise ValueError(f"name = {name!r}: must be one of {', '.join(SUPPORTED)}")
        self.name = name
        self.burn_in = int(check_number("burn_in", burn_in, 0, 1e9, integer=True))
        self.params = dict(params)
        self._det = self._build()
        self._seen = 0
        self._drift = False

    def _build(self):
        from river import drift

        try:
            return getattr(drift, self.name)(**self.params)
        except TypeError as exc:
            raise ValueError(f"{self.name} parameters {self.params!r}: {exc}") from None

    def update(self, x) -> "RiverDetector":
        """Feed one value (NaN: skipped). Returns the detector."""
        v = float(x)
        self._drift = False
        if math.isnan(v):
            return self
        self._seen += 1
        if self._seen <= self.burn_in:
            return self
        self._det.update(v)
        self._drift = bool(self._det.drift_detected)
        return self

    def update_many(self, values) -> np.ndarray:
        """Feed ``values`` in order (a Python loop: river detectors are not compiled); returns
        1 where an alarm was raised, else 0."""
        return np.array([int(self.update(v).drift_detected) for v in np.asarray(values, float)],
                        dtype=np.int64)

    @property
    def drift_detected(self) -> bool:
        return self._drift

    def reset(self) -> "RiverDetector":
        self._det = self._build()
        self._seen = 0
        self._drift = False
        return self

    def clone(self) -> "RiverDetector":
        return RiverDetector(self.name, burn_in=self.burn_in, **self.params)

    def to_state(self) -> dict:
        blob = base64.b64encode(pickle.dumps(self._det, protocol=4)).decode("ascii")
        return {"detector": "RiverDetector", "params": {"name": self.name, "burn_in": self.burn_in,
                                                        **self.params},
                "state": {"seen": self._seen, "drift": self._drift, "river_pickle": blob}}

    @classmethod
    def from_state(cls, state: Mapping) -> "RiverDetector":
        det = cls(**state["params"])
        st = state["state"]
        det._seen = int(st["seen"])
        det._drift = bool(st["drift"])
        det._det = pickle.loads(base64.b64decode(st["river_pickle"]))
        return det

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self.params.items())
        return f"RiverDetector({self.name!r}{', ' if args else ''}{args})"


def run_per_series(detector, sid, values) -> np.ndarray:
    """Run a fresh clone of ``detector`` per series over ``values`` (rows in time order within
    each series, as in a pipeline batch); returns a boolean alarm per row.

    ``values`` is any per-row signal: the standardized innovation ``result.out[:, O_Z]``, the
    slope statistic ``result.signals[:, S_D]`` (``keep_signals=True``), or the estimate.

    >>> import numpy as np
    >>> sid = np.array([0, 1, 0, 1, 0, 1])
    >>> run_per_series(RiverDetector("PageHinkley", delta=0.0, threshold=0.5, min_instances=1),
    ...                sid, np.array([0.0, 0.0, 0.0, 0.0, 3.0, 0.0])).tolist()
    [False, False, False, False, True, False]
    """
    sid = np.asarray(sid)
    values = np.asarray(values, dtype=np.float64)
    alarms = np.zeros(values.shape[0], dtype=bool)
    for s in np.unique(sid):
        rows = np.flatnonzero(sid == s)
        det = detector.clone()
        alarms[rows] = [det.update(v).drift_detected for v in values[rows]]
    return alarms


def false_alarm_rate(detector, n: int = 100_000, seed: int = 0) -> float:
    """Alarms per observation of a fresh clone of ``detector`` on iid N(0, 1) values."""
    det = detector.clone()
    x = np.random.default_rng(seed).standard_normal(int(n))
    return sum(det.update(v).drift_detected for v in x) / float(n)
