"""Compiled solves with the information matrix ``A = sum_s w_s x_s x_s'`` of a design.

The estimators keep the (exponentially weighted) information matrix ``A`` rather than its
inverse, so the least-squares solution is exact at every step (no error carried from step to
step) and a singular ``A`` (too few observations, a price held constant, a control that has not
varied yet, a price the controls explain) is handled by leaving the unidentified columns out.

:func:`factor` computes a Cholesky factor ``L L' = A`` with the columns in the order
``0, 2, 3, ..., k-1, 1``: the intercept, the controls, and the log price last. A column whose
pivot ``s_j`` (the weighted residual sum of squares of that column regressed on the columns
before it) is at most ``DROP_TOL * A_jj`` (i.e. ``1 - R^2_j <= 1e-10``) is dependent: it is
dropped (its row and column of ``L`` are zero) and its coefficient is reported as 0 by
:func:`solve`. Because the log price comes last, its pivot is the residual variation of log
price after the intercept and the controls (Frisch & Waugh 1933; Lovell 1963):

    s_b = A_bb - A_bo A_oo^- A_ob = 1 / (A^{-1})_bb                (when A is nonsingular)

which is what identification of the elasticity rests on.

The scratch ``L`` is a flat ``k * k`` vector (row-major, permuted order), ``drop`` a length-k
vector of 0/1 flags and ``tmp`` a length-k vector; nothing is allocated.
"""

from __future__ import annotations

import numpy as np
from numba import njit

#: a column is dependent when 1 - R^2 of it on the columns before it is at most this
DROP_TOL = 1e-10


@njit(cache=True, inline="always")
def perm(i, k):
    """Column of ``A`` at position ``i`` of the factor order ``0, 2, ..., k-1, 1``."""
    if i == 0:
        return 0
    if i == k - 1:
        return 1
    return i + 1


@njit(cache=True, inline="always")
def factor_column(A, a0, k, L, drop, jj):
    """Column ``jj`` (factor order) of :func:`factor`; return ``(s, a_jj, kept)``: the pivot
    before the drop test, the diagonal entry of ``A`` and whether the column is kept."""
    j = perm(jj, k)
    ajj = A[a0 + j * k + j]
    s = ajj
    for p in range(jj):
        s -= L[jj * k + p] * L[jj * k + p]
    if not (ajj > 0.0) or s <= DROP_TOL * ajj:
        drop[jj] = 1.0
        for ii in range(jj, k):
            L[ii * k + jj] = 0.0
        return s, ajj, False
    drop[jj] = 0.0
    d = np.sqrt(s)
    L[jj * k + jj] = d
    for ii in range(jj + 1, k):
        i = perm(ii, k)
        t = A[a0 + i * k + j]
        for p in range(jj):
            t -= L[ii * k + p] * L[jj * k + p]
        L[ii * k + jj] = t / d
    return s, ajj, True


@njit(cache=True, inline="always")
def factor(A, a0, k, L, drop):
    """Factor ``A = st[a0 : a0 + k*k]`` into ``L``; return ``(s_b, rank)``.

    ``s_b`` is the log price's pivot before the drop test (its residual sum of squares after
    the other columns, on the weight scale of ``A``); NaN when the log price column is empty.
    """
    rank = 0
    s_b = np.nan
    for jj in range(k):
        s, ajj, kept = factor_column(A, a0, k, L, drop, jj)
        if jj == k - 1:
            s_b = s if ajj > 0.0 else np.nan
        if kept:
            rank += 1
    return s_b, rank


@njit(cache=True, inline="always")
def factor_pair(A, a0, L, drop, B, b0, M, dropm, k):
    """:func:`factor` of ``A`` (into ``L``, ``drop``) and of ``B`` (into ``M``, ``dropm``) at
    once, column by column: the two factorizations are independent chains of square roots and
    divisions, so written side by side the processor overlaps them. Each is the same to the
    bit as :func:`factor` alone. Returns ``(s_b, rank)`` of ``A``, then of ``B``."""
    rank_a = 0
    rank_b = 0
    sa = np.nan
    sb = np.nan
    for jj in range(k):
        s1, a1, kept1 = factor_column(A, a0, k, L, drop, jj)
        s2, a2, kept2 = factor_column(B, b0, k, M, dropm, jj)
        if jj == k - 1:
            sa = s1 if a1 > 0.0 else np.nan
            sb = s2 if a2 > 0.0 else np.nan
        if kept1:
            rank_a += 1
        if kept2:
            rank_b += 1
    return sa, rank_a, sb, rank_b


@njit(cache=True, inline="always")
def forward_row(L, drop, k, rhs, r0, tmp, jj):
    """Row ``jj`` of the forward substitution ``L t = P rhs`` of :func:`solve`."""
    if drop[jj] != 0.0:
        tmp[jj] = 0.0
        return
    t = rhs[r0 + perm(jj, k)]
    for p in range(jj):
        t -= L[jj * k + p] * tmp[p]
    tmp[jj] = t / L[jj * k + jj]


@njit(cache=True, inline="always")
def back_row(L, drop, k, tmp, jj):
    """Row ``jj`` of the backward substitution ``L' v = t`` of :func:`solve` (in place)."""
    if drop[jj] != 0.0:
        tmp[jj] = 0.0
        return
    t = tmp[jj]
    for p in range(jj + 1, k):
        t -= L[p * k + jj] * tmp[p]
    tmp[jj] = t / L[jj * k + jj]


@njit(cache=True, inline="always")
def solve(L, drop, k, rhs, r0, out, o0, tmp):
    """``out[o0:o0+k] = A^- rhs[r0:r0+k]`` with the factor of :func:`factor` (dropped columns
    get 0). ``rhs`` and ``out`` are in the original column order; they may not overlap."""
    for jj in range(k):
        forward_row(L, drop, k, rhs, r0, tmp, jj)
    for jj in range(k - 1, -1, -1):
        back_row(L, drop, k, tmp, jj)
    for jj in range(k):
        out[o0 + perm(jj, k)] = tmp[jj]


@njit(cache=True, inline="always")
def solve_pair(L, drop, rhs, r0, out, o0, tmp, M, dropm, rhs2, r2, out2, o2, tmp2, k):
    """:func:`solve` with ``L`` and with ``M`` at once, row by row (two independent chains the
    processor overlaps); each the same to the bit as :func:`solve` alone."""
    for jj in range(k):
        forward_row(L, drop, k, rhs, r0, tmp, jj)
        forward_row(M, dropm, k, rhs2, r2, tmp2, jj)
    for jj in range(k - 1, -1, -1):
        back_row(L, drop, k, tmp, jj)
        back_row(M, dropm, k, tmp2, jj)
    for jj in range(k):
        out[o0 + perm(jj, k)] = tmp[jj]
        out2[o2 + perm(jj, k)] = tmp2[jj]


@njit(cache=True, inline="always")
def price_column(L, drop, k, out, o0):
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
                t -= L[p * k + jj] * out[o0 + perm(p, k)]
        out[o0 + perm(jj, k)] = t / L[jj * k + jj]
