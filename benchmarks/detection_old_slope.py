"""The slope chart as it was before issue 12, kept for the detection benchmark only.

A faithful copy of elmon's ``elasticity_change`` path at commit 4b04b35 (2026-12, before issue
12 replaced it): the fast-minus-reference slope statistic ``d_t``
(``monitor/detectors/slope.py``: ``slope_step``, ``reanchor``, ``adjusted_response``), a
two-sided tabular CUSUM on ``d_t`` with ``k = 1``, burn-in 50 and the threshold designed then for
the estimator's default forgetting 0.99 (``monitor/detectors/cusum.py``: ``cusum_step``;
thresholds from ``Pipeline.designs`` at that commit), fed only on *informative* rows (status
``ok``, forgetting not paused), with the reference re-anchored on the fast regression after
every alarm, and the impulse alert policy of ``monitor/rules.py`` (``rule_step``: one open
alert per series; it clears after 200 quiet informative observations; cooldown 50). The
estimator step is elmon's own (:mod:`monitor.estimators.kernel`, unchanged by issue 12).

On the rows of the "before" run (commit 4b04b35) this copy opened ``elasticity_change`` at
exactly the rows the pipeline did (checked by :func:`check_against_pipeline` while that
pipeline existed; the result is in the commit message of this file).

Statistic (from the old module docstring): two exponentially weighted regressions of
``y* = log q - c'z`` on ``x = log p`` with an intercept, fast (forgetting 0.95, about 39
observations) and reference (0.998, about 1,000);
``d_t = (b_f - b_r) / (sigma sqrt(B_ff / Sxx_f^2 + B_rr / Sxx_r^2 - 2 B_fr / (Sxx_f Sxx_r)))``.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from monitor.estimators import kernel as K

#: thresholds h of the old slope CUSUM (k = 1) designed at commit 4b04b35 for forgetting 0.99,
#: fast 0.95, reference 0.998: ARL0 20,000 from its precomputed design table (2,000 paths),
#: ARL0 2,000 by its simulation design (400 paths, seed 0)
OLD_H = {20000.0: 84.6198, 2000.0: 45.32145756765798}
OLD_K, OLD_BURN, FAST, REFERENCE = 1.0, 50, 0.95, 0.998
CLEAR_AFTER, COOLDOWN = 200, 50

(G_WF, G_W2F, G_MXF, G_MYF, G_SXXF, G_SXYF, G_BFF, G_WS, G_MXS, G_SXXS, G_BSS, G_BFS,
 G_BF, G_D, G_N, G_MYS, G_SXYS, G_SIGMA) = range(18)
SLOPE_SIZE = 18
C_UP, C_DN, C_SEEN = 0, 1, 2
R_OPEN, R_QUIET, R_LAST_CLEAR, R_CLEARS = 0, 1, 2, 3
OLD_SIZE = SLOPE_SIZE + 3 + 4


@njit(cache=True)
def _slope_step(g, x, y, sigma, paused, lf, ls):
    # verbatim from monitor/detectors/slope.py at 4b04b35 (offset at = 0)
    if paused != 0.0:
        lf = 1.0
        ls = 1.0
    w = lf * g[G_WF] + 1.0
    iw = 1.0 / w
    g[G_WF] = w
    g[G_W2F] = lf * lf * g[G_W2F] + 1.0
    dx = x - g[G_MXF]
    mxf = g[G_MXF] + dx * iw
    g[G_MXF] = mxf
    myf = g[G_MYF] + (y - g[G_MYF]) * iw
    g[G_MYF] = myf
    cf = x - mxf
    sxf = lf * g[G_SXXF] + dx * cf
    g[G_SXXF] = sxf
    sxyf = lf * g[G_SXYF] + dx * (y - myf)
    g[G_SXYF] = sxyf
    ws = ls * g[G_WS] + 1.0
    iws = 1.0 / ws
    g[G_WS] = ws
    dxs = x - g[G_MXS]
    mxs = g[G_MXS] + dxs * iws
    g[G_MXS] = mxs
    mys = g[G_MYS] + (y - g[G_MYS]) * iws
    g[G_MYS] = mys
    cs = x - mxs
    sxs = ls * g[G_SXXS] + dxs * cs
    g[G_SXXS] = sxs
    sxys = ls * g[G_SXYS] + dxs * (y - mys)
    g[G_SXYS] = sxys
    bff = lf * lf * g[G_BFF] + cf * cf
    g[G_BFF] = bff
    bss = ls * ls * g[G_BSS] + cs * cs
    g[G_BSS] = bss
    bfs = lf * ls * g[G_BFS] + cf * cs
    g[G_BFS] = bfs
    nn = g[G_N] + 1.0
    g[G_N] = nn
    d = np.nan
    bf = np.nan
    if sxf > 0.0 and sxs > 0.0 and nn >= 3.0:
        i_f = 1.0 / sxf
        i_s = 1.0 / sxs
        bf = sxyf * i_f
        vd = (bff * i_f - 2.0 * bfs * i_s) * i_f + bss * i_s * i_s
        if vd > 0.0 and sigma > 0.0:
            d = (bf - sxys * i_s) / (sigma * np.sqrt(vd))
    g[G_BF] = bf
    g[G_D] = d
    return d


@njit(cache=True)
def _reanchor(g):
    g[G_WS] = g[G_WF]
    g[G_MXS] = g[G_MXF]
    g[G_MYS] = g[G_MYF]
    g[G_SXXS] = g[G_SXXF]
    g[G_SXYS] = g[G_SXYF]
    g[G_BSS] = g[G_BFF]
    g[G_BFS] = g[G_BFF]


@njit(cache=True, inline="always")
def _after_step(st, g, o, xj, yj, k, h, kk, burn, clear_after, cooldown):
    """The old chart and alert policy after the estimator's step on one row; returns 1 when an
    ``elasticity_change`` alert opens."""
    stat = o[K.O_STATUS]
    ys = yj
    for i in range(2, k):
        ys -= st[K.NS + i] * xj[i]
    paused = st[K.I_PAUSED]
    d = _slope_step(g, xj[1], ys, o[K.O_RESID_SD], paused, FAST, REFERENCE)
    inf = stat == K.ST_OK and paused == 0.0
    alarm = False
    c = SLOPE_SIZE
    if inf and d == d:
        g[c + C_SEEN] += 1.0
        if g[c + C_SEEN] > burn:
            up = max(g[c + C_UP] + d - kk, 0.0)
            dn = max(g[c + C_DN] - d - kk, 0.0)
            if up > h or dn > h:
                alarm = True
                up = 0.0
                dn = 0.0
            g[c + C_UP] = up
            g[c + C_DN] = dn
    r = SLOPE_SIZE + 3
    n = st[K.I_N]
    opened = 0
    if g[r + R_OPEN] != 0.0:
        if alarm:
            g[r + R_QUIET] = 0.0
        elif inf:
            g[r + R_QUIET] += 1.0
        if g[r + R_QUIET] >= clear_after:
            g[r + R_OPEN] = 0.0
            g[r + R_LAST_CLEAR] = n
            g[r + R_CLEARS] += 1.0
    elif alarm and inf and not (g[r + R_CLEARS] > 0.0 and n - g[r + R_LAST_CLEAR] <= cooldown):
        g[r + R_OPEN] = 1.0
        g[r + R_QUIET] = 0.0
        opened = 1
    if alarm:
        _reanchor(g)
    return opened


@njit(cache=True)
def _run_v1(est, old, sid, X, y, lam, guard, guard_lam, mps, mneff, tq, h, kk, burn,
            clear_after, cooldown, opened, z):
    """Rows in order with the estimator step of 4b04b35 (``step_two`` / ``step_general``);
    ``opened[j] = 1`` where an alert opened, ``z[j]`` the standardized innovation."""
    k = X.shape[1]
    o = np.empty(K.NOUT)
    u = np.empty(k)
    for j in range(X.shape[0]):
        st = est[sid[j]]
        if k == 2:
            K.step_two(st, X[j, 1], y[j], lam, guard, guard_lam, mps, mneff, tq, o)
        else:
            K.step_general(st, X[j], y[j], k, lam, guard, guard_lam, mps, mneff, tq, o, u)
        z[j] = o[K.O_Z] if o[K.O_STATUS] != K.ST_WARMING_UP else np.nan
        opened[j] = _after_step(st, old[sid[j]], o, X[j], y[j], k, h, kk, burn, clear_after,
                                cooldown)


@njit(cache=True)
def _run_v2(est, old, sid, X, y, band, lags, lam, guard, guard_lam, mps, mneff, tq, h, kk,
            burn, clear_after, cooldown, opened, z, w):
    """The same with the estimator step of later commits (``rls_step`` with bands); ``w`` is
    its scratch vector, sized by the tree's ``work_size``."""
    k = X.shape[1]
    o = np.empty(K.NOUT)
    for j in range(X.shape[0]):
        st = est[sid[j]]
        K.rls_step(st, X[j], y[j], k, band, lags, lam, guard, guard_lam, mps, mneff, tq, o, w)
        z[j] = o[K.O_Z] if o[K.O_STATUS] != K.ST_WARMING_UP else np.nan
        opened[j] = _after_step(st, old[sid[j]], o, X[j], y[j], k, h, kk, burn, clear_after,
                                cooldown)


def run_old_slope(est, sid, X, y, n_series: int, arl0: float) -> tuple[np.ndarray, np.ndarray]:
    """``(opened, z)`` of the old slope chart over rows in arrival order (fresh states).

    ``est`` is an :class:`~monitor.estimators.ElasticityRLS` prototype (its forgetting must be
    the default 0.99 the thresholds in :data:`OLD_H` were designed for).
    """
    from monitor.estimators.batch import initial_states

    if float(arl0) not in OLD_H:
        raise ValueError(f"arl0 = {arl0}: the old thresholds are known for {sorted(OLD_H)}")
    if est.forgetting != 0.99:
        raise ValueError(f"forgetting = {est.forgetting}: the old thresholds are for 0.99")
    X = np.ascontiguousarray(X, dtype=np.float64)
    st = initial_states(est, n_series)
    old = np.zeros((n_series, OLD_SIZE))
    opened = np.zeros(X.shape[0], dtype=np.int8)
    z = np.empty(X.shape[0])
    args = tuple(est.kernel_args)
    # the estimator's kernel arguments grew (band, lags) after 4b04b35; the old chart sits on
    # whichever estimator step the tree has (classic band: the one it was designed with)
    run = _run_v1 if len(args) == 6 else _run_v2
    extra = ()
    if run is _run_v2:
        # the general step's scratch grew in issue 15's third round (5 December 2026): a fixed
        # size written here overran it with controls (k = 3) and corrupted memory
        k = X.shape[1]
        size = K.work_size(k) if hasattr(K, "work_size") else k * k + 8 * k + 64
        extra = (np.empty(max(size, k * k + 8 * k + 64)),)
    run(st, old, np.ascontiguousarray(sid, dtype=np.int64), X,
        np.ascontiguousarray(y, dtype=np.float64), *args, OLD_H[float(arl0)], OLD_K,
        float(OLD_BURN), float(CLEAR_AFTER), float(COOLDOWN), opened, z, *extra)
    return opened, z


def check_against_pipeline(pipe, est, sid, X, y, n_series: int, arl0: float) -> tuple[int, int]:
    """``(rows where both opened, rows where only one did)``: this copy against a pipeline
    that still has the old slope chart (for the record; not used once it is gone)."""
    opened, _ = run_old_slope(est, sid, X, y, n_series, arl0)
    ev = pipe.run(sid, X, y, n_series=n_series).events
    rows = set(ev.loc[(ev["kind"] == "elasticity_change") & (ev["action"] == "open"), "row"])
    mine = set(np.flatnonzero(opened).tolist())
    return len(rows & mine), len(rows ^ mine)
