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
the upper triangle of ``N = sum v [w, y][w, y]'`` (``(m + 3)(m + 4) / 2`` floats, 45 for
``m = NCF = 6``; the row weight ``v`` is 1 under the log-log models and the predicted mean
``mu`` under the Poisson model, below), and uses ``c`` from it: the control coefficients of a
fit that only sharpens, instead of one that forgets. Changes the detector finds are the fit's
regimes:

- after a ``level_shift`` the intercept is partialled out of ``N`` (its Schur complement on
  the intercept, :func:`fit_partial`): the rows before keep their information on ``b`` and
  ``c`` under their own intercept;
- after an ``elasticity_change`` both the intercept and log price are partialled out: the
  old rows keep only their information on ``c`` (the controls' effects are assumed unchanged,
  as the detector's test assumes).

So ``c`` is the least-squares estimate of a model with a common ``c`` and regime-specific
``(a, b)`` (the within estimator, in the sense of Frisch & Waugh 1933).

Every row with the current ``c``: the detector keeps the controls' sums beside its response
sums and re-expresses all of them whenever ``c`` changes (:func:`fit_response` calls
:func:`~monitor.detectors.split_glr.zs_express`; split_glr's docstring, "The controls' sums"),
so every candidate change time is tested with the fit's ``c`` now, not with the ``c`` each row
met. Measured on the load demo (ARL0 20,000, 2.6 false alerts expected per replay): 5.6 false
alerts per replay over seeds 1-10 with each row's own ``c``, 2.1 with the current one.

Start rule: the fit takes every row of the series, the estimator's warm-up included, and the
series' rows are fed to the detector only once the controls are *identified* for it
(:func:`fit_identified`): ``VIF_x - 1 <= IDENT_EPS^2 n`` with ``VIF_x`` the variance
inflation of log price by the intercept and the controls (``N^-1_11`` times the centred sum of
squares of log price) and ``n >= MIN_FIT_ROWS`` the rows so far, checked until it first holds.
The part of the fit's control error that tilts the detector's slope is the part collinear with
log price; its variance, in units of the noise over the price's sd, is ``(VIF_x - 1) / n``
(Frisch & Waugh 1933; Lovell 1963), so the rule keeps its sd at ``IDENT_EPS`` (a tenth) of the
noise. Controls drawn apart from the price (``VIF_x`` near 1) start with the warm-up's end or a
few rows after; a control's overlap with the intercept does not count (the previous rule, on
each control's raw VIF, made a series with a 30% promotion flag wait about 40 rows). Measured
on the demos (seeds 1-3): the load feeders, whose hour-of-day controls carry the tariff blocks
(``VIF_x`` 4-7), start after 310-640 hourly rows; the retail series (promotions are a 20% cut:
``VIF_x`` 1.0-1.8) after 12-75 days. Rows are re-expressed with each new ``c``, but the test
of a candidate carries the fit's error then, times the difference of the two samples' mean
controls, which is why they are not fed while ``c`` is poorly determined. They are not lost
either: at identification the detector's window sums, and its controls' sums, start from all
earlier rows (:func:`fit_seed`; the sums are linear in ``c``), so the before sample of a later
change holds the whole history, as for a series without controls.
A control first seen after the start (cooling degrees from May, rare event hours) enters the
fit then; its coefficient sharpens as the fit's others did.

Under the Poisson model the fit is of the working responses ``x' theta + (q - mu) / mu``
(variance about ``phi / mu``) with the working weights ``v = mu``, the estimator's predicted
mean of the row, as the detector's own sums (split_glr, "Working weights"): weighted least
squares of the working responses, the iteratively reweighted least squares of the Poisson
regression (McCullagh & Nelder 1989, sec. 2.5) with each row linearized at the estimator's
coefficients when it came. The warm-up's rows enter with the warming estimator's ``mu`` (a
fit without them was no better: rms error of the promotion coefficient 1.58 against 1.00 at
40 rows, 0.42 against 0.38 at 100, below). The identification rule then takes the weighted
``VIF_x`` and ``n`` the rows (the estimator's row count, not ``sum mu``), so that
:data:`MIN_FIT_ROWS` stays a count of rows and the rule's noise that of one row; the
partialling after alarms is the weighted within estimator; the detector's sums are not seeded
from the fit at identification (:func:`fit_seed`, log-log only). Unweighted, rows with small
means dominated the fit: on the count log of tests/test_dask_poisson.py (mean counts 0.3-3, a
promotion flag on 25% of rows, true coefficient 0.3; 50 series, seeds 21-30, no shift) the
promotion coefficient's rms error was 2.97 / 1.31 / 0.67 / 0.36 after 40 / 100 / 200 / 400
rows (worst 14.5 / 5.3 / 2.6 / 1.3) unweighted and 1.00 / 0.38 / 0.21 / 0.14 (worst 3.5 /
1.2 / 0.6 / 0.3) weighted. Over ten 400-row replays of that log (seeds 21-30, 6 series, a
x2.5 level shift at row 200 in one) the shift is alerted in 8 (7 unweighted) with 1 level
alert on another series (2), and the replays without the shift raise no false alert (1). At
these counts the coefficient is poorly determined for a long time either way (its sd is
about ``1 / sqrt(n mu p (1 - p))``: 0.35 after 100 rows at a mean of 0.5).

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
#: largest sd of the collinear part of the controls' error, ``sqrt((VIF_x - 1) / n)`` in units
#: of the noise over log price's sd, at which the controls count as identified
IDENT_EPS = 0.1
#: fewest rows before the controls can count as identified: a little above the estimator's
#: warm-up (``min_n_eff`` 10), so that the VIF rests on more rows than the fit has
#: coefficients; a price that has not moved yet (hourly load in its first off-peak hours) is
#: caught by its zero pivot, not by this count. With 30 a series with a promotion flag started
#: its charts 20 rows later than one without controls
MIN_FIT_ROWS = 12.0
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
def fit_add(st, o, xj, y, kc, wt):
    """Add one row (``xj``: the design row, ``xj[1]`` log price, ``xj[2:2 + kc]`` the first
    ``kc`` controls; ``y``: log q less any further controls' effects) with weight ``wt`` to
    ``N`` at ``st[o:]`` (``N += wt [w, y][w, y]'``; with ``wt = 1`` exactly the unweighted
    sums)."""
    for i in range(MP):
        wi = _w(i, xj, y, kc)
        if wi == 0.0:
            continue
        wi = wt * wi
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
def fit_identified(st, o, s, s0, kc, eps, n):
    """True when ``n >= MIN_FIT_ROWS`` and the price's variance inflation by the controls is
    small for this many rows: ``VIF_x - 1 <= eps^2 n`` with ``VIF_x = N^-1_11 Sxx`` (``Sxx =
    N_11 - N_01^2 / N_00`` the centred sum of squares of log price) and ``n`` the rows in the
    fit (``N_00`` for unweighted rows; with working weights the estimator's row count, see
    :func:`fit_response`). Uses the
    factor :func:`fit_solve` left in ``s[s0:]`` and ``s[s0 + M * M + M:]`` as work space. A log
    price that is constant, or a control seen so far that is dependent on the intercept, log
    price and the controls before it (zero pivot), is not identified: the factor would
    drop that control and understate the price's inflation (hourly load data in its first
    days: VIF_x looked like 1 at row 43).

    Why the price's VIF: the part of the controls' error that moves the detector's slope is
    the one collinear with log price. By Frisch & Waugh (1933) the variance of the fitted
    ``b`` is ``sigma^2 VIF_x / Sxx``, of which ``sigma^2 (VIF_x - 1) / Sxx`` comes from
    estimating ``c`` (Lovell 1963): it is the variance of ``gamma' (c_hat - c)`` with ``gamma``
    the regression of the controls on log price, i.e. the slope the fit's control error puts
    into ``y*``. In units of the noise over the price's sd that is ``(VIF_x - 1) / n``, so the
    rule keeps it at ``eps``. Controls unrelated to price (a promotion flag drawn apart from
    the price) have ``VIF_x`` near 1 and start after ``MIN_FIT_ROWS``; a binary control's
    overlap with the intercept does not count (the raw VIF of a 30% flag is 1.43, which made
    short series wait ~40 rows). Measured on the demos (seed 1): load feeders, whose
    hour-of-day controls carry the tariff blocks, ``VIF_x`` 5.3-6.6 from 400 rows on; retail
    series with promotions (a 20% cut) and weekends 1.2-1.6."""
    m = 2 + kc
    v0 = s0 + M * M + M
    if n < MIN_FIT_ROWS:
        return False
    if not (s[s0 + 1 * M + 1] > 0.0):
        return False
    for i in range(2, m):        # a control seen so far but dependent on the others (zero
        if st[o + _pi(i, i)] > 0.0 and not (s[s0 + i * M + i] > 0.0):    # pivot) is not
            return False                                                  # identified
    # N^-1_11 = || L^-1 e_1 ||^2: forward solve L v = e_1 (v_0 = 0)
    vv = 0.0
    for q in range(1, m):
        dq = s[s0 + q * M + q]
        acc = 1.0 if q == 1 else 0.0
        for r in range(1, q):
            acc -= s[s0 + q * M + r] * s[v0 + r]
        vq = acc / dq if dq > 0.0 else 0.0
        s[v0 + q] = vq
        vv += vq * vq
    sxx = st[o + _pi(1, 1)] - st[o + _pi(0, 1)] ** 2 / st[o + _pi(0, 0)]
    return vv * sxx - 1.0 <= eps * eps * n


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
def fit_row(st, at, xj, yj, k, est, mu):
    """Add one row of a series with controls (``k > 2``) to the fit and return ``log q`` (the
    working response under the Poisson model) less the effects of controls beyond ``NCF``
    (the estimator's current coefficients). ``mu``: the row's working weight, the Poisson
    model's predicted mean, NaN for the log-log models (weight 1). Called on every row, the
    estimator's warm-up included, so that the controls are identified about when the detector
    could start; a row with a NaN is not added."""
    kc = min(k - 2, SG.NCF)
    ys = yj
    for i in range(2 + SG.NCF, k):
        ys -= est[K.NS + i] * xj[i]
    ok = ys == ys and xj[1] == xj[1]
    for i in range(2, 2 + kc):
        if not (xj[i] == xj[i]):
            ok = False
    wt = 1.0
    if mu == mu:
        wt = mu
        ok = ok and mu > 0.0
    if ok:
        fit_add(st, at + SG.CFIT0, xj, ys, kc, wt)
    return ys


@njit(cache=True, inline="always")
def fit_response(st, at, xj, yj, k, est, work, w0, mu):
    """``(y*, ready)`` for one row of a series with controls (``k > 2``; split state at
    ``st[at:]``, the estimator's state ``est``, scratch ``work[w0:]`` of :data:`SCRATCH`
    floats): adds the row to the fit (:func:`fit_row`; weight ``mu``, the Poisson model's
    predicted mean, or 1 when ``mu`` is NaN), solves it and returns ``y* = log q - c' z`` with
    the fit's ``c`` for the first ``NCF`` controls and the estimator's current coefficient for
    any further ones; ``ready`` is False (do not feed the detector) until the controls are
    identified (:func:`fit_identified`, once per series; ``n`` the fit's rows: ``N_00``
    unweighted, the estimator's row count ``est[I_N]`` with weights, so that
    :data:`MIN_FIT_ROWS` and the rule's noise stay those of one typical row); at that row the
    detector's window sums start from the earlier rows when the rows are unweighted
    (:func:`fit_seed`; not under the Poisson model).
    Once the controls' sums are on (from identification; a state restored from the layout
    without them turns them on at its next slope alarm), every response sum of the detector is
    re-expressed with the fit's ``c`` now (:func:`~monitor.detectors.split_glr.zs_express`)
    and the row's controls are left in ``ZS_ROW`` for the detector's step."""
    kc = min(k - 2, SG.NCF)
    ys = fit_row(st, at, xj, yj, k, est, mu)
    o = at + SG.CFIT0
    fit_solve(st, o, work, w0, kc)
    c0 = w0 + M * M
    seed = not (mu == mu)
    if st[at + SG.CFIT_ON] == 0.0:
        n = st[o + _pi(0, 0)] if seed else est[K.I_N]
        if not fit_identified(st, o, work, w0, kc, IDENT_EPS, n):
            return ys, False
        st[at + SG.CFIT_ON] = 1.0
        _zs_start(st, at, work, c0, kc)
        yr = ys
        for i in range(2, 2 + kc):
            yr -= work[c0 + i] * xj[i]
        if seed:
            fit_seed(st, at, xj, yr, kc, work, w0)
    elif st[at + SG.ZS_ON] != 0.0 and st[at + SG.ZS_K] == 0.0:
        _zs_start(st, at, work, c0, kc)      # turned on by a slope alarm (sums empty)
    else:
        # every response sum of the detector to the fit's c now (a no-op while the
        # controls' sums are off: a state restored from the layout without them)
        SG.zs_express(st, at, work, c0 + 2)
    on = st[at + SG.ZS_ON] != 0.0
    for i in range(2, 2 + kc):
        if on:
            st[at + SG.ZS_ROW + i - 2] = xj[i]     # the row's controls, for the detector
        ys -= work[c0 + i] * xj[i]
    return ys, True


@njit(cache=True, inline="always")
def _zs_start(st, at, work, c0, kc):
    """The controls' sums start (empty): ``kc`` controls, the response sums in units of the
    fit's ``c`` now (``work[c0 + 2:]``)."""
    st[at + SG.ZS_ON] = 1.0
    st[at + SG.ZS_K] = float(kc)
    for i in range(kc):
        st[at + SG.ZS_C + i] = work[c0 + 2 + i]


@njit(cache=True, inline="always")
def fit_seed(st, at, xj, yr, kc, work, w0):
    """At identification, the detector's window sums start from every earlier row of the
    series, with ``y* = log q - c' z`` for the fit's ``c`` now (instead of being dropped): the
    sums ``(n, Sx, Sxx, Sy*, Sxy*)`` are read off the normal equations, ``Sy* = N_0y - sum_i
    c_i N_0i`` and ``Sxy* = N_1y - sum_i c_i N_1i`` (linear in ``c``), less the current row
    (``x = xj[1]``, ``y* = yr``; it is fed next), in the detector's coordinates centred at
    the current log price (which :func:`~monitor.detectors.split_glr.split_step` takes as its
    origin). They join the reference when the charts start, like the rows fed before it.
    The controls' sums of the same rows (``sum z_k``, ``sum (x - x_now) z_k``) start with
    them, so that later changes of ``c`` re-express these rows too.
    Measured: without them a retail series that waited ~60 days for its controls lost them
    from its before sample, and a change of b at day 189 went unalerted in 420 days."""
    o = at + SG.CFIT0
    c0 = w0 + M * M
    n = st[o + _pi(0, 0)]
    sx = st[o + _pi(0, 1)]
    sxx = st[o + _pi(1, 1)]
    sy = st[o + _pi(0, MP - 1)]
    sxy = st[o + _pi(1, MP - 1)]
    for i in range(2, 2 + kc):
        sy -= work[c0 + i] * st[o + _pi(0, i)]
        sxy -= work[c0 + i] * st[o + _pi(1, i)]
    x = xj[1]
    ok = yr == yr and x == x
    for i in range(2, 2 + kc):
        if not (xj[i] == xj[i]):
            ok = False
    if ok:                         # the current row is in the fit: leave it to the detector
        n -= 1.0
        sx -= x
        sxx -= x * x
        sy -= yr
        sxy -= x * yr
    if n < 1.0 or not (x == x) or st[at + SG.D_NF] != 0.0:
        return
    st[at + SG.C0] = n
    st[at + SG.C0 + 1] = sx - n * x
    st[at + SG.C0 + 2] = max(sxx - 2.0 * x * sx + n * x * x, 0.0)
    st[at + SG.C0 + 3] = sy
    st[at + SG.C0 + 4] = sxy - x * sy
    # and the controls' sums of the same rows (sum z_k, sum (x - x_now) z_k), so that later
    # changes of c re-express them too
    for i in range(kc):
        sz = st[o + _pi(0, 2 + i)]
        sxz = st[o + _pi(1, 2 + i)]
        if ok:
            sz -= xj[2 + i]
            sxz -= x * xj[2 + i]
        st[at + SG.ZS_CW + i] = sz
        st[at + SG.ZS_CW + SG.NCF + i] = sxz - x * sz
