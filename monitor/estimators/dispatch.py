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
"""

from __future__ import annotations

from numba import njit

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


@njit(cache=True, inline="always")
def estimator_step(model, st, x, y, off, k, band, lags, lam, guard, guard_lam, min_price_sd,
                   min_neff, tq, out, w):
    """One observation of one series, for any model (see the module docstring)."""
    if model == MODEL_POISSON:
        poisson_step(st, x, y, off, k, band, lam, guard, guard_lam, min_price_sd, min_neff, tq,
                     out, w)
    elif model == MODEL_IV:
        # instruments (monitor.estimators.iv): k is the widened row's width, lags the count
        iv_step(st, x, y, k - lags, lags, lam, min_price_sd, min_neff, DEFAULT_F_MIN, tq, out, w)
    else:
        K.rls_step(st, x, y, k, band, lags, lam, guard, guard_lam, min_price_sd, min_neff, tq,
                   out, w)


@njit(cache=True, inline="always")
def estimator_discount(model, st, k, band, lags, f):
    """Discount everything a series' estimator has accumulated by ``f`` (any model; see
    :func:`monitor.estimators.kernel.discount`)."""
    if model == MODEL_POISSON:
        poisson_discount(st, k, f)
    elif model == MODEL_IV:
        iv_discount(st, k - lags, lags, f)
    else:
        K.discount(st, k, band, lags, f)


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
