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
def cd_pairs(z, k, ncd, zc, zd):
    """``zc[n] = z_c``, ``zd[n] = z_d`` over the packed pairs ``c <= d`` (``n`` in packed order,
    ``ncd`` of them; ``z = z[0:k+1]``): the operands of :func:`update_t` laid out in a row."""
    m = k + 1 if ncd > 1 else 1
    n = 0
    for c in range(m):
        for d in range(c, m):
            zc[n] = z[c]
            zd[n] = z[d]
            n += 1


@njit(cache=True, inline="always")
def update_t(st, t0, z, k, ncd, l2, zc, zd):
    """``T <- l2 T + x_a x_b z_c z_d`` over the packed pairs (``ncd = 1``: only ``S``).

    ``z = (x, y)`` is ``z[0:k+1]``; ``zc``, ``zd`` from :func:`cd_pairs`. Each entry is
    ``l2 T + ((x_a x_b) z_c) z_d`` (the same operations, in the same order, as computing it
    from ``z``); a row ``ab`` of the tensor is one loop over ``ncd`` contiguous entries, which
    the compiler turns into vector instructions."""
    i = t0
    zc = zc[:ncd]
    zd = zd[:ncd]
    for a in range(k):
        for b in range(a, k):
            xab = z[a] * z[b]
            row = st[i:i + ncd]
            for n in range(ncd):
                row[n] = l2 * row[n] + xab * zc[n] * zd[n]
            i += ncd


@njit(cache=True, inline="always")
def update_q(st, q0, z, lz, wl, k, l2, zc, zd, lc, ld):
    """``Q^l <- l2 Q^l + wl sym(x x_l') sym(z z_l')`` for one lag (``z = z[0:k+1]`` the row,
    ``lz = lz[0:k+1]`` the lagged row, ``wl``: its current weight; ``zc``, ``zd`` from
    :func:`cd_pairs` of ``z``; ``lc``, ``ld`` scratch for the same of ``lz``). Each entry is
    ``l2 Q + ((wl xab) (z_c lz_d + z_d lz_c)) 0.5`` with ``xab = x_a lx_b + x_b lx_a``; a row
    ``ab`` is one loop over contiguous entries (vector instructions)."""
    ncd = (k + 1) * (k + 2) // 2
    cd_pairs(lz, k, ncd, lc, ld)
    i = q0
    zc = zc[:ncd]
    zd = zd[:ncd]
    lc = lc[:ncd]
    ld = ld[:ncd]
    for a in range(k):
        for b in range(a, k):
            wx = wl * (z[a] * lz[b] + z[b] * lz[a])
            row = st[i:i + ncd]
            for n in range(ncd):
                row[n] = l2 * row[n] + wx * (zc[n] * ld[n] + zd[n] * lc[n]) * 0.5
            i += ncd


@njit(cache=True, inline="always")
def g_pairs(th, k, gg, dg):
    """``gg[n] = g_c g_d`` over the packed pairs ``c <= d`` (``n`` in packed order), with
    ``g = (-theta, 1)``, ``theta = th[0:k]``, and ``dg[n]`` 1 on the diagonal ``c = d``, 2 off
    it: the weights of :func:`meat_form`."""
    m = k + 1
    n = 0
    for c in range(m):
        gc = 1.0 if c == k else -th[c]
        for d in range(c, m):
            gd = 1.0 if d == k else -th[d]
            gg[n] = gc * gd
            dg[n] = 1.0 if c == d else 2.0
            n += 1


@njit(cache=True, inline="always")
def meat_form(st, t0, gg, dg, k, p, p0, scale, acc):
    """``scale * p' Omega(g) p`` for the packed tensor at ``t0``: ``Omega_ab = sum_{c <= d}
    dg_cd (gg_cd T_{ab,cd})``, ``gg``, ``dg`` from :func:`g_pairs`, ``p = p[p0:p0+k]``;
    ``acc`` is scratch of ``k (k + 1) / 2`` floats.

    Each ``Omega_ab`` is a sum over ``cd`` in packed order and ``p' Omega p`` a sum over ``ab``
    in packed order, as written (``1 * v`` is ``v`` exactly and ``2 * v`` is what the entries
    off the diagonal always added); four ``Omega_ab`` are summed side by side (their additions
    are independent), so the processor overlaps them instead of waiting on one chain of
    ``k^2 (k+1)^2 / 4`` dependent additions (k = 6: 588)."""
    nab = k * (k + 1) // 2
    ncd = (k + 1) * (k + 2) // 2
    gg = gg[:ncd]
    dg = dg[:ncd]
    ab = 0
    while ab + 4 <= nab:
        i0 = t0 + ab * ncd
        r0 = st[i0:i0 + ncd]
        r1 = st[i0 + ncd:i0 + 2 * ncd]
        r2 = st[i0 + 2 * ncd:i0 + 3 * ncd]
        r3 = st[i0 + 3 * ncd:i0 + 4 * ncd]
        s0 = 0.0
        s1 = 0.0
        s2 = 0.0
        s3 = 0.0
        for n in range(ncd):
            g = gg[n]
            f = dg[n]
            s0 += f * (g * r0[n])
            s1 += f * (g * r1[n])
            s2 += f * (g * r2[n])
            s3 += f * (g * r3[n])
        acc[ab] = s0
        acc[ab + 1] = s1
        acc[ab + 2] = s2
        acc[ab + 3] = s3
        ab += 4
    while ab < nab:
        i0 = t0 + ab * ncd
        r0 = st[i0:i0 + ncd]
        s0 = 0.0
        for n in range(ncd):
            s0 += dg[n] * (gg[n] * r0[n])
        acc[ab] = s0
        ab += 1
    tot = 0.0
    ab = 0
    for a in range(k):
        for b in range(a, k):
            f = p[p0 + a] * p[p0 + b]
            if a != b:
                f *= 2.0
            tot += f * acc[ab]
            ab += 1
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
