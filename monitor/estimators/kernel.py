"""Compiled recursive-least-squares step with exponential forgetting, shared by every path.

One series' state is one flat float64 vector (see :data:`NS` and :func:`state_size`), so a
batch of series is a 2-D array and a checkpoint is a list of floats. The same compiled
:func:`rls_step` runs inside :meth:`monitor.ElasticityRLS.learn_one` and inside the batch loop
:func:`rls_run`, so streaming and batch results are identical to the bit.

The update, for design row ``x`` (length k), response ``y = log q`` and forgetting factor
``lam`` (Ljung & Soderstrom 1983, ch. 2; symmetric covariance form):

    e   = y - x' theta                     one-step-ahead prediction error (log scale)
    u   = P x,  r = x' u,  d = lam + r
    theta <- theta + u e / d
    P   <- (P - u u' / d) / lam            computed on the upper triangle and mirrored
    S   <- lam^2 S + x x'                  for the sandwich variance
    V   <- lam V + lam e^2 / d             weighted residual sum of squares
    W   <- lam W + 1,   W2 <- lam^2 W2 + 1 sum of weights and of squared weights

Derived quantities: ``sigma^2 = V / (W - k)``, ``Var(theta) = sigma^2 P S P`` (the weighted
least-squares sandwich; with forgetting, ``sigma^2 P`` alone overstates the variance by about
``(1 + lam)``), ``n_eff = W^2 / W2`` (Kish 1965), confidence limits from Student-t with
``n_eff - k`` degrees of freedom.

Excitation guard: the exponentially weighted sd of log price (same ``lam``) is tracked; while it
is below ``min_price_sd`` the status is ``low_variation``. With flat prices the covariance winds
up as ``lam^-n`` along the unexcited direction and the first price change afterwards throws b
around. The guard tracks the same sd over a short window (``guard_lam``, default 0.8, about 9
observations) and, while that is below ``min_price_sd``, pauses forgetting (``lam`` is replaced by
1 in the step): observations are then forgotten only as fast as informative ones replace them,
and P stops growing within a few observations of the prices going flat. This is the "conditional updating" remedy for
estimator windup (Astrom & Wittenmark 1995, Adaptive Control, sec. 11.x; from memory).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from monitor.estimators.tquantile import t_lookup

# layout of the scalar part of a state vector
(I_W, I_W2, I_V, I_N, I_LPW, I_LPMEAN, I_LPM2, I_E, I_ZSD, I_Z, I_PAUSED, I_NPAUSED,
 I_GW, I_GMEAN, I_GM2) = range(15)
NS = 15

# columns of the per-observation output row
O_BETA, O_SE, O_LO, O_HI, O_NEFF, O_STATUS, O_E, O_Z, O_INTERCEPT, O_RESID_SD = range(10)
NOUT = 10

ST_WARMING_UP, ST_OK, ST_LOW_VARIATION = 0, 1, 2


def state_size(k: int) -> int:
    """Length of one series' state vector for ``k`` parameters."""
    return NS + k + 2 * k * k


def init_state(prior_mean: np.ndarray, prior_var: np.ndarray) -> np.ndarray:
    """Fresh state with prior mean ``theta0`` and diagonal prior covariance ``P0``."""
    k = prior_mean.shape[0]
    st = np.zeros(state_size(k))
    st[NS:NS + k] = prior_mean
    P = np.diag(np.asarray(prior_var, dtype=np.float64))
    st[NS + k:NS + k + k * k] = P.ravel()
    return st


@njit(cache=True, inline="always")
def ew_variance(st, i, v, lam):
    """Exponentially weighted mean and variance of ``v`` in slots i, i+1, i+2 (West 1979)."""
    w = lam * st[i] + 1.0
    d = v - st[i + 1]
    mean = st[i + 1] + d / w
    m2 = lam * st[i + 2] + d * (v - mean)
    if m2 < 0.0:
        m2 = 0.0
    st[i] = w
    st[i + 1] = mean
    st[i + 2] = m2
    return m2 / w


@njit(cache=True, inline="always")
def excitation(st, lp, lam, guard, guard_lam, min_price_sd):
    """Update both price-variation statistics; return (low_variation, lambda for this step).

    ``low_variation``: the EW sd of log price over the estimator's own window (``lam``) is below
    ``min_price_sd``. The guard pauses forgetting when the sd over a short window
    (``guard_lam``, about (1 + g) / (1 - g) observations) is below it, so a flat stretch is
    caught within a few observations and P grows by at most a few factors of 1/lam.
    """
    thr = min_price_sd * min_price_sd
    lowvar = ew_variance(st, I_LPW, lp, lam) < thr
    fast_low = ew_variance(st, I_GW, lp, guard_lam) < thr
    if guard and fast_low:
        st[I_NPAUSED] += 1.0
        st[I_PAUSED] = 1.0
        return lowvar, 1.0
    st[I_PAUSED] = 0.0
    return lowvar, lam


@njit(cache=True, inline="always")
def step_general(st, x, y, k, lam, guard, guard_lam, min_price_sd, min_neff, tq, out, u):
    """The update for any k (controls present); see the module docstring for the formulas."""
    th = NS
    p0 = NS + k
    s0 = NS + k + k * k
    lowvar, lt = excitation(st, x[1], lam, guard, guard_lam, min_price_sd)

    # prediction from the previous state
    yhat = 0.0
    for i in range(k):
        yhat += st[th + i] * x[i]
    e = y - yhat
    # u = P x, r = x' P x, q = x' P S P x (predictive variance factor, sandwich form)
    r = 0.0
    q = 0.0
    for i in range(k):
        acc = 0.0
        for j in range(k):
            acc += st[p0 + i * k + j] * x[j]
        u[i] = acc
        r += x[i] * acc
    for i in range(k):
        acc = 0.0
        for j in range(k):
            acc += st[s0 + i * k + j] * u[j]
        q += u[i] * acc
    W = st[I_W]
    V = st[I_V]
    dof = W - k
    if dof > 0.0 and V > 0.0:
        zsd = np.sqrt(V / dof * (1.0 + q))
        z = e / zsd
    else:
        zsd = np.nan
        z = np.nan
    st[I_E] = e
    st[I_ZSD] = zsd
    st[I_Z] = z

    # update
    inv_d = 1.0 / (lt + r)
    g = e * inv_d
    inv_l = 1.0 / lt
    l2 = lt * lt
    for i in range(k):
        st[th + i] += u[i] * g
    for i in range(k):
        for j in range(i, k):
            pij = (st[p0 + i * k + j] - u[i] * u[j] * inv_d) * inv_l
            st[p0 + i * k + j] = pij
            st[p0 + j * k + i] = pij
            sij = l2 * st[s0 + i * k + j] + x[i] * x[j]
            st[s0 + i * k + j] = sij
            st[s0 + j * k + i] = sij
    V = lt * V + lt * e * g
    W = lt * W + 1.0
    W2 = l2 * st[I_W2] + 1.0
    st[I_V] = V
    st[I_W] = W
    st[I_W2] = W2
    st[I_N] += 1.0

    # outputs: Var(b) = sigma^2 (P S P)_bb
    neff = W * W / W2
    dof = W - k
    beta = st[th + 1]
    out[O_BETA] = beta
    out[O_NEFF] = neff
    out[O_E] = e
    out[O_Z] = z
    out[O_INTERCEPT] = st[th]
    vb = 0.0
    for i in range(k):
        acc = 0.0
        for j in range(k):
            acc += st[s0 + i * k + j] * st[p0 + j * k + 1]
        vb += st[p0 + k + i] * acc
    if dof > 0.0 and V > 0.0 and vb >= 0.0:
        s2 = V / dof
        se = np.sqrt(s2 * vb)
        tq_ = t_lookup(tq, neff - k)
        out[O_SE] = se
        out[O_LO] = beta - tq_ * se
        out[O_HI] = beta + tq_ * se
        out[O_RESID_SD] = np.sqrt(s2)
        if neff < min_neff or neff < k + 2.0:
            out[O_STATUS] = ST_WARMING_UP
        elif lowvar:
            out[O_STATUS] = ST_LOW_VARIATION
        else:
            out[O_STATUS] = ST_OK
    else:
        out[O_SE] = np.nan
        out[O_LO] = np.nan
        out[O_HI] = np.nan
        out[O_RESID_SD] = np.nan
        out[O_STATUS] = ST_WARMING_UP


@njit(cache=True, inline="always")
def step_two(st, x1, y, lam, guard, guard_lam, min_price_sd, min_neff, tq, out):
    """The same update written out for k = 2 (intercept and log price), about 4x faster.

    Equal to :func:`step_general` to rounding (tests/test_estimator_kernel.py checks 1e-9).
    """
    lowvar, lt = excitation(st, x1, lam, guard, guard_lam, min_price_sd)
    a = st[NS]
    b = st[NS + 1]
    p00 = st[NS + 2]
    p01 = st[NS + 3]
    p11 = st[NS + 5]
    s00 = st[NS + 6]
    s01 = st[NS + 7]
    s11 = st[NS + 9]
    e = y - a - b * x1
    u0 = p00 + p01 * x1
    u1 = p01 + p11 * x1
    r = u0 + u1 * x1
    q = u0 * (s00 * u0 + s01 * u1) + u1 * (s01 * u0 + s11 * u1)
    W = st[I_W]
    V = st[I_V]
    dof = W - 2.0
    if dof > 0.0 and V > 0.0:
        zsd = np.sqrt(V / dof * (1.0 + q))
        z = e / zsd
    else:
        zsd = np.nan
        z = np.nan
    st[I_E] = e
    st[I_ZSD] = zsd
    st[I_Z] = z
    inv_d = 1.0 / (lt + r)
    g = e * inv_d
    a += u0 * g
    b += u1 * g
    inv_l = 1.0 / lt
    p00 = (p00 - u0 * u0 * inv_d) * inv_l
    p01 = (p01 - u0 * u1 * inv_d) * inv_l
    p11 = (p11 - u1 * u1 * inv_d) * inv_l
    l2 = lt * lt
    s00 = l2 * s00 + 1.0
    s01 = l2 * s01 + x1
    s11 = l2 * s11 + x1 * x1
    V = lt * V + lt * e * g
    W = lt * W + 1.0
    W2 = l2 * st[I_W2] + 1.0
    st[NS] = a
    st[NS + 1] = b
    st[NS + 2] = p00
    st[NS + 3] = p01
    st[NS + 4] = p01
    st[NS + 5] = p11
    st[NS + 6] = s00
    st[NS + 7] = s01
    st[NS + 8] = s01
    st[NS + 9] = s11
    st[I_W] = W
    st[I_W2] = W2
    st[I_V] = V
    st[I_N] += 1.0
    neff = W * W / W2
    dof = W - 2.0
    out[O_BETA] = b
    out[O_NEFF] = neff
    out[O_E] = e
    out[O_Z] = z
    out[O_INTERCEPT] = a
    vb = p01 * (s00 * p01 + s01 * p11) + p11 * (s01 * p01 + s11 * p11)
    if dof > 0.0 and V > 0.0 and vb >= 0.0:
        s2 = V / dof
        se = np.sqrt(s2 * vb)
        tq_ = t_lookup(tq, neff - 2.0)
        out[O_SE] = se
        out[O_LO] = b - tq_ * se
        out[O_HI] = b + tq_ * se
        out[O_RESID_SD] = np.sqrt(s2)
        if neff < min_neff or neff < 4.0:
            out[O_STATUS] = ST_WARMING_UP
        elif lowvar:
            out[O_STATUS] = ST_LOW_VARIATION
        else:
            out[O_STATUS] = ST_OK
    else:
        out[O_SE] = np.nan
        out[O_LO] = np.nan
        out[O_HI] = np.nan
        out[O_RESID_SD] = np.nan
        out[O_STATUS] = ST_WARMING_UP


@njit(cache=True, inline="always")
def rls_step(st, x, y, k, lam, guard, guard_lam, min_price_sd, min_neff, tq, out, u):
    """One update of one series' state ``st`` in place; writes the output row ``out``.

    ``x`` is the design row, ``y = log q``; ``u`` is a scratch vector of length k (no
    allocation in the hot loop). Dispatches to the written-out k = 2 form when it applies.
    """
    if k == 2:
        step_two(st, x[1], y, lam, guard, guard_lam, min_price_sd, min_neff, tq, out)
    else:
        step_general(st, x, y, k, lam, guard, guard_lam, min_price_sd, min_neff, tq, out, u)


@njit(cache=True)
def rls_run(state, sid, X, y, lam, guard, guard_lam, min_price_sd, min_neff, tq, out):
    """Run :func:`rls_step` over rows in order; row j updates series ``sid[j]``.

    ``state`` is ``(n_series, state_size(k))``, updated in place; ``out`` is ``(n, NOUT)``.
    Rows of different series may be interleaved; each series' rows must be in time order.
    """
    k = X.shape[1]
    u = np.empty(k)
    for j in range(X.shape[0]):
        rls_step(state[sid[j]], X[j], y[j], k, lam, guard, guard_lam, min_price_sd, min_neff, tq, out[j], u)
