"""``ElasticityRLS``: the streaming elasticity estimator (river-style verbs).

Model, per series: ``log q_t = a + b log p_t + c' z_t + e_t``; ``b`` is the elasticity. The
update is recursive least squares with exponential forgetting, covariance in symmetric form, and
the exponentially weighted least-squares sandwich for the variance; the compiled step and every
formula live in :mod:`monitor.estimators.kernel`, shared with the batch path.

>>> import numpy as np
>>> rng = np.random.default_rng(7)
>>> est = ElasticityRLS(forgetting=0.99)
>>> for _ in range(400):
...     p = 10.0 * np.exp(rng.normal(0.0, 0.1))
...     q = 500.0 * p ** -1.5 * np.exp(rng.normal(0.0, 0.2))
...     _ = est.learn_one({"price": p}, q)
>>> est.status, est.n_obs
('ok', 400)
>>> lo, hi = est.interval(0.95)
>>> bool(lo < -1.5 < hi)
True
"""

from __future__ import annotations

import math
from typing import Mapping, Sequence

import numpy as np

from monitor.errors import ValidationError
from monitor.estimators import kernel as K
from monitor.estimators.tquantile import t_table
from monitor.estimators.transform import (ControlSpec, check_quantity, design_row, parameter_names,
                                          parse_controls)
from monitor.types import STATUS_LABELS


#: documented defaults of the weak prior: N(0, 1000^2) for every coefficient
DEFAULT_PRIOR_SD = 1000.0


def _check_range(name: str, value: float, lo: float, hi: float, lo_open: bool, hi_open: bool) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} = {value!r}: must be a number") from None
    ok = math.isfinite(v) and (v > lo if lo_open else v >= lo) and (v < hi if hi_open else v <= hi)
    if not ok:
        lb = "(" if lo_open else "["
        rb = ")" if hi_open else "]"
        raise ValueError(f"{name} = {value!r}: must be in {lb}{lo}, {hi}{rb}")
    return v


def floats_to_json(a: np.ndarray) -> list:
    """A float vector as a JSON-safe list (NaN as None; finite values round-trip exactly)."""
    return [None if v != v else v for v in np.asarray(a, dtype=np.float64).tolist()]


def floats_from_json(values: Sequence) -> np.ndarray:
    return np.array([math.nan if v is None else v for v in values], dtype=np.float64)


class ElasticityRLS:
    """Online log-log elasticity by recursive least squares with exponential forgetting.

    Parameters
    ----------
    forgetting : float in (0, 1]
        Forgetting factor lambda; weights lambda^(t-s). 1 is ordinary least squares. The
        effective window is n_eff -> (1 + lambda) / (1 - lambda) observations.
    controls, log_controls : sequence of str
        Names of control features entered as given, and in logs.
    prior_mean, prior_sd : float
        Prior for the elasticity b (default 0 and 1000: a weak prior). The intercept and the
        controls get N(0, 1000^2). ``prior_mean=-1.5, prior_sd=1.0`` encodes "b near -1.5 +/- 1".
    level : float in (0, 1)
        Confidence level of the reported interval (Student-t with n_eff - k degrees of freedom).
    min_n_eff : float
        Status is ``warming_up`` until n_eff reaches this (and at least k + 2).
    min_price_sd : float
        Status is ``low_variation`` while the exponentially weighted sd of log price is below this
        (default 0.02: prices vary by less than about 2%)..
    excitation_guard : bool
        Pause forgetting while prices are flat over a short window, so the covariance cannot wind
        up (see :mod:`monitor.estimators.kernel`).
    guard_forgetting : float in (0, 1)
        Forgetting factor of the guard's short window (0.8: about 9 observations).
    """

    def __init__(self, forgetting: float = 0.99, controls: Sequence[str] = (),
                 log_controls: Sequence[str] = (), prior_mean: float = 0.0,
                 prior_sd: float = DEFAULT_PRIOR_SD, level: float = 0.95, min_n_eff: float = 10.0,
                 min_price_sd: float = 0.02, excitation_guard: bool = True,
                 guard_forgetting: float = 0.8):
        self.forgetting = _check_range("forgetting", forgetting, 0.0, 1.0, True, False)
        self.controls = tuple(controls)
        self.log_controls = tuple(log_controls)
        self.prior_mean = _check_range("prior_mean", prior_mean, -math.inf, math.inf, True, True)
        self.prior_sd = _check_range("prior_sd", prior_sd, 0.0, math.inf, True, True)
        self.level = _check_range("level", level, 0.0, 1.0, True, True)
        self.min_n_eff = _check_range("min_n_eff", min_n_eff, 0.0, math.inf, False, True)
        self.min_price_sd = _check_range("min_price_sd", min_price_sd, 0.0, math.inf, False, True)
        self.excitation_guard = bool(excitation_guard)
        self.guard_forgetting = _check_range("guard_forgetting", guard_forgetting, 0.0, 1.0, True, True)
        self._specs: tuple[ControlSpec, ...] = parse_controls(self.controls, self.log_controls)
        self._k = 2 + len(self._specs)
        self._state = K.init_state(*self.prior())
        self._out = np.full(K.NOUT, np.nan)
        self._out[K.O_STATUS] = K.ST_WARMING_UP
        self._u = np.empty(self._k)
        self._tq = t_table(self.level)

    # ------------------------------------------------------------------ set-up
    def prior(self) -> tuple[np.ndarray, np.ndarray]:
        """Prior mean vector and diagonal prior variances, in design-row order."""
        mean = np.zeros(self._k)
        mean[1] = self.prior_mean
        var = np.full(self._k, DEFAULT_PRIOR_SD ** 2)
        var[1] = self.prior_sd ** 2
        return mean, var

    @property
    def parameter_names(self) -> list[str]:
        return parameter_names(self._specs)

    @property
    def kernel_args(self) -> tuple:
        """Arguments after the data in :func:`monitor.estimators.kernel.rls_run`."""
        return (self.forgetting, self.excitation_guard, self.guard_forgetting, self.min_price_sd,
                self.min_n_eff, self._tq)

    # ------------------------------------------------------------------ learning
    def learn_one(self, x: Mapping[str, object], y: float) -> "ElasticityRLS":
        """Update with one observation: ``x`` holds ``price`` and the controls, ``y`` the quantity."""
        row = design_row(x, self._specs)
        q = check_quantity(y)
        K.rls_step(self._state, row, math.log(q), self._k, *self.kernel_args, self._out, self._u)
        return self

    def predict_one(self, x: Mapping[str, object]) -> float:
        """Expected quantity on the original scale, ``exp(x' theta) * exp(s^2 / 2)``.

        The factor ``exp(s^2/2)`` is the retransformation for normal log errors (the log-normal
        mean); without it the prediction is the median and is biased low by that factor (1.13x
        at s = 0.5). Before the residual sd is known the factor is 1.
        """
        row = design_row(x, self._specs)
        s = self.residual_sd
        factor = math.exp(0.5 * s * s) if math.isfinite(s) else 1.0
        return math.exp(float(row @ self._theta)) * factor

    # ------------------------------------------------------------------ results
    @property
    def _theta(self) -> np.ndarray:
        return self._state[K.NS:K.NS + self._k]

    @property
    def _P(self) -> np.ndarray:
        k = self._k
        return self._state[K.NS + k:K.NS + k + k * k].reshape(k, k)

    @property
    def _S(self) -> np.ndarray:
        k = self._k
        return self._state[K.NS + k + k * k:].reshape(k, k)

    @property
    def elasticity(self) -> float:
        """Current estimate of b (d log q / d log p)."""
        return float(self._theta[1])

    @property
    def intercept(self) -> float:
        return float(self._theta[0])

    @property
    def coefficients(self) -> dict[str, float]:
        return dict(zip(self.parameter_names, map(float, self._theta)))

    @property
    def n_eff(self) -> float:
        """Kish's effective number of observations (sum w)^2 / sum w^2."""
        w2 = self._state[K.I_W2]
        return float(self._state[K.I_W] ** 2 / w2) if w2 > 0 else 0.0

    @property
    def n_obs(self) -> int:
        return int(self._state[K.I_N])

    @property
    def residual_sd(self) -> float:
        """Exponentially weighted residual sd on the log scale (NaN while warming up)."""
        dof = self._state[K.I_W] - self._k
        v = self._state[K.I_V]
        return float(math.sqrt(v / dof)) if dof > 0 and v > 0 else math.nan

    def covariance(self) -> np.ndarray:
        """Sandwich covariance ``sigma^2 P S P`` of the coefficients (NaN while warming up)."""
        s = self.residual_sd
        P = self._P
        return (s * s) * (P @ self._S @ P)

    @property
    def stderr(self) -> float:
        """Standard error of b (sandwich form)."""
        return float(self._out[K.O_SE])

    def interval(self, level: float | None = None) -> tuple[float, float]:
        """Confidence interval for b: Student-t with n_eff - k degrees of freedom."""
        if level is None or level == self.level:
            return float(self._out[K.O_LO]), float(self._out[K.O_HI])
        level = _check_range("level", level, 0.0, 1.0, True, True)
        from monitor.estimators.tquantile import t_lookup

        q = t_lookup(t_table(level), self.n_eff - self._k)
        b, se = self.elasticity, self.stderr
        return b - q * se, b + q * se

    @property
    def status(self) -> str:
        """``warming_up``, ``low_variation`` or ``ok``."""
        return STATUS_LABELS[int(self._out[K.O_STATUS])]

    @property
    def innovation(self) -> float:
        """Last one-step-ahead prediction error on the log scale, ``y - x' theta_{t-1}``."""
        return float(self._state[K.I_E])

    @property
    def innovation_sd(self) -> float:
        """Its predicted sd, ``sigma sqrt(1 + x' P S P x)`` (NaN while warming up)."""
        return float(self._state[K.I_ZSD])

    @property
    def standardized_innovation(self) -> float:
        """``innovation / innovation_sd``: about N(0, 1) when the model holds."""
        return float(self._state[K.I_Z])

    @property
    def last_output(self) -> dict[str, float]:
        """The output row of the last update (the columns of estimates.csv and more)."""
        o = self._out
        return {"beta": o[K.O_BETA], "beta_se": o[K.O_SE], "beta_lo": o[K.O_LO],
                "beta_hi": o[K.O_HI], "n_eff": o[K.O_NEFF], "status": self.status,
                "innovation": o[K.O_E], "z": o[K.O_Z], "intercept": o[K.O_INTERCEPT],
                "resid_sd": o[K.O_RESID_SD]}

    # ------------------------------------------------------------------ state
    def to_state(self) -> dict:
        """Plain JSON-able state; :meth:`from_state` continues bit for bit."""
        return {"params": self._params(), "state": floats_to_json(self._state),
                "out": floats_to_json(self._out)}

    def _params(self) -> dict:
        return {"forgetting": self.forgetting, "controls": list(self.controls),
                "log_controls": list(self.log_controls), "prior_mean": self.prior_mean,
                "prior_sd": self.prior_sd, "level": self.level, "min_n_eff": self.min_n_eff,
                "min_price_sd": self.min_price_sd, "excitation_guard": self.excitation_guard,
                "guard_forgetting": self.guard_forgetting}

    @classmethod
    def from_state(cls, state: Mapping) -> "ElasticityRLS":
        est = cls(**state["params"])
        st = floats_from_json(state["state"])
        if st.shape != est._state.shape:
            raise ValidationError(f"state vector has length {st.size}, expected {est._state.size}",
                                  field="state")
        est._state[:] = st
        est._out[:] = floats_from_json(state["out"])
        return est

    def clone(self) -> "ElasticityRLS":
        """A fresh, unfitted estimator with the same hyperparameters."""
        return type(self)(**self._params())

    def __repr__(self) -> str:
        return f"ElasticityRLS(forgetting={self.forgetting}, controls={self.controls}, log_controls={self.log_controls})"
