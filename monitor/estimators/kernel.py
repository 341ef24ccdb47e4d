"""Compiled log-log estimator step (weighted least squares with exponential forgetting),
shared by every path.

One series' state is one flat float64 vector (layout below, size :func:`state_size`), so a
batch of series is a 2-D array and a checkpoint is a list of floats. The same compiled step
runs inside :meth:`monitor.estimators.ElasticityRLS.learn_one`, the batch loop :func:`rls_run`
and the pipeline (through :func:`monitor.estimators.dispatch.estimator_step`), so streaming and
batch results are identical to the bit. The batch loop also runs the k = 2 step on four
different series at once (:func:`step_two_lanes`, one series per vector lane): the same IEEE
operations in the same order, so the same bits; it is a second copy of :func:`step_two_band`
that must change with it (tests/test_estimator_bits.py compares the two paths).

The update, for design row ``x`` (length k), response ``y = log q`` and forgetting ``lam``:

    e   = y - x' theta_{t-1}              one-step-ahead prediction error (log scale)
    A   <- lam A + x x'                   information matrix (exponentially weighted X'X)
    c   <- lam c + x y,  Y2 <- lam Y2 + y^2
    theta = A^- c                         exact weighted least squares at every step
    V   = Y2 - theta' c                   weighted residual sum of squares
    W   <- lam W + 1,   W2 <- lam^2 W2 + 1 sum of weights and of squared weights

The information form is recursive least squares written on ``A`` instead of ``P = A^{-1}``
(Ljung & Soderstrom 1983, ch. 2, give both). It starts exactly diffuse: no prior unless the
user gives one (then ``A_0 = diag(1 / prior variance)``, ``c_0 = A_0 theta_0``), a singular
``A`` leaves the unidentified columns out (:mod:`monitor.estimators.solve`), so forgetting 1
is ordinary least squares from the first identified observation on, with no error carried
from step to step.

Bands (``band``): ``classic`` ``Var(theta) = sigma^2 P S P``, ``S = sum w^2 x x'``,
``sigma^2 = V / (W - rank)``; ``hc`` the White (1980) sandwich ``c P Omega P`` with
``Omega = sum w^2 e^2 x x'`` at the current theta and the small-sample factor
``c = W2 / (W2 - rank W3 / W)`` (``W3 = sum w^3``): with leverages ``h_s ~ rank w_s / W`` the meat
is biased by ``sum w_s^2 h_s``, and ``c`` removes that; at forgetting 1 it is ``n / (n - k)``,
MacKinnon & White's (1985) HC1; ``hac`` Newey & West (1987) with a Bartlett
kernel over ``lags`` lags, same factor (:mod:`monitor.estimators.sandwich`), its limits widened
by the fixed-b critical value of Kiefer & Vogelsang (2005) (:func:`fixed_b_factor`). Limits:
Student-t with ``n_eff - rank`` degrees of freedom, ``n_eff = W^2 / W2`` (Kish 1965). The standardized
innovation ``z = e / (sigma sqrt(1 + x' P S P x))`` uses the previous state and the classic
form for every band (the detectors' thresholds are designed for it).

Identification: ``x_sd = sqrt(s_b / W)``, the weighted sd of log price left after the
intercept and the controls (``s_b = 1 / (A^{-1})_bb``, :mod:`monitor.estimators.solve`). The
status is ``low_variation`` while ``x_sd`` or the exponentially weighted sd of the raw log price
(same ``lam``) is below ``min_price_sd``, and the elasticity is not reported (NaN) while the
log price column is dependent on the others.

Excitation guard: the sd of log price over a short window (``guard_lam``, default 0.8, about 9
observations) is tracked; while it is below ``min_price_sd`` forgetting is paused (``lam``
replaced by 1), so information along the unexcited direction is not forgotten while prices are
flat: the "conditional updating" remedy for estimator windup (Astrom & Wittenmark 1995,
Adaptive Control, sec. 11.x; from memory).

Retransformation diagnostics: exponentially weighted sums of the a-posteriori residual
``r = y - x' theta_t`` to the powers 2, 3, 4 and of ``exp(r)`` (Duan 1983 smearing).

State layout (float64): ``NS`` scalars, ``theta`` (k), ``A`` (k x k), ``c`` (k), the centring
reference (first observation's ``x_1..x_{k-1}, y``: k), the meat
tensor (classic: ``k(k+1)/2``; hc: ``k(k+1)/2 (k+1)(k+2)/2``), and for hac per lag its tensor
plus the lagged row ``(x, y, weight)``. Bytes per series (8 per float) at k = 2: classic 288,
hc 408, hac with 8 lags 1,816 (the previous RLS state: 200).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from monitor.estimators.sandwich import (cd_pairs, centre_theta, centre_vector, g_pairs,
                                        meat_form, s_form, update_q, update_t)
from monitor.estimators.solve import DROP_TOL, factor_pair, price_column, solve_pair
from monitor.estimators.packed import (div2, div4, sqrt4, vadd, vand, vdiv, veq, vgt, vlt,
                                       vmul, vnot, vor, vsel, vsqrt, vsub)
from monitor.estimators.tquantile import t_lookup, t_lookup_inv


# layout of the scalar part of a state vector
(I_W, I_W2, I_V, I_N, I_LPW, I_LPMEAN, I_LPM2, I_E, I_ZSD, I_Z, I_PAUSED, I_NPAUSED,
 I_GW, I_GMEAN, I_GM2, I_YY, I_XSD, I_R2, I_R3, I_R4, I_SMEAR, I_W3, I_W4) = range(23)
NS = 23

# columns of the per-observation output row
# O_BAND: band code of the estimate; O_YLOG: the log-scale response the detectors use (y itself
# here; the Poisson model's working response)
(O_BETA, O_SE, O_LO, O_HI, O_NEFF, O_STATUS, O_E, O_Z, O_INTERCEPT, O_RESID_SD,
 O_BAND, O_YLOG) = range(12)
NOUT = 12

ST_WARMING_UP, ST_OK, ST_LOW_VARIATION = 0, 1, 2

#: band codes (recorded per estimate in column ``O_BAND``)
BAND_CLASSIC, BAND_HC, BAND_HAC = 0, 1, 2
BANDS = {"classic": BAND_CLASSIC, "hc": BAND_HC, "hac": BAND_HAC}
BAND_NAMES = {v: k for k, v in BANDS.items()}


def n_ab(k: int) -> int:
    return k * (k + 1) // 2


def n_cd(k: int, band: int) -> int:
    return 1 if band == BAND_CLASSIC else (k + 1) * (k + 2) // 2


def state_size(k: int, band: int = BAND_CLASSIC, lags: int = 0) -> int:
    """Length of one series' state vector for ``k`` parameters, band code and HAC lags."""
    base = NS + 3 * k + k * k + n_ab(k) * n_cd(k, band)
    if band == BAND_HAC:
        base += lags * (n_ab(k) * n_cd(k, band) + k + 2)
    return base


def work_size(k: int) -> int:
    """Length of the scratch vector the general step needs: the factors of the information
    matrix before and after the row and the matrix after it (``3 k^2``), eight vectors of k,
    the centred row ``(x, y)`` (k + 1), the meat weights and the operands of the tensor
    updates (6 x ``(k + 1)(k + 2) / 2``) and the meat's rows ``Omega_ab``
    (``k (k + 1) / 2``)."""
    return 3 * k * k + 9 * k + 1 + 6 * ((k + 1) * (k + 2) // 2) + k * (k + 1) // 2


def init_state(prior_mean: np.ndarray, prior_var: np.ndarray, band: int = BAND_CLASSIC,
               lags: int = 0) -> np.ndarray:
    """Fresh state; ``prior_var`` entries that are ``inf`` are diffuse (no prior information).

    A finite prior variance ``v_i`` on coefficient i enters as information ``1 / v_i`` with
    ``c_i = theta0_i / v_i`` and ``Y2 = sum theta0_i^2 / v_i`` (it then decays with ``lam`` like
    any observation).
    """
    mean = np.asarray(prior_mean, dtype=np.float64)
    var = np.asarray(prior_var, dtype=np.float64)
    k = mean.shape[0]
    st = np.zeros(state_size(k, band, lags))
    info = np.where(np.isfinite(var), 1.0 / var, 0.0)
    st[NS:NS + k] = np.where(info > 0, mean, 0.0)
    st[NS + k:NS + k + k * k] = np.diag(info).ravel()
    st[NS + k + k * k:NS + 2 * k + k * k] = info * mean
    st[I_YY] = float(np.sum(info * mean * mean))
    return st


@njit(cache=True, inline="always")
def ew_variance(st, i, v, lam):
    """Exponentially weighted mean and variance of ``v`` in slots i, i+1, i+2 (West 1979)."""
    w = lam * st[i] + 1.0
    d = v - st[i + 1]
    mean = st[i + 1] + d / w
    m2 = lam * st[i + 2] + d * (v - mean)
    if m2 < 0.0:
        m2 = 0.0
    st[i] = w
    st[i + 1] = mean
    st[i + 2] = m2
    return m2 / w


@njit(cache=True, inline="always")
def excitation(st, lp, lam, guard, guard_lam, min_price_sd):
    """Update both raw price-variation statistics; return (raw low variation, lambda now).

    Raw low variation: the EW sd of log price over the estimator's own window (``lam``) is
    below ``min_price_sd``. The guard pauses forgetting when the sd over a short window
    (``guard_lam``, about (1 + g) / (1 - g) observations) is below it.
    """
    thr = min_price_sd * min_price_sd
    lowvar = ew_variance(st, I_LPW, lp, lam) < thr
    fast_low = ew_variance(st, I_GW, lp, guard_lam) < thr
    if guard and fast_low:
        st[I_NPAUSED] += 1.0
        st[I_PAUSED] = 1.0
        return lowvar, 1.0
    st[I_PAUSED] = 0.0
    return lowvar, lam


@njit(cache=True, inline="always")
def diagnostics(st, r, lt):
    """Exponentially weighted sums of the a-posteriori residual's powers and of ``exp(r)``."""
    r2 = r * r
    st[I_R2] = lt * st[I_R2] + r2
    st[I_R3] = lt * st[I_R3] + r2 * r
    st[I_R4] = lt * st[I_R4] + r2 * r2
    st[I_SMEAR] = lt * st[I_SMEAR] + np.exp(r)


@njit(cache=True, inline="always")
def fixed_b_factor(lags, n_meat):
    """Widening of the hac band for the variability of the Newey-West variance: the ratio of
    the fixed-b 97.5% critical value of the Bartlett kernel, ``1.9600 + 2.9694 b + 0.4160 b^2
    - 0.5324 b^3`` (Kiefer & Vogelsang 2005's fitted polynomial; coefficients recalled, and
    checked within 2% for b in 0.05-1 against the fixed-b limit simulated from its definition
    in tests/test_estimator_bands.py), to 1.96, with
    ``b = (lags + 1) / n_meat`` and ``n_meat = W2^2 / W4`` the effective number of rows of the
    meat (n at forgetting 1). Applied at every level (exact for 95%, an approximation else)."""
    b = (lags + 1.0) / n_meat if n_meat > 0.0 else 1.0
    if b > 1.0:
        b = 1.0
    return (1.96 + b * (2.9694 + b * (0.4160 - 0.5324 * b))) / 1.96


@njit(cache=True, inline="always")
def hc_factor(W, W2, W3, rank):
    """Small-sample factor of the robust bands, ``W2 / (W2 - rank W3 / W)`` (NaN if <= 0)."""
    d = W2 - rank * W3 / W
    return W2 / d if d > 0.0 else np.nan


@njit(cache=True, inline="always")
def band_row(out, ok, beta, se, tq_, identified, warm, lowvar):
    """The elasticity, its band and the status of the output row (both step forms).

    ``ok``: b is identified and its variance defined (``se`` and the t quantile ``tq_`` are
    then used: limits ``beta -+ tq_ se``); otherwise the band is NaN and the status is
    ``warming_up`` while b is identified or the estimator is warming up, else
    ``low_variation``. With a band, the status is ``warming_up`` while warming up or when the
    t quantile is undefined, ``low_variation`` when the price varies too little, else ``ok``."""
    if ok:
        out[O_BETA] = beta
        out[O_SE] = se
        out[O_LO] = beta - tq_ * se
        out[O_HI] = beta + tq_ * se
        if warm or not (tq_ == tq_):
            out[O_STATUS] = ST_WARMING_UP
        elif lowvar:
            out[O_STATUS] = ST_LOW_VARIATION
        else:
            out[O_STATUS] = ST_OK
    else:
        out[O_BETA] = beta if identified else np.nan
        out[O_SE] = np.nan
        out[O_LO] = np.nan
        out[O_HI] = np.nan
        if identified or warm:
            out[O_STATUS] = ST_WARMING_UP
        else:
            out[O_STATUS] = ST_LOW_VARIATION


@njit(cache=True, inline="always")
def finish(st, out, beta, intercept, identified, vb, V, rank, k, neff, lowvar, band, e, z,
           min_neff, tq, ylog, qmult=1.0):
    """Write the output row from the updated quantities (shared by both step forms)."""
    W = st[I_W]
    dof = W - rank
    out[O_NEFF] = neff
    out[O_E] = e
    out[O_Z] = z
    out[O_INTERCEPT] = intercept
    out[O_BAND] = band
    out[O_YLOG] = ylog
    warm = neff < min_neff or neff < k + 2.0
    if dof > 0.0 and V > 0.0:
        out[O_RESID_SD] = np.sqrt(V / dof)
    else:
        out[O_RESID_SD] = np.nan
    if identified and dof > 0.0 and V > 0.0 and vb >= 0.0:
        se = np.sqrt(vb)
        band_row(out, True, beta, se, t_lookup(tq, neff - rank) * qmult, identified, warm,
                 lowvar)
    else:
        band_row(out, False, beta, np.nan, np.nan, identified, warm, lowvar)


@njit(cache=True, inline="always")
def step_two_band(st, x1, y, band, lam, guard, guard_lam, min_price_sd, min_neff, tq, out):
    """The update written out for k = 2 (intercept and log price), bands classic and hc.

    Equal to :func:`linear_step` to rounding (tests/test_estimator_bands.py checks 1e-10), and
    to the bit to its own form before issue 15's second round
    (benchmarks/estimator_previous.py; tests/test_estimator_bits.py): the same floating-point
    operations on the same operands, arranged for speed. Independent divisions go through the
    divider together (:mod:`monitor.estimators.packed`: 4 lanes cost about one scalar division),
    ``(-u) / v`` is written ``-(u / v)`` and ``rank * W3 / W`` as ``rank * (W3 / W)`` (exact:
    IEEE rounding is symmetric in sign and rank is 1 or 2, a power of two), the Student-t
    lookup takes its ``1 / df`` from a packed division (:func:`t_lookup_inv`), and the residual
    diagnostics (a call to ``exp``) come last, when few values are live across the call.
    """
    thr = min_price_sd * min_price_sd
    # the divisions that need only the previous state, in two packed instructions: the two
    # excitation windows' mean steps d / w, and A01^2 / A00, A01 / A00, 1 / A00, V / (W - 2)
    # of the predictive variance
    w1 = lam * st[I_LPW] + 1.0
    d1 = x1 - st[I_LPMEAN]
    w2 = guard_lam * st[I_GW] + 1.0
    d2 = x1 - st[I_GMEAN]
    a = st[NS]
    b = st[NS + 1]
    A00 = st[NS + 2]
    A01 = st[NS + 3]
    A11 = st[NS + 5]
    W = st[I_W]
    V = st[I_V]
    q_d1, q_d2, q_sq, q_r = div4((d1, d2, A01 * A01, A01), (w1, w2, A00, A00))
    q_i00, q_vd = div2((1.0, V), (A00, W - 2.0))
    # excitation (both windows), as ew_variance and excitation; then m2 / w of both windows
    # and the previous 1 / s_b in one instruction
    mean1 = st[I_LPMEAN] + q_d1
    m2a = lam * st[I_LPM2] + d1 * (x1 - mean1)
    if m2a < 0.0:
        m2a = 0.0
    mean2 = st[I_GMEAN] + q_d2
    m2b = guard_lam * st[I_GM2] + d2 * (x1 - mean2)
    if m2b < 0.0:
        m2b = 0.0
    sb0 = A11 - q_sq
    v1, v2, p11, _ = div4((m2a, m2b, 1.0, 1.0), (w1, w2, sb0, 1.0))
    st[I_LPW] = w1
    st[I_LPMEAN] = mean1
    st[I_LPM2] = m2a
    st[I_GW] = w2
    st[I_GMEAN] = mean2
    st[I_GM2] = m2b
    raw_low = v1 < thr
    lt = lam
    if guard and v2 < thr:
        st[I_NPAUSED] += 1.0
        st[I_PAUSED] = 1.0
        lt = 1.0
    else:
        st[I_PAUSED] = 0.0
    ncd = 1 if band == BAND_CLASSIC else 6
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
    zsd = np.nan
    zok = False
    if A00 > 0.0 and A11 > 0.0 and sb0 > DROP_TOL * A11:
        p01 = -q_r * p11
        p00 = q_i00 - q_r * p01
        u1 = p01 + p11 * x1
        u0 = p00 + p01 * x1 + mu * u1
        s00 = st[t0]
        s01 = st[t0 + ncd]
        s11 = st[t0 + 2 * ncd]
        q = u0 * (s00 * u0 + s01 * u1) + u1 * (s01 * u0 + s11 * u1)
        if W - 2.0 > 0.0 and V > 0.0:
            zsd = np.sqrt(q_vd * (1.0 + q))
            zok = True
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
    # A01^2 / A00 and A01 / A00 of the solve, n_eff = W^2 / W2, W3 / W of the hc factor
    q_sq, q_r, neff, q_w3 = div4((A01 * A01, A01, W * W, W3), (A00, A00, W2, W))
    z = np.nan
    if zok:
        z = e / zsd
    st[I_E] = e
    st[I_ZSD] = zsd
    st[I_Z] = z
    # solve (log price last: Frisch-Waugh form)
    sb = A11 - q_sq
    identified = A11 > 0.0 and sb > DROP_TOL * A11
    rank = 2.0 if identified else 1.0
    # rank * W3 / W == rank * (W3 / W) to the bit: rank is 1 or 2 (a power of two)
    hd = W2 - rank * q_w3
    # b's quotient, 1 / s_b, s_b / W (x_sd^2) and 1 / df of the t lookup; then a and the hc
    # factor W2 / (W2 - rank W3 / W)
    bq, p11, xs2, u_df = div4((c1 - q_r * c0, 1.0, sb, 1.0), (sb, sb, W, neff - rank))
    if identified:
        b = bq
        num = c0 - A01 * b
    else:
        b = 0.0
        num = c0
    a, hf = div2((num, W2), (A00, hd))
    st[NS] = a
    st[NS + 1] = b
    V = YY - a * c0 - b * c1
    if V < 0.0:
        V = 0.0
    st[I_V] = V
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
    dof = W - rank
    vd, _ = div2((V, 1.0), (dof, 1.0))
    vb = np.nan
    if identified:
        p01 = -q_r * p11 + mu * p11
        if band == BAND_CLASSIC:
            s00 = st[t0]
            s01 = st[t0 + 1]
            s11 = st[t0 + 2]
            vb = p01 * (s00 * p01 + s01 * p11) + p11 * (s01 * p01 + s11 * p11)
            if W > rank:
                vb *= vd
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
            vb *= hf if hd > 0.0 else np.nan
    # x_sd, the residual sd and the elasticity's se in one square root
    xsd_, rsd, se, _ = sqrt4((xs2, vd, vb, 1.0))
    xsd = xsd_ if sb > 0.0 else 0.0
    st[I_XSD] = xsd
    lowvar = raw_low or xsd < min_price_sd
    # output row (as finish does for the general step)
    out[O_NEFF] = neff
    out[O_E] = e
    out[O_Z] = z
    out[O_INTERCEPT] = a
    out[O_BAND] = band
    out[O_YLOG] = y
    warm = neff < min_neff or neff < 4.0
    vok = dof > 0.0 and V > 0.0
    out[O_RESID_SD] = rsd if vok else np.nan
    if identified and vok and vb >= 0.0:
        band_row(out, True, b, se, t_lookup_inv(tq, neff - rank, u_df), identified, warm,
                 lowvar)
    else:
        band_row(out, False, b, np.nan, np.nan, identified, warm, lowvar)
    diagnostics(st, y - a - b * x1, lt)


# ---- four series at once (the batch loop's k = 2 rows of four different series) ----------

@njit(cache=True, inline="always")
def _c4(v):
    return (v, v, v, v)


@njit(cache=True, inline="always")
def _g4(s0, s1, s2, s3, i):
    return (s0[i], s1[i], s2[i], s3[i])


@njit(cache=True, inline="always")
def _p4(s0, s1, s2, s3, i, v):
    s0[i] = v[0]
    s1[i] = v[1]
    s2[i] = v[2]
    s3[i] = v[3]


@njit(cache=True, inline="always")
def _meat_row4(s0, s1, s2, s3, i, l2, xa, xc, yc, x2, xy, y2):
    """One row of the hc meat tensor (as the loop over ``ia`` in :func:`step_two_band`);
    returns its six updated sums."""
    m0 = vadd(vmul(l2, _g4(s0, s1, s2, s3, i)), xa)
    m1 = vadd(vmul(l2, _g4(s0, s1, s2, s3, i + 1)), vmul(xa, xc))
    m2 = vadd(vmul(l2, _g4(s0, s1, s2, s3, i + 2)), vmul(xa, yc))
    m3 = vadd(vmul(l2, _g4(s0, s1, s2, s3, i + 3)), vmul(xa, x2))
    m4 = vadd(vmul(l2, _g4(s0, s1, s2, s3, i + 4)), vmul(xa, xy))
    m5 = vadd(vmul(l2, _g4(s0, s1, s2, s3, i + 5)), vmul(xa, y2))
    _p4(s0, s1, s2, s3, i, m0)
    _p4(s0, s1, s2, s3, i + 1, m1)
    _p4(s0, s1, s2, s3, i + 2, m2)
    _p4(s0, s1, s2, s3, i + 3, m3)
    _p4(s0, s1, s2, s3, i + 4, m4)
    _p4(s0, s1, s2, s3, i + 5, m5)
    return m0, m1, m2, m3, m4, m5


@njit(cache=True, inline="always")
def _lane_row(out, beta, se, lo, hi, neff, status, e, z, a, rsd, band, y):
    """Store one lane's output row."""
    out[O_BETA] = beta
    out[O_SE] = se
    out[O_LO] = lo
    out[O_HI] = hi
    out[O_NEFF] = neff
    out[O_STATUS] = status
    out[O_E] = e
    out[O_Z] = z
    out[O_INTERCEPT] = a
    out[O_RESID_SD] = rsd
    out[O_BAND] = band
    out[O_YLOG] = y


@njit(cache=True, inline="always")
def step_two_lanes(s0, s1, s2, s3, o0, o1, o2, o3, x1, y, band, lam, guard, guard_lam,
                   min_price_sd, min_neff, tq):
    """:func:`step_two_band` on four different series at once, one per vector lane.

    ``s0..s3`` are the four states (distinct series), ``o0..o3`` their output rows, ``x1`` and
    ``y`` 4-tuples of log price and response. Every operation is the scalar step's, on the
    same operands in the same order, done lane-wise by :mod:`monitor.estimators.packed`'s
    vector operations (IEEE, no fast-math: each lane's result is the scalar result to the
    bit); the branches of the scalar step (:func:`band_row`'s included) become lane-wise
    selects of values computed on every lane (a lane may divide by zero or take the root of a
    negative number where the scalar step would not: that value is not selected). The t
    lookup, the stores of the output rows and the residual diagnostics (a call to ``exp``) run
    lane by lane in scalar code.
    """
    ONE = _c4(1.0)
    TWO = _c4(2.0)
    ZERO = _c4(0.0)
    NZ = _c4(-0.0)
    NAN = _c4(np.nan)
    DT = _c4(DROP_TOL)
    LAM = _c4(lam)
    GL = _c4(guard_lam)
    thr = min_price_sd * min_price_sd
    THR = _c4(thr)
    w1 = vadd(vmul(LAM, _g4(s0, s1, s2, s3, I_LPW)), ONE)
    lpmean = _g4(s0, s1, s2, s3, I_LPMEAN)
    d1 = vsub(x1, lpmean)
    w2 = vadd(vmul(GL, _g4(s0, s1, s2, s3, I_GW)), ONE)
    gmean = _g4(s0, s1, s2, s3, I_GMEAN)
    d2 = vsub(x1, gmean)
    a = _g4(s0, s1, s2, s3, NS)
    b = _g4(s0, s1, s2, s3, NS + 1)
    A00 = _g4(s0, s1, s2, s3, NS + 2)
    A01 = _g4(s0, s1, s2, s3, NS + 3)
    A11 = _g4(s0, s1, s2, s3, NS + 5)
    W = _g4(s0, s1, s2, s3, I_W)
    V = _g4(s0, s1, s2, s3, I_V)
    q_d1 = vdiv(d1, w1)
    q_d2 = vdiv(d2, w2)
    q_sq = vdiv(vmul(A01, A01), A00)
    q_r = vdiv(A01, A00)
    q_i00 = vdiv(ONE, A00)
    q_vd = vdiv(V, vsub(W, TWO))
    mean1 = vadd(lpmean, q_d1)
    m2a = vadd(vmul(LAM, _g4(s0, s1, s2, s3, I_LPM2)), vmul(d1, vsub(x1, mean1)))
    m2a = vsel(vlt(m2a, ZERO), ZERO, m2a)
    mean2 = vadd(gmean, q_d2)
    m2b = vadd(vmul(GL, _g4(s0, s1, s2, s3, I_GM2)), vmul(d2, vsub(x1, mean2)))
    m2b = vsel(vlt(m2b, ZERO), ZERO, m2b)
    sb0 = vsub(A11, q_sq)
    v1 = vdiv(m2a, w1)
    v2 = vdiv(m2b, w2)
    p11 = vdiv(ONE, sb0)
    _p4(s0, s1, s2, s3, I_LPW, w1)
    _p4(s0, s1, s2, s3, I_LPMEAN, mean1)
    _p4(s0, s1, s2, s3, I_LPM2, m2a)
    _p4(s0, s1, s2, s3, I_GW, w2)
    _p4(s0, s1, s2, s3, I_GMEAN, mean2)
    _p4(s0, s1, s2, s3, I_GM2, m2b)
    raw_low = vlt(v1, THR)
    pause = vand(vlt(v2, THR), _c4(guard))
    npaused = _g4(s0, s1, s2, s3, I_NPAUSED)
    _p4(s0, s1, s2, s3, I_NPAUSED, vsel(pause, vadd(npaused, ONE), npaused))
    _p4(s0, s1, s2, s3, I_PAUSED, vsel(pause, ONE, ZERO))
    lt = vsel(pause, ONE, LAM)
    ncd = 1 if band == BAND_CLASSIC else 6
    t0 = NS + 10
    first = veq(_g4(s0, s1, s2, s3, I_N), ZERO)
    mu = vsel(first, x1, _g4(s0, s1, s2, s3, NS + 8))
    nu = vsel(first, y, _g4(s0, s1, s2, s3, NS + 9))
    _p4(s0, s1, s2, s3, NS + 8, mu)
    _p4(s0, s1, s2, s3, NS + 9, nu)
    xc = vsub(x1, mu)
    yc = vsub(y, nu)
    e = vsub(vsub(y, a), vmul(b, x1))
    # classic predictive variance from the previous state, on every lane; kept where the
    # scalar step computes it
    p01 = vmul(vsub(NZ, q_r), p11)
    p00 = vsub(q_i00, vmul(q_r, p01))
    u1 = vadd(p01, vmul(p11, x1))
    u0 = vadd(vadd(p00, vmul(p01, x1)), vmul(mu, u1))
    s00 = _g4(s0, s1, s2, s3, t0)
    s01 = _g4(s0, s1, s2, s3, t0 + ncd)
    s11 = _g4(s0, s1, s2, s3, t0 + 2 * ncd)
    q = vadd(vmul(u0, vadd(vmul(s00, u0), vmul(s01, u1))),
             vmul(u1, vadd(vmul(s01, u0), vmul(s11, u1))))
    zok = vand(vand(vand(vgt(A00, ZERO), vgt(A11, ZERO)), vgt(sb0, vmul(DT, A11))),
               vand(vgt(vsub(W, TWO), ZERO), vgt(V, ZERO)))
    zsd = vsel(zok, vsqrt(vmul(q_vd, vadd(ONE, q))), NAN)
    # update the sums
    A00 = vadd(vmul(lt, A00), ONE)
    A01 = vadd(vmul(lt, A01), x1)
    A11 = vadd(vmul(lt, A11), vmul(x1, x1))
    c0 = vadd(vmul(lt, _g4(s0, s1, s2, s3, NS + 6)), y)
    c1 = vadd(vmul(lt, _g4(s0, s1, s2, s3, NS + 7)), vmul(x1, y))
    YY = vadd(vmul(lt, _g4(s0, s1, s2, s3, I_YY)), vmul(y, y))
    W = vadd(vmul(lt, W), ONE)
    l2 = vmul(lt, lt)
    W2 = vadd(vmul(l2, _g4(s0, s1, s2, s3, I_W2)), ONE)
    W3 = vadd(vmul(vmul(l2, lt), _g4(s0, s1, s2, s3, I_W3)), ONE)
    _p4(s0, s1, s2, s3, I_W3, W3)
    _p4(s0, s1, s2, s3, NS + 2, A00)
    _p4(s0, s1, s2, s3, NS + 3, A01)
    _p4(s0, s1, s2, s3, NS + 4, A01)
    _p4(s0, s1, s2, s3, NS + 5, A11)
    _p4(s0, s1, s2, s3, NS + 6, c0)
    _p4(s0, s1, s2, s3, NS + 7, c1)
    _p4(s0, s1, s2, s3, I_YY, YY)
    _p4(s0, s1, s2, s3, I_W, W)
    _p4(s0, s1, s2, s3, I_W2, W2)
    _p4(s0, s1, s2, s3, I_N, vadd(_g4(s0, s1, s2, s3, I_N), ONE))
    q_sq = vdiv(vmul(A01, A01), A00)
    q_r = vdiv(A01, A00)
    neff = vdiv(vmul(W, W), W2)
    q_w3 = vdiv(W3, W)
    z = vsel(zok, vdiv(e, zsd), NAN)
    _p4(s0, s1, s2, s3, I_E, e)
    _p4(s0, s1, s2, s3, I_ZSD, zsd)
    _p4(s0, s1, s2, s3, I_Z, z)
    sb = vsub(A11, q_sq)
    identified = vand(vgt(A11, ZERO), vgt(sb, vmul(DT, A11)))
    rank = vsel(identified, TWO, ONE)
    hd = vsub(W2, vmul(rank, q_w3))
    bq = vdiv(vsub(c1, vmul(q_r, c0)), sb)
    p11 = vdiv(ONE, sb)
    xs2 = vdiv(sb, W)
    u_df = vdiv(ONE, vsub(neff, rank))
    b = vsel(identified, bq, ZERO)
    num = vsel(identified, vsub(c0, vmul(A01, b)), c0)
    a = vdiv(num, A00)
    hf = vdiv(W2, hd)
    _p4(s0, s1, s2, s3, NS, a)
    _p4(s0, s1, s2, s3, NS + 1, b)
    V = vsub(vsub(YY, vmul(a, c0)), vmul(b, c1))
    V = vsel(vlt(V, ZERO), ZERO, V)
    _p4(s0, s1, s2, s3, I_V, V)
    dof = vsub(W, rank)
    vd = vdiv(V, dof)
    p01 = vadd(vmul(vsub(NZ, q_r), p11), vmul(mu, p11))
    if band == BAND_CLASSIC:
        s00 = vadd(vmul(l2, _g4(s0, s1, s2, s3, t0)), ONE)
        s01 = vadd(vmul(l2, _g4(s0, s1, s2, s3, t0 + 1)), xc)
        s11 = vadd(vmul(l2, _g4(s0, s1, s2, s3, t0 + 2)), vmul(xc, xc))
        _p4(s0, s1, s2, s3, t0, s00)
        _p4(s0, s1, s2, s3, t0 + 1, s01)
        _p4(s0, s1, s2, s3, t0 + 2, s11)
        vb = vadd(vmul(p01, vadd(vmul(s00, p01), vmul(s01, p11))),
                  vmul(p11, vadd(vmul(s01, p01), vmul(s11, p11))))
        vb = vsel(vgt(W, rank), vmul(vb, vd), vb)
    else:
        x2 = vmul(xc, xc)
        xy = vmul(xc, yc)
        y2 = vmul(yc, yc)
        T0, T1, T2, T3, T4, T5 = _meat_row4(s0, s1, s2, s3, t0, l2, ONE, xc, yc, x2, xy, y2)
        T6, T7, T8, T9, T10, T11 = _meat_row4(s0, s1, s2, s3, t0 + 6, l2, xc, xc, yc, x2, xy,
                                              y2)
        T12, T13, T14, T15, T16, T17 = _meat_row4(s0, s1, s2, s3, t0 + 12, l2, x2, xc, yc,
                                                  x2, xy, y2)
        ac = vsub(vadd(a, vmul(mu, b)), nu)
        g0 = vmul(ac, ac)
        g1 = vmul(vmul(TWO, ac), b)
        g2 = vmul(_c4(-2.0), ac)
        g3 = vmul(b, b)
        g4 = vmul(_c4(-2.0), b)
        m00 = vadd(vadd(vadd(vadd(vadd(vmul(g0, T0), vmul(g1, T1)), vmul(g2, T2)),
                             vmul(g3, T3)), vmul(g4, T4)), T5)
        m01 = vadd(vadd(vadd(vadd(vadd(vmul(g0, T6), vmul(g1, T7)), vmul(g2, T8)),
                             vmul(g3, T9)), vmul(g4, T10)), T11)
        m11 = vadd(vadd(vadd(vadd(vadd(vmul(g0, T12), vmul(g1, T13)), vmul(g2, T14)),
                             vmul(g3, T15)), vmul(g4, T16)), T17)
        vb = vadd(vadd(vmul(vmul(p01, p01), m00), vmul(vmul(vmul(TWO, p01), p11), m01)),
                  vmul(vmul(p11, p11), m11))
        vb = vmul(vb, vsel(vgt(hd, ZERO), hf, NAN))
    vb = vsel(identified, vb, NAN)
    xsd = vsel(vgt(sb, ZERO), vsqrt(xs2), ZERO)
    rsd = vsqrt(vd)
    se = vsqrt(vb)
    _p4(s0, s1, s2, s3, I_XSD, xsd)
    lowvar = vor(raw_low, vlt(xsd, _c4(min_price_sd)))
    # the output rows (as band_row and the end of step_two_band), lane-wise; the t quantile
    # lane by lane
    vok = vand(vgt(dof, ZERO), vgt(V, ZERO))
    ok = vand(vand(identified, vok), vor(vgt(vb, ZERO), veq(vb, ZERO)))
    warm = vor(vlt(neff, _c4(min_neff)), vlt(neff, _c4(4.0)))
    q0 = t_lookup_inv(tq, neff[0] - rank[0], u_df[0]) if ok[0] else np.nan
    q1 = t_lookup_inv(tq, neff[1] - rank[1], u_df[1]) if ok[1] else np.nan
    q2 = t_lookup_inv(tq, neff[2] - rank[2], u_df[2]) if ok[2] else np.nan
    q3 = t_lookup_inv(tq, neff[3] - rank[3], u_df[3]) if ok[3] else np.nan
    tqv = (q0, q1, q2, q3)
    beta = vsel(vor(ok, identified), b, NAN)
    seo = vsel(ok, se, NAN)
    lo = vsel(ok, vsub(b, vmul(tqv, se)), NAN)
    hi = vsel(ok, vadd(b, vmul(tqv, se)), NAN)
    WU = _c4(float(ST_WARMING_UP))
    LV = _c4(float(ST_LOW_VARIATION))
    status = vsel(ok, vsel(vor(warm, vnot(veq(tqv, tqv))), WU,
                           vsel(lowvar, LV, _c4(float(ST_OK)))),
                  vsel(vor(identified, warm), WU, LV))
    rso = vsel(vok, rsd, NAN)
    bnd = _c4(float(band))
    _lane_row(o0, beta[0], seo[0], lo[0], hi[0], neff[0], status[0], e[0], z[0], a[0], rso[0],
              bnd[0], y[0])
    _lane_row(o1, beta[1], seo[1], lo[1], hi[1], neff[1], status[1], e[1], z[1], a[1], rso[1],
              bnd[1], y[1])
    _lane_row(o2, beta[2], seo[2], lo[2], hi[2], neff[2], status[2], e[2], z[2], a[2], rso[2],
              bnd[2], y[2])
    _lane_row(o3, beta[3], seo[3], lo[3], hi[3], neff[3], status[3], e[3], z[3], a[3], rso[3],
              bnd[3], y[3])
    diagnostics(s0, y[0] - a[0] - b[0] * x1[0], lt[0])
    diagnostics(s1, y[1] - a[1] - b[1] * x1[1], lt[1])
    diagnostics(s2, y[2] - a[2] - b[2] * x1[2], lt[2])
    diagnostics(s3, y[3] - a[3] - b[3] * x1[3], lt[3])


@njit(cache=True, inline="always")
def run_two_lanes(state, sid, X, y, band, lam, guard, guard_lam, min_price_sd, min_neff, tq,
                  out):
    """The k = 2 rows in order, four rows at a time when they belong to four different series
    (:func:`step_two_lanes`), else one row (:func:`step_two_band`)."""
    n = X.shape[0]
    j = 0
    while j + 4 <= n:
        i0 = sid[j]
        i1 = sid[j + 1]
        if i0 != i1:
            i2 = sid[j + 2]
            i3 = sid[j + 3]
            if i0 != i2 and i0 != i3 and i1 != i2 and i1 != i3 and i2 != i3:
                step_two_lanes(state[i0], state[i1], state[i2], state[i3], out[j], out[j + 1],
                               out[j + 2], out[j + 3],
                               (X[j, 1], X[j + 1, 1], X[j + 2, 1], X[j + 3, 1]),
                               (y[j], y[j + 1], y[j + 2], y[j + 3]), band, lam, guard,
                               guard_lam, min_price_sd, min_neff, tq)
                j += 4
                continue
            step_two_band(state[i0], X[j, 1], y[j], band, lam, guard, guard_lam,
                          min_price_sd, min_neff, tq, out[j])
            j += 1
            continue
        # a run of one series' rows (a burst, one long series): row by row to its end
        step_two_band(state[i0], X[j, 1], y[j], band, lam, guard, guard_lam, min_price_sd,
                      min_neff, tq, out[j])
        j += 1
        while j + 1 < n and sid[j + 1] == i0:
            step_two_band(state[i0], X[j, 1], y[j], band, lam, guard, guard_lam,
                          min_price_sd, min_neff, tq, out[j])
            j += 1
    while j < n:
        step_two_band(state[sid[j]], X[j, 1], y[j], band, lam, guard, guard_lam, min_price_sd,
                      min_neff, tq, out[j])
        j += 1


@njit(cache=True, inline="always")
def step_two(st, x1, y, lam, guard, guard_lam, min_price_sd, min_neff, tq, out):
    """k = 2, classic band (the form the detector threshold design simulates)."""
    step_two_band(st, x1, y, BAND_CLASSIC, lam, guard, guard_lam, min_price_sd, min_neff, tq,
                  out)


@njit(cache=True, inline="always")
def linear_step(st, x, y, k, band, lags, lam, guard, guard_lam, min_price_sd, min_neff, tq,
                out, w):
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
    thc = w[k * k + 4 * k:k * k + 5 * k]
    pt = w[k * k + 5 * k:k * k + 6 * k]
    xc = w[k * k + 6 * k:k * k + 7 * k + 1]    # centred (x, y)
    nz = (k + 1) * (k + 2) // 2
    z0 = k * k + 7 * k + 1
    gg = w[z0:z0 + nz]
    zcn = w[z0 + nz:z0 + 2 * nz]
    zdn = w[z0 + 2 * nz:z0 + 3 * nz]
    lcn = w[z0 + 3 * nz:z0 + 4 * nz]
    ldn = w[z0 + 4 * nz:z0 + 5 * nz]
    dg = w[z0 + 5 * nz:z0 + 6 * nz]
    acc = w[z0 + 6 * nz:z0 + 6 * nz + nab]
    m0 = z0 + 6 * nz + nab
    M = w[m0:m0 + k * k]              # factor of A after the row
    An = w[m0 + k * k:m0 + 2 * k * k]    # A after the row
    dropm = w[m0 + 2 * k * k:m0 + 2 * k * k + k]
    tmp2 = w[m0 + 2 * k * k + k:m0 + 2 * k * k + 2 * k]
    if st[I_N] == 0.0:
        for j in range(1, k):
            st[r0 + j - 1] = x[j]
        st[r0 + k - 1] = y
    xc[0] = x[0]
    for j in range(1, k):
        xc[j] = x[j] - st[r0 + j - 1]
    yc = y - st[r0 + k - 1]
    xc[k] = yc
    yhat = 0.0
    for i in range(k):
        yhat += st[th + i] * x[i]
    e = y - yhat
    W = st[I_W]
    V = st[I_V]
    # A before the row (factor L: the predictive variance) and after it (factor M: the
    # solution), factored and solved side by side
    for i in range(k):
        for j in range(i, k):
            v = lt * st[a0 + i * k + j] + x[i] * x[j]
            An[i * k + j] = v
            An[j * k + i] = v
        st[c0 + i] = lt * st[c0 + i] + x[i] * y
    _, rank0, sb, rank = factor_pair(st, a0, L, drop, An, 0, M, dropm, k)
    solve_pair(L, drop, x, 0, u, 0, tmp, M, dropm, st, c0, st, th, tmp2, k)
    for i in range(k * k):
        st[a0 + i] = An[i]
    # classic predictive variance from the previous state
    z = np.nan
    zsd = np.nan
    if rank0 == k:
        centre_vector(u, 0, st, r0, k, pt)
        q = s_form(st, t0, k, ncd, pt, 0)
        dof = W - k
        if dof > 0.0 and V > 0.0:
            zsd = np.sqrt(V / dof * (1.0 + q))
            z = e / zsd
    st[I_E] = e
    st[I_ZSD] = zsd
    st[I_Z] = z
    # update the sums
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
    cd_pairs(xc, k, ncd, zcn, zdn)
    update_t(st, t0, xc, k, ncd, l2, zcn, zdn)
    if band == BAND_HAC:
        size = nab * ncd
        q0 = t0 + size
        g0 = q0 + lags * size
        rw = k + 2
        for l in range(lags):
            ro = g0 + l * rw
            wl = st[ro + k + 1] * lt
            st[ro + k + 1] = wl
            update_q(st, q0 + l * size, xc, st[ro:ro + k + 1], wl, k, l2, zcn, zdn, lcn, ldn)
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
    identified = dropm[k - 1] == 0.0
    vb = np.nan
    if identified:
        price_column(M, dropm, k, pc, 0)
        centre_vector(pc, 0, st, r0, k, pt)
        if band == BAND_CLASSIC:
            vb = s_form(st, t0, k, ncd, pt, 0)
            if W > rank:
                vb *= V / (W - rank)
        else:
            centre_theta(st, th, st, r0, k, thc)
            g_pairs(thc, k, gg, dg)
            vb = meat_form(st, t0, gg, dg, k, pt, 0, 1.0, acc)
            if band == BAND_HAC:
                size = nab * ncd
                for l in range(lags):
                    vb += meat_form(st, t0 + (l + 1) * size, gg, dg, k, pt, 0,
                                    1.0 - (l + 1.0) / (lags + 1.0), acc)
            vb *= hc_factor(W, W2, W3, rank)
    qmult = 1.0
    if band == BAND_HAC:
        qmult = fixed_b_factor(lags, W2 * W2 / W4)
    finish(st, out, st[th + 1], st[th], identified, vb, V, float(rank), k, neff,
           raw_low or xsd < min_price_sd, band, e, z, min_neff, tq, y, qmult)


@njit(cache=True, inline="always")
def rls_step(st, x, y, k, band, lags, lam, guard, guard_lam, min_price_sd, min_neff, tq, out,
             w):
    """One update of one series' state ``st`` in place; writes the output row ``out``.

    ``x`` is the design row, ``y = log q``; ``w`` is scratch of length :func:`work_size` (no
    allocation in the hot loop). Uses the written-out k = 2 form when it applies.
    """
    if k == 2 and band != BAND_HAC:
        step_two_band(st, x[1], y, band, lam, guard, guard_lam, min_price_sd, min_neff, tq, out)
    else:
        linear_step(st, x, y, k, band, lags, lam, guard, guard_lam, min_price_sd, min_neff, tq,
                    out, w)


@njit(cache=True, _nrt=False)
def rls_run(state, sid, X, y, band, lags, lam, guard, guard_lam, min_price_sd, min_neff, tq,
            out, w):
    """Run :func:`rls_step` over rows in order; row j updates series ``sid[j]``.

    ``state`` is ``(n_series, state_size(k, band, lags))``, updated in place; ``out`` is
    ``(n, NOUT)``; ``w`` is scratch of length :func:`work_size`. Rows of different series may
    be interleaved; each series' rows must be in time order.

    Compiled without numba's reference counting (``_nrt=False``): nothing is allocated here,
    and the reference-count updates on the per-row slices (``state[sid[j]]``, ``out[j]``) cost
    more than the slices themselves. The choice between the written-out k = 2 step and the
    general one is made once, outside the row loop (the same functions :func:`rls_step` picks,
    so the outputs are identical to the bit). The k = 2 rows go four at a time through
    :func:`step_two_lanes` whenever four consecutive rows belong to four different series
    (:func:`run_two_lanes`; rows in arrival order almost always do), one at a time otherwise;
    the band is fixed per compiled loop, so the lane step has no band branch.
    """
    k = X.shape[1]
    if k == 2 and band == BAND_CLASSIC:
        run_two_lanes(state, sid, X, y, BAND_CLASSIC, lam, guard, guard_lam, min_price_sd,
                      min_neff, tq, out)
    elif k == 2 and band == BAND_HC:
        run_two_lanes(state, sid, X, y, BAND_HC, lam, guard, guard_lam, min_price_sd,
                      min_neff, tq, out)
    else:
        for j in range(X.shape[0]):
            linear_step(state[sid[j]], X[j], y[j], k, band, lags, lam, guard, guard_lam,
                        min_price_sd, min_neff, tq, out[j], w)


#: slots of the packed settings vector :func:`rls_learn` takes (:func:`pack_settings`)
(P_BAND, P_LAGS, P_LAM, P_GUARD, P_GUARD_LAM, P_MIN_PRICE_SD, P_MIN_NEFF) = range(7)


def pack_settings(band, lags, lam, guard, guard_lam, min_price_sd, min_neff) -> np.ndarray:
    """The step's scalar settings as one float64 vector (slots ``P_*``), for :func:`rls_learn`."""
    return np.array([band, lags, lam, 1.0 if guard else 0.0, guard_lam, min_price_sd,
                     min_neff], dtype=np.float64)


@njit(cache=True, _nrt=False)
def rls_learn(st, x, par, tq, out, w, y):
    """:func:`rls_step` for one observation called from Python, settings packed in ``par``.

    The same step as the batch loop; only the call differs: seven arguments instead of
    fifteen, which is most of the cost of a call from Python (numba checks the type of every
    argument on each call). ``y`` comes last so a caller can keep the six arrays in one tuple.
    """
    rls_step(st, x, y, x.shape[0], int(par[P_BAND]), int(par[P_LAGS]), par[P_LAM],
             par[P_GUARD] != 0.0, par[P_GUARD_LAM], par[P_MIN_PRICE_SD], par[P_MIN_NEFF], tq,
             out, w)


@njit(cache=True, _nrt=False)
def rls_learn_price(st, x, par, tq, out, w, lp, y):
    """:func:`rls_learn` for a design row ``(1, log p)`` whose log price ``lp`` is written into
    ``x[1]`` here (a float argument costs less to pass from Python than a numpy item write)."""
    x[1] = lp
    rls_step(st, x, y, x.shape[0], int(par[P_BAND]), int(par[P_LAGS]), par[P_LAM],
             par[P_GUARD] != 0.0, par[P_GUARD_LAM], par[P_MIN_PRICE_SD], par[P_MIN_NEFF], tq,
             out, w)


@njit(cache=True, inline="always")
def discount(st, k, band, lags, f):
    """One extra forgetting step of factor ``f`` in (0, 1] on everything accumulated so far.

    Every weighted sum scales like its weights: ``A, c, Y2, V, W``, the residual-power sums and
    the raw log-price window by ``f``; ``W2`` and the meat tensors (squared weights) by ``f^2``;
    ``W3`` by ``f^3``; the HAC lagged rows' weights by ``f``. ``theta`` (the solution of
    ``A theta = c``) and ``n_eff = W^2 / W2`` are unchanged at that moment; the rows after it
    dominate the fit. The pipeline calls it after an elasticity-change alarm.
    """
    f2 = f * f
    for i in (I_W, I_V, I_YY, I_R2, I_R3, I_R4, I_SMEAR, I_LPW, I_LPM2):
        st[i] *= f
    st[I_W2] *= f2
    st[I_W3] *= f2 * f
    st[I_W4] *= f2 * f2
    a0 = NS + k
    for i in range(a0, a0 + k * k + k):
        st[i] *= f
    t0 = a0 + k * k + 2 * k
    nab = k * (k + 1) // 2
    ncd = 1 if band == BAND_CLASSIC else (k + 1) * (k + 2) // 2
    size = nab * ncd
    nq = lags if band == BAND_HAC else 0
    for i in range(t0, t0 + size * (1 + nq)):
        st[i] *= f2
    if nq > 0:
        g0 = t0 + size * (1 + nq)
        for l in range(nq):
            st[g0 + l * (k + 2) + k + 1] *= f
