"""``ElasticityIV``: the streaming elasticity through instruments (recursive 2SLS with forgetting).

Use it when prices follow demand (a manager raises the price after busy days): least squares
then mixes the demand response with the manager's reaction and is biased. An instrument is a
column that moves the price but not demand: an input cost, a tax, a randomized price
assignment. The compiled step and every formula live in :mod:`monitor.estimators.iv_kernel`.

>>> import numpy as np
>>> rng = np.random.default_rng(3)
>>> est = ElasticityIV(instruments=["cost"], forgetting=1.0)
>>> u_prev = 0.0
>>> for _ in range(600):
...     cost = 2.0 * np.exp(rng.normal(0.0, 0.1))
...     u = 0.8 * u_prev + rng.normal(0.0, 0.1)          # persistent demand shock
...     p = 10.0 * np.exp(0.8 * np.log(cost / 2.0) + 0.5 * u_prev)
...     q = 500.0 * p ** -1.5 * np.exp(u)
...     u_prev = u
...     _ = est.learn_one({"price": p, "cost": cost}, q)
>>> est.status, bool(est.first_stage_f > 10.0)
('ok', True)
>>> lo, hi = est.interval()
>>> bool(lo < -1.5 < hi)
True
"""

from __future__ import annotations

import math
from typing import Mapping, Sequence

import numpy as np

from monitor.errors import ValidationError
from monitor.estimators import iv_kernel as IK
from monitor.estimators import kernel as K
from monitor.estimators.access import KernelView
from monitor.estimators.batch import BatchResult
from monitor.estimators.rls import check_range, floats_from_json, floats_to_json
from monitor.estimators.tquantile import t_table
from monitor.estimators.transform import (ControlSpec, check_quantity, design_row,
                                          parameter_names, parse_controls)
from monitor.types import STATUS_LABELS

WEAK_INSTRUMENT = "weak_instrument"


def status_label(code: int) -> str:
    """Text of a status code, including :data:`iv_kernel.ST_WEAK_INSTRUMENT`."""
    code = int(code)
    if code == IK.ST_WEAK_INSTRUMENT:
        return WEAK_INSTRUMENT
    return STATUS_LABELS[code]


def parse_instruments(linear: Sequence[str] = (), logged: Sequence[str] = (),
                      controls: Sequence[ControlSpec] = ()) -> tuple[ControlSpec, ...]:
    """Instrument specs; a name may not repeat, be reserved or also be a control."""
    specs = parse_controls(linear, logged)
    clash = {s.name for s in specs} & {c.name for c in controls}
    if clash:
        name = sorted(clash)[0]
        raise ValidationError(f"'{name}' is given both as a control and as an instrument; an "
                              "instrument must be left out of the demand equation", field=name)
    if not specs:
        raise ValidationError("instrumental variables need at least one instrument column",
                              field="instruments")
    return specs


class ElasticityIV(KernelView):
    """Online log-log elasticity through instruments (recursive 2SLS, exponential forgetting).

    Parameters
    ----------
    instruments, log_instruments : sequence of str
        Instrument columns entered as given, and in logs (a cost that moves the price in
        proportion is best given in logs). At least one.
    forgetting : float in (0, 1]
        Forgetting factor lambda (weights lambda^(t-s)); 1 is the textbook 2SLS.
    controls, log_controls : sequence of str
        Exogenous controls (they are their own instruments).
    level : float in (0, 1)
        Confidence level of the band (Student-t with n_eff - k degrees of freedom on the
        HC1 robust standard error).
    min_n_eff : float
        Status is ``warming_up`` until n_eff reaches this (and at least k + 2). Default 30,
        above least squares' 10: the first stage is estimated too, and with few rows 2SLS
        leans toward the least-squares answer and its robust band is too narrow.
    min_price_sd : float
        Status ``low_variation`` while the exponentially weighted sd of log price is below it.
    f_min : float
        Status ``weak_instrument`` while the first stage's effective F is below it (default 10).
    """

    def __init__(self, instruments: Sequence[str] = (), log_instruments: Sequence[str] = (),
                 forgetting: float = 0.99, controls: Sequence[str] = (),
                 log_controls: Sequence[str] = (), level: float = 0.95,
                 min_n_eff: float = 30.0, min_price_sd: float = 0.02,
                 f_min: float = IK.DEFAULT_F_MIN):
        self.forgetting = check_range("forgetting", forgetting, 0.0, 1.0, True, False)
        self.controls = tuple(controls)
        self.log_controls = tuple(log_controls)
        self.instruments = tuple(instruments)
        self.log_instruments = tuple(log_instruments)
        self.level = check_range("level", level, 0.0, 1.0, True, True)
        self.min_n_eff = check_range("min_n_eff", min_n_eff, 0.0, math.inf, False, True)
        self.min_price_sd = check_range("min_price_sd", min_price_sd, 0.0, math.inf, False, True)
        self.f_min = check_range("f_min", f_min, 0.0, math.inf, False, True)
        self._cspecs = parse_controls(self.controls, self.log_controls)
        self._ispecs = parse_instruments(self.instruments, self.log_instruments, self._cspecs)
        self._kp = 2 + len(self._cspecs)
        self._nq = len(self._ispecs)
        # what the row path and the pipeline see: the design row is widened by the
        # instruments, (1, log p, controls, instruments), so the shared design_matrix builds it
        self._specs = self._cspecs + self._ispecs
        self._k = self._kp + self._nq
        self._band = K.BAND_HC
        self._lags = self._nq       # the dispatch's ``lags`` argument carries the instrument count
        self.excitation_guard = False
        self.guard_forgetting = 0.8
        self._state = self.initial_state()
        self._out = np.full(IK.NOUT_IV, np.nan)
        self._out[K.O_STATUS] = K.ST_WARMING_UP
        self._work = np.empty(IK.work_size(self._kp, self._nq))
        self._tq = t_table(self.level)

    #: model name in the estimator dispatch (:mod:`monitor.estimators.dispatch`)
    model = "iv"
    #: width of the output rows: the shared columns plus ``first_stage_f``
    nout = IK.NOUT_IV

    def initial_state(self) -> np.ndarray:
        """A fresh state vector (no data; 2SLS has no prior)."""
        return IK.init_state(self._kp, self._nq)

    @property
    def state_size(self) -> int:
        return IK.state_size(self._kp, self._nq)

    @property
    def control_specs(self) -> tuple:
        """Design specs of the controls then the instruments, in design-row order."""
        return self._specs

    @property
    def parameter_names(self) -> list[str]:
        return parameter_names(self._cspecs)

    @property
    def n_instruments(self) -> int:
        return self._nq

    @property
    def kernel_args(self) -> tuple:
        """Arguments after ``(state, sid, R, y)`` of :func:`iv_kernel.iv_run`, up to ``tq``."""
        return (self._kp, self._nq, self.forgetting, self.min_price_sd, self.min_n_eff,
                self.f_min, self._tq)

    def design(self, x: Mapping[str, object]) -> np.ndarray:
        """The widened row ``(1, log p, controls, instruments)`` for one observation."""
        missing = [s.name for s in self._ispecs if s.name not in x]
        if missing:
            raise ValidationError(f"instrument '{missing[0]}' is missing", field=missing[0],
                                  rule="missing")
        return design_row(x, self._specs)

    def learn_one(self, x: Mapping[str, object], y: float) -> "ElasticityIV":
        """Update with one observation: ``x`` holds price, controls and instruments."""
        r = self.design(x)
        q = check_quantity(y)
        IK.iv_step(self._state, r, math.log(q), self._kp, self._nq, self.forgetting,
                   self.min_price_sd, self.min_n_eff, self.f_min, self._tq, self._out,
                   self._work)
        return self

    # ------------------------------------------------------------------ results
    @property
    def elasticity(self) -> float:
        """Current b (NaN until the moments can be solved)."""
        return float(self._out[K.O_BETA])

    @property
    def coefficients(self) -> dict[str, float]:
        return dict(zip(self.parameter_names, map(float, self._state[K.NS:K.NS + self._kp])))

    def covariance(self) -> np.ndarray:
        """HC1 robust sandwich covariance of the coefficients (NaN until the first solve)."""
        k = self._kp
        o = IK.offsets(k, self._nq)[0]
        return self._state[o:o + k * k].reshape(k, k).copy()

    @property
    def stderr(self) -> float:
        return float(self._out[K.O_SE])

    def interval(self) -> tuple[float, float]:
        return float(self._out[K.O_LO]), float(self._out[K.O_HI])

    @property
    def first_stage_f(self) -> float:
        """Effective first-stage F (Olea & Pflueger 2013); NaN until it can be computed."""
        return float(self._out[IK.O_FSTAT])

    @property
    def n_eff(self) -> float:
        return float(self._out[K.O_NEFF]) if self.n_obs else 0.0

    @property
    def n_obs(self) -> int:
        return int(self._state[K.I_N])

    @property
    def status(self) -> str:
        """``warming_up``, ``low_variation``, ``weak_instrument`` or ``ok``."""
        return status_label(int(self._out[K.O_STATUS]))

    @property
    def last_output(self) -> dict[str, float]:
        o = self._out
        return {"beta": o[K.O_BETA], "beta_se": o[K.O_SE], "beta_lo": o[K.O_LO],
                "beta_hi": o[K.O_HI], "n_eff": o[K.O_NEFF], "status": self.status,
                "innovation": o[K.O_E], "z": o[K.O_Z], "intercept": o[K.O_INTERCEPT],
                "resid_sd": o[K.O_RESID_SD], "first_stage_f": o[IK.O_FSTAT]}

    # ------------------------------------------------------------------ state
    def hyperparameters(self) -> dict:
        return {"instruments": list(self.instruments),
                "log_instruments": list(self.log_instruments), "forgetting": self.forgetting,
                "controls": list(self.controls), "log_controls": list(self.log_controls),
                "level": self.level, "min_n_eff": self.min_n_eff,
                "min_price_sd": self.min_price_sd, "f_min": self.f_min}

    def to_state(self) -> dict:
        """Plain JSON-able state; :meth:`from_state` continues bit for bit."""
        return {"params": self.hyperparameters(), "state": floats_to_json(self._state),
                "out": floats_to_json(self._out)}

    @classmethod
    def from_state(cls, state: Mapping) -> "ElasticityIV":
        est = cls(**state["params"])
        st = floats_from_json(state["state"])
        if st.shape != est._state.shape:
            raise ValidationError(f"state vector has length {st.size}, expected {est._state.size}",
                                  field="state")
        est._state[:] = st
        est._out[:] = floats_from_json(state["out"])
        return est

    def __repr__(self) -> str:
        return (f"ElasticityIV(instruments={self.instruments + self.log_instruments}, "
                f"forgetting={self.forgetting}, controls={self.controls + self.log_controls})")


def est_instruments(est, logged: bool = False) -> tuple[str, ...]:
    """Instrument columns of any estimator (empty for the estimators without instruments):
    the row path validates them like controls."""
    return tuple(getattr(est, "log_instruments" if logged else "instruments", ()))


#: ``[estimator]`` keys an IV estimator takes from a config section
IV_KEYS = ("instruments", "log_instruments", "forgetting", "controls", "log_controls", "level",
           "min_price_sd")


def iv_from_settings(params: Mapping) -> ElasticityIV:
    """The IV estimator from ``[estimator]`` settings that name instruments. Keys of the
    least-squares estimator without meaning here (prior, excitation guard) are not used;
    ``min_n_eff`` applies when it is set above the IV default of 30."""
    kw = {k: params[k] for k in IV_KEYS if k in params and params[k] is not None}
    est = ElasticityIV(**kw)
    if params.get("min_n_eff") is not None and float(params["min_n_eff"]) > est.min_n_eff:
        est = ElasticityIV(**kw, min_n_eff=float(params["min_n_eff"]))
    return est


class IVBatchResult(BatchResult):
    """Per-row outputs (columns ``kernel.O_*`` and :data:`iv_kernel.O_FSTAT`) and final states:
    :class:`~monitor.estimators.batch.BatchResult` plus the first-stage F statistic."""

    @property
    def first_stage_f(self) -> np.ndarray:
        return self.out[:, IK.O_FSTAT]

    def status_labels(self) -> list[str]:
        return [status_label(s) for s in self.status]


def run_iv(est: ElasticityIV, sid: np.ndarray, R: np.ndarray, y: np.ndarray,
           states: np.ndarray | None = None) -> IVBatchResult:
    """Run the estimator's settings over rows ``(sid[j], R[j], y[j])`` in order.

    ``R`` is ``(n, k + n_instruments)``: the design row ``(1, log p, controls)`` followed by
    the instrument values (already logged where asked); ``y = log q``. Same numbers as
    :meth:`ElasticityIV.learn_one` row by row (one compiled step).
    """
    R = np.ascontiguousarray(R, dtype=np.float64)
    y = np.ascontiguousarray(y, dtype=np.float64)
    sid = np.ascontiguousarray(sid, dtype=np.int64)
    width = est._k
    if R.ndim != 2 or R.shape[1] != width:
        raise ValueError(f"R has shape {R.shape}; expected (n, {width}): design columns "
                         f"{est.parameter_names} then {est._nq} instrument(s)")
    if y.shape[0] != R.shape[0] or sid.shape[0] != R.shape[0]:
        raise ValueError("sid, R and y must have the same number of rows")
    n_series = int(sid.max()) + 1 if sid.size else 0
    if states is None:
        states = np.tile(est.initial_state(), (n_series, 1))
    out = np.empty((R.shape[0], IK.NOUT_IV))
    IK.iv_run(states, sid, R, y, *est.kernel_args, out, np.empty(IK.work_size(est._kp, est._nq)))
    return IVBatchResult(out=out, states=states)
