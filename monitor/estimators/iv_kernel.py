"""Compiled recursive instrumental-variables step (two-stage least squares with forgetting).

Model: ``log q_t = x_t' theta + e_t`` with ``x = (1, log p, controls)``; ``log p`` may move with
the demand shock ``e`` (prices that follow demand), so least squares is biased. Instruments
``z = (1, controls, excluded instruments)`` (m of them, m >= k) are assumed unrelated to ``e``
and related to ``log p``: an input cost, a tax, a randomized price assignment.

A series' state is one flat float64 vector. Its first :data:`~monitor.estimators.kernel.NS`
slots have the meanings of the least-squares state (``I_W``, ``I_N``, ``I_E``, ``I_Z``,
``I_LPW`` ...), and ``theta`` sits at ``NS`` as there, so the pipeline's detectors read an IV
state exactly like an RLS state. After ``theta`` come the covariance of ``theta`` (k x k), two
IV scalars (:data:`J_FSTAT`, :data:`J_PIVOT`), the packed weighted moments ``G`` of the vector
``g = (log q, log p, z)`` and the packed fourth moments ``Q`` needed by the robust sandwich.

Per observation, with forgetting factor ``lam`` (weights ``lam^(t-s)``; Soderstrom & Stoica
1983, *Instrumental Variable Methods for System Identification*, ch. 4 and 7: recursive IV
with exponential weighting, here in its moment form so that over-identified instruments and
the exact robust variance are covered):

    G <- lam G + g g'                           (Szz, Szx, Szy are blocks of G)
    Q <- lam^2 Q + (g g') (x) (z z')             (for the sandwich; lam^2: squared weights)
    Pi    = Szz^-1 Szx                           first-stage coefficients, m x k
    A     = Szx' Szz^-1 Szx                      sum of w xhat x'
    theta = A^-1 Szx' Szz^-1 Szy                 weighted 2SLS
    Var(theta) = c1 A^-1 Pi' M Pi A^-1,  M = sum w^2 e^2 z z'   (robust sandwich, White 1980)

with the small-sample factor ``c1 = n_eff / (n_eff - k)`` (HC1; MacKinnon & White 1985).

``M`` is a quadratic form in the residual coefficients ``c = (1, -theta)`` over the blocks of
``Q``, so it is exact for the current theta, not a running approximation. At ``lam = 1`` this
is the textbook 2SLS with the heteroskedasticity-robust covariance, equal to linearmodels'
``IV2SLS(...).fit(cov_type="robust", debiased=True)`` (tests/test_iv_reference.py).

First-stage strength (one endogenous regressor, log p): the effective F of Olea & Pflueger
(2013), ``F_eff = pi_X' S~ pi_X / tr(S~ V_XX)``, where ``pi_X`` are the first-stage coefficients
of the excluded instruments, ``S~ = ((Szz^-1)_XX)^-1`` is their moment matrix after the
exogenous regressors are partialled out (Frisch-Waugh), and ``V_XX`` their robust covariance
block. With one instrument it is the robust first-stage t^2; with homoskedastic errors the
usual first-stage F. Status ``weak_instrument`` while ``F_eff < f_min`` (10, the rule of thumb
of Staiger & Stock 1997 that Stock & Yogo 2005 tabulate; Olea & Pflueger's 10%-bias critical
value is about 23).

Innovation (for the level chart): ``e = log q - x' theta_{t-1}``, ``sd = sqrt(s^2 + x' V x)``
with the previous step's ``s^2`` and ``V``.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from monitor.estimators import kernel as K
from monitor.estimators.iv_moments import chol, chol_inv, meat, packed_index
from monitor.estimators.tquantile import t_lookup


#: extra output column: the first stage's effective F (the shared columns are kernel.O_*)
O_FSTAT = K.NOUT
NOUT_IV = K.NOUT + 1
#: status code of an estimate whose first stage is weak (after the shared codes 0..4)
ST_WEAK_INSTRUMENT = 5
#: default threshold of the first stage's effective F
DEFAULT_F_MIN = 10.0


def sizes(k: int, n_instruments: int) -> tuple[int, int, int]:
    """``(m, ng, nz2)``: instruments incl. exogenous regressors, length of g, packed z z'."""
    m = k - 1 + n_instruments
    return m, m + 2, m * (m + 1) // 2


def offsets(k: int, n_instruments: int) -> tuple[int, int, int, int]:
    """State offsets ``(cov, scalars, G, Q)`` and the total size is :func:`state_size`."""
    o_cov = K.NS + k
    o_sc = o_cov + k * k
    o_g = o_sc + 2
    m, ng, _ = sizes(k, n_instruments)
    o_q = o_g + ng * (ng + 1) // 2
    return o_cov, o_sc, o_g, o_q


#: slots after the covariance: last effective F, and 1 while the first stage could be solved
J_FSTAT, J_PIVOT = 0, 1


def state_size(k: int, n_instruments: int) -> int:
    """Length of one series' IV state for ``k`` model parameters and ``n_instruments``."""
    m, ng, nz2 = sizes(k, n_instruments)
    return offsets(k, n_instruments)[3] + (ng * (ng + 1) // 2) * nz2


def work_size(k: int, n_instruments: int) -> int:
    """Length of the scratch vector one step needs (the kernel allocates nothing)."""
    m, ng, nz2 = sizes(k, n_instruments)
    q = n_instruments
    return 3 * ng + nz2 + ng * ng + 7 * m * m + 2 * m * k + 5 * k * k + 2 * k + m + 3 * q * q


def work_size_bound(width: int) -> int:
    """Scratch enough for any split of a design row of ``width`` = k + instruments columns."""
    return max([work_size(width - q, q) for q in range(1, max(2, width - 1))])


def init_state(k: int, n_instruments: int) -> np.ndarray:
    """Fresh state: no data, NaN covariance (no prior: 2SLS has none)."""
    if n_instruments < 1:
        raise ValueError(f"n_instruments = {n_instruments}: IV needs at least one instrument")
    st = np.zeros(state_size(k, n_instruments))
    o_cov = offsets(k, n_instruments)[0]
    st[o_cov:o_cov + k * k] = np.nan
    st[o_cov + k * k + J_FSTAT] = np.nan
    return st


@njit(cache=True, inline="always")
def _xg(i):
    """Position in g of design column i: x = (1, log p, controls), g = (y, log p, 1, controls, ...)."""
    if i == 0:
        return 2
    if i == 1:
        return 1
    return i + 1


@njit(cache=True, _nrt=False)
def iv_step(st, r, y, k, nq, lam, min_price_sd, min_neff, f_min, tq, out, w):
    """One IV update of state ``st`` in place; writes the output row ``out`` (>= K.NOUT).

    ``r = (1, log p, controls (k - 2), instruments (nq))`` is the widened design row,
    ``y = log q``, ``w`` a scratch vector of :func:`work_size` floats. When ``out`` has a
    column :data:`O_FSTAT` the effective F goes there too.
    """
    m = k - 1 + nq
    ng = m + 2
    nz2 = m * (m + 1) // 2
    o_cov = K.NS + k
    o_sc = o_cov + k * k
    o_g = o_sc + 2
    o_q = o_g + ng * (ng + 1) // 2
    # scratch views
    p0 = 0
    g = w[p0:p0 + ng]; p0 += ng
    zz = w[p0:p0 + nz2]; p0 += nz2
    Gf = w[p0:p0 + ng * ng]; p0 += ng * ng
    Szz = w[p0:p0 + m * m]; p0 += m * m
    L = w[p0:p0 + m * m]; p0 += m * m
    Sinv = w[p0:p0 + m * m]; p0 += m * m
    M = w[p0:p0 + m * m]; p0 += m * m
    V = w[p0:p0 + m * m]; p0 += m * m
    T = w[p0:p0 + m * m]; p0 += m * m
    Pi = w[p0:p0 + m * k]; p0 += m * k
    MPi = w[p0:p0 + m * k]; p0 += m * k
    A = w[p0:p0 + k * k]; p0 += k * k
    LA = w[p0:p0 + k * k]; p0 += k * k
    Ainv = w[p0:p0 + k * k]; p0 += k * k
    B = w[p0:p0 + k * k]; p0 += k * k
    C = w[p0:p0 + k * k]; p0 += k * k
    h = w[p0:p0 + k]; p0 += k
    c = w[p0:p0 + ng]; p0 += ng
    d = w[p0:p0 + ng]; p0 += ng
    pif = w[p0:p0 + m]; p0 += m
    Sx = w[p0:p0 + nq * nq]; p0 += nq * nq
    Lx = w[p0:p0 + nq * nq]; p0 += nq * nq
    Sxt = w[p0:p0 + nq * nq]; p0 += nq * nq

    lowvar, _ = K.excitation(st, r[1], lam, False, 0.5, min_price_sd)
    g[0] = y
    g[1] = r[1]
    g[2] = r[0]
    for p in range(1, m):
        g[2 + p] = r[p + 1]

    # innovation from the previous estimate
    yhat = 0.0
    for i in range(k):
        yhat += st[K.NS + i] * r[i]
    e = y - yhat
    W = st[K.I_W]
    V0 = st[K.I_V]
    zsd = np.nan
    if W - k > 0.0 and V0 > 0.0:
        pv = 0.0
        for i in range(k):
            for j in range(k):
                pv += r[i] * st[o_cov + i * k + j] * r[j]
        zsd = np.sqrt(V0 / (W - k) + pv)
    st[K.I_E] = e
    st[K.I_ZSD] = zsd
    st[K.I_Z] = e / zsd if zsd > 0.0 else np.nan

    # moments
    l2 = lam * lam
    for p in range(m):
        for q in range(p, m):
            zz[packed_index(p, q, m)] = g[2 + p] * g[2 + q]
    for a in range(ng):
        for b in range(a, ng):
            gab = g[a] * g[b]
            ia = packed_index(a, b, ng)
            st[o_g + ia] = lam * st[o_g + ia] + gab
            base = o_q + ia * nz2
            for t in range(nz2):
                st[base + t] = l2 * st[base + t] + gab * zz[t]
    W = lam * W + 1.0
    W2 = l2 * st[K.I_W2] + 1.0
    st[K.I_W] = W
    st[K.I_W2] = W2
    st[K.I_N] += 1.0
    st[K.I_PAUSED] = 0.0
    neff = W * W / W2

    out[K.O_NEFF] = neff
    out[K.O_BAND] = K.BAND_HC          # the IV band is always the robust one
    out[K.O_YLOG] = y
    out[K.O_E] = e
    out[K.O_Z] = st[K.I_Z]
    ok = _solve(st, k, nq, m, ng, nz2, o_cov, o_sc, o_g, o_q, g, Gf, Szz, L, Sinv, M, V, T, Pi,
                MPi, A, LA, Ainv, B, C, h, c, d, pif, Sx, Lx, Sxt)
    if ok and neff > k:
        # HC1: the small-sample factor n / (n - k) of MacKinnon & White (1985), with n_eff
        hc1 = neff / (neff - k)
        for i in range(k * k):
            st[o_cov + i] *= hc1
    fstat = st[o_sc + J_FSTAT]
    if out.shape[0] > O_FSTAT:
        out[O_FSTAT] = fstat
    solved = st[o_sc + J_PIVOT] != 0.0
    out[K.O_BETA] = st[K.NS + 1] if solved else np.nan
    out[K.O_INTERCEPT] = st[K.NS] if solved else np.nan
    dof = W - k
    vb = st[o_cov + k + 1]
    RSS = st[K.I_V]
    if ok and dof > 0.0 and RSS > 0.0 and vb >= 0.0:
        se = np.sqrt(vb)
        tq_ = t_lookup(tq, neff - k)
        b = st[K.NS + 1]
        out[K.O_SE] = se
        out[K.O_LO] = b - tq_ * se
        out[K.O_HI] = b + tq_ * se
        out[K.O_RESID_SD] = np.sqrt(RSS / dof)
        if neff < min_neff or neff < k + 2.0:
            out[K.O_STATUS] = K.ST_WARMING_UP
        elif lowvar:
            out[K.O_STATUS] = K.ST_LOW_VARIATION
        elif not (fstat >= f_min):
            out[K.O_STATUS] = ST_WEAK_INSTRUMENT
        else:
            out[K.O_STATUS] = K.ST_OK
    else:
        out[K.O_SE] = np.nan
        out[K.O_LO] = np.nan
        out[K.O_HI] = np.nan
        out[K.O_RESID_SD] = np.nan
        out[K.O_STATUS] = K.ST_WARMING_UP


@njit(cache=True, _nrt=False)
def _solve(st, k, nq, m, ng, nz2, o_cov, o_sc, o_g, o_q, g, Gf, Szz, L, Sinv, M, V, T, Pi, MPi,
           A, LA, Ainv, B, C, h, c, d, pif, Sx, Lx, Sxt):
    """2SLS estimate, its HC0 covariance (before the HC1 factor) and the effective F from the moments in ``st``.

    Writes theta, the covariance, ``I_V`` (weighted sum of squared residuals) and the F slot;
    returns False (state's estimate untouched, F NaN) while a moment matrix is singular.
    """
    for a in range(ng):
        for b in range(a, ng):
            v = st[o_g + packed_index(a, b, ng)]
            Gf[a * ng + b] = v
            Gf[b * ng + a] = v
    for p in range(m):
        for q in range(m):
            Szz[p * m + q] = Gf[(2 + p) * ng + 2 + q]
    st[o_sc + J_FSTAT] = np.nan
    if not chol(Szz, L, m):
        st[o_sc + J_PIVOT] = 0.0
        return False
    chol_inv(L, Sinv, m)
    # Pi = Szz^-1 Szx  (m x k)
    for p in range(m):
        for i in range(k):
            acc = 0.0
            for q in range(m):
                acc += Sinv[p * m + q] * Gf[(2 + q) * ng + _xg(i)]
            Pi[p * k + i] = acc
    # A = Szx' Pi, h = Pi' Szy
    for i in range(k):
        acc_h = 0.0
        for p in range(m):
            acc_h += Pi[p * k + i] * Gf[(2 + p) * ng]
        h[i] = acc_h
        for j in range(k):
            acc = 0.0
            for p in range(m):
                acc += Gf[(2 + p) * ng + _xg(i)] * Pi[p * k + j]
            A[i * k + j] = acc
    for i in range(k):
        for j in range(i + 1, k):
            s = 0.5 * (A[i * k + j] + A[j * k + i])
            A[i * k + j] = s
            A[j * k + i] = s
    if not chol(A, LA, k):
        st[o_sc + J_PIVOT] = 0.0
        return False
    chol_inv(LA, Ainv, k)
    st[o_sc + J_PIVOT] = 1.0
    for i in range(k):
        acc = 0.0
        for j in range(k):
            acc += Ainv[i * k + j] * h[j]
        st[K.NS + i] = acc
    # residual coefficients over g: e = y - x' theta
    for a in range(ng):
        c[a] = 0.0
    c[0] = 1.0
    for i in range(k):
        c[_xg(i)] -= st[K.NS + i]
    rss = 0.0
    for a in range(ng):
        for b in range(ng):
            rss += c[a] * Gf[a * ng + b] * c[b]
    st[K.I_V] = rss if rss > 0.0 else 0.0
    # sandwich: Ainv (Pi' M Pi) Ainv
    meat(st, o_q, c, ng, m, nz2, M)
    for p in range(m):
        for i in range(k):
            acc = 0.0
            for q in range(m):
                acc += M[p * m + q] * Pi[q * k + i]
            MPi[p * k + i] = acc
    for i in range(k):
        for j in range(k):
            acc = 0.0
            for p in range(m):
                acc += Pi[p * k + i] * MPi[p * k + j]
            B[i * k + j] = acc
    for i in range(k):
        for j in range(k):
            acc = 0.0
            for t in range(k):
                acc += B[i * k + t] * Ainv[t * k + j]
            C[i * k + j] = acc
    for i in range(k):
        for j in range(k):
            acc = 0.0
            for t in range(k):
                acc += Ainv[i * k + t] * C[t * k + j]
            st[o_cov + i * k + j] = acc
    # first stage: log p on z; effective F of the excluded instruments (the last nq of z)
    for p in range(m):
        acc = 0.0
        for q in range(m):
            acc += Sinv[p * m + q] * Gf[(2 + q) * ng + 1]
        pif[p] = acc
    for a in range(ng):
        d[a] = 0.0
    d[1] = 1.0
    for p in range(m):
        d[2 + p] = -pif[p]
    meat(st, o_q, d, ng, m, nz2, M)
    # V = Sinv M Sinv (robust covariance of the first-stage coefficients)
    for p in range(m):
        for q in range(m):
            acc = 0.0
            for t in range(m):
                acc += M[p * m + t] * Sinv[t * m + q]
            T[p * m + q] = acc
    for p in range(m):
        for q in range(m):
            acc = 0.0
            for t in range(m):
                acc += Sinv[p * m + t] * T[t * m + q]
            V[p * m + q] = acc
    x0 = m - nq
    for a in range(nq):
        for b in range(nq):
            Sx[a * nq + b] = Sinv[(x0 + a) * m + x0 + b]
    if not chol(Sx, Lx, nq):
        return True
    chol_inv(Lx, Sxt, nq)          # S~ = ((Szz^-1)_XX)^-1
    num = 0.0
    den = 0.0
    for a in range(nq):
        for b in range(nq):
            num += pif[x0 + a] * Sxt[a * nq + b] * pif[x0 + b]
            den += Sxt[a * nq + b] * V[(x0 + b) * m + x0 + a]
    if den > 0.0:
        st[o_sc + J_FSTAT] = num / den
    return True


@njit(cache=True, inline="always")
def iv_discount(st, k, nq, f):
    """One extra forgetting step of factor ``f`` in (0, 1] on everything accumulated so far
    (for the detectors' re-anchoring after an elasticity change): ``G``, ``W``, the residual sum
    and the log-price window by ``f``; ``Q`` and ``W2`` (squared weights) by ``f^2``. The 2SLS
    solution and ``n_eff`` are unchanged at that moment; the rows after it dominate."""
    m = k - 1 + nq
    ng = m + 2
    nz2 = m * (m + 1) // 2
    f2 = f * f
    for i in (K.I_W, K.I_V, K.I_LPW, K.I_LPM2):
        st[i] *= f
    st[K.I_W2] *= f2
    o_g = K.NS + k + k * k + 2
    o_q = o_g + ng * (ng + 1) // 2
    for i in range(o_g, o_q):
        st[i] *= f
    for i in range(o_q, o_q + (ng * (ng + 1) // 2) * nz2):
        st[i] *= f2


@njit(cache=True, _nrt=False)
def iv_run(state, sid, R, y, k, nq, lam, min_price_sd, min_neff, f_min, tq, out, w):
    """Run :func:`iv_step` over rows in order; row j updates series ``sid[j]``.

    ``R`` is ``(n, k + nq)`` (design columns then instruments), ``state`` is
    ``(n_series, state_size(k, nq))``, ``out`` is ``(n, NOUT_IV)``.
    """
    for j in range(R.shape[0]):
        iv_step(state[sid[j]], R[j], y[j], k, nq, lam, min_price_sd, min_neff, f_min, tq,
                out[j], w)
