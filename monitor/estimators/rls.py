"""``ElasticityRLS``: the streaming elasticity estimator (river-style verbs).

Model, per series: ``log q_t = a + b log p_t + c' z_t + e_t``; ``b`` is the elasticity. The
update is recursive least squares with exponential forgetting in information form (exact
weighted least squares at every step, diffuse start: forgetting 1 is ordinary least squares),
with a heteroskedasticity-robust band by default; the compiled step and every formula live in
:mod:`monitor.estimators.kernel`, shared with the batch path.

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
from monitor.estimators.access import KernelView
from monitor.estimators.tquantile import t_lookup, t_table
from monitor.estimators.transform import (ControlSpec, check_quantity, design_row, parameter_names,
                                          parse_controls)
from monitor.types import STATUS_LABELS


_learn = K.rls_learn
_log = math.log
_INF = math.inf
_NAN = math.nan
#: the compiled one-observation step for a price-only row, called through its compiled entry
#: (:func:`compiled_entry`); loaded on the first price-only learn_one
_learn_price = None


def compiled_entry(dispatcher, args: tuple):
    """The compiled function of numba ``dispatcher`` for the types of ``args``, called directly.

    A call through the dispatcher first works out the numba type of every argument to pick
    the compiled version (about 150 ns of the 280 ns a seven-argument call costs, measured
    for issue 15); the compiled entry skips that and converts the arguments as that version
    expects (a wrong type raises TypeError there). For a caller that always passes the same
    kinds of arguments, like :meth:`ElasticityRLS.learn_one` with its own arrays.
    """
    import numba

    return dispatcher.compile(tuple(numba.typeof(a) for a in args))


def _load_learn_price(args: tuple):
    global _learn_price
    _learn_price = compiled_entry(K.rls_learn_price, args)
    return _learn_price

#: Jarque-Bera statistic above which predict_one uses Duan's smearing (chi-square(2) 0.99)
SMEARING_JB = 9.21


def check_range(name: str, value: float, lo: float, hi: float, lo_open: bool, hi_open: bool) -> float:
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


class ElasticityRLS(KernelView):
    """Online log-log elasticity by recursive least squares with exponential forgetting.

    Parameters
    ----------
    forgetting : float in (0, 1]
        Forgetting factor lambda; weights lambda^(t-s). 1 is ordinary least squares. The
        effective window is n_eff -> (1 + lambda) / (1 - lambda) observations.
    controls, log_controls : sequence of str
        Names of control features entered as given, and in logs.
    prior_mean, prior_sd : float
        Prior for the elasticity b, N(prior_mean, prior_sd^2); ``prior_sd=None`` (default): no
        prior, the start is exactly diffuse. The intercept and the controls never get one.
        ``prior_mean=-1.5, prior_sd=1.0`` encodes "b near -1.5 +/- 1".
    level : float in (0, 1)
        Confidence level of the reported interval (Student-t with n_eff - k degrees of freedom).
    min_n_eff : float
        Status is ``warming_up`` until n_eff reaches this (and at least k + 2).
    min_price_sd : float
        Status is ``low_variation`` while the exponentially weighted sd of log price, raw or
        left after the intercept and the controls, is below this (default 0.02: about 2%).
    excitation_guard : bool
        Pause forgetting while prices are flat over a short window, so the information along
        the unexcited direction is not forgotten (see :mod:`monitor.estimators.kernel`).
    guard_forgetting : float in (0, 1)
        Forgetting factor of the guard's short window (0.8: about 9 observations).
    band : {"hc", "hac", "classic"}
        Variance of the estimate: White (1980) heteroskedasticity-robust (default), Newey & West
        (1987) autocorrelation-robust with a Bartlett kernel, or classic (constant error
        variance, no autocorrelation).
    hac_lags : int
        Lags of the Newey-West band (used with ``band="hac"``; default 8, which held the 95%
        band at 94-96% at forgetting 0.995 on AR(1) 0.5 errors and prices; 4 gave 93.4%).
    """

    model = "loglinear"
    #: zero quantities cannot be logged: the row path applies ``[validation] zero_policy``
    zero_quantity_ok = False

    def __init__(self, forgetting: float = 0.99, controls: Sequence[str] = (),
                 log_controls: Sequence[str] = (), prior_mean: float = 0.0,
                 prior_sd: float | None = None, level: float = 0.95, min_n_eff: float = 10.0,
                 min_price_sd: float = 0.02, excitation_guard: bool = True,
                 guard_forgetting: float = 0.8, band: str = "hc", hac_lags: int = 8):
        self.forgetting = check_range("forgetting", forgetting, 0.0, 1.0, True, False)
        self.controls = tuple(controls)
        self.log_controls = tuple(log_controls)
        self.prior_mean = check_range("prior_mean", prior_mean, -math.inf, math.inf, True, True)
        self.prior_sd = None if prior_sd is None else check_range(
            "prior_sd", prior_sd, 0.0, math.inf, True, True)
        self.level = check_range("level", level, 0.0, 1.0, True, True)
        self.min_n_eff = check_range("min_n_eff", min_n_eff, 0.0, math.inf, False, True)
        self.min_price_sd = check_range("min_price_sd", min_price_sd, 0.0, math.inf, False, True)
        self.excitation_guard = bool(excitation_guard)
        self.guard_forgetting = check_range("guard_forgetting", guard_forgetting, 0.0, 1.0, True, True)
        if band not in K.BANDS:
            raise ValueError(f"band = {band!r}: must be one of {', '.join(K.BANDS)}")
        self.band = band
        self.hac_lags = int(check_range("hac_lags", hac_lags, 1, 52, False, False))
        if self.hac_lags != hac_lags:
            raise ValueError(f"hac_lags = {hac_lags!r}: must be an integer in [1, 52]")
        self._specs: tuple[ControlSpec, ...] = parse_controls(self.controls, self.log_controls)
        self._k = 2 + len(self._specs)
        self._band = K.BANDS[band]
        self._lags = self.hac_lags if self._band == K.BAND_HAC else 0
        self._state = self.initial_state()
        self._out = np.full(K.NOUT, np.nan)
        self._out[K.O_STATUS] = K.ST_WARMING_UP
        self._work = np.empty(K.work_size(self._k))
        self._tq = t_table(self.level)
        # settings for the compiled one-observation step, and its reused design row (the
        # hyperparameters are fixed once constructed: clone() for other settings)
        self._par = K.pack_settings(*self.kernel_args[:-1])
        self._row = np.ones(self._k)
        # the arrays of every call, in rls_learn's order (the design row is filled in place)
        self._learn_args = (self._state, self._row, self._par, self._tq, self._out, self._work)

    # ------------------------------------------------------------------ set-up
    def prior(self) -> tuple[np.ndarray, np.ndarray]:
        """Prior mean vector and diagonal prior variances (``inf``: diffuse), design-row order."""
        mean = np.zeros(self._k)
        mean[1] = self.prior_mean
        var = np.full(self._k, math.inf)
        if self.prior_sd is not None:
            var[1] = self.prior_sd ** 2
        return mean, var

    def initial_state(self) -> np.ndarray:
        """A fresh state vector for these settings."""
        return K.init_state(*self.prior(), self._band, self._lags)

    @property
    def state_size(self) -> int:
        return K.state_size(self._k, self._band, self._lags)

    @property
    def parameter_names(self) -> list[str]:
        return parameter_names(self._specs)

    @property
    def control_specs(self) -> tuple:
        """The controls' design specs, in design-row order (after the intercept and log price)."""
        return self._specs

    @property
    def kernel_args(self) -> tuple:
        """Arguments after the data in :func:`monitor.estimators.kernel.rls_run`."""
        return self.dispatch_args

    # ------------------------------------------------------------------ learning
    def learn_one(self, x: Mapping[str, object], y: float) -> "ElasticityRLS":
        """Update with one observation: ``x`` holds ``price`` and the controls, ``y`` the quantity."""
        if not self._specs and type(x) is dict:
            # price only: the checks of design_row / check_quantity inline (they run on every
            # call); anything not a finite positive number goes to them below for the message
            try:
                p = float(x["price"])
            except (KeyError, TypeError, ValueError):
                p = _NAN
            try:
                q = float(y)
            except (TypeError, ValueError):
                q = _NAN
            if 0.0 < p < _INF and 0.0 < q < _INF:
                args = self._learn_args
                (_learn_price or _load_learn_price(args + (0.0, 0.0)))(*args, _log(p), _log(q))
                return self
        row = design_row(x, self._specs)           # raises with the field, value and rule
        q = check_quantity(y)                      # raises with the field, value and rule
        _learn(self._state, row, self._par, self._tq, self._out, self._work, _log(q))
        return self

    @property
    def residual_shape(self) -> dict[str, float]:
        """Skewness, excess kurtosis and the Jarque-Bera statistic of the a-posteriori log
        residuals (exponentially weighted; ``JB = n_eff / 6 (skew^2 + kurt^2 / 4)``, Jarque &
        Bera 1980, with n_eff for n)."""
        st = self._state
        w = st[K.I_W]
        m2 = st[K.I_R2] / w if w > 0 else math.nan
        if not m2 > 0:
            return {"skew": math.nan, "excess_kurtosis": math.nan, "jarque_bera": math.nan}
        skew = st[K.I_R3] / w / m2 ** 1.5
        kurt = st[K.I_R4] / w / (m2 * m2) - 3.0
        jb = self.n_eff / 6.0 * (skew * skew + kurt * kurt / 4.0)
        return {"skew": float(skew), "excess_kurtosis": float(kurt), "jarque_bera": float(jb)}

    @property
    def retransformation(self) -> str:
        """``"normal"`` (factor ``exp(s^2/2)``) or ``"smearing"`` (Duan 1983), chosen by the
        residuals: smearing when their Jarque-Bera statistic exceeds :data:`SMEARING_JB`."""
        jb = self.residual_shape["jarque_bera"]
        return "smearing" if jb > SMEARING_JB else "normal"

    def retransformation_factor(self) -> float:
        """The factor that turns ``exp(x' theta)`` (a median) into a mean (1 while unknown).

        ``normal``: ``exp(s^2 / 2)``, the log-normal mean; ``smearing``: the weighted mean of
        ``exp(r)`` over the a-posteriori log residuals r (Duan 1983), which needs no
        distributional assumption.
        """
        s = self.residual_sd
        if not math.isfinite(s):
            return 1.0
        if self.retransformation == "smearing":
            return float(self._state[K.I_SMEAR] / self._state[K.I_W])
        return math.exp(0.5 * s * s)

    def predict_one(self, x: Mapping[str, object]) -> float:
        """Expected quantity on the original scale, ``exp(x' theta) * factor``.

        The factor is chosen by :attr:`retransformation` (normal ``exp(s^2/2)`` or Duan's
        smearing); without it the prediction is the median and biased low (1.13x at s = 0.5).
        """
        row = design_row(x, self._specs)
        return math.exp(float(row @ self._theta)) * self.retransformation_factor()

    # ------------------------------------------------------------------ results
    @property
    def _theta(self) -> np.ndarray:
        return self._state[K.NS:K.NS + self._k]

    @property
    def _A(self) -> np.ndarray:
        """Information matrix ``sum w x x'`` (plus any prior information)."""
        k = self._k
        return self._state[K.NS + k:K.NS + k + k * k].reshape(k, k)

    @property
    def _P(self) -> np.ndarray:
        """``A^{-1}`` (inf on the diagonal of unidentified columns)."""
        try:
            return np.linalg.inv(self._A)
        except np.linalg.LinAlgError:
            return np.full((self._k, self._k), math.inf)

    @property
    def elasticity(self) -> float:
        """Current estimate of b (d log q / d log p); NaN while the log price is unidentified
        (before any data: the prior mean if a prior is given)."""
        if self.n_obs == 0:
            return self.prior_mean if self.prior_sd is not None else math.nan
        return float(self._out[K.O_BETA])

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

    @property
    def price_sd_after_controls(self) -> float:
        """Weighted sd of log price left after the intercept and the controls."""
        return float(self._state[K.I_XSD])

    def collinear_controls(self, tol: float = 0.05) -> list[str]:
        """Controls that explain the log price: in the weighted regression of log price on the
        intercept and the controls (from the information matrix), those whose term moves log
        price by more than ``tol`` (in sd units of log price). For the low-variation message."""
        A = self._A
        k = self._k
        if k <= 2 or not A[0, 0] > 0:
            return []
        others = [0] + list(range(2, k))
        Aoo = A[np.ix_(others, others)]
        coef = np.linalg.lstsq(Aoo, A[others, 1], rcond=None)[0]
        w = A[0, 0]
        names = []
        for j, c in zip(range(2, k), coef[1:]):
            mean_j = A[0, j] / w
            sd_j = math.sqrt(max(A[j, j] / w - mean_j * mean_j, 0.0))
            mean_p = A[0, 1] / w
            sd_p = math.sqrt(max(A[1, 1] / w - mean_p * mean_p, 0.0))
            if sd_p > 0 and abs(c) * sd_j > tol * sd_p:
                names.append(self.parameter_names[j])
        return names

    def covariance(self) -> np.ndarray:
        """Covariance of the coefficients under the chosen band (NaN while warming up).

        Computed from the state in Python (the kernel reports only the elasticity's variance).
        """
        from monitor.estimators.bands import coefficient_covariance

        return coefficient_covariance(self._state, self._k, self._band, self._lags)

    @property
    def stderr(self) -> float:
        """Standard error of b under the chosen band."""
        return float(self._out[K.O_SE])

    def interval(self, level: float | None = None) -> tuple[float, float]:
        """Confidence interval for b: Student-t with n_eff - k degrees of freedom."""
        if level is None or level == self.level:
            return float(self._out[K.O_LO]), float(self._out[K.O_HI])
        level = check_range("level", level, 0.0, 1.0, True, True)
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
                "resid_sd": o[K.O_RESID_SD], "band": self.band}

    # ------------------------------------------------------------------ state
    def to_state(self) -> dict:
        """Plain JSON-able state; :meth:`from_state` continues bit for bit."""
        return {"params": self.hyperparameters(), "state": floats_to_json(self._state),
                "out": floats_to_json(self._out)}

    def hyperparameters(self) -> dict:
        return {"forgetting": self.forgetting, "controls": list(self.controls),
                "log_controls": list(self.log_controls), "prior_mean": self.prior_mean,
                "prior_sd": self.prior_sd, "level": self.level, "min_n_eff": self.min_n_eff,
                "min_price_sd": self.min_price_sd, "excitation_guard": self.excitation_guard,
                "guard_forgetting": self.guard_forgetting, "band": self.band,
                "hac_lags": self.hac_lags}

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
        return type(self)(**self.hyperparameters())

    def __repr__(self) -> str:
        return (f"ElasticityRLS(forgetting={self.forgetting}, controls={self.controls}, "
                f"log_controls={self.log_controls}, band={self.band!r})")
