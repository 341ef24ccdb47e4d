"""Compiled steps of the fast/slow slope signal and its state layout (:data:`SLOPE_SIZE` floats
per series, slots ``G_*``); the Python classes are in :mod:`monitor.detectors.slope`, the
pipeline (:mod:`monitor.pipeline.kernel`) and the threshold design
(:mod:`monitor.detectors.design`) call the same functions."""

from __future__ import annotations

import numpy as np
from numba import njit

from monitor.estimators import kernel as K
from monitor.estimators.tquantile import t_lookup


(G_WF, G_W2F, G_MXF, G_MYF, G_SXXF, G_SXYF, G_BFF, G_WS, G_MXS, G_SXXS, G_BSS, G_BFS,
 G_BF, G_D, G_N, G_MYS, G_SXYS, G_SIGMA) = range(18)


SLOPE_SIZE = 18


DEFAULT_FAST = 0.95


DEFAULT_REFERENCE = 0.998


@njit(cache=True, inline="always")
def slope_step(g, at, x, y, sigma, paused, lf, ls):
    """Update the fast and reference sums in ``g[at:]`` with ``x = log p``, ``y = y*`` and
    return ``d`` (NaN while it is undefined). ``sigma`` is the estimator's residual sd after its
    own update, ``paused`` is 1 when its forgetting was paused at this step, ``lf`` / ``ls``
    the fast and reference forgetting factors. The fast estimate's interval is computed only
    when asked (:func:`fast_interval`): it is needed for messages, not at every step."""
    if paused != 0.0:
        lf = 1.0
        ls = 1.0
    w = lf * g[at + G_WF] + 1.0
    iw = 1.0 / w
    g[at + G_WF] = w
    g[at + G_W2F] = lf * lf * g[at + G_W2F] + 1.0
    dx = x - g[at + G_MXF]
    mxf = g[at + G_MXF] + dx * iw
    g[at + G_MXF] = mxf
    myf = g[at + G_MYF] + (y - g[at + G_MYF]) * iw
    g[at + G_MYF] = myf
    cf = x - mxf
    sxf = lf * g[at + G_SXXF] + dx * cf
    g[at + G_SXXF] = sxf
    sxyf = lf * g[at + G_SXYF] + dx * (y - myf)
    g[at + G_SXYF] = sxyf
    ws = ls * g[at + G_WS] + 1.0
    iws = 1.0 / ws
    g[at + G_WS] = ws
    dxs = x - g[at + G_MXS]
    mxs = g[at + G_MXS] + dxs * iws
    g[at + G_MXS] = mxs
    mys = g[at + G_MYS] + (y - g[at + G_MYS]) * iws
    g[at + G_MYS] = mys
    cs = x - mxs
    sxs = ls * g[at + G_SXXS] + dxs * cs
    g[at + G_SXXS] = sxs
    sxys = ls * g[at + G_SXYS] + dxs * (y - mys)
    g[at + G_SXYS] = sxys
    bff = lf * lf * g[at + G_BFF] + cf * cf
    g[at + G_BFF] = bff
    bss = ls * ls * g[at + G_BSS] + cs * cs
    g[at + G_BSS] = bss
    bfs = lf * ls * g[at + G_BFS] + cf * cs
    g[at + G_BFS] = bfs
    nn = g[at + G_N] + 1.0
    g[at + G_N] = nn
    d = np.nan
    bf = np.nan
    if sxf > 0.0 and sxs > 0.0 and nn >= 3.0:
        i_f = 1.0 / sxf
        i_s = 1.0 / sxs
        bf = sxyf * i_f
        vd = (bff * i_f - 2.0 * bfs * i_s) * i_f + bss * i_s * i_s
        if vd > 0.0 and sigma > 0.0:
            d = (bf - sxys * i_s) / (sigma * np.sqrt(vd))
    g[at + G_BF] = bf
    g[at + G_D] = d
    return d


@njit(cache=True, inline="always")
def fast_interval(g, at, sigma, tq):
    """``(se_f, lo_f, hi_f)`` of the fast slope: ``se_f = sigma sqrt(B_ff) / Sxx_f`` and a
    Student-t interval with the fast window's Kish n_eff - 2 degrees of freedom."""
    bf = g[at + G_BF]
    if not (bf == bf) or not (sigma > 0.0):
        return np.nan, np.nan, np.nan
    se = sigma * np.sqrt(g[at + G_BFF]) / g[at + G_SXXF]
    q = t_lookup(tq, g[at + G_WF] * g[at + G_WF] / g[at + G_W2F] - 2.0)
    return se, bf - q * se, bf + q * se


@njit(cache=True, inline="always")
def reanchor(g, at):
    """Make the reference equal to the fast regression (after an alarm): the sums of the
    reference take the fast values, and the cross sum ``B_fr`` becomes ``B_ff`` (identical
    weights so far), so ``d`` restarts from 0 with a correct variance."""
    g[at + G_WS] = g[at + G_WF]
    g[at + G_MXS] = g[at + G_MXF]
    g[at + G_MYS] = g[at + G_MYF]
    g[at + G_SXXS] = g[at + G_SXXF]
    g[at + G_SXYS] = g[at + G_SXYF]
    g[at + G_BSS] = g[at + G_BFF]
    g[at + G_BFS] = g[at + G_BFF]


@njit(cache=True, inline="always")
def adjusted_response(st, x, y, k):
    """``y* = y - sum_{i >= 2} theta_i x_i``: log q with the controls' effects (the
    estimator's current coefficients) removed, so the fast and reference regressions need only
    an intercept and the log price."""
    ys = y
    for i in range(2, k):
        ys -= st[K.NS + i] * x[i]
    return ys
