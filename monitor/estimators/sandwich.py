"""Moment tensors for the robust (sandwich) variances of the log-log estimator, exactly at the
current coefficients.

With exponential weights ``w_s = lam^(t-s)`` the estimate is weighted least squares,
``theta = A^{-1} sum w_s x_s y_s`` with ``A = sum w_s x_s x_s'``, and its variance is the
sandwich ``A^{-1} Omega A^{-1}``. The meat ``Omega`` needs the residuals at the *current*
``theta``, ``e_s = y_s - x_s' theta = z_s' g`` with ``z_s = (x_s, y_s)`` and
``g = (-theta, 1)``, so it is a quadratic form in ``g`` of moments that can be accumulated:

- White (1980), heteroskedasticity-robust:
  ``Omega_ab = sum_s w_s^2 e_s^2 x_sa x_sb = sum_{cd} g_c g_d T_{ab,cd}`` with
  ``T_{ab,cd} = sum_s w_s^2 x_sa x_sb z_sc z_sd``;
- Newey & West (1987), Bartlett kernel over ``L`` lags:
  ``Omega = Gamma_0 + sum_{l=1..L} (1 - l/(L+1)) (Gamma_l + Gamma_l')`` with
  ``Gamma_l = sum_s w_s w_{s-l} e_s e_{s-l} x_s x_{s-l}'``; the symmetric part is the quadratic
  form in ``g`` of
  ``Q^l_{ab,cd} = sum_s w_s w_{s-l} (x_sa x_{s-l,b} + x_sb x_{s-l,a})(z_sc z_{s-l,d} + z_sd z_{s-l,c}) / 2``.

Storage, packed over ``a <= b`` (``nab = k(k+1)/2``) and ``c <= d`` (``ncd = (k+1)(k+2)/2``):
``T`` is ``nab * ncd`` floats (k = 2: 18; k = 4: 150); each lag adds ``nab * ncd`` for ``Q^l``
plus the lagged row ``z_{s-l}`` and its weight (``k + 2`` floats). The classic band needs only
``S = sum w_s^2 x_s x_s'``, the ``cd = (0, 0)`` slice of ``T`` (``z_s0 = 1``): ``ncd = 1``.

Centring: the sums are kept in coordinates centred at the series' first observation
(``x~ = (1, x_1 - x_1ref, ..., ), y~ = y - y_ref``), which removes most of the cancellation
between the large uncentred moments; with ``x = M x~`` (``M = [[1, 0], [x_ref, I]]``) the
coefficients become ``theta~_0 = theta_0 + x_ref' theta_{1:} - y_ref`` and a vector ``p`` of
the quadratic form becomes ``M' p`` (:func:`centre_vector`).

Every update multiplies the old sums by ``lt^2`` (``lt`` the step's forgetting factor), so the
weights are exact even while the excitation guard pauses forgetting. At forgetting 1 these
are the HC and HAC meats of ordinary least squares exactly (up to rounding).
"""

from __future__ import annotations

from numba import njit


@njit(cache=True, inline="always")
def zval(x, y, k, c):
    """Entry ``c`` of ``z = (x, y)``."""
    return y if c == k else x[c]


@njit(cache=True, inline="always")
def update_t(st, t0, x, y, k, ncd, l2):
    """``T <- l2 T + x_a x_b z_c z_d`` over the packed pairs (``ncd = 1``: only ``S``)."""
    m = k + 1
    i = t0
    for a in range(k):
        for b in range(a, k):
            xab = x[a] * x[b]
            n = 0
            for c in range(m):
                zc = zval(x, y, k, c)
                for d in range(c, m):
                    if n >= ncd:
                        break
                    st[i] = l2 * st[i] + xab * zc * zval(x, y, k, d)
                    i += 1
                    n += 1


@njit(cache=True, inline="always")
def update_q(st, q0, x, y, lx, ly, wl, k, ncd, l2):
    """``Q^l <- l2 Q^l + wl sym(x x_l') sym(z z_l')`` for one lag (``lx, ly``: the lagged row,
    ``wl``: its current weight)."""
    m = k + 1
    i = q0
    for a in range(k):
        for b in range(a, k):
            xab = x[a] * lx[b] + x[b] * lx[a]
            for c in range(m):
                zc = zval(x, y, k, c)
                lzc = zval(lx, ly, k, c)
                for d in range(c, m):
                    v = zc * zval(lx, ly, k, d) + zval(x, y, k, d) * lzc
                    st[i] = l2 * st[i] + wl * xab * v * 0.5
                    i += 1


@njit(cache=True, inline="always")
def meat_form(st, t0, th, k, p, p0, scale):
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
def s_form(st, t0, k, ncd, p, p0):
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
def centre_vector(p, p0, ref, r0, k, out):
    """``out = M' p``: ``out_0 = p_0 + sum_{j >= 1} ref_j p_j`` (``ref = st[r0 : r0 + k - 1]``
    holds the reference of columns 1..k-1), ``out_j = p_j``."""
    s = p[p0]
    for j in range(1, k):
        s += ref[r0 + j - 1] * p[p0 + j]
        out[j] = p[p0 + j]
    out[0] = s


@njit(cache=True, inline="always")
def centre_theta(th, t0, ref, r0, k, out):
    """``theta~``: ``theta~_0 = theta_0 + sum_j ref_j theta_j - y_ref`` (``y_ref = ref[r0+k-1]``)."""
    centre_vector(th, t0, ref, r0, k, out)
    out[0] -= ref[r0 + k - 1]
