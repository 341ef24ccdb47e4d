"""Full coefficient covariance of the log-log estimator from its state, for each band kind.

The compiled step reports only the elasticity's variance (one quadratic form per observation);
:func:`coefficient_covariance` gives the whole matrix from the same sums, in numpy, for
:meth:`monitor.estimators.ElasticityRLS.covariance` and for reports. Formulas: see
:mod:`monitor.estimators.kernel` and :mod:`monitor.estimators.sandwich`.
"""

from __future__ import annotations

import math

import numpy as np

from monitor.estimators import kernel as K


def _unpack(flat: np.ndarray, k: int, ncd: int) -> np.ndarray:
    """Packed ``(a <= b, c <= d)`` tensor as a dense ``(k, k, ncd)`` array (cd still packed)."""
    out = np.zeros((k, k, ncd))
    i = 0
    for a in range(k):
        for b in range(a, k):
            out[a, b] = out[b, a] = flat[i:i + ncd]
            i += ncd
    return out


def _form(tensor: np.ndarray, g: np.ndarray) -> np.ndarray:
    """``Omega_ab = sum_{c <= d} mult g_c g_d T_{ab,cd}`` (mult 2 off the diagonal)."""
    m = g.size
    gg = []
    for c in range(m):
        for d in range(c, m):
            gg.append(g[c] * g[d] * (1.0 if c == d else 2.0))
    return tensor @ np.array(gg)


def coefficient_covariance(st: np.ndarray, k: int, band: int, lags: int) -> np.ndarray:
    """``Var(theta)`` under ``band`` (NaN matrix while the fit is not identified)."""
    nan = np.full((k, k), math.nan)
    A = st[K.NS + k:K.NS + k + k * k].reshape(k, k)
    try:
        P = np.linalg.inv(A)
    except np.linalg.LinAlgError:
        return nan
    W, W2 = st[K.I_W], st[K.I_W2]
    if not (W > k and W2 > 0):
        return nan
    theta = st[K.NS:K.NS + k]
    r0 = K.NS + 2 * k + k * k
    ref = st[r0:r0 + k]
    t0 = r0 + k
    # centred coordinates (monitor.estimators.sandwich): x = M x~, P~ = M' P M
    M = np.eye(k)
    M[1:, 0] = ref[:k - 1]
    P = M.T @ P
    nab, ncd = K.n_ab(k), K.n_cd(k, band)
    T = _unpack(st[t0:t0 + nab * ncd], k, ncd)
    if band == K.BAND_CLASSIC:
        return st[K.I_V] / (W - k) * (P.T @ T[:, :, 0] @ P)
    thc = M.T @ theta
    thc[0] -= ref[k - 1]
    g = np.r_[-thc, 1.0]
    meat = _form(T, g)
    if band == K.BAND_HAC:
        for lag in range(1, lags + 1):
            q0 = t0 + lag * nab * ncd
            meat = meat + (1.0 - lag / (lags + 1.0)) * _form(
                _unpack(st[q0:q0 + nab * ncd], k, ncd), g)
    factor = W2 / (W2 - k * st[K.I_W3] / W)
    return factor * (P.T @ meat @ P)
