"""The compiled pipeline step: estimator -> slope statistic -> charts -> bounds -> alert policy.

One series' state is one float64 row laid out by :data:`LAYOUT` offsets (see
:class:`monitor.pipeline.run.Pipeline` for the table). Every piece is the same compiled step
function the streaming classes call (:mod:`monitor.estimators.kernel`,
:mod:`monitor.detectors`, :mod:`monitor.pipeline.rules`), applied to a slice of the row, so the batch
path and the one-at-a-time classes agree to the bit.

The kernel is compiled without numba's reference counting (``_nrt=False``): it allocates
nothing (the caller passes every buffer), and in a function this size the reference-count
updates on the many array arguments of the inlined steps were not pruned and cost about 4x the
arithmetic (measured: 2.4M vs 10.8M obs/s on the same machine).

One compiled loop per configuration family (:data:`LOOPS`): the estimator's step form
(:func:`monitor.estimators.dispatch.step_form`) and the detector family are compile-time
constants (:func:`monitor.estimators.dispatch.compile_time_choice`), so a configuration
compiles only its own estimator step and detectors, on first use, and numba's cache keeps each
loop (module-level functions; closures made by a factory would not be cached). The estimator
step and the detector step are compiled as functions of their own, not pasted into the loop:
numba's type inference costs more than linearly in the size of the function it types, and one
loop holding every model and both detector families took about 170 CPU-s to compile on an
empty cache, the default loop alone about 35 (same results to the bit; speed within the
noise of a shared machine).

Per observation, in this order:

1. :func:`~monitor.estimators.kernel.rls_step` (estimate, interval, status, innovation z);
2. :func:`~monitor.detectors.slope.slope_step` on ``(log p, y*)`` (always, to keep its windows);
3. the level chart on z (skipped while ``warming_up``) and its episode tracker;
4. the slope chart on d (only on *informative* rows: status ``ok`` and the estimator's
   forgetting not paused by the excitation guard) and its episode tracker;
5. the bounds and sign-flip detectors on ``(b, lo, hi)`` (informative rows only) and the
   low-variation detector on the status (not while ``warming_up``), with their run trackers;
6. :func:`~monitor.pipeline.rules.rule_step` for the five kinds, writing event records;
7. after a slope alarm the slope statistic's reference is re-anchored; after any chart alarm
   its episode restarts; the row's status becomes ``out_of_bounds`` (bounds or sign-flip alert
   open) or ``changed`` (elasticity-change alert open) where the estimator said ``ok``.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from monitor.detectors.bounds_kernel import B_ACTIVE, B_SIDE, bounds_step, hysteresis_step
from monitor.detectors.kernels import C_LAST, F_ALARM, F_DOWN, chart_stat, chart_step
from monitor.detectors.slope_kernel import (G_BF, adjusted_response, fast_interval, reanchor,
                                            slope_step)
from monitor.detectors import split_glr as SG
from monitor.estimators import kernel as K
from monitor.estimators.dispatch import (FORM_IV, FORM_LINEAR, FORM_POISSON, FORM_TWO,
                                         compile_time_choice, form_discount, form_step)
from monitor.pipeline.split_events import (change_start, detector_mean, split_open,
                                           split_reanchor, split_row, split_warm)
from monitor.pipeline.messages import (EV_AFTER_B, EV_AFTER_HI, EV_AFTER_LO, EV_DELAY,
                                       EV_SUPERSEDED,
                                       EV_ACTION, EV_BETA, EV_COUNT, EV_EXTRA, EV_HI, EV_KIND,
                                       EV_LO, EV_N, EV_OLD_B, EV_OLD_HI, EV_OLD_LO, EV_ROW, EV_SIDE,
                                       EV_SIZE, EV_START_N, EV_START_TS, EV_STAT, EV_TS)
from monitor.pipeline.rules import (A_B, A_HI, A_LO, A_N_IN, A_START_N, A_START_TS, ACTION_CLEAR,
                                    ACTION_OPEN, E_B, E_CNT, E_HI, E_LO, E_START_N, E_START_TS,
                                    E_SUM, EP_SIDE, KIND_ELASTICITY_CHANGE, KIND_LEVEL_SHIFT,
                                    KIND_LOW_VARIATION, KIND_OUT_OF_BOUNDS, KIND_SIGN_FLIP,
                                    R_ALARMS, R_OPEN, R_OPENED_N, R_OPENED_TS, RULE_SIZE, rule_reopen,
                                    U_CLEAR_AFTER, U_COOLDOWN, U_ENABLED, U_MODE, episode_restart,
                                    episode_step, rule_step, run_track)


# offsets in the layout vector
(L_SLOPE, L_LCHART, L_LEP, L_SCHART, L_SEP, L_BOUNDS, L_BRUN, L_SIGN, L_SRUN, L_LOWVAR,
 L_VRUN, L_RULES, L_SPLIT, L_SIZE) = range(14)
# signal columns (PipelineResult.signals)
(S_D, S_BFAST, S_LOFAST, S_HIFAST, S_LEVEL_STAT, S_SLOPE_STAT, S_LEVEL_FLAGS,
 S_SLOPE_FLAGS) = range(8)
NSIG = 8
#: most events one observation can produce (one per kind)
#: weight left on the estimator's past after an elasticity change (one extra forgetting step)
DISCOUNT = 0.05
MAX_EVENTS_PER_ROW = 7  # one per kind, plus a superseding clear for each change kind


@njit(cache=True, _nrt=False)
def _event(ev, ne, j, kind, action, n, ts, b, lo, hi, ob, olo, ohi, sn, sts, side, size, stat,
           count, extra):
    """Write one event record (not inlined: events are rare)."""
    ev[ne, EV_ROW] = j
    ev[ne, EV_KIND] = kind
    ev[ne, EV_ACTION] = action
    ev[ne, EV_BETA] = b
    ev[ne, EV_LO] = lo
    ev[ne, EV_HI] = hi
    ev[ne, EV_OLD_B] = ob
    ev[ne, EV_OLD_LO] = olo
    ev[ne, EV_OLD_HI] = ohi
    ev[ne, EV_START_N] = sn
    ev[ne, EV_START_TS] = sts
    ev[ne, EV_N] = n
    ev[ne, EV_TS] = ts
    ev[ne, EV_SIDE] = side
    ev[ne, EV_SIZE] = size
    ev[ne, EV_STAT] = stat
    ev[ne, EV_COUNT] = count
    ev[ne, EV_EXTRA] = extra
    ev[ne, EV_AFTER_B] = np.nan
    ev[ne, EV_AFTER_LO] = np.nan
    ev[ne, EV_AFTER_HI] = np.nan
    ev[ne, EV_DELAY] = np.nan
    ev[ne, EV_SUPERSEDED] = 0.0
    return ne + 1


@njit(cache=True, _nrt=False)
def _clear(ev, ne, j, kind, st, r, n, ts, b, lo, hi):
    return _event(ev, ne, j, kind, ACTION_CLEAR, n, ts, b, lo, hi, np.nan, np.nan, np.nan,
                  st[r + R_OPENED_N], st[r + R_OPENED_TS], 0.0, n - st[r + R_OPENED_N], np.nan,
                  st[r + R_ALARMS], np.nan)


@njit(cache=True, _nrt=False)
def _open_chart(ev, ne, j, kind, st, ep, flags, n, ts, b, lo, hi, stat, extra):
    """Opening of an impulse kind: the episode side that alarmed gives the start and the
    estimate before it."""
    e = ep + (EP_SIDE if flags & F_DOWN else 0)
    if kind == KIND_LEVEL_SHIFT:
        cnt = st[e + E_CNT]
        size = st[e + E_SUM] / cnt if cnt > 0 else np.nan
    else:
        size = b - st[e + E_B]
    return _event(ev, ne, j, kind, ACTION_OPEN, n, ts, b, lo, hi, st[e + E_B], st[e + E_LO],
                  st[e + E_HI], st[e + E_START_N], st[e + E_START_TS],
                  -1.0 if flags & F_DOWN else 1.0, size, stat, 1.0, extra)


@njit(cache=True, _nrt=False)
def _open_run(ev, ne, j, kind, st, det, run, n, ts, b, lo, hi, size, extra):
    """Opening of a level kind: the run tracker gives the start and the last estimate inside."""
    inside = st[run + A_N_IN] > 0.0
    return _event(ev, ne, j, kind, ACTION_OPEN, n, ts, b, lo, hi,
                  st[run + A_B] if inside else np.nan, st[run + A_LO] if inside else np.nan,
                  st[run + A_HI] if inside else np.nan, st[run + A_START_N],
                  st[run + A_START_TS], st[det + B_SIDE], size, np.nan, 1.0, extra)


@njit(cache=True, _nrt=False)
def _open_split(split, ev, ne, j, kind, st, lay, fl, fs, n, t, b, lo, hi, sd, tq, d, z, gp,
                rep):
    return split_open(ev, ne, j, kind, st, lay[L_SPLIT], rep, n, t, b, lo, hi, tq, gp)


@njit(cache=True, _nrt=False)
def _open_charts(split, ev, ne, j, kind, st, lay, fl, fs, n, t, b, lo, hi, sd, tq, d, z, gp,
                 rep):
    if kind == KIND_ELASTICITY_CHANGE:
        ga = lay[L_SLOPE]
        _, flo, fhi = fast_interval(st, ga, sd, tq)
        return _open_chart(ev, ne, j, kind, st, lay[L_SEP], fs, n, t, st[ga + G_BF], flo, fhi,
                           st[lay[L_SCHART] + C_LAST], d)
    return _open_chart(ev, ne, j, kind, st, lay[L_LEP], fl, n, t, b, lo, hi,
                       st[lay[L_LCHART] + C_LAST], z)


@compile_time_choice({True: _open_split, False: _open_charts})
def open_change(split, ev, ne, j, kind, st, lay, fl, fs, n, t, b, lo, hi, sd, tq, d, z, gp,
                rep):
    """The opening record of an elasticity change or level shift (``split``: a constant)."""
    return (_open_split if split else _open_charts)(split, ev, ne, j, kind, st, lay, fl, fs, n,
                                                    t, b, lo, hi, sd, tq, d, z, gp, rep)


@njit(cache=True, _nrt=False)
def _open(ev, ne, j, kind, st, lay, fl, fs, sj, n, t, b, lo, hi, sd, tq, d, z, bparams, gparams,
          vparams, split, gp, rep):
    """The event record of an opening (rare: not inlined; ``split`` is a constant)."""
    if kind == KIND_ELASTICITY_CHANGE or kind == KIND_LEVEL_SHIFT:
        return open_change(split, ev, ne, j, kind, st, lay, fl, fs, n, t, b, lo, hi, sd, tq, d,
                           z, gp, rep)
    if kind == KIND_OUT_OF_BOUNDS:
        return _open_run(ev, ne, j, kind, st, lay[L_BOUNDS], lay[L_BRUN], n, t, b, lo, hi,
                         bparams[sj, 1], bparams[sj, 2])
    if kind == KIND_SIGN_FLIP:
        return _open_run(ev, ne, j, kind, st, lay[L_SIGN], lay[L_SRUN], n, t, b, lo, hi,
                         gparams[1], gparams[2])
    # low variation: the size is the sd the status compared with the minimum, the sd of log
    # price left after the intercept and the controls (the estimator's information matrix;
    # the raw sd when that is the lower); the statistic slot holds the raw sd (a price that
    # the controls explain varies in the raw data: issue 13, the load scenario's tariff hours)
    w = st[K.I_LPW]
    raw = np.sqrt(st[K.I_LPM2] / w) if w > 0.0 else np.nan
    left = st[K.I_XSD]
    ne = _open_run(ev, ne, j, kind, st, lay[L_LOWVAR], lay[L_VRUN], n, t, b, lo, hi,
                   left if left < raw or not (raw == raw) else raw, vparams[2])
    ev[ne - 1, EV_STAT] = raw
    return ne


def _detect_split(split, st, lay, xj, yj, k, o, n, t, b, lo, hi, sd, inf, warm, lf, lr, lkind,
                  lp, skind, sp, gp, mu, work):
    """The split GLR (slope and level kinds from the same sums) on every row past warm-up
    (``mu``: the Poisson model's predicted mean, the row's working weight; NaN otherwise); its
    own fit of the controls (series with controls) on every row."""
    fl = 0
    fs = 0
    if not warm:
        fl, fs = split_row(st, lay[L_SPLIT], xj, yj, k, o[K.O_E], n, t, gp, mu, work)
    elif k > 2:
        split_warm(st, lay[L_SPLIT], xj, yj, k, mu)
    return np.nan, fl, fs


def _detect_charts(split, st, lay, xj, yj, k, o, n, t, b, lo, hi, sd, inf, warm, lf, lr, lkind,
                   lp, skind, sp, gp, mu, work):
    """The previous charts: the slope statistic d, the level chart on the standardized
    innovation, the slope chart on d (informative rows only), with their episode trackers."""
    d = slope_step(st, lay[L_SLOPE], xj[1], adjusted_response(st, xj, yj, k), sd, st[K.I_PAUSED],
                   lf, lr)
    fl = chart_step(lkind, st, lay[L_LCHART], np.nan if warm else o[K.O_Z], lp)
    episode_step(st, lay[L_LEP], fl, n, t, b, lo, hi, o[K.O_E])
    fs = chart_step(skind, st, lay[L_SCHART], d if inf else np.nan, sp)
    episode_step(st, lay[L_SEP], fs, n, t, b, lo, hi, d)
    return d, fl, fs


@compile_time_choice({True: _detect_split, False: _detect_charts})
def detect(split, st, lay, xj, yj, k, o, n, t, b, lo, hi, sd, inf, warm, lf, lr, lkind, lp,
           skind, sp, gp, mu, work):
    """The change detector family's step on one row; returns ``(d, level_flags,
    slope_flags)``. ``split`` is a constant: only that family is compiled (as a function of
    its own: it is most of the loop's code)."""
    return (_detect_split if split else _detect_charts)(
        split, st, lay, xj, yj, k, o, n, t, b, lo, hi, sd, inf, warm, lf, lr, lkind, lp, skind, sp,
        gp, mu, work)


@njit(cache=True, _nrt=False)
def _after_split(split, st, lay, fl, fs, b, lo, hi, gp):
    split_reanchor(st, lay[L_SPLIT], fl, fs, gp)


@njit(cache=True, _nrt=False)
def _after_charts(split, st, lay, fl, fs, b, lo, hi, gp):
    if fs & F_ALARM:
        reanchor(st, lay[L_SLOPE])
        episode_restart(st, lay[L_SEP], b, lo, hi)
    if fl & F_ALARM:
        episode_restart(st, lay[L_LEP], b, lo, hi)


@compile_time_choice({True: _after_split, False: _after_charts})
def after_alarms(split, st, lay, fl, fs, b, lo, hi, gp):
    """Re-anchoring of the detectors after the row's alarms, once the rules have seen them
    (``split``: a constant)."""
    (_after_split if split else _after_charts)(split, st, lay, fl, fs, b, lo, hi, gp)


@njit(cache=True, _nrt=False)
def _keep_split(split, sig, j, st, lay, d, sd, tq, fl, fs, lkind, lp, skind, sp):
    at = lay[L_SPLIT]
    sig[j, S_D] = np.nan
    sig[j, S_BFAST] = np.nan
    sig[j, S_LOFAST] = np.nan
    sig[j, S_HIFAST] = np.nan
    sig[j, S_LEVEL_STAT] = st[at + SG.D_GL]
    sig[j, S_SLOPE_STAT] = st[at + SG.D_GS]
    sig[j, S_LEVEL_FLAGS] = fl
    sig[j, S_SLOPE_FLAGS] = fs


@njit(cache=True, _nrt=False)
def _keep_charts(split, sig, j, st, lay, d, sd, tq, fl, fs, lkind, lp, skind, sp):
    ga = lay[L_SLOPE]
    sig[j, S_D] = d
    sig[j, S_BFAST] = st[ga + G_BF]
    _, sig[j, S_LOFAST], sig[j, S_HIFAST] = fast_interval(st, ga, sd, tq)
    sig[j, S_LEVEL_STAT] = chart_stat(lkind, st, lay[L_LCHART], lp)
    sig[j, S_SLOPE_STAT] = chart_stat(skind, st, lay[L_SCHART], sp)
    sig[j, S_LEVEL_FLAGS] = fl
    sig[j, S_SLOPE_FLAGS] = fs


@compile_time_choice({True: _keep_split, False: _keep_charts})
def keep_signals(split, sig, j, st, lay, d, sd, tq, fl, fs, lkind, lp, skind, sp):
    """Row ``j`` of the signals (:data:`S_D` ...), when the caller keeps them."""
    (_keep_split if split else _keep_charts)(split, sig, j, st, lay, d, sd, tq, fl, fs, lkind,
                                             lp, skind, sp)


@njit(cache=True, inline="always")
def _row(form, split, a, st, o, xj, yj, j, sj, k, t, ne):
    """Everything after the estimator's step for row ``j`` of series ``sj``; returns ``ne``.
    ``a`` holds :func:`pipeline_run`'s arguments. All state is addressed as
    ``st[offset + slot]``: no array views are made per row."""
    (_, _, _, _, _, _, lay, est_args, lf, lr, lkind, lp, skind, sp, bparams, bon, gparams,
     vparams, rparams, _, ev, status, sig, keep, _, gp, rep) = a
    tq = est_args[7]
    stat = o[K.O_STATUS]
    n = st[K.I_N]
    b = o[K.O_BETA]
    lo = o[K.O_LO]
    hi = o[K.O_HI]
    sd = o[K.O_RESID_SD]
    ok = stat == K.ST_OK
    warm = stat == K.ST_WARMING_UP
    # informative: status ok and the estimator's forgetting not paused by flat prices (while
    # paused, b and the slope statistic are frozen; feeding them again is not new evidence)
    inf = ok and st[K.I_PAUSED] == 0.0
    d, fl, fs = detect(split, st, lay, xj, yj, k, o, n, t, b, lo, hi, sd, inf, warm, lf, lr,
                       lkind, lp, skind, sp, gp, detector_mean(form, a[3][j], o),
                       rep)
    # bounds, sign flip, low variation
    ba, bra = lay[L_BOUNDS], lay[L_BRUN]
    if inf and bon[sj]:
        fb = bounds_step(st, ba, b, lo, hi, 0.0, bparams[sj, 1], bparams[sj, 2],
                         bparams[sj, 3] == 1.0, bparams[sj, 4], bparams[sj, 5])
        run_track(st, bra, fb, n, t, b, lo, hi)
    ga2, gra = lay[L_SIGN], lay[L_SRUN]
    if inf and rparams[KIND_SIGN_FLIP, U_ENABLED] != 0.0:
        fg = bounds_step(st, ga2, b, lo, hi, 0.0, gparams[1], gparams[2], False, gparams[4],
                         gparams[5])
        run_track(st, gra, fg, n, t, b, lo, hi)
    va, vra = lay[L_LOWVAR], lay[L_VRUN]
    if not warm and rparams[KIND_LOW_VARIATION, U_ENABLED] != 0.0:
        fv = hysteresis_step(st, va, stat == K.ST_LOW_VARIATION, ok, False, vparams[0],
                             vparams[1])
        run_track(st, vra, fv, n, t, b, lo, hi)
    # alert policy, kind by kind (the order of monitor.pipeline.rules.KINDS)
    r0 = lay[L_RULES]
    for kind in range(5):
        if rparams[kind, U_ENABLED] == 0.0:
            continue
        if kind == KIND_OUT_OF_BOUNDS:
            fire = st[ba + B_ACTIVE] != 0.0
            allowed = inf
        elif kind == KIND_ELASTICITY_CHANGE:
            fire = (fs & F_ALARM) != 0
            # the split GLR handles flat prices itself (no slope information, no alarm)
            allowed = not warm if split else inf
        elif kind == KIND_LEVEL_SHIFT:
            fire = (fl & F_ALARM) != 0
            allowed = not warm
        elif kind == KIND_SIGN_FLIP:
            fire = st[ga2 + B_ACTIVE] != 0.0
            allowed = inf
        else:
            fire = st[va + B_ACTIVE] != 0.0
            allowed = True
        r = r0 + kind * RULE_SIZE
        if split and fire and st[r + R_OPEN] != 0.0 and (kind == KIND_ELASTICITY_CHANGE or
                                                         kind == KIND_LEVEL_SHIFT):
            # a further change while the alert is open: when it began after the open alert's
            # detection, the open alert is closed as superseded and the new one opened
            if change_start(st, lay[L_SPLIT], kind == KIND_ELASTICITY_CHANGE, n, gp) > \
                    st[r + R_OPENED_N]:
                ne = _clear(ev, ne, j, kind, st, r, n, t, b, lo, hi)
                ev[ne - 1, EV_SUPERSEDED] = 1.0
                rule_reopen(st, r, n, t)
                ne = _open(ev, ne, j, kind, st, lay, fl, fs, sj, n, t, b, lo, hi, sd, tq, d,
                           o[K.O_Z], bparams, gparams, vparams, split, gp, rep)
                continue
        # no cooldown for the split detector's kinds: it re-anchors after every alarm, so a
        # later alarm is a further change with its own change time, not a flap of the last
        # one (with a cooldown, a -50% level shift within 50 rows of a cleared level alert
        # was never reported: the alarm was dropped and the detector had re-anchored)
        cool = 0.0 if split and (kind == KIND_ELASTICITY_CHANGE or kind == KIND_LEVEL_SHIFT) \
            else rparams[kind, U_COOLDOWN]
        act = rule_step(st, r, fire, not fire, allowed, n, t, rparams[kind, U_MODE],
                        rparams[kind, U_CLEAR_AFTER], cool)
        if act == ACTION_CLEAR:
            ne = _clear(ev, ne, j, kind, st, r, n, t, b, lo, hi)
        elif act == ACTION_OPEN:
            ne = _open(ev, ne, j, kind, st, lay, fl, fs, sj, n, t, b, lo, hi, sd, tq, d,
                       o[K.O_Z], bparams, gparams, vparams, split, gp, rep)
    if (fl | fs) & F_ALARM:
        after_alarms(split, st, lay, fl, fs, b, lo, hi, gp)
        if split and (fs & F_ALARM or (fl & F_ALARM and form != FORM_POISSON)):
            # the estimator's past before the change is down-weighted at once (one extra
            # forgetting step), so the reported b follows the new regime within a few dozen
            # rows. After a level alarm too: the split GLR's scale is learnt from the
            # estimator's innovations, and an estimator that keeps the old level (a
            # forgetting of 0.995 absorbs a step in about 200 rows) feeds it the step itself
            # once the scale's hold after the alarm ends; a change of b with the intercept
            # held (level step of db log p0) then grew the scale 3-4x and the innovations'
            # lag-1 autocorrelation to 0.8, and the slope change that came with it was found
            # after 5x the information bound or never (measured 5 December, indep sd0.1 db0.5
            # at ARL0 20,000: 52% within 5x the bound before, 98% after; in-control and pivot
            # cells unchanged, AR(1) 0.6 level alerts 9.15 -> 8.84 per 10,000 at ARL0 2,000).
            # Not after a level alarm under the Poisson model: the detector's response there
            # is the working response, built from the estimator's coefficients, which a
            # discount makes noisy for a while; the level chart's in-control rate on Poisson
            # counts (elmon tune's check, tests/test_tune_count_check.py) went from 1.24x to
            # 1.25x its design, the edge of its band, and held changes under that model were
            # not measured
            form_discount(form, st, k, est_args[0], est_args[1], DISCOUNT)
    # final status of the row
    code = stat
    if ok:
        r = lay[L_RULES]
        if st[r + KIND_OUT_OF_BOUNDS * RULE_SIZE + R_OPEN] != 0.0 or \
                st[r + KIND_SIGN_FLIP * RULE_SIZE + R_OPEN] != 0.0:
            code = 3.0
        elif st[r + KIND_ELASTICITY_CHANGE * RULE_SIZE + R_OPEN] != 0.0:
            code = 4.0
    status[j] = np.int8(code)
    if keep:
        keep_signals(split, sig, j, st, lay, d, sd, tq, fl, fs, lkind, lp, skind, sp)
    return ne


def pipeline_run(form, split, states, sid, X, y, ts, start, lay, est_args, lf, lr, lkind, lp,
                 skind, sp, bparams, bon, gparams, vparams, rparams, out, ev, status, sig, keep,
                 u, gp, rep):
    """Process rows ``start..`` in order; returns ``(stop_row, n_events)``.

    ``form`` (:func:`monitor.estimators.dispatch.step_form`) and ``split`` (the split GLR,
    else the previous charts) choose the compiled loop (:data:`LOOPS`): each holds only its
    estimator step and its detector family, so a configuration compiles, and caches, only what
    it uses.

    Stops early (``stop_row < n``) when the event buffer ``ev`` might overflow; the caller
    grows it and calls again from ``stop_row`` (the states are consistent at row boundaries).
    ``est_args = (band, lags, lam, guard, guard_lam, min_price_sd, min_neff, tq, off)``
    (:func:`monitor.estimators.dispatch.form_step`; ``off``: log exposure per row, or
    empty); ``bparams`` is
    ``(n_series, BOUNDS_PARAMS)``, ``bon`` per-series bounds switches; ``rparams`` is
    ``(5, RULE_PARAMS)``; ``vparams = [persistence, clear_after, min_price_sd]``; ``u`` is the
    estimator's scratch vector (``dispatch.work_size``; the kernel allocates nothing). The
    detectors get the estimator's log-scale response ``out[O_YLOG]`` (``y`` itself for the
    log-log model).
    """
    return LOOPS[form, bool(split)]((states, sid, X, y, ts, start, lay, est_args, lf, lr, lkind,
                                     lp, skind, sp, bparams, bon, gparams, vparams, rparams, out,
                                     ev, status, sig, keep, u, gp, rep))


@njit(cache=True, inline="always")
def _rows(form, split, a):
    """The loop of :func:`pipeline_run` for a literal ``form`` and ``split`` (``a``: the
    arguments after them, as one tuple)."""
    states, sid, X, y, ts, start, _, est_args, _, _, _, _, _, _, _, _, _, _, _, out, ev, _, _, \
        _, u, _, _ = a
    band, lags, lam, guard, guard_lam, mps, mneff, tq, off = est_args
    has_off = off.shape[0] > 0
    k = X.shape[1]
    ne = 0
    cap = ev.shape[0]
    for j in range(start, X.shape[0]):
        if ne + MAX_EVENTS_PER_ROW > cap:
            return j, ne
        sj = sid[j]
        st = states[sj]
        o = out[j]
        form_step(form, st, X[j], y[j], off[j] if has_off else 0.0, k, band, lags, lam, guard,
                  guard_lam, mps, mneff, tq, o, u)
        ne = _row(form, split, a, st, o, X[j], o[K.O_YLOG], j, sj, k, ts[j], ne)
    return X.shape[0], ne


# One compiled loop per (estimator step form, detector family), each a module-level function so
# that numba's cache=True keeps it: a configuration compiles only its own loop, on first use.
@njit(cache=True, _nrt=False)
def _two_split(a):
    return _rows(FORM_TWO, True, a)


@njit(cache=True, _nrt=False)
def _two_charts(a):
    return _rows(FORM_TWO, False, a)


@njit(cache=True, _nrt=False)
def _linear_split(a):
    return _rows(FORM_LINEAR, True, a)


@njit(cache=True, _nrt=False)
def _linear_charts(a):
    return _rows(FORM_LINEAR, False, a)


@njit(cache=True, _nrt=False)
def _poisson_split(a):
    return _rows(FORM_POISSON, True, a)


@njit(cache=True, _nrt=False)
def _poisson_charts(a):
    return _rows(FORM_POISSON, False, a)


@njit(cache=True, _nrt=False)
def _iv_split(a):
    return _rows(FORM_IV, True, a)


@njit(cache=True, _nrt=False)
def _iv_charts(a):
    return _rows(FORM_IV, False, a)


#: the compiled loop of each ``(step form, split)``
LOOPS = {(FORM_TWO, True): _two_split, (FORM_TWO, False): _two_charts,
         (FORM_LINEAR, True): _linear_split, (FORM_LINEAR, False): _linear_charts,
         (FORM_POISSON, True): _poisson_split, (FORM_POISSON, False): _poisson_charts,
         (FORM_IV, True): _iv_split, (FORM_IV, False): _iv_charts}
