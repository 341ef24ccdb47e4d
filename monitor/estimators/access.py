"""What other modules may read of an estimator, in one place for every model.

:class:`KernelView` is a base of :class:`~monitor.estimators.rls.ElasticityRLS`,
:class:`~monitor.estimators.poisson.ElasticityPoisson` and
:class:`~monitor.estimators.iv.ElasticityIV`: the pipeline, the detectors, tuning and batch runs
read these properties instead of the estimators' private attributes (``_k``, ``_band``,
``_lags``, ``_tq``, ``_state``), which each model sets in its constructor.
"""

from __future__ import annotations

import numpy as np


class KernelView:
    """Read-only views of an estimator's compiled-step settings and state."""

    _k: int
    _band: int
    _lags: int
    _tq: np.ndarray
    _state: np.ndarray

    @property
    def dispatch_args(self) -> tuple:
        """Arguments after the data of a step of :mod:`monitor.estimators.dispatch`: band code,
        lag count (the instrument model: its instrument count), forgetting, guard, guard
        forgetting, min price sd, min n_eff, t table."""
        return (self._band, self._lags, self.forgetting, self.excitation_guard,
                self.guard_forgetting, self.min_price_sd, self.min_n_eff, self._tq)

    @property
    def row_width(self) -> int:
        """Columns of one design row the kernels read: ``(1, log p, controls)``, then the
        instruments for the instrument model."""
        return self._k

    @property
    def band_code(self) -> int:
        """The band kind as the kernels' integer code (:data:`kernel.BANDS`; the instrument
        model: always the heteroskedasticity-robust code)."""
        return self._band

    @property
    def state_vector(self) -> np.ndarray:
        """The live state vector (the array itself, not a copy: read it, never write it)."""
        return self._state
