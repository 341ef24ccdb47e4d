"""Compiled steps of the bounds detector and its state layout (:data:`BOUNDS_SIZE` floats,
slots ``B_*``; parameters ``Q_*``); the Python class is in :mod:`monitor.detectors.bounds`."""

from __future__ import annotations

from numba import njit

from monitor.detectors.kernels import F_ALARM, F_BREACH, F_CLEAR, F_DOWN, F_INSIDE, F_USED


B_ACTIVE, B_RUN, B_SEEN, B_IN_RUN, B_SIDE, B_OPENS = 0, 1, 2, 3, 4, 5


BOUNDS_SIZE = 6


Q_BURN, Q_LOW, Q_HIGH, Q_MODE, Q_PERSIST, Q_CLEAR = 0, 1, 2, 3, 4, 5


BOUNDS_PARAMS = 6


MODES = {"interval": 0.0, "point": 1.0}


@njit(cache=True, inline="always")
def hysteresis_step(s, at, breach, inside, down, persistence, clear_after):
    """Persistence / hysteresis machine (state ``s[at:]``) on one update's ``breach`` and
    ``inside`` verdicts.

    Inactive: counts consecutive breaches and opens at ``persistence``. Active: counts
    consecutive updates inside and clears at ``clear_after``; an update that is neither
    breaching nor inside breaks both runs.
    """
    flags = F_USED
    if breach:
        flags |= F_BREACH
        if down:
            flags |= F_DOWN
    if inside:
        flags |= F_INSIDE
    if s[at + B_ACTIVE] == 0.0:
        run = s[at + B_RUN] + 1.0 if breach else 0.0
        s[at + B_RUN] = run
        if run >= persistence:
            s[at + B_ACTIVE] = 1.0
            s[at + B_IN_RUN] = 0.0
            s[at + B_SIDE] = -1.0 if down else 1.0
            s[at + B_OPENS] += 1.0
            flags |= F_ALARM
    else:
        run = s[at + B_IN_RUN] + 1.0 if inside else 0.0
        s[at + B_IN_RUN] = run
        if run >= clear_after:
            s[at + B_ACTIVE] = 0.0
            s[at + B_RUN] = 0.0
            flags |= F_CLEAR
    return flags


@njit(cache=True, inline="always")
def bounds_step(s, at, beta, lo, hi, burn_in, low, high, point, persistence, clear_after):
    """One update of ``s[at:]``: bounds ``[low, high]``, ``point`` False for interval mode.
    NaN inputs (the interval in interval mode) are skipped."""
    if not (beta == beta) or (not point and not (lo == lo and hi == hi)):
        return 0
    s[at + B_SEEN] += 1.0
    if s[at + B_SEEN] <= burn_in:
        return 0
    if point:
        above = beta > high
        below = beta < low
    else:
        above = lo > high
        below = hi < low
    inside = beta >= low and beta <= high
    return hysteresis_step(s, at, above or below, inside, below, persistence, clear_after)


@njit(cache=True)
def bounds_run(s, beta, lo, hi, p, out):
    """Batch form: :func:`bounds_step` over the rows of ``beta, lo, hi``, flags into ``out``."""
    for i in range(beta.shape[0]):
        out[i] = bounds_step(s, 0, beta[i], lo[i], hi[i], p[Q_BURN], p[Q_LOW], p[Q_HIGH],
                             p[Q_MODE] == 1.0, p[Q_PERSIST], p[Q_CLEAR])
