"""Batch path: many series (or one long series) through the compiled RLS step at full speed.

:func:`run_batch` gives the same numbers as calling :meth:`ElasticityRLS.learn_one` row by row,
to the bit, because both run the same compiled step (:mod:`monitor.estimators.dispatch`). It
serves both models (:class:`ElasticityRLS`, :class:`ElasticityPoisson`).

>>> import numpy as np
>>> from monitor.estimators import ElasticityRLS, run_batch
>>> rng = np.random.default_rng(1)
>>> lp = np.log(5.0) + rng.normal(0, 0.1, 300)
>>> X = np.column_stack([np.ones(300), lp])
>>> y = 4.0 - 2.0 * lp + rng.normal(0, 0.1, 300)
>>> res = run_batch(ElasticityRLS(forgetting=0.98), np.zeros(300, dtype=np.int64), X, y)
>>> bool(res.beta_lo[-1] < -2.0 < res.beta_hi[-1]), res.status_labels()[-1]
(True, 'ok')
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from monitor.estimators import kernel as K
from monitor.estimators.dispatch import (MODEL_LOGLINEAR, estimator_run, model_code,
                                         work_size)
from monitor.types import STATUS_LABELS


@dataclass
class BatchResult:
    """Per-row outputs (``out`` columns named by :mod:`monitor.estimators.kernel`) and final states."""

    out: np.ndarray      # (n, NOUT)
    states: np.ndarray   # (n_series, state_size)

    @property
    def beta(self) -> np.ndarray:
        return self.out[:, K.O_BETA]

    @property
    def beta_se(self) -> np.ndarray:
        return self.out[:, K.O_SE]

    @property
    def beta_lo(self) -> np.ndarray:
        return self.out[:, K.O_LO]

    @property
    def beta_hi(self) -> np.ndarray:
        return self.out[:, K.O_HI]

    @property
    def n_eff(self) -> np.ndarray:
        return self.out[:, K.O_NEFF]

    @property
    def status(self) -> np.ndarray:
        return self.out[:, K.O_STATUS].astype(np.int8)

    @property
    def z(self) -> np.ndarray:
        return self.out[:, K.O_Z]

    def status_labels(self) -> list[str]:
        return [STATUS_LABELS[s] for s in self.status]


def initial_states(est, n_series: int) -> np.ndarray:
    """``(n_series, state_size)`` array of fresh states for the estimator's settings."""
    return np.tile(est.initial_state(), (n_series, 1))


def run_batch(est, sid: np.ndarray, X: np.ndarray, y: np.ndarray,
              states: np.ndarray | None = None, out: np.ndarray | None = None,
              offset: np.ndarray | None = None) -> BatchResult:
    """Run the estimator's settings over rows ``(sid[j], X[j], y[j])`` in order.

    Parameters
    ----------
    est : ElasticityRLS
        Supplies the hyperparameters (its own state is not touched).
    sid : int array (n,)
        Series index of each row, in ``0 .. n_series - 1``; rows of one series in time order.
    X : float array (n, k)
        Design rows from :func:`monitor.estimators.transform.design_matrix`.
    y : float array (n,)
        ``log q`` (log-log model) or ``q`` (Poisson model, zeros allowed).
    offset : float array (n,), optional
        ``log exposure`` per row (Poisson model only).
    states : float array (n_series, state_size), optional
        Starting states (e.g. restored checkpoints); updated in place. Fresh priors if omitted.
    """
    X = np.ascontiguousarray(X, dtype=np.float64)
    y = np.ascontiguousarray(y, dtype=np.float64)
    sid = np.ascontiguousarray(sid, dtype=np.int64)
    if X.ndim != 2 or X.shape[1] != est.row_width:
        raise ValueError(f"X has shape {X.shape}; expected (n, {est.row_width}) for {est.parameter_names}")
    if y.shape[0] != X.shape[0] or sid.shape[0] != X.shape[0]:
        raise ValueError("sid, X and y must have the same number of rows")
    n_series = int(sid.max()) + 1 if sid.size else 0
    if states is None:
        states = initial_states(est, n_series)
    elif states.shape[0] < n_series or states.shape[1] != est.state_size:
        raise ValueError(f"states has shape {states.shape}; expected ({n_series}, {est.state_size})")
    if out is None:
        out = np.empty((X.shape[0], K.NOUT))
    off = np.empty(0) if offset is None else np.ascontiguousarray(offset, dtype=np.float64)
    if off.size and off.shape[0] != X.shape[0]:
        raise ValueError("offset must have one value per row")
    if off.size and est.model != "poisson":
        raise ValueError("offset (exposure) is used by the Poisson model only")
    w = np.empty(work_size(est.model, est.row_width))
    code = model_code(est.model)
    if code == MODEL_LOGLINEAR:
        # the log-log loop called directly: inside estimator_run LLVM compiles it together
        # with the other models' loops, and the k = 2 rows ran ~6% slower (issue 15)
        K.rls_run(states, sid, X, y, *est.kernel_args, out, w)
    else:
        estimator_run(code, states, sid, X, y, off, *est.kernel_args, out, w)
    return BatchResult(out=out, states=states)
