"""Packed weighted moments and small dense solves for the IV and price-feedback kernels.

A symmetric n x n matrix is stored as its packed upper triangle (``packed_index``). The robust
sandwich needs the fourth moments ``Q[a, b, p, q] = sum w^2 g_a g_b z_p z_q`` of a vector ``g``
(response, regressors, instruments) and the instruments ``z``; the meat for any residual
``e = c' g`` is then the exact quadratic form ``sum_{a,b} c_a c_b Q[a, b]`` (:func:`meat`), so
the variance uses the current coefficients, not the residuals of earlier steps (White 1980).
Everything here is compiled, allocates nothing and works on flat row-major arrays.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, inline="always")
def packed_index(a, b, n):
    """Index of (a, b), a <= b, in the packed upper triangle of an n x n matrix."""
    return a * (2 * n - a - 1) // 2 + b


@njit(cache=True)
def chol(A, L, n):
    """Cholesky factor L (lower, row-major n x n) of A; False when A is not positive definite
    to working precision (a pivot below 1e-13 of its diagonal entry)."""
    for i in range(n):
        for j in range(i + 1):
            s = A[i * n + j]
            for t in range(j):
                s -= L[i * n + t] * L[j * n + t]
            if i == j:
                if not (s > 1e-13 * A[i * n + i]) or not (A[i * n + i] > 0.0):
                    return False
                L[i * n + i] = np.sqrt(s)
            else:
                L[i * n + j] = s / L[j * n + j]
        for j in range(i + 1, n):
            L[i * n + j] = 0.0
    return True


@njit(cache=True)
def chol_inv(L, Ainv, n):
    """Inverse of A = L L' from its Cholesky factor (row-major n x n, symmetric result)."""
    for c in range(n):
        # solve L y = e_c, then L' x = y; column c of the inverse
        for i in range(n):
            s = 1.0 if i == c else 0.0
            for t in range(i):
                s -= L[i * n + t] * Ainv[t * n + c]
            Ainv[i * n + c] = s / L[i * n + i]
        for i in range(n - 1, -1, -1):
            s = Ainv[i * n + c]
            for t in range(i + 1, n):
                s -= L[t * n + i] * Ainv[t * n + c]
            Ainv[i * n + c] = s / L[i * n + i]


@njit(cache=True)
def meat(st, o_q, c, ng, m, nz2, M):
    """``M = sum_{a,b} c_a c_b Q[a, b]`` (m x m): the weighted sum of (c'g)^2 z z'."""
    for i in range(m * m):
        M[i] = 0.0
    for a in range(ng):
        ca = c[a]
        if ca == 0.0:
            continue
        for b in range(a, ng):
            cb = c[b]
            if cb == 0.0:
                continue
            f = ca * cb if a == b else 2.0 * ca * cb
            base = o_q + packed_index(a, b, ng) * nz2
            for p in range(m):
                for q in range(p, m):
                    M[p * m + q] += f * st[base + packed_index(p, q, m)]
    for p in range(m):
        for q in range(p + 1, m):
            M[q * m + p] = M[p * m + q]
