"""The log-log estimator's general step (any k, every band) as it was before issue 15's third
round (commit e960560), kept verbatim as the reference the faster step is checked against to
the bit.

:func:`monitor.estimators.kernel.linear_step` and its helpers in
:mod:`monitor.estimators.sandwich` and :mod:`monitor.estimators.solve` were rearranged for speed
(independent accumulations side by side instead of one long chain of dependent additions, the
products shared by a row of the moment tensors computed once); every output and state value
must stay identical. This copy (the functions renamed ``previous_*``, bodies unchanged) is what
tests/test_estimator_bits.py and benchmarks/estimator_call.py compare it with. It uses the
kernel's helpers that the general step still uses unchanged (:func:`~monitor.estimators.kernel.
excitation`, :func:`~monitor.estimators.kernel.finish`, ...).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from monitor.estimators.kernel import (BAND_CLASSIC, BAND_HAC, I_E, I_N, I_V, I_W, I_W2, I_W3,
                                       I_W4, I_XSD, I_YY, I_Z, I_ZSD, NS, diagnostics,
                                       excitation, finish, fixed_b_factor, hc_factor)
from monitor.estimators.solve import DROP_TOL


@njit(cache=True, inline="always")
def previous_zval(x, y, k, c):
    """Entry ``c`` of ``z = (x, y)``."""
    return y if c == k else x[c]


@njit(cache=True, inline="always")
def previous_update_t(st, t0, x, y, k, ncd, l2):
    """``T <- l2 T + x_a x_b z_c z_d`` over the packed pairs (``ncd = 1``: only ``S``)."""
    m = k + 1
    i = t0
    for a in range(k):
        for b in range(a, k):
            xab = x[a] * x[b]
            n = 0
            for c in range(m):
                zc = previous_zval(x, y, k, c)
                for d in range(c, m):
                    if n >= ncd:
                        break
                    st[i] = l2 * st[i] + xab * zc * previous_zval(x, y, k, d)
                    i += 1
                    n += 1


@njit(cache=True, inline="always")
def previous_update_q(st, q0, x, y, lx, ly, wl, k, ncd, l2):
    """``Q^l <- l2 Q^l + wl sym(x x_l') sym(z z_l')`` for one lag (``lx, ly``: the lagged row,
    ``wl``: its current weight)."""
    m = k + 1
    i = q0
    for a in range(k):
        for b in range(a, k):
            xab = x[a] * lx[b] + x[b] * lx[a]
            for c in range(m):
                zc = previous_zval(x, y, k, c)
                lzc = previous_zval(lx, ly, k, c)
                for d in range(c, m):
                    v = zc * previous_zval(lx, ly, k, d) + previous_zval(x, y, k, d) * lzc
                    st[i] = l2 * st[i] + wl * xab * v * 0.5
                    i += 1


@njit(cache=True, inline="always")
def previous_meat_form(st, t0, th, k, p, p0, scale):
    """``scale * p' Omega(g) p`` for the packed tensor at ``t0`` (``g = (-theta, 1)`` with
    ``theta = th[0:k]``; ``p = p[p0:p0+k]``)."""
    m = k + 1
    i = t0
    tot = 0.0
    for a in range(k):
        for b in range(a, k):
            f = p[p0 + a] * p[p0 + b]
            if a != b:
                f *= 2.0
            acc = 0.0
            for c in range(m):
                gc = 1.0 if c == k else -th[c]
                for d in range(c, m):
                    gd = 1.0 if d == k else -th[d]
                    v = gc * gd * st[i]
                    acc += v if c == d else 2.0 * v
                    i += 1
            tot += f * acc
    return scale * tot


@njit(cache=True, inline="always")
def previous_s_form(st, t0, k, ncd, p, p0):
    """``p' S p`` with ``S`` the ``cd = (0, 0)`` slice of the tensor at ``t0``."""
    i = t0
    tot = 0.0
    for a in range(k):
        for b in range(a, k):
            v = p[p0 + a] * p[p0 + b] * st[i]
            tot += v if a == b else 2.0 * v
            i += ncd
    return tot


@njit(cache=True, inline="always")
def previous_centre_vector(p, p0, ref, r0, k, out):
    """``out = M' p``: ``out_0 = p_0 + sum_{j >= 1} ref_j p_j`` (``ref = st[r0 : r0 + k - 1]``
    holds the reference of columns 1..k-1), ``out_j = p_j``."""
    s = p[p0]
    for j in range(1, k):
        s += ref[r0 + j - 1] * p[p0 + j]
        out[j] = p[p0 + j]
    out[0] = s


@njit(cache=True, inline="always")
def previous_centre_theta(th, t0, ref, r0, k, out):
    """``theta~``: ``theta~_0 = theta_0 + sum_j ref_j theta_j - y_ref``
    (``y_ref = ref[r0+k-1]``)."""
    previous_centre_vector(th, t0, ref, r0, k, out)
    out[0] -= ref[r0 + k - 1]



@njit(cache=True, inline="always")
def previous_perm(i, k):
    """Column of ``A`` at position ``i`` of the factor order ``0, 2, ..., k-1, 1``."""
    if i == 0:
        return 0
    if i == k - 1:
        return 1
    return i + 1


@njit(cache=True, inline="always")
def previous_factor(A, a0, k, L, drop):
    """Factor ``A = st[a0 : a0 + k*k]`` into ``L``; return ``(s_b, rank)``.

    ``s_b`` is the log price's pivot before the drop test (its residual sum of squares after
    the other columns, on the weight scale of ``A``); NaN when the log price column is empty.
    """
    rank = 0
    s_b = np.nan
    for jj in range(k):
        j = previous_perm(jj, k)
        ajj = A[a0 + j * k + j]
        s = ajj
        for p in range(jj):
            s -= L[jj * k + p] * L[jj * k + p]
        if jj == k - 1:
            s_b = s if ajj > 0.0 else np.nan
        if not (ajj > 0.0) or s <= DROP_TOL * ajj:
            drop[jj] = 1.0
            for ii in range(jj, k):
                L[ii * k + jj] = 0.0
            continue
        drop[jj] = 0.0
        rank += 1
        d = np.sqrt(s)
        L[jj * k + jj] = d
        for ii in range(jj + 1, k):
            i = previous_perm(ii, k)
            t = A[a0 + i * k + j]
            for p in range(jj):
                t -= L[ii * k + p] * L[jj * k + p]
            L[ii * k + jj] = t / d
    return s_b, rank


@njit(cache=True, inline="always")
def previous_solve(L, drop, k, rhs, r0, out, o0, tmp):
    """``out[o0:o0+k] = A^- rhs[r0:r0+k]`` with the factor of :func:`factor` (dropped columns
    get 0). ``rhs`` and ``out`` are in the original column order; they may not overlap."""
    for jj in range(k):
        if drop[jj] != 0.0:
            tmp[jj] = 0.0
            continue
        t = rhs[r0 + previous_perm(jj, k)]
        for p in range(jj):
            t -= L[jj * k + p] * tmp[p]
        tmp[jj] = t / L[jj * k + jj]
    for jj in range(k - 1, -1, -1):
        if drop[jj] != 0.0:
            tmp[jj] = 0.0
            continue
        t = tmp[jj]
        for p in range(jj + 1, k):
            t -= L[p * k + jj] * tmp[p]
        tmp[jj] = t / L[jj * k + jj]
    for jj in range(k):
        out[o0 + previous_perm(jj, k)] = tmp[jj]


@njit(cache=True, inline="always")
def previous_price_column(L, drop, k, out, o0):
    """``out[o0:o0+k] = A^{-1} e_b``, the log-price column of the inverse (``e_b`` is the unit
    vector of column 1); zero when the log price is dropped. Its entry 1 is ``1 / s_b``."""
    for i in range(k):
        out[o0 + i] = 0.0
    if drop[k - 1] != 0.0:
        return
    # forward solve of L t = e (e is the last unit vector in factor order): t = e / L_kk
    # backward solve of L' v = t
    last = k - 1
    v_last = 1.0 / (L[last * k + last] * L[last * k + last])
    out[o0 + 1] = v_last
    # remaining components v_jj = -(sum_{p > jj} L[p, jj] v_p) / L[jj, jj], stored by perm;
    # reuse out as the permuted store through perm
    for jj in range(k - 2, -1, -1):
        if drop[jj] != 0.0:
            continue
        t = 0.0
        for p in range(jj + 1, k):
            if drop[p] == 0.0:
                t -= L[p * k + jj] * out[o0 + previous_perm(p, k)]
        out[o0 + previous_perm(jj, k)] = t / L[jj * k + jj]



@njit(cache=True, inline="always")
def previous_linear_step(st, x, y, k, band, lags, lam, guard, guard_lam, min_price_sd, min_neff,
                         tq, out, w):
    """The update for any k and band; ``w`` is scratch of length :func:`work_size`."""
    raw_low, lt = excitation(st, x[1], lam, guard, guard_lam, min_price_sd)
    th = NS
    a0 = NS + k
    c0 = a0 + k * k
    r0 = c0 + k
    t0 = r0 + k
    nab = k * (k + 1) // 2
    ncd = 1 if band == BAND_CLASSIC else (k + 1) * (k + 2) // 2
    L = w
    drop = w[k * k:k * k + k]
    tmp = w[k * k + k:k * k + 2 * k]
    u = w[k * k + 2 * k:k * k + 3 * k]
    pc = w[k * k + 3 * k:k * k + 4 * k]
    xc = w[k * k + 4 * k:k * k + 5 * k]
    thc = w[k * k + 5 * k:k * k + 6 * k]
    pt = w[k * k + 6 * k:k * k + 7 * k]
    if st[I_N] == 0.0:
        for j in range(1, k):
            st[r0 + j - 1] = x[j]
        st[r0 + k - 1] = y
    xc[0] = x[0]
    for j in range(1, k):
        xc[j] = x[j] - st[r0 + j - 1]
    yc = y - st[r0 + k - 1]
    yhat = 0.0
    for i in range(k):
        yhat += st[th + i] * x[i]
    e = y - yhat
    # classic predictive variance from the previous state
    W = st[I_W]
    V = st[I_V]
    _, rank0 = previous_factor(st, a0, k, L, drop)
    z = np.nan
    zsd = np.nan
    if rank0 == k:
        previous_solve(L, drop, k, x, 0, u, 0, tmp)
        previous_centre_vector(u, 0, st, r0, k, pt)
        q = previous_s_form(st, t0, k, ncd, pt, 0)
        dof = W - k
        if dof > 0.0 and V > 0.0:
            zsd = np.sqrt(V / dof * (1.0 + q))
            z = e / zsd
    st[I_E] = e
    st[I_ZSD] = zsd
    st[I_Z] = z
    # update the sums
    for i in range(k):
        for j in range(i, k):
            v = lt * st[a0 + i * k + j] + x[i] * x[j]
            st[a0 + i * k + j] = v
            st[a0 + j * k + i] = v
        st[c0 + i] = lt * st[c0 + i] + x[i] * y
    YY = lt * st[I_YY] + y * y
    st[I_YY] = YY
    W = lt * W + 1.0
    l2 = lt * lt
    W2 = l2 * st[I_W2] + 1.0
    W3 = l2 * lt * st[I_W3] + 1.0
    W4 = l2 * l2 * st[I_W4] + 1.0
    st[I_W] = W
    st[I_W2] = W2
    st[I_W3] = W3
    st[I_W4] = W4
    st[I_N] += 1.0
    sb, rank = previous_factor(st, a0, k, L, drop)
    previous_solve(L, drop, k, st, c0, st, th, tmp)
    V = YY
    r = y
    for i in range(k):
        V -= st[th + i] * st[c0 + i]
        r -= st[th + i] * x[i]
    if V < 0.0:
        V = 0.0
    st[I_V] = V
    xsd = np.sqrt(sb / W) if sb > 0.0 else 0.0
    st[I_XSD] = xsd
    diagnostics(st, r, lt)
    # meat sums
    previous_update_t(st, t0, xc, yc, k, ncd, l2)
    if band == BAND_HAC:
        size = nab * ncd
        q0 = t0 + size
        g0 = q0 + lags * size
        rw = k + 2
        for l in range(lags):
            ro = g0 + l * rw
            wl = st[ro + k + 1] * lt
            st[ro + k + 1] = wl
            previous_update_q(st, q0 + l * size, xc, yc, st[ro:ro + k], st[ro + k], wl, k, ncd, l2)
        for l in range(lags - 1, 0, -1):
            ro = g0 + l * rw
            for i in range(rw):
                st[ro + i] = st[ro - rw + i]
        if lags > 0:
            for i in range(k):
                st[g0 + i] = xc[i]
            st[g0 + k] = yc
            st[g0 + k + 1] = 1.0
    neff = W * W / W2
    identified = drop[k - 1] == 0.0
    vb = np.nan
    if identified:
        previous_price_column(L, drop, k, pc, 0)
        previous_centre_vector(pc, 0, st, r0, k, pt)
        if band == BAND_CLASSIC:
            vb = previous_s_form(st, t0, k, ncd, pt, 0)
            if W > rank:
                vb *= V / (W - rank)
        else:
            previous_centre_theta(st, th, st, r0, k, thc)
            vb = previous_meat_form(st, t0, thc, k, pt, 0, 1.0)
            if band == BAND_HAC:
                size = nab * ncd
                for l in range(lags):
                    vb += previous_meat_form(st, t0 + (l + 1) * size, thc, k, pt, 0,
                                    1.0 - (l + 1.0) / (lags + 1.0))
            vb *= hc_factor(W, W2, W3, rank)
    qmult = 1.0
    if band == BAND_HAC:
        qmult = fixed_b_factor(lags, W2 * W2 / W4)
    finish(st, out, st[th + 1], st[th], identified, vb, V, float(rank), k, neff,
           raw_low or xsd < min_price_sd, band, e, z, min_neff, tq, y, qmult)


@njit(cache=True, _nrt=False)
def previous_rls_run_general(state, sid, X, y, band, lags, lam, guard, guard_lam, min_price_sd,
                             min_neff, tq, out, w):
    """The batch loop of the general step as it was (``w``: scratch of the old work size,
    ``k * k + 8 * k``)."""
    k = X.shape[1]
    for j in range(X.shape[0]):
        previous_linear_step(state[sid[j]], X[j], y[j], k, band, lags, lam, guard, guard_lam,
                             min_price_sd, min_neff, tq, out[j], w)
