"""Dispatch over the change charts by an integer code, for the compiled pipeline and the
threshold design simulations (numba needs a static choice, not a Python object).

Codes: :data:`CHART_NONE` (0), :data:`CHART_CUSUM` (1), :data:`CHART_EWMA` (2),
:data:`CHART_PH` (3). Each chart's state is :data:`CHART_SIZE` floats and its parameters
:data:`CHART_PARAMS` floats, laid out as in its own module.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from monitor.detectors.cusum import (C_DN, C_RUN, C_UP, CHART_PARAMS, CHART_SIZE, P_A, P_B,
                                     P_BURN, P_C, P_THRESHOLD, CUSUM, cusum_step)
from monitor.detectors.ewma import EWMAChart, ewma_step
from monitor.detectors.page_hinkley import C_MAX_DN, C_MIN_UP, PageHinkley, ph_step

CHART_NONE, CHART_CUSUM, CHART_EWMA, CHART_PH = 0, 1, 2, 3
CHART_CODES = {"none": CHART_NONE, "cusum": CHART_CUSUM, "ewma": CHART_EWMA,
               "page_hinkley": CHART_PH}
CHART_NAMES = {v: k for k, v in CHART_CODES.items()}
#: name of each chart's threshold parameter, for messages and settings
THRESHOLD_NAMES = {"cusum": "h", "ewma": "L", "page_hinkley": "threshold"}

__all__ = ["CHART_NONE", "CHART_CUSUM", "CHART_EWMA", "CHART_PH", "CHART_CODES", "CHART_SIZE",
           "CHART_PARAMS", "chart_step", "chart_stat", "chart_run", "pack_chart", "make_chart"]


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


def pack_chart(chart: str, threshold: float, burn_in: float, *, k: float = 0.5,
               lam: float = 0.1, delta: float = 0.5, alpha: float = 1.0,
               min_instances: float = 30) -> np.ndarray:
    """Parameter vector for :func:`chart_step`. ``threshold`` is h (CUSUM), L (EWMA, converted
    here to the limit on Z) or lambda (Page-Hinkley)."""
    p = np.zeros(CHART_PARAMS)
    p[P_BURN] = burn_in
    if chart == "cusum":
        p[P_THRESHOLD], p[P_A] = threshold, k
    elif chart == "ewma":
        p[P_THRESHOLD], p[P_A] = threshold * math.sqrt(lam / (2.0 - lam)), lam
    elif chart == "page_hinkley":
        p[P_THRESHOLD], p[P_A], p[P_B], p[P_C] = threshold, delta, alpha, min_instances
    elif chart != "none":
        raise ValueError(f"chart = {chart!r}: must be one of {', '.join(CHART_CODES)}")
    return p


def make_chart(chart: str, threshold: float, burn_in: int = 0, *, k: float = 0.5,
               lam: float = 0.1, delta: float = 0.5, alpha: float = 1.0,
               min_instances: int = 30):
    """The detector class instance equal to ``pack_chart`` with the same arguments."""
    if chart == "cusum":
        return CUSUM(k=k, h=threshold, burn_in=burn_in)
    if chart == "ewma":
        return EWMAChart(lam=lam, L=threshold, burn_in=burn_in)
    if chart == "page_hinkley":
        return PageHinkley(delta=delta, threshold=threshold, alpha=alpha,
                           min_instances=int(min_instances), burn_in=burn_in)
    raise ValueError(f"chart = {chart!r}: must be cusum, ewma or page_hinkley")
