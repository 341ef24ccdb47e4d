"""Compiled steps of the change charts (CUSUM, EWMA, Page-Hinkley) and their state layout.

Every chart keeps :data:`CHART_SIZE` floats of state and reads :data:`CHART_PARAMS` floats of
parameters; the slots are shared (``C_*`` for state, ``P_*`` for parameters) so that one
dispatch by an integer code (:func:`chart_step`, numba needs a static choice, not a Python
object) serves the compiled pipeline, the threshold design simulations and the Python classes
(:mod:`monitor.detectors.cusum`, :mod:`~monitor.detectors.ewma`,
:mod:`~monitor.detectors.page_hinkley`), which all call the very same functions.

Codes: :data:`CHART_NONE` (0), :data:`CHART_CUSUM` (1), :data:`CHART_EWMA` (2),
:data:`CHART_PH` (3); their names are in :mod:`monitor.detectors.spec`.

Step flags returned by every compiled step (bit field): ``F_ALARM`` an alarm at this update;
``F_DOWN`` the alarm (or breach) is on the low side; ``F_REST_UP`` / ``F_REST_DN`` the upper /
lower statistic is at rest (a change on that side would start after this observation);
``F_USED`` the value entered the statistic (not NaN, not burn-in); ``F_CLEAR`` a level-type
detector (bounds) returned to normal; ``F_BREACH`` / ``F_INSIDE`` the bounds detector's raw
reading.
"""

from __future__ import annotations

import numpy as np
from numba import njit


F_ALARM, F_DOWN, F_REST_UP, F_REST_DN, F_USED, F_CLEAR, F_BREACH, F_INSIDE = (
    1, 2, 4, 8, 16, 32, 64, 128)


#: state slots shared by every chart: statistics, counts, the statistic at the last alarm
C_UP, C_DN, C_SEEN, C_RUN, C_ALARMS, C_LAST = 0, 1, 2, 3, 4, 5

CHART_SIZE = 10


#: parameter slots shared by every chart
P_BURN, P_THRESHOLD, P_A, P_B, P_C = 0, 1, 2, 3, 4

CHART_PARAMS = 6


@njit(cache=True, inline="always")
def cusum_step(s, at, x, p):
    """One update of the tabular CUSUM state ``s[at:at + CHART_SIZE]`` with value ``x``;
    params ``p = [burn_in, h, k]``. Returns the bit flags of :mod:`monitor.detectors.base`."""
    if not (x == x):
        return 0
    s[at + C_SEEN] += 1.0
    if s[at + C_SEEN] <= p[P_BURN]:
        return 0
    k = p[P_A]
    h = p[P_THRESHOLD]
    up = s[at + C_UP] + x - k
    if up < 0.0:
        up = 0.0
    dn = s[at + C_DN] - x - k
    if dn < 0.0:
        dn = 0.0
    s[at + C_RUN] += 1.0
    flags = F_USED
    if up > h or dn > h:
        flags |= F_ALARM
        if dn > up:
            flags |= F_DOWN
            s[at + C_LAST] = -dn
        else:
            s[at + C_LAST] = up
        s[at + C_ALARMS] += 1.0
        s[at + C_RUN] = 0.0
        up = 0.0
        dn = 0.0
    s[at + C_UP] = up
    s[at + C_DN] = dn
    if up == 0.0:
        flags |= F_REST_UP
    if dn == 0.0:
        flags |= F_REST_DN
    return flags


#: Page-Hinkley's own state slots: running mean, minimum of U, maximum of D
C_MEAN, C_MIN_UP, C_MAX_DN = 6, 7, 8


@njit(cache=True, inline="always")
def ewma_step(s, at, x, p):
    """One EWMA update of ``s[at:]``; params ``p = [burn_in, limit c = L sqrt(lam/(2-lam)),
    lam]``."""
    if not (x == x):
        return 0
    s[at + C_SEEN] += 1.0
    if s[at + C_SEEN] <= p[P_BURN]:
        return 0
    lam = p[P_A]
    z = (1.0 - lam) * s[at + C_UP] + lam * x
    s[at + C_RUN] += 1.0
    flags = F_USED
    if z > p[P_THRESHOLD] or z < -p[P_THRESHOLD]:
        flags |= F_ALARM
        if z < 0.0:
            flags |= F_DOWN
        s[at + C_LAST] = z
        s[at + C_ALARMS] += 1.0
        s[at + C_RUN] = 0.0
        z = 0.0
    s[at + C_UP] = z
    if z <= 0.0:
        flags |= F_REST_UP
    if z >= 0.0:
        flags |= F_REST_DN
    return flags


@njit(cache=True, inline="always")
def ph_update(s, at, x, p):
    """Advance the Page-Hinkley sums in ``s[at:]`` without testing; returns (test_up,
    test_down)."""
    s[at + C_RUN] += 1.0
    n = s[at + C_RUN]
    mean = s[at + C_MEAN] + (1.0 / n) * (x - s[at + C_MEAN])
    s[at + C_MEAN] = mean
    dev = x - mean
    alpha = p[P_B]
    up = alpha * s[at + C_UP] + dev - p[P_A]
    dn = alpha * s[at + C_DN] + dev + p[P_A]
    s[at + C_UP] = up
    s[at + C_DN] = dn
    if n == 1.0 or up < s[at + C_MIN_UP]:
        s[at + C_MIN_UP] = up
    if n == 1.0 or dn > s[at + C_MAX_DN]:
        s[at + C_MAX_DN] = dn
    return up - s[at + C_MIN_UP], s[at + C_MAX_DN] - dn


@njit(cache=True, inline="always")
def ph_step(s, at, x, p):
    """One update; params ``p = [burn_in, lambda, delta, alpha, min_instances]``."""
    if not (x == x):
        return 0
    s[at + C_SEEN] += 1.0
    if s[at + C_SEEN] <= p[P_BURN]:
        return 0
    t_up, t_dn = ph_update(s, at, x, p)
    flags = F_USED
    if s[at + C_RUN] >= p[P_C] and (t_up > p[P_THRESHOLD] or t_dn > p[P_THRESHOLD]):
        flags |= F_ALARM | F_REST_UP | F_REST_DN
        if t_dn > t_up:
            flags |= F_DOWN
            s[at + C_LAST] = -t_dn
        else:
            s[at + C_LAST] = t_up
        s[at + C_ALARMS] += 1.0
        s[at + C_UP] = 0.0
        s[at + C_DN] = 0.0
        s[at + C_RUN] = 0.0
        s[at + C_MEAN] = 0.0
        s[at + C_MIN_UP] = 0.0
        s[at + C_MAX_DN] = 0.0
        return flags
    if t_up == 0.0:
        flags |= F_REST_UP
    if t_dn == 0.0:
        flags |= F_REST_DN
    return flags


#: dispatch codes of :func:`chart_step` (names in :data:`monitor.detectors.spec.CHART_CODES`)
CHART_NONE, CHART_CUSUM, CHART_EWMA, CHART_PH = 0, 1, 2, 3


@njit(cache=True, _nrt=False)
def chart_step(kind, s, at, x, p):
    """Advance chart ``kind`` (a code above), state ``s[at:]``, by value ``x``; returns its
    bit flags."""
    if kind == CHART_CUSUM:
        return cusum_step(s, at, x, p)
    if kind == CHART_EWMA:
        return ewma_step(s, at, x, p)
    if kind == CHART_PH:
        return ph_step(s, at, x, p)
    return 0


@njit(cache=True, inline="always")
def chart_stat(kind, s, at, p):
    """The quantity compared with the threshold, after an update that did not alarm:
    ``max(S+, S-)`` (CUSUM), ``|Z|`` (EWMA), the larger Page-Hinkley test (``-inf`` before
    ``min_instances``). A chart with an infinite threshold never resets, so the running
    maximum of this value gives the first-passage time at every threshold at once."""
    if kind == CHART_CUSUM:
        return max(s[at + C_UP], s[at + C_DN])
    if kind == CHART_EWMA:
        return abs(s[at + C_UP])
    if kind == CHART_PH:
        if s[at + C_RUN] < p[P_C]:
            return -np.inf
        return max(s[at + C_UP] - s[at + C_MIN_UP], s[at + C_MAX_DN] - s[at + C_DN])
    return -np.inf


@njit(cache=True, _nrt=False)
def chart_run(kind, s, values, p, out):
    """Batch form of a chart: :func:`chart_step` over ``values`` in order, flags into ``out``."""
    for i in range(values.shape[0]):
        out[i] = chart_step(kind, s, 0, values[i], p)


