"""The log-log estimator's k = 2 step as it was before issue 15's second round (commit d74f4e0),
kept verbatim as the reference the lean step is checked against to the bit.

:func:`monitor.estimators.kernel.step_two_band` was rewritten for speed (independent divisions
packed into vector instructions, the exponential last, the t quantile from a reciprocal shared
with other divisions); every output and state value must stay identical. This copy is what
tests/test_estimator_bits.py and benchmarks/estimator_call.py compare it with. It uses the
kernel's helpers (:func:`~monitor.estimators.kernel.excitation`,
:func:`~monitor.estimators.kernel.finish`, ...), which the general-k step still uses unchanged.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from monitor.estimators.kernel import (BAND_CLASSIC, I_N, I_V, I_W, I_W2, I_W3, I_XSD, I_YY,
                                       I_E, I_Z, I_ZSD, NS, diagnostics, excitation, finish,
                                       hc_factor, step_two_band)
from monitor.estimators.solve import DROP_TOL


@njit(cache=True, inline="always")
def previous_step_two_band(st, x1, y, band, lam, guard, guard_lam, min_price_sd, min_neff, tq,
                           out):
    """The update written out for k = 2 (intercept and log price), bands classic and hc.

    The form of commit d74f4e0, unchanged.
    """
    raw_low, lt = excitation(st, x1, lam, guard, guard_lam, min_price_sd)
    ncd = 1 if band == BAND_CLASSIC else 6
    a = st[NS]
    b = st[NS + 1]
    A00 = st[NS + 2]
    A01 = st[NS + 3]
    A11 = st[NS + 5]
    t0 = NS + 10
    if st[I_N] == 0.0:
        st[NS + 8] = x1
        st[NS + 9] = y
    mu = st[NS + 8]
    nu = st[NS + 9]
    xc = x1 - mu
    yc = y - nu
    e = y - a - b * x1
    # classic predictive variance x' P S P x from the previous state
    W = st[I_W]
    V = st[I_V]
    z = np.nan
    zsd = np.nan
    if A00 > 0.0 and A11 > 0.0:
        sb = A11 - A01 * A01 / A00
        if sb > DROP_TOL * A11:
            p11 = 1.0 / sb
            p01 = -A01 / A00 * p11
            p00 = 1.0 / A00 - A01 / A00 * p01
            u1 = p01 + p11 * x1
            u0 = p00 + p01 * x1 + mu * u1
            s00 = st[t0]
            s01 = st[t0 + ncd]
            s11 = st[t0 + 2 * ncd]
            q = u0 * (s00 * u0 + s01 * u1) + u1 * (s01 * u0 + s11 * u1)
            dof = W - 2.0
            if dof > 0.0 and V > 0.0:
                zsd = np.sqrt(V / dof * (1.0 + q))
                z = e / zsd
    st[I_E] = e
    st[I_ZSD] = zsd
    st[I_Z] = z
    # update the sums
    A00 = lt * A00 + 1.0
    A01 = lt * A01 + x1
    A11 = lt * A11 + x1 * x1
    c0 = lt * st[NS + 6] + y
    c1 = lt * st[NS + 7] + x1 * y
    YY = lt * st[I_YY] + y * y
    W = lt * W + 1.0
    l2 = lt * lt
    W2 = l2 * st[I_W2] + 1.0
    W3 = l2 * lt * st[I_W3] + 1.0
    st[I_W3] = W3
    st[NS + 2] = A00
    st[NS + 3] = A01
    st[NS + 4] = A01
    st[NS + 5] = A11
    st[NS + 6] = c0
    st[NS + 7] = c1
    st[I_YY] = YY
    st[I_W] = W
    st[I_W2] = W2
    st[I_N] += 1.0
    # solve (log price last: Frisch-Waugh form)
    sb = A11 - A01 * A01 / A00
    identified = A11 > 0.0 and sb > DROP_TOL * A11
    if identified:
        b = (c1 - A01 / A00 * c0) / sb
        a = (c0 - A01 * b) / A00
        rank = 2.0
    else:
        b = 0.0
        a = c0 / A00
        rank = 1.0
    st[NS] = a
    st[NS + 1] = b
    V = YY - a * c0 - b * c1
    if V < 0.0:
        V = 0.0
    st[I_V] = V
    xsd = np.sqrt(sb / W) if sb > 0.0 else 0.0
    st[I_XSD] = xsd
    diagnostics(st, y - a - b * x1, lt)
    # meat sums
    if band == BAND_CLASSIC:
        st[t0] = l2 * st[t0] + 1.0
        st[t0 + 1] = l2 * st[t0 + 1] + xc
        st[t0 + 2] = l2 * st[t0 + 2] + xc * xc
    else:
        x2 = xc * xc
        xy = xc * yc
        y2 = yc * yc
        for ia in range(3):
            xa = 1.0 if ia == 0 else (xc if ia == 1 else x2)
            i = t0 + 6 * ia
            st[i] = l2 * st[i] + xa
            st[i + 1] = l2 * st[i + 1] + xa * xc
            st[i + 2] = l2 * st[i + 2] + xa * yc
            st[i + 3] = l2 * st[i + 3] + xa * x2
            st[i + 4] = l2 * st[i + 4] + xa * xy
            st[i + 5] = l2 * st[i + 5] + xa * y2
    neff = W * W / W2
    vb = np.nan
    if identified:
        p11 = 1.0 / sb
        p01 = -A01 / A00 * p11 + mu * p11
        if band == BAND_CLASSIC:
            s00 = st[t0]
            s01 = st[t0 + 1]
            s11 = st[t0 + 2]
            vb = p01 * (s00 * p01 + s01 * p11) + p11 * (s01 * p01 + s11 * p11)
            if W > rank:
                vb *= V / (W - rank)
        else:
            ac = a + mu * b - nu
            g0 = ac * ac
            g1 = 2.0 * ac * b
            g2 = -2.0 * ac
            g3 = b * b
            g4 = -2.0 * b
            m00 = g0 * st[t0] + g1 * st[t0 + 1] + g2 * st[t0 + 2] + g3 * st[t0 + 3] + \
                g4 * st[t0 + 4] + st[t0 + 5]
            m01 = g0 * st[t0 + 6] + g1 * st[t0 + 7] + g2 * st[t0 + 8] + g3 * st[t0 + 9] + \
                g4 * st[t0 + 10] + st[t0 + 11]
            m11 = g0 * st[t0 + 12] + g1 * st[t0 + 13] + g2 * st[t0 + 14] + g3 * st[t0 + 15] + \
                g4 * st[t0 + 16] + st[t0 + 17]
            vb = p01 * p01 * m00 + 2.0 * p01 * p11 * m01 + p11 * p11 * m11
            vb *= hc_factor(W, W2, W3, rank)
    finish(st, out, b, a, identified, vb, V, rank, 2, neff, raw_low or xsd < min_price_sd,
           band, e, z, min_neff, tq, y)


@njit(cache=True, _nrt=False)
def previous_rls_run_two(state, sid, X, y, band, lam, guard, guard_lam, min_price_sd, min_neff,
                         tq, out):
    """The batch loop over rows with :func:`previous_step_two_band` (k = 2, classic or hc), as
    :func:`monitor.estimators.kernel.rls_run` ran it."""
    for j in range(X.shape[0]):
        previous_step_two_band(state[sid[j]], X[j, 1], y[j], band, lam, guard, guard_lam,
                               min_price_sd, min_neff, tq, out[j])


@njit(cache=True, _nrt=False)
def rows_rls_run_two(state, sid, X, y, band, lam, guard, guard_lam, min_price_sd, min_neff, tq,
                     out):
    """The batch loop one row at a time with the current k = 2 step
    (:func:`monitor.estimators.kernel.step_two_band`), as
    :func:`monitor.estimators.kernel.rls_run` ran the k = 2 rows before it took them four
    series at a time (:func:`monitor.estimators.kernel.step_two_lanes`): the reference of the
    lane path, in tests/test_estimator_bits.py and benchmarks/estimator_call.py."""
    for j in range(X.shape[0]):
        step_two_band(state[sid[j]], X[j, 1], y[j], band, lam, guard, guard_lam, min_price_sd,
                      min_neff, tq, out[j])
