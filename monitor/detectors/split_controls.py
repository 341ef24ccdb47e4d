"""The split GLR's own fit of the control coefficients: ``y* = log q - c' z`` with ``c`` that
does not wander.

Why
---
The split GLR (:mod:`monitor.detectors.split_glr`) treats ``y* = log q - c' z`` as known up to
its regression on log price. With the pipeline estimator's current ``c_t`` (forgetting 0.995:
about 200 rows) ``y*`` moves whenever ``c_t`` wanders; where a control is collinear with the
price (tariff blocks that are hour-of-day controls) the error of ``c_t`` is minus the error of
``b_t`` times the controls' prediction of log price (Frisch & Waugh 1933, Lovell 1963), so it
wanders with ``b_t`` and the moves look like changes of level and slope. Measured on the load
demo (6 hourly feeders, half a year, ARL0 20,000): 16-20 false alerts per seed with slow means
of ``c_t``, 1-2 with the true coefficients.

What
----
The detector keeps the normal equations of its own least-squares fit of ``log q`` on
``w = (1, log p, z_1 .. z_m)`` (forgetting 1: every row since the series started), packed as
the upper triangle of ``N = sum [w, y][w, y]'`` (``(m + 3)(m + 4) / 2`` floats, 45 for
``m = NCF = 6``), and uses ``c`` from it: the control coefficients of a fit that only
sharpens, instead of one that forgets. Changes the detector finds are the fit's regimes:

- after a ``level_shift`` the intercept is partialled out of ``N`` (its Schur complement on
  the intercept, :func:`fit_partial`): the rows before keep their information on ``b`` and
  ``c`` under their own intercept;
- after an ``elasticity_change`` both the intercept and log price are partialled out: the
  old rows keep only their information on ``c`` (the controls' effects are assumed unchanged,
  as the detector's test assumes).

So ``c`` is the least-squares estimate of a model with a common ``c`` and regime-specific
``(a, b)`` (the within estimator, in the sense of Frisch & Waugh 1933).

Start rule: the series' rows are fed to the detector only once every control seen so far is
*identified*: ``N^-1_ii N_ii - 1 <= IDENT_EPS^2 n`` with ``n`` the rows so far (at least
``MIN_FIT_ROWS``). ``N^-1_ii N_ii`` is the control's variance inflation factor (VIF): the
variance of ``c_i`` over what it would be were the control orthogonal to log price and the
other controls. The excess ``VIF - 1`` is the collinear part, whose error moves with the error
of ``b`` and tilts the detector's slope; ``(VIF - 1) / n`` is the variance of that part of
``c_i``'s error times the control's mean square, over the noise variance, so the rule keeps
its sd at ``IDENT_EPS`` (a tenth) of the noise sd. The orthogonal part (the 1) only adds noise
the detector's scale sees. Measured: the load demo's hour-of-day controls (VIF about 9, the
tariff blocks follow the hours) start after about 900 hourly rows; the retail demo's promotion
and weekend controls (VIF about 1.4) after about 40-60 days; with ``VIF / n <= 0.01`` instead
the retail series waited 150 days and its headline change (day 164) fell in the reference.
Rows entered with a poorly determined ``c`` stay
in the detector's reference sums for up to ``ref_cap`` rows, so they must not be fed early.

The solve uses a Cholesky factorization in a scratch vector (no allocation in the compiled
loop); a column that is zero so far or linearly dependent on earlier ones (pivot below
``1e-10`` of its diagonal) gets coefficient 0.
"""

from __future__ import annotations

from numba import njit

from monitor.detectors import split_glr as SG
from monitor.estimators import kernel as K

#: design width: intercept, log price, NCF controls
M = SG.NCF + 2
#: with the response
MP = M + 1
#: floats of the scratch vector :func:`fit_solve` needs (Cholesky factor, coefficients)
SCRATCH = M * M + 2 * M
#: largest ``se(c_i) rms(z_i) / sigma`` at which a control counts as identified
IDENT_EPS = 0.1
#: fewest rows before the controls can count as identified (a control not seen in the first
#: rows would otherwise let them through)
MIN_FIT_ROWS = 30.0
#: relative pivot below which a column counts as dependent
PIVOT_TOL = 1e-10


@njit(cache=True, inline="always")
def _pi(i, j):
    """Packed index of ``N[i, j]`` (``i <= j``) in the upper triangle, row-major."""
    return i * MP - (i * (i - 1)) // 2 + (j - i)


@njit(cache=True, inline="always")
def _w(i, xj, y, kc):
    """Element ``i`` of ``(1, log p, z_1 .. z_kc, 0 .., y)``."""
    if i == 0:
        return 1.0
    if i == 1:
        return xj[1]
    if i == MP - 1:
        return y
    if i - 2 < kc:
        return xj[i]
    return 0.0


@njit(cache=True, inline="always")
def fit_add(st, o, xj, y, kc):
    """Add one row (``xj``: the design row, ``xj[1]`` log price, ``xj[2:2 + kc]`` the first
    ``kc`` controls; ``y``: log q less any further controls' effects) to ``N`` at ``st[o:]``."""
    for i in range(MP):
        wi = _w(i, xj, y, kc)
        if wi == 0.0:
            continue
        for j in range(i, MP):
            wj = _w(j, xj, y, kc)
            if wj != 0.0:
                st[o + _pi(i, j)] += wi * wj


@njit(cache=True, inline="always")
def fit_solve(st, o, s, s0, kc):
    """Cholesky factor of ``N[:2 + kc, :2 + kc]`` into ``s[s0:]`` (row-major, lower) and the
    coefficients into ``s[s0 + M * M:]``; dependent or empty columns get coefficient 0."""
    m = 2 + kc
    c0 = s0 + M * M
    for i in range(m):
        for j in range(i + 1):
            v = st[o + _pi(j, i)]
            for q in range(j):
                v -= s[s0 + i * M + q] * s[s0 + j * M + q]
            if i == j:
                d = st[o + _pi(i, i)]
                if d > 0.0 and v > PIVOT_TOL * d:
                    s[s0 + i * M + i] = v ** 0.5
                else:
                    s[s0 + i * M + i] = 0.0          # dependent / empty column
            else:
                djj = s[s0 + j * M + j]
                s[s0 + i * M + j] = v / djj if djj > 0.0 else 0.0
    # forward: L u = N[:, y]
    for i in range(m):
        dii = s[s0 + i * M + i]
        if dii > 0.0:
            v = st[o + _pi(i, MP - 1)]
            for q in range(i):
                v -= s[s0 + i * M + q] * s[c0 + q]
            s[c0 + i] = v / dii
        else:
            s[c0 + i] = 0.0
    # backward: L' c = u
    for i in range(m - 1, -1, -1):
        dii = s[s0 + i * M + i]
        if dii > 0.0:
            v = s[c0 + i]
            for q in range(i + 1, m):
                v -= s[s0 + q * M + i] * s[c0 + q]
            s[c0 + i] = v / dii
        else:
            s[c0 + i] = 0.0


@njit(cache=True, inline="always")
def fit_identified(st, o, s, s0, kc, eps):
    """True when ``n >= MIN_FIT_ROWS`` and every control seen so far (``N_ii > 0``) has
    ``N^-1_ii N_ii - 1 <= eps^2 n`` (``n = N_00``; uses the factor :func:`fit_solve` left in
    ``s[s0:]``, and ``s[s0 + M * M + M:]`` as work space). A dependent control (zero pivot) is not identified."""
    m = 2 + kc
    v0 = s0 + M * M + M
    n = st[o + _pi(0, 0)]
    if n < MIN_FIT_ROWS:
        return False
    for i in range(2, m):
        d = st[o + _pi(i, i)]
        if not (d > 0.0):
            continue
        if not (s[s0 + i * M + i] > 0.0):
            return False
        # N^-1_ii = || L^-1 e_i ||^2: forward solve L v = e_i (v_q = 0 for q < i)
        vv = 0.0
        for q in range(i, m):
            dq = s[s0 + q * M + q]
            acc = 1.0 if q == i else 0.0
            for r in range(i, q):
                acc -= s[s0 + q * M + r] * s[v0 + r]
            vq = acc / dq if dq > 0.0 else 0.0
            s[v0 + q] = vq
            vv += vq * vq
        if vv * d - 1.0 > eps * eps * n:
            return False
    return True


@njit(cache=True, inline="always")
def fit_partial(st, o, q):
    """Partial column ``q`` (0: intercept, 1: log price) out of ``N``: its Schur complement
    ``N_ij - N_iq N_qj / N_qq`` on the other rows and columns (the response included), then
    row and column ``q`` zero. The rows so far keep their information on the other
    coefficients under a coefficient ``q`` of their own."""
    d = st[o + _pi(q, q)]
    if d > 0.0:
        for i in range(MP):
            if i == q:
                continue
            niq = st[o + (_pi(i, q) if i < q else _pi(q, i))]
            if niq == 0.0:
                continue
            for j in range(i, MP):
                if j == q:
                    continue
                nqj = st[o + (_pi(j, q) if j < q else _pi(q, j))]
                st[o + _pi(i, j)] -= niq * nqj / d
    for i in range(MP):
        st[o + (_pi(i, q) if i < q else _pi(q, i))] = 0.0


@njit(cache=True, inline="always")
def fit_response(st, at, xj, yj, k, est, work, w0):
    """``(y*, ready)`` for one row of a series with controls (``k > 2``; split state at
    ``st[at:]``, the estimator's state ``est``, scratch ``work[w0:]`` of :data:`SCRATCH`
    floats): adds the row to the fit, solves it and returns ``y* = log q - c' z`` with the
    fit's ``c`` for the first ``NCF`` controls and the estimator's current coefficient for any
    further ones; ``ready`` is False (do not feed the detector) until the controls are
    identified (:func:`fit_identified`, once per series)."""
    kc = min(k - 2, SG.NCF)
    ys = yj
    for i in range(2 + SG.NCF, k):
        ys -= est[K.NS + i] * xj[i]
    ok = ys == ys and xj[1] == xj[1]
    for i in range(2, 2 + kc):
        if not (xj[i] == xj[i]):
            ok = False
    o = at + SG.CFIT0
    if ok:
        fit_add(st, o, xj, ys, kc)
    fit_solve(st, o, work, w0, kc)
    if st[at + SG.CFIT_ON] == 0.0:
        if not fit_identified(st, o, work, w0, kc, IDENT_EPS):
            return ys, False
        st[at + SG.CFIT_ON] = 1.0
    for i in range(2, 2 + kc):
        ys -= work[w0 + M * M + i] * xj[i]
    return ys, True
