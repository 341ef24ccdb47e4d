"""``ElasticityPoisson``: the streaming Poisson pseudo-maximum-likelihood elasticity estimator,
and :func:`poisson_fit`, the exact weighted maximum-likelihood fit on stored rows.

Model: ``E[q] = exposure * exp(a + b log p + c' z)``; ``q`` may be 0 (zeros are data, not
rejects). Use it for sales counts (product-store-day series are mostly small counts) and for
any quantity with zeros or with a variance that grows with the mean; the log-log least-squares
model is biased there (Santos Silva & Tenreyro 2006). The compiled step and its formulas live
in :mod:`monitor.estimators.poisson_kernel`.

>>> import numpy as np
>>> rng = np.random.default_rng(3)
>>> est = ElasticityPoisson(forgetting=0.995)
>>> for _ in range(3000):
...     p = 4.0 * np.exp(rng.normal(0.0, 0.15))
...     _ = est.learn_one({"price": p}, rng.poisson(2.0 * (p / 4.0) ** -1.5))
>>> est.status, bool(est.interval()[0] < -1.5 < est.interval()[1])
('ok', True)
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from monitor.errors import ValidationError
from monitor.estimators import kernel as K
from monitor.estimators.access import KernelView
from monitor.estimators.poisson_kernel import (poisson_init_state, poisson_state_size,
                                               poisson_step, poisson_work_size)
from monitor.estimators.rls import check_range, floats_from_json, floats_to_json
from monitor.estimators.tquantile import t_lookup, t_table
from monitor.estimators.transform import (ControlSpec, design_row, parameter_names,
                                          parse_controls)
from monitor.types import STATUS_LABELS


def check_count(value: object) -> float:
    """The quantity as float: finite and >= 0 (zeros allowed)."""
    try:
        q = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise ValidationError(f"field 'quantity' = {value!r}: not a number", field="quantity",
                              value=value, rule="number") from None
    if not math.isfinite(q):
        raise ValidationError(f"field 'quantity' = {value!r}: must be finite", field="quantity",
                              value=value, rule="finite")
    if q < 0.0:
        raise ValidationError(f"field 'quantity' = {value!r}: quantity must be >= 0",
                              field="quantity", value=value, rule="non_negative")
    return q


def log_exposure(value: object) -> float:
    """``log(exposure)``; exposure must be finite and > 0."""
    try:
        v = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise ValidationError(f"field 'exposure' = {value!r}: not a number", field="exposure",
                              value=value, rule="number") from None
    if not (math.isfinite(v) and v > 0.0):
        raise ValidationError(f"field 'exposure' = {value!r}: exposure must be finite and > 0",
                              field="exposure", value=value, rule="positive")
    return math.log(v)


class ElasticityPoisson(KernelView):
    """Online Poisson pseudo-maximum-likelihood elasticity with exponential forgetting.

    Parameters
    ----------
    forgetting : float in (0, 1]
        Forgetting factor lambda (weights lambda^(t-s)); effective window (1 + lambda) /
        (1 - lambda) observations.
    controls, log_controls : sequence of str
        Control features entered as given and in logs.
    level : float in (0, 1)
        Confidence level of the band (Student-t, n_eff - k degrees of freedom).
    min_n_eff, min_price_sd, excitation_guard, guard_forgetting
        As in :class:`monitor.estimators.ElasticityRLS`.
    band : {"hc", "classic"}
        ``hc``: the robust sandwich (default; valid under any variance); ``classic``: the
        quasi-Poisson variance ``phi A^-1`` (variance proportional to the mean).
    exposure : str
        Name of the exposure column in a log (``""``: none); the row path passes
        ``log(exposure)`` as the offset. :meth:`learn_one` takes the exposure value itself.
    """

    model = "poisson"
    #: the row path keeps zero quantities for this model and passes ``q`` itself as response
    zero_quantity_ok = True

    def __init__(self, forgetting: float = 0.99, controls: Sequence[str] = (),
                 log_controls: Sequence[str] = (), level: float = 0.95, min_n_eff: float = 10.0,
                 min_price_sd: float = 0.02, excitation_guard: bool = True,
                 guard_forgetting: float = 0.8, band: str = "hc", exposure: str = ""):
        self.forgetting = check_range("forgetting", forgetting, 0.0, 1.0, True, False)
        self.controls = tuple(controls)
        self.log_controls = tuple(log_controls)
        self.level = check_range("level", level, 0.0, 1.0, True, True)
        self.min_n_eff = check_range("min_n_eff", min_n_eff, 0.0, math.inf, False, True)
        self.min_price_sd = check_range("min_price_sd", min_price_sd, 0.0, math.inf, False, True)
        self.excitation_guard = bool(excitation_guard)
        self.guard_forgetting = check_range("guard_forgetting", guard_forgetting, 0.0, 1.0,
                                             True, True)
        if band not in ("hc", "classic"):
            raise ValueError(f"band = {band!r}: must be one of hc, classic for the Poisson "
                             f"model (hac is not available for it)")
        self.band = band
        self.exposure = str(exposure or "")
        self._band = K.BANDS[band]
        self._lags = 0
        self._specs: tuple[ControlSpec, ...] = parse_controls(self.controls, self.log_controls)
        self._k = 2 + len(self._specs)
        self._state = self.initial_state()
        self._out = np.full(K.NOUT, np.nan)
        self._out[K.O_STATUS] = K.ST_WARMING_UP
        self._work = np.empty(poisson_work_size(self._k))
        self._tq = t_table(self.level)

    def initial_state(self) -> np.ndarray:
        return poisson_init_state(self._k)

    @property
    def state_size(self) -> int:
        return poisson_state_size(self._k)

    @property
    def parameter_names(self) -> list[str]:
        return parameter_names(self._specs)

    @property
    def control_specs(self) -> tuple:
        """The controls' design specs, in design-row order (after the intercept and log price)."""
        return self._specs

    @property
    def kernel_args(self) -> tuple:
        """Arguments after the data in :func:`monitor.estimators.dispatch.estimator_run`."""
        return self.dispatch_args

    # ------------------------------------------------------------------ learning
    def learn_one(self, x: Mapping[str, object], y: float, exposure: float | None = None
                  ) -> "ElasticityPoisson":
        """Update with one observation: ``x`` holds ``price`` and the controls, ``y`` the
        quantity (>= 0), ``exposure`` (> 0) the opening hours, customers or meters behind it."""
        row = design_row(x, self._specs)
        q = check_count(y)
        off = 0.0 if exposure is None else log_exposure(exposure)
        poisson_step(self._state, row, q, off, self._k, self._band, self.forgetting,
                     self.excitation_guard, self.guard_forgetting, self.min_price_sd,
                     self.min_n_eff, self._tq, self._out, self._work)
        return self

    def predict_one(self, x: Mapping[str, object], exposure: float = 1.0) -> float:
        """Expected quantity ``exposure * exp(x' theta)`` (the model is for the mean itself:
        no retransformation factor is needed)."""
        row = design_row(x, self._specs)
        return float(exposure) * math.exp(float(row @ self._state[K.NS:K.NS + self._k]))

    # ------------------------------------------------------------------ results
    @property
    def elasticity(self) -> float:
        return float(self._out[K.O_BETA])

    @property
    def intercept(self) -> float:
        return float(self._state[K.NS])

    @property
    def coefficients(self) -> dict[str, float]:
        return dict(zip(self.parameter_names, map(float, self._state[K.NS:K.NS + self._k])))

    @property
    def stderr(self) -> float:
        return float(self._out[K.O_SE])

    @property
    def n_eff(self) -> float:
        w2 = self._state[K.I_W2]
        return float(self._state[K.I_W] ** 2 / w2) if w2 > 0 else 0.0

    @property
    def n_obs(self) -> int:
        return int(self._state[K.I_N])

    @property
    def dispersion(self) -> float:
        """Pearson dispersion ``phi`` (1 for Poisson counts; > 1 overdispersed)."""
        dof = self._state[K.I_W] - self._k
        return float(self._state[K.I_V] / dof) if dof > 0 else math.nan

    def interval(self, level: float | None = None) -> tuple[float, float]:
        if level is None or level == self.level:
            return float(self._out[K.O_LO]), float(self._out[K.O_HI])
        level = check_range("level", level, 0.0, 1.0, True, True)
        q = t_lookup(t_table(level), self.n_eff - self._k)
        return self.elasticity - q * self.stderr, self.elasticity + q * self.stderr

    @property
    def status(self) -> str:
        return STATUS_LABELS[int(self._out[K.O_STATUS])]

    @property
    def standardized_innovation(self) -> float:
        return float(self._state[K.I_Z])

    @property
    def last_output(self) -> dict[str, float]:
        o = self._out
        return {"beta": o[K.O_BETA], "beta_se": o[K.O_SE], "beta_lo": o[K.O_LO],
                "beta_hi": o[K.O_HI], "n_eff": o[K.O_NEFF], "status": self.status,
                "innovation": o[K.O_E], "z": o[K.O_Z], "intercept": o[K.O_INTERCEPT],
                "resid_sd": o[K.O_RESID_SD], "band": self.band}

    # ------------------------------------------------------------------ state
    def hyperparameters(self) -> dict:
        return {"forgetting": self.forgetting, "controls": list(self.controls),
                "log_controls": list(self.log_controls), "level": self.level,
                "min_n_eff": self.min_n_eff, "min_price_sd": self.min_price_sd,
                "excitation_guard": self.excitation_guard,
                "guard_forgetting": self.guard_forgetting, "band": self.band,
                "exposure": self.exposure}

    def to_state(self) -> dict:
        return {"params": self.hyperparameters(), "state": floats_to_json(self._state),
                "out": floats_to_json(self._out)}

    @classmethod
    def from_state(cls, state: Mapping) -> "ElasticityPoisson":
        est = cls(**state["params"])
        st = floats_from_json(state["state"])
        if st.shape != est._state.shape:
            raise ValidationError(f"state vector has length {st.size}, expected "
                                  f"{est._state.size}", field="state")
        est._state[:] = st
        est._out[:] = floats_from_json(state["out"])
        return est

    def clone(self) -> "ElasticityPoisson":
        return type(self)(**self.hyperparameters())

    def __repr__(self) -> str:
        return (f"ElasticityPoisson(forgetting={self.forgetting}, controls={self.controls}, "
                f"log_controls={self.log_controls}, band={self.band!r})")


@dataclass(frozen=True)
class PoissonFit:
    """Result of :func:`poisson_fit`: coefficients, sandwich covariances, iterations."""

    params: np.ndarray
    cov_hc0: np.ndarray
    cov_hc1: np.ndarray
    iterations: int

    @property
    def bse_hc0(self) -> np.ndarray:
        return np.sqrt(np.diag(self.cov_hc0))

    @property
    def bse_hc1(self) -> np.ndarray:
        return np.sqrt(np.diag(self.cov_hc1))


def poisson_fit(X, y, offset=None, weights=None, tol: float = 1e-13,
                max_iter: int = 100) -> PoissonFit:
    """Exact weighted Poisson pseudo-maximum likelihood by Newton's method.

    Maximizes ``sum_s w_s (y_s eta_s - exp(eta_s))``, ``eta = X theta + offset``; stops when
    the largest Newton step is below ``tol`` (relative to 1 + |theta|). Covariances: the
    sandwich ``A^-1 H A^-1`` with ``A = X' diag(w mu) X``, ``H = X' diag(w^2 (y - mu)^2) X``
    (HC0) and times ``W2 / (W2 - k W3 / W)`` (``W_j = sum w^j``; ``n / (n - k)`` for unit
    weights: HC1), the factor the online filter uses.
    """
    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    n, k = X.shape
    off = np.zeros(n) if offset is None else np.asarray(offset, dtype=np.float64)
    w = np.ones(n) if weights is None else np.asarray(weights, dtype=np.float64)
    theta = np.zeros(k)
    theta[0] = math.log(max(float(np.sum(w * y) / np.sum(w * np.exp(off))), 1e-300))
    it = 0
    for it in range(1, max_iter + 1):
        mu = np.exp(X @ theta + off)
        A = X.T @ (X * (w * mu)[:, None])
        step = np.linalg.solve(A, X.T @ (w * (y - mu)))
        theta = theta + step
        if np.max(np.abs(step) / (1.0 + np.abs(theta))) < tol:
            break
    else:
        raise ValueError(f"poisson_fit: Newton did not converge in {max_iter} iterations")
    mu = np.exp(X @ theta + off)
    A = X.T @ (X * (w * mu)[:, None])
    Ainv = np.linalg.inv(A)
    H = X.T @ (X * (w * w * (y - mu) ** 2)[:, None])
    hc0 = Ainv @ H @ Ainv
    W, W2, W3 = w.sum(), (w ** 2).sum(), (w ** 3).sum()
    return PoissonFit(theta, hc0, hc0 * W2 / (W2 - k * W3 / W), it)
