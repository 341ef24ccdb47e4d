"""One configuration of the core: estimator -> detectors -> rules, over many series at once.

The live service and the replay both call :meth:`Pipeline.run` with the rows of a batch, so they
produce the same estimates and alerts on the same rows.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from monitor.estimators import kernel as K
from monitor.estimators.batch import initial_states


@dataclass
class PipelineResult:
    out: np.ndarray                  # (n, NOUT) estimator outputs
    status: np.ndarray               # (n,) int8 final status per row (after detectors)
    states: np.ndarray               # (n_series, state_size) estimator states
    alert_rows: list = field(default_factory=list)   # dicts with row (index), rule, message

    def alerts_frame(self, good: pd.DataFrame, names: list[str]) -> pd.DataFrame:
        cols = ["series", "ts", "rule", "beta", "beta_lo", "beta_hi", "message"]
        if not self.alert_rows:
            return pd.DataFrame(columns=cols)
        return pd.DataFrame(self.alert_rows)


class Pipeline:
    """The estimator prototype plus (once configured) detectors and alert rules."""

    def __init__(self, estimator):
        self.estimator = estimator

    @classmethod
    def from_config(cls, config, estimator) -> "Pipeline":
        return cls(estimator)

    def settings(self) -> dict:
        return {}

    def new_states(self, n_series: int) -> np.ndarray:
        return initial_states(self.estimator, n_series)

    def run(self, sid, X, y, n_series: int, states: np.ndarray | None = None) -> PipelineResult:
        if states is None:
            states = self.new_states(n_series)
        out = np.empty((X.shape[0], K.NOUT))
        K.rls_run(states, sid, X, y, *self.estimator.kernel_args, out)
        return PipelineResult(out=out, status=out[:, K.O_STATUS].astype(np.int8), states=states)
