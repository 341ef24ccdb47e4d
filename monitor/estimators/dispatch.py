"""One estimator step for every model: what the pipeline, replay and service call.

``estimator_step(model, st, x, y, off, k, band, lags, lam, guard, guard_lam, min_price_sd,
min_neff, tq, out, w)`` updates one series' state ``st`` in place and writes the output row
``out`` (columns of :mod:`monitor.estimators.kernel`, identical for every model):

- ``MODEL_LOGLINEAR`` (0): ``y = log q``; least squares with forgetting
  (:mod:`monitor.estimators.kernel`; written-out k = 2 form for the classic and hc bands);
- ``MODEL_POISSON`` (1): ``y = q`` (zeros allowed), ``off = log exposure``; Poisson
  pseudo-maximum likelihood (:mod:`monitor.estimators.poisson_kernel`).

``w`` is scratch of length :func:`work_size`; nothing is allocated. :func:`state_size` gives
the state length per model, k, band and HAC lags.

Compiling only what a configuration uses
----------------------------------------
:func:`estimator_step` chooses the model at run time, so a loop that calls it compiles every
model's step (about a minute of CPU for the pipeline, on a first run with an empty numba
cache). :func:`form_step` and :func:`form_discount` choose at *compile* time: their first
argument is a step form (:data:`FORM_TWO` ... :data:`FORM_IV`, from :func:`step_form`) that
must be a compile-time constant (a numba literal: a global, or an argument of a function that
calls ``numba.literally`` on it), and only that form's step is typed and compiled into the
caller. A caller compiled with ``cache=True`` is then cached once per form
(:func:`monitor.pipeline.kernel.pipeline_run`). The forms run the very functions
:func:`estimator_step` runs, so both give identical results.
"""

from __future__ import annotations

from numba import njit
from numba.core import types
from numba.core.dispatcher import Dispatcher
from numba.extending import overload

from monitor.estimators import kernel as K
from monitor.estimators.iv_kernel import DEFAULT_F_MIN, iv_discount, iv_step, work_size_bound
from monitor.estimators.poisson_kernel import (poisson_discount, poisson_state_size, poisson_step,
                                               poisson_work_size)

MODEL_LOGLINEAR, MODEL_POISSON, MODEL_IV = 0, 1, 2
MODELS = {"loglinear": MODEL_LOGLINEAR, "poisson": MODEL_POISSON, "iv": MODEL_IV}
MODEL_NAMES = {v: k for k, v in MODELS.items()}


def model_code(model) -> int:
    """Code of a model name (or code); ValueError naming the allowed names otherwise."""
    if isinstance(model, str):
        if model not in MODELS:
            raise ValueError(f"model = {model!r}: must be one of {', '.join(MODELS)}")
        return MODELS[model]
    if int(model) not in MODEL_NAMES:
        raise ValueError(f"model = {model!r}: must be one of {', '.join(MODELS)}")
    return int(model)


def band_code(band) -> int:
    if isinstance(band, str):
        if band not in K.BANDS:
            raise ValueError(f"band = {band!r}: must be one of {', '.join(K.BANDS)}")
        return K.BANDS[band]
    return int(band)


def state_size(model, k: int, band="hc", lags: int = 8) -> int:
    """Floats in one series' estimator state (8 bytes each)."""
    m, b = model_code(model), band_code(band)
    if m == MODEL_POISSON:
        return poisson_state_size(k)
    return K.state_size(k, b, lags if b == K.BAND_HAC else 0)


def work_size(model, k: int) -> int:
    return max(K.work_size(k), poisson_work_size(k), work_size_bound(k))


#: compiled step forms: the log-log model's written-out k = 2 step (bands classic and hc), its
#: general step (any k, the hac band), the Poisson step, the IV step
FORM_TWO, FORM_LINEAR, FORM_POISSON, FORM_IV = 0, 1, 2, 3


def step_form(model, k: int, band="hc") -> int:
    """The compiled step form of ``model`` with ``k`` design columns and ``band`` (the choice
    :func:`monitor.estimators.kernel.rls_step` makes at run time for the log-log model)."""
    m, b = model_code(model), band_code(band)
    if m == MODEL_POISSON:
        return FORM_POISSON
    if m == MODEL_IV:
        return FORM_IV
    return FORM_TWO if k == 2 and b != K.BAND_HAC else FORM_LINEAR


def _two(form, st, x, y, off, k, band, lags, lam, guard, guard_lam, min_price_sd, min_neff,
         tq, out, w):
    K.step_two_band(st, x[1], y, band, lam, guard, guard_lam, min_price_sd, min_neff, tq, out)


def _linear(form, st, x, y, off, k, band, lags, lam, guard, guard_lam, min_price_sd, min_neff,
            tq, out, w):
    K.linear_step(st, x, y, k, band, lags, lam, guard, guard_lam, min_price_sd, min_neff, tq,
                  out, w)


def _poisson(form, st, x, y, off, k, band, lags, lam, guard, guard_lam, min_price_sd, min_neff,
             tq, out, w):
    poisson_step(st, x, y, off, k, band, lam, guard, guard_lam, min_price_sd, min_neff, tq, out,
                 w)


def _iv(form, st, x, y, off, k, band, lags, lam, guard, guard_lam, min_price_sd, min_neff, tq,
        out, w):
    # instruments (monitor.estimators.iv): k is the widened row's width, lags the count
    iv_step(st, x, y, k - lags, lags, lam, min_price_sd, min_neff, DEFAULT_F_MIN, tq, out, w)


def _loglinear_discount(form, st, k, band, lags, f):
    K.discount(st, k, band, lags, f)


def _poisson_discount(form, st, k, band, lags, f):
    poisson_discount(st, k, f)


def _iv_discount(form, st, k, band, lags, f):
    iv_discount(st, k - lags, lags, f)


_STEPS = {FORM_TWO: _two, FORM_LINEAR: _linear, FORM_POISSON: _poisson, FORM_IV: _iv}
_DISCOUNTS = {FORM_TWO: _loglinear_discount, FORM_LINEAR: _loglinear_discount,
              FORM_POISSON: _poisson_discount, FORM_IV: _iv_discount}


def compile_time_choice(table: dict, inline: str = "never"):
    """Decorator: the decorated function's first argument picks its implementation from
    ``table`` when numba compiles a call to it.

    In compiled code the first argument must be a compile-time constant (a numba literal: a
    global such as :data:`FORM_TWO`, ``True``, or an argument that is itself literal); only the
    chosen implementation is typed and compiled into the caller. Each implementation takes the
    same arguments as the decorated function and is either

    - a compiled function (``@njit(cache=True, _nrt=False)``; ``inline="never"``): called as
      itself, so it is compiled once, cached on its own and shared by every caller; it keeps
      the caller small for numba's type inference, whose cost grows faster than the code it
      types (one loop holding every step took several times the sum of its parts); or
    - a plain Python function, compiled into the caller (``inline="always"`` pastes it in).

    Called from Python, the decorated function's own body runs instead (it looks the
    implementation up in ``table`` itself).
    """
    def decorate(stub):
        def typer(code, *args):
            if not (isinstance(code, types.Literal) and code.literal_value in table):
                return None  # a value only known at run time: no implementation (typing error)
            impl = table[code.literal_value]
            if isinstance(impl, Dispatcher):
                def forward(code, *args):
                    return impl(code, *args)
                return forward
            return impl

        overload(stub, prefer_literal=True, inline=inline, strict=False,
                 jit_options={"_nrt": False})(typer)
        return stub
    return decorate


@compile_time_choice(_STEPS)
def form_step(form, st, x, y, off, k, band, lags, lam, guard, guard_lam, min_price_sd,
              min_neff, tq, out, w):
    """:func:`estimator_step` for a step form fixed at compile time (``form``: a constant
    :data:`FORM_TWO` ... :data:`FORM_IV`; only that form's step is compiled in)."""
    _STEPS[form](form, st, x, y, off, k, band, lags, lam, guard, guard_lam, min_price_sd,
                 min_neff, tq, out, w)


@compile_time_choice(_DISCOUNTS, inline="always")
def form_discount(form, st, k, band, lags, f):
    """:func:`estimator_discount` for a step form fixed at compile time."""
    _DISCOUNTS[form](form, st, k, band, lags, f)


@njit(cache=True, inline="always")
def estimator_step(model, st, x, y, off, k, band, lags, lam, guard, guard_lam, min_price_sd,
                   min_neff, tq, out, w):
    """One observation of one series, for any model (see the module docstring)."""
    if model == MODEL_POISSON:
        form_step(FORM_POISSON, st, x, y, off, k, band, lags, lam, guard, guard_lam,
                  min_price_sd, min_neff, tq, out, w)
    elif model == MODEL_IV:
        form_step(FORM_IV, st, x, y, off, k, band, lags, lam, guard, guard_lam, min_price_sd,
                  min_neff, tq, out, w)
    else:
        K.rls_step(st, x, y, k, band, lags, lam, guard, guard_lam, min_price_sd, min_neff, tq,
                   out, w)


@njit(cache=True, inline="always")
def estimator_discount(model, st, k, band, lags, f):
    """Discount everything a series' estimator has accumulated by ``f`` (any model; see
    :func:`monitor.estimators.kernel.discount`)."""
    if model == MODEL_POISSON:
        form_discount(FORM_POISSON, st, k, band, lags, f)
    elif model == MODEL_IV:
        form_discount(FORM_IV, st, k, band, lags, f)
    else:
        form_discount(FORM_LINEAR, st, k, band, lags, f)


@njit(cache=True, _nrt=False)
def estimator_run(model, state, sid, X, y, off, band, lags, lam, guard, guard_lam,
                  min_price_sd, min_neff, tq, out, w):
    """:func:`estimator_step` over rows in order (``off`` of length n, or 0 for none).

    The log-log model goes to :func:`monitor.estimators.kernel.rls_run` (the model is
    chosen once, not per row); both loops allocate nothing (``_nrt=False``).
    """
    if model == MODEL_LOGLINEAR:
        K.rls_run(state, sid, X, y, band, lags, lam, guard, guard_lam, min_price_sd, min_neff,
                  tq, out, w)
        return
    k = X.shape[1]
    has_off = off.shape[0] > 0
    for j in range(X.shape[0]):
        o = off[j] if has_off else 0.0
        estimator_step(model, state[sid[j]], X[j], y[j], o, k, band, lags, lam, guard,
                       guard_lam, min_price_sd, min_neff, tq, out[j], w)


def make_estimator(model: str = "loglinear", **params):
    """The streaming estimator of ``model`` with ``params`` (its constructor's arguments).

    ``hac_lags`` and ``prior_mean``/``prior_sd`` apply to the log-log model only (the Poisson
    model ignores them, and refuses a given ``prior_sd`` and ``band="hac"`` with a message).
    """
    code = model_code(model)
    if code == MODEL_POISSON:
        from monitor.estimators.poisson import ElasticityPoisson

        if params.get("prior_sd") is not None:
            raise ValueError("prior_sd: a prior is not available for the Poisson model")
        for key in ("prior_mean", "prior_sd", "hac_lags"):
            params.pop(key, None)
        return ElasticityPoisson(**params)
    from monitor.estimators.rls import ElasticityRLS

    return ElasticityRLS(**params)
