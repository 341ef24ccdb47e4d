"""The split GLR inside the compiled pipeline: its step on one row and its event records.

:func:`split_row` feeds the detector of :mod:`monitor.detectors.split_glr` with the row's log
price, the response with the controls' effects removed (the detector's own fit of the
control coefficients, :mod:`monitor.detectors.split_controls`) and the estimator's
innovation; it returns the pipeline's chart flags (bit ``F_ALARM``) for the level and slope
kinds. :func:`split_open` writes the event record of an
opening: the change time and observation (the likelihood's argmax), b before and after with
Student-t intervals from the data on each side (degrees of freedom: each side's rows - 2), the
size (``b_after - b_before``, or the log level change), the statistic and the series' expected
delay for a change of 0.5 in b (:func:`delay50`). :func:`split_reanchor` re-anchors the
detector after the rule has seen the alarm; the kernel then discounts the estimator's past
after an elasticity change or a level shift (a level shift only under the log-log and
instrumental-variable models; when the estimator offers ``discount``; the reasons are beside
the call in :mod:`monitor.pipeline.kernel`).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from monitor.detectors import split_controls as SC
from monitor.detectors import split_glr as SG
from monitor.detectors.kernels import F_ALARM
from monitor.detectors.split_table import DELAY_FACTOR
from monitor.estimators import kernel as K
from monitor.estimators.dispatch import (FORM_IV, FORM_LINEAR, FORM_POISSON, FORM_TWO,
                                         compile_time_choice)
from monitor.estimators.tquantile import t_lookup
from monitor.pipeline.messages import (EV_ACTION, EV_AFTER_B, EV_AFTER_HI, EV_AFTER_LO, EV_BETA,
                                       EV_COUNT, EV_DELAY, EV_EXTRA, EV_HI, EV_KIND, EV_LO, EV_N,
                                       EV_OLD_B, EV_OLD_HI, EV_OLD_LO, EV_ROW, EV_SIDE, EV_SIZE,
                                       EV_START_N, EV_START_TS, EV_STAT, EV_TS)
from monitor.pipeline.rules import ACTION_OPEN, KIND_ELASTICITY_CHANGE

#: change of b the per-series delay is quoted for
DB_QUOTED = 0.5
#: where the control fit's scratch starts in the work vector (after the report)
W0 = SG.REPORT_SIZE
#: floats of the work vector: the report and the control fit's scratch
WORK_SIZE = SG.REPORT_SIZE + SC.SCRATCH


def _no_mean(form, q, o):
    return np.nan


def _count_mean(form, q, o):
    return q - o[K.O_E]


@compile_time_choice({FORM_TWO: _no_mean, FORM_LINEAR: _no_mean, FORM_IV: _no_mean,
                      FORM_POISSON: _count_mean}, inline="always")
def detector_mean(form, q, o):
    """The estimator's predicted mean ``mu`` of this row under the Poisson model (``q`` the
    count, ``o[O_E] = q - mu``), NaN for the log-log models (no working weights); ``form`` is
    a compile-time constant."""
    return (_count_mean if form == FORM_POISSON else _no_mean)(form, q, o)


@njit(cache=True, inline="always")
def split_row(st, at, xj, yj, k, e, n, t, gp, mu, work):
    """One row of the split GLR; returns ``(level_flags, slope_flags)`` (``F_ALARM`` bits).

    The response is ``y* = y - c' z`` with ``c`` from the detector's own fit of the controls
    (:mod:`monitor.detectors.split_controls`: least squares over every row, with the regimes'
    intercepts and slopes partialled out after alarms); controls beyond ``NCF`` use the
    estimator's current coefficient; every response sum the detector holds is re-expressed
    with the fit's current ``c`` first (split_glr's docstring, "The controls' sums"), so all
    its candidates are tested with one ``c``. A series with controls is fed to the detector
    only once its controls are identified
    (:func:`~monitor.detectors.split_controls.fit_identified`); ``work`` is scratch (:data:`WORK_SIZE` floats). Series without controls (``k == 2``) are
    untouched. ``y`` is log q under the log-log model (``mu`` NaN: every row weight 1, ``e``
    the log-scale innovation) and the working response ``x' theta + (q - mu) / mu`` under the
    Poisson model (``mu`` the predicted mean, ``e = q - mu``): the row then enters with the
    working weight ``w = mu`` and the scale sees the Pearson residual ``(q - mu) / sqrt(mu)``
    (:func:`monitor.detectors.split_glr.split_step_w`, "Working weights"). The control fit
    weights its rows alike (``mu``, 1 under log-log); under the Poisson model the detector's
    sums are not seeded from it at identification."""
    ys = yj
    if k > 2:
        ys, ready = SC.fit_response(st, at, xj, yj, k, st, work, W0, mu)
        if not ready:
            return 0, 0
    w = 1.0
    if mu == mu:
        w = mu
        e = e / np.sqrt(mu)
    f = SG.split_step_w(st, at, xj[1], ys, e, w, n, t, gp)
    fl = F_ALARM if f & SG.SG_LEVEL else 0
    fs = F_ALARM if f & SG.SG_SLOPE else 0
    return fl, fs


@njit(cache=True, inline="always")
def split_warm(st, at, xj, yj, k, mu):
    """A row of a series with controls (``k > 2``) while the estimator warms up: it enters
    only the detector's control fit (:func:`~monitor.detectors.split_controls.fit_row`; weight
    ``mu``, the Poisson model's predicted mean from the warming estimator, 1 when NaN), so
    the controls can be identified by the time the detector may start."""
    SC.fit_row(st, at, xj, yj, k, st, mu)


@njit(cache=True, inline="always")
def delay50(st, at, h):
    """Expected rows to detect a change of 0.5 in b at this series' price variation and noise:
    ``DELAY_FACTOR * h / I`` with ``I = 0.25 Var(log p) / (2 sigma_s^2)`` (NaN when there is
    no scale yet or no price variation)."""
    info = SG.info_per_obs(st, at, DB_QUOTED)
    if not (info > 0.0):
        return np.nan
    return DELAY_FACTOR * h / info


@njit(cache=True)
def delay50_all(states, at, h, out):
    """:func:`delay50` of every state row into ``out``."""
    for i in range(states.shape[0]):
        out[i] = delay50(states[i], at, h)


@njit(cache=True, _nrt=False)
def split_open(ev, ne, j, kind, st, at, rep, n, t, b, lo, hi, tq, gp):
    """Write the opening record of an elasticity change (slope chart) or level shift (level
    chart) from the detector's report; returns the new event count."""
    slope = kind == KIND_ELASTICITY_CHANGE
    h = gp[SG.Q_HS]
    SG.split_report(st, at, slope, n, rep, gp)
    bb, bse, ba, ase = rep[SG.RP_BB], rep[SG.RP_BB_SE], rep[SG.RP_BA], rep[SG.RP_BA_SE]
    qb = t_lookup(tq, max(rep[SG.RP_DFB], 1.0))
    qa = t_lookup(tq, max(rep[SG.RP_DFA], 1.0))
    size = ba - bb if slope else rep[SG.RP_LEVEL]
    ev[ne, EV_ROW] = j
    ev[ne, EV_KIND] = kind
    ev[ne, EV_ACTION] = ACTION_OPEN
    ev[ne, EV_BETA] = b
    ev[ne, EV_LO] = lo
    ev[ne, EV_HI] = hi
    ev[ne, EV_OLD_B] = bb
    ev[ne, EV_OLD_LO] = bb - qb * bse
    ev[ne, EV_OLD_HI] = bb + qb * bse
    ev[ne, EV_AFTER_B] = ba
    ev[ne, EV_AFTER_LO] = ba - qa * ase
    ev[ne, EV_AFTER_HI] = ba + qa * ase
    ev[ne, EV_START_N] = n - rep[SG.RP_NA] + 1.0
    ev[ne, EV_START_TS] = rep[SG.RP_TS]
    ev[ne, EV_N] = n
    ev[ne, EV_TS] = t
    ev[ne, EV_SIDE] = 1.0 if size > 0.0 else -1.0
    ev[ne, EV_SIZE] = size
    ev[ne, EV_STAT] = rep[SG.RP_STAT]
    ev[ne, EV_COUNT] = 1.0
    ev[ne, EV_EXTRA] = rep[SG.RP_LEVEL_SE] if not slope else np.sqrt(ase * ase + bse * bse)
    ev[ne, EV_DELAY] = delay50(st, at, h)
    return ne + 1


@njit(cache=True, inline="always")
def change_start(st, at, slope, n, gp):
    """Observation number at which the change of the last alarm began (argmax checkpoint;
    with working weights the after sample's weight in rows, :func:`~monitor.detectors.
    split_glr.row_unit`)."""
    j = int(st[at + (SG.D_JS if slope else SG.D_JL)])
    if j < 0:
        return n
    o = at + SG.SLOT0 + SG.SLOT_W * j
    return n - np.floor((st[at + SG.C0] - st[o]) / SG.row_unit(st, at, gp) + 0.5) + 1.0


@njit(cache=True, inline="always")
def split_reanchor(st, at, fl, fs, gp):
    """Re-anchor after the row's alarms (slope first: it drops everything); the control fit
    starts a regime: after a slope alarm the intercept and log price are partialled out of its
    normal equations, after a level alarm the intercept (a no-op without controls)."""
    if fs & F_ALARM:
        SG.reanchor_slope(st, at, gp)
        SC.fit_partial(st, at + SG.CFIT0, 0)
        SC.fit_partial(st, at + SG.CFIT0, 1)
    elif fl & F_ALARM:
        SG.reanchor_level(st, at, gp)
        SC.fit_partial(st, at + SG.CFIT0, 0)

