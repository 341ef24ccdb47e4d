"""Alert policy: detector signals -> alert decisions (open / clear), in the pure core.

Kinds (:data:`KINDS`): ``out_of_bounds``, ``elasticity_change``, ``level_shift``,
``sign_flip`` and the informational ``low_variation``. For each series and kind the policy
holds at most one open alert (dedupe) and decides, at every observation:

- *open* when the kind's signal fires, the estimator's status allows it and the cooldown since
  the last clear has passed. ``elasticity_change``, ``out_of_bounds`` and ``sign_flip`` need
  status ``ok`` (never while ``warming_up`` or ``low_variation``); ``level_shift`` needs the
  status not to be ``warming_up``; ``low_variation`` is always allowed;
- *clear* (auto-resolve) on the kind's clear condition. Level-type kinds (bounds, sign flip,
  low variation) clear when their hysteresis detector clears. Impulse-type kinds (elasticity
  change, level shift: CUSUM-type alarms, which restart after each alarm) clear after
  ``clear_after`` allowed observations without a new alarm; a new alarm while open is counted
  in the open alert, not raised again;
- after a clear, no new alert of that kind for ``cooldown`` observations of the series.

The same compiled :func:`rule_step` runs in the batch pipeline and in :class:`AlertRule` (the
streaming form). Episode trackers record where a change began and the estimate before it
(:func:`episode_step` for charts, :func:`run_track` for persistence detectors), so a message can
say "b moved from ... since ...". Messages and severities are made from the event records by
:mod:`monitor.pipeline.messages`.

>>> rule = AlertRule("elasticity_change", clear_after=3, cooldown=2)
>>> fired = [0, 1, 0, 1, 0, 0, 0, 0, 1, 0, 0, 1]
>>> [rule.update(bool(f), allowed=True) for f in fired]
[None, 'open', None, None, None, None, 'clear', None, None, None, None, 'open']
"""

from __future__ import annotations

from typing import Mapping

import numpy as np
from numba import njit

from monitor.detectors.base import check_number, floats_from_json, floats_to_json
from monitor.detectors.kernels import F_ALARM, F_BREACH, F_INSIDE, F_REST_DN, F_REST_UP, F_USED


KINDS = ("out_of_bounds", "elasticity_change", "level_shift", "sign_flip", "low_variation")
(KIND_OUT_OF_BOUNDS, KIND_ELASTICITY_CHANGE, KIND_LEVEL_SHIFT, KIND_SIGN_FLIP,
 KIND_LOW_VARIATION) = range(5)
MODE_LEVEL, MODE_IMPULSE = 0.0, 1.0
KIND_MODES = (MODE_LEVEL, MODE_IMPULSE, MODE_IMPULSE, MODE_LEVEL, MODE_LEVEL)
ACTION_NONE, ACTION_OPEN, ACTION_CLEAR = 0, 1, 2
ACTIONS = (None, "open", "clear")

# rule state
R_OPEN, R_QUIET, R_LAST_CLEAR, R_CLEARS, R_OPENED_N, R_OPENED_TS, R_ALARMS, R_OPENS = range(8)
RULE_SIZE = 8
# rule parameters (one row per kind): mode, clear_after, cooldown, enabled
U_MODE, U_CLEAR_AFTER, U_COOLDOWN, U_ENABLED = range(4)
RULE_PARAMS = 4

# episode tracker of a chart: per side (up at 0, down at EP_SIDE) then an init flag
E_PENDING, E_START_N, E_START_TS, E_B, E_LO, E_HI, E_SUM, E_CNT = range(8)
EP_SIDE = 8
E_INIT = 16
EP_SIZE = 17
# run tracker of a persistence detector
A_PREV, A_START_N, A_START_TS, A_B, A_LO, A_HI, A_TS_IN, A_N_IN = range(8)
RUN_SIZE = 8


@njit(cache=True, inline="always")
def rule_step(r, at, fire, release, allowed, n, ts, mode, clear_after, cooldown):
    """One observation of one (series, kind) policy in ``r[at:]``; returns ACTION_NONE / OPEN
    / CLEAR.

    ``fire``: the detector's signal (level kinds: the detector is active; impulse kinds: an
    alarm at this observation). ``release``: a level kind's clear condition. ``allowed``: the
    estimator status permits this kind. ``n``: the series' observation count, ``ts`` its time.
    """
    if r[at + R_OPEN] != 0.0:
        if mode == MODE_IMPULSE:
            if fire:
                r[at + R_ALARMS] += 1.0
                r[at + R_QUIET] = 0.0
            elif allowed:
                r[at + R_QUIET] += 1.0
            done = r[at + R_QUIET] >= clear_after
        else:
            done = release
        if done:
            r[at + R_OPEN] = 0.0
            r[at + R_LAST_CLEAR] = n
            r[at + R_CLEARS] += 1.0
            return ACTION_CLEAR
        return ACTION_NONE
    if fire and allowed and not (r[at + R_CLEARS] > 0.0 and n - r[at + R_LAST_CLEAR] <= cooldown):
        r[at + R_OPEN] = 1.0
        r[at + R_QUIET] = 0.0
        r[at + R_OPENED_N] = n
        r[at + R_OPENED_TS] = ts
        r[at + R_ALARMS] = 1.0
        r[at + R_OPENS] += 1.0
        return ACTION_OPEN
    return ACTION_NONE


@njit(cache=True, inline="always")
def rule_reopen(r, at, n, ts):
    """An open impulse-kind alert is superseded by a further change (the split detector's
    estimated change time is after the open alert's detection): the caller has written the
    clear; the policy counts that clear and opens the new alert at once (no cooldown: the
    change is a new one, not a flap of the old)."""
    r[at + R_CLEARS] += 1.0
    r[at + R_LAST_CLEAR] = n
    r[at + R_OPEN] = 1.0
    r[at + R_QUIET] = 0.0
    r[at + R_OPENED_N] = n
    r[at + R_OPENED_TS] = ts
    r[at + R_ALARMS] = 1.0
    r[at + R_OPENS] += 1.0


@njit(cache=True, inline="always")
def episode_step(e, at, flags, n, ts, b, lo, hi, value):
    """Track, per side of a chart (tracker ``e[at:]``), where the current excursion began and
    the estimate before it.

    A side at rest (its statistic at 0) records the estimate ``(b, lo, hi)``; the first used
    observation after rest is the estimated start (observation ``n``, time ``ts``). ``value``
    is summed over the excursion (for the level rule: the innovation, so ``sum / count`` is the
    size of the level shift on the log scale). An alarm observation belongs to the excursion.
    The first used observation of a series starts an excursion on both sides.
    """
    if not (flags & F_USED):
        return
    first = e[at + E_INIT] == 0.0
    e[at + E_INIT] = 1.0
    alarm = (flags & F_ALARM) != 0
    for side in range(2):
        a = at + side * EP_SIDE
        rest = (flags & (F_REST_UP if side == 0 else F_REST_DN)) != 0 and not alarm
        if rest or first:
            e[a + E_PENDING] = 1.0
            e[a + E_B] = b
            e[a + E_LO] = lo
            e[a + E_HI] = hi
            e[a + E_SUM] = 0.0
            e[a + E_CNT] = 0.0
        if not rest:
            if e[a + E_PENDING] != 0.0:
                e[a + E_PENDING] = 0.0
                e[a + E_START_N] = n
                e[a + E_START_TS] = ts
            e[a + E_SUM] += value
            e[a + E_CNT] += 1.0


@njit(cache=True, inline="always")
def episode_restart(e, at, b, lo, hi):
    """After an alarm (the chart restarted): both sides at rest with the current estimate."""
    for side in range(2):
        a = at + side * EP_SIDE
        e[a + E_PENDING] = 1.0
        e[a + E_B] = b
        e[a + E_LO] = lo
        e[a + E_HI] = hi
        e[a + E_SUM] = 0.0
        e[a + E_CNT] = 0.0


@njit(cache=True, inline="always")
def run_track(a, at, flags, n, ts, b, lo, hi):
    """For a persistence detector (tracker ``a[at:]``): the first observation of the current
    breach run, and the last estimate that was back inside."""
    if not (flags & F_USED):
        return
    breach = (flags & F_BREACH) != 0
    if breach and a[at + A_PREV] == 0.0:
        a[at + A_START_N] = n
        a[at + A_START_TS] = ts
    a[at + A_PREV] = 1.0 if breach else 0.0
    if flags & F_INSIDE:
        a[at + A_B] = b
        a[at + A_LO] = lo
        a[at + A_HI] = hi
        a[at + A_TS_IN] = ts
        a[at + A_N_IN] = n


def rule_params(kind: str, clear_after: float, cooldown: float, enabled: bool = True) -> np.ndarray:
    """Parameter row of one kind for :func:`rule_step` (validated)."""
    if kind not in KINDS:
        raise ValueError(f"kind = {kind!r}: must be one of {', '.join(KINDS)}")
    p = np.zeros(RULE_PARAMS)
    p[U_MODE] = KIND_MODES[KINDS.index(kind)]
    p[U_CLEAR_AFTER] = check_number("clear_after", clear_after, 1, 1e9, integer=True)
    p[U_COOLDOWN] = check_number("cooldown", cooldown, 0, 1e9, integer=True)
    p[U_ENABLED] = 1.0 if enabled else 0.0
    return p


class AlertRule:
    """Streaming form of the policy for one series and one kind (see the module docstring).

    Parameters
    ----------
    kind : str
        One of :data:`KINDS`; decides level-type or impulse-type behaviour.
    clear_after : int >= 1
        Impulse kinds: allowed observations without an alarm before the alert clears.
    cooldown : int >= 0
        Observations after a clear during which the kind cannot open again.
    """

    def __init__(self, kind: str, clear_after: int = 200, cooldown: int = 50):
        self._p = rule_params(kind, clear_after, cooldown)
        self.kind = kind
        self.clear_after = int(clear_after)
        self.cooldown = int(cooldown)
        self._state = np.zeros(RULE_SIZE)
        self._n = 0

    def update(self, fire: bool, release: bool = False, allowed: bool = True,
               ts: float = float("nan")) -> str | None:
        """One observation: returns ``'open'``, ``'clear'`` or None."""
        self._n += 1
        a = rule_step(self._state, 0, bool(fire), bool(release), bool(allowed), float(self._n),
                      float(ts), self._p[U_MODE], self._p[U_CLEAR_AFTER], self._p[U_COOLDOWN])
        return ACTIONS[a]

    @property
    def is_open(self) -> bool:
        return bool(self._state[R_OPEN])

    def to_state(self) -> dict:
        return {"params": {"kind": self.kind, "clear_after": self.clear_after,
                           "cooldown": self.cooldown},
                "state": floats_to_json(self._state), "n": self._n}

    @classmethod
    def from_state(cls, state: Mapping) -> "AlertRule":
        rule = cls(**state["params"])
        rule._state[:] = floats_from_json(state["state"])
        rule._n = int(state["n"])
        return rule
