"""Thresholds of the split GLR charts from an in-control ARL, and their expected delays.

Design by simulation
--------------------
The statistics of :mod:`monitor.detectors.split_glr` are standardized (each candidate's
``2 G`` is chi-square(1) under no change with the variance known), but the maximum over the
checkpoints, the estimated scale and the growing reference make the run-length distribution
something no table gives. The thresholds are therefore found by simulating the in-control
process through the real compiled steps: ``log p ~ N(log 10, 0.1^2)`` iid, ``log q = 5 - 1.5
log p + e``, ``e ~ N(0, 0.2^2)``, the estimator's :func:`~monitor.estimators.kernel.step_two`
(forgetting 0.99, its default guard) and :func:`~monitor.detectors.split_glr.split_step` with
infinite thresholds. Scales drop out (the statistics are invariant to the price level, the
price sd, b and the noise sd); what matters is the checkpoint layout, the reference cap and
the start rule. Each path runs from a series' start (the charts' own start rule included), so
the designed ARL0 is the mean number of observations from a chart's start (a series' start, or
the restart after an alarm) to a false alarm, per chart and per series.

With the threshold at +inf the chart never alarms, so its first passage above ``h`` is the
first time the running maximum of ``max_j G_j`` exceeds ``h``: one simulation keeps each path's
record values and gives the ARL at every h (as :mod:`monitor.detectors.design` does for the
other charts). ``ARL(h) = arl0`` is solved by log-linear interpolation; the ARL's relative
standard error is about ``1 / sqrt(n_paths)``.

Defaults are precomputed (:data:`PRECOMPUTED`, ``python -m monitor.detectors.split_design``;
they serve every estimator forgetting factor in :data:`FORGETTING_RANGE`, measured):
``h`` at ARL0 from 500 to 100,000, between which ``h`` is interpolated linearly in
``log(arl0)`` (h is close to linear in log ARL0, as for a CUSUM: ``ARL ~ exp(h) * const``);
other settings are simulated on first use (400 paths) and cached in-process.

Expected delay
--------------
For a change ``db`` of b, the information per observation is ``I = db^2 Var(x) / (2
sigma_s^2)`` (Kullback-Leibler between the two normal regression models; Var(x) the log-price
variance after the controls). Lorden (1971) bounds the delay of any procedure with false-alarm
ARL ``arl0`` from below by about ``log(arl0) / I``; a GLR with threshold ``h`` needs about
``h / I`` plus the checkpoint-spacing loss. :func:`expected_delay` returns ``DELAY_FACTOR * h /
I``, with ``DELAY_FACTOR`` measured on the design model (median delay over h / I, see
``tests/test_split_glr.py``).
"""

from __future__ import annotations

import math
from functools import lru_cache
from typing import NamedTuple

import numpy as np
from numba import njit

from monitor.detectors import split_glr as S
from monitor.detectors.base import check_number
from monitor.detectors.split_table import DELAY_FACTOR, PRECOMPUTED, TABLE_KEY
from monitor.estimators import kernel as K
from monitor.estimators.tquantile import t_table


DEFAULT_PATHS = 400
#: estimator forgetting factors the precomputed table serves. The statistics use the data's
#: own sums; the estimator enters only through the scale of its innovations, which forgetting
#: inflates by about (1 - lam) k. Measured (ARL0 2,000, 300 paths, seed 3, 13:25 UTC): slope /
#: level thresholds 4.37 / 5.86 at forgetting 0.95, 4.43 / 5.82 at 0.97, 4.51 / 5.77 at 0.99,
#: 4.46 / 5.76 at 0.999, against the table's 4.41 / 5.80: within the Monte Carlo error (the
#: ARL's relative se of about 6% moves h by about 0.06)
FORGETTING_RANGE = (0.95, 1.0)
#: statistic above which the scale freezes in the design runs (half a typical threshold; the
#: pipeline's level chart freezes at the same point, :data:`monitor.detectors.split_glr.HOT_LEVEL`)
HOT = S.HOT_LEVEL
MAX_RECORDS = 512
_LP0, _PSD, _A, _B, _SIG = math.log(10.0), 0.1, 5.0, -1.5, 0.2


class SplitThresholds(NamedTuple):
    """Designed thresholds (G units) of the slope and level charts for one ARL0."""

    slope: float
    level: float
    arl0: float
    n_paths: int
    method: str


@njit(cache=True)
def _seed(seed):  # pragma: no cover - numba
    np.random.seed(seed)


@njit(cache=True)
def _run_paths(n_paths, max_len, h_stop, p, lam, tq, est0, rec_t, rec_v, nrec):  # pragma: no cover - numba
    """Simulate ``n_paths`` in-control paths of ``max_len`` observations from the estimator's
    fresh state ``est0``; keep the records of the running maximum of the slope (chart 0) and
    level (chart 1) statistics."""
    cap = rec_t.shape[2]
    o = np.empty(K.NOUT)
    for i in range(n_paths):
        est = est0.copy()
        st = np.zeros(S.SPLIT_SIZE)
        rm0 = 0.0
        rm1 = 0.0
        for t in range(max_len):
            if rm0 > h_stop and rm1 > h_stop:
                break
            x = _LP0 + _PSD * np.random.standard_normal()
            y = _A + _B * x + _SIG * np.random.standard_normal()
            K.step_two(est, x, y, lam, True, 0.8, 0.02, 10.0, tq, o)
            if o[K.O_STATUS] == K.ST_WARMING_UP:
                continue
            S.split_step(st, 0, x, y, o[K.O_E], float(t), float(t), p)
            for c in range(2):
                g = st[S.D_GS] if c == 0 else st[S.D_GL]
                rm = rm0 if c == 0 else rm1
                if g > rm:
                    if nrec[c, i] == cap:
                        half = cap // 2
                        for jj in range(half):
                            rec_t[c, i, jj] = rec_t[c, i, 2 * jj + 1]
                            rec_v[c, i, jj] = rec_v[c, i, 2 * jj + 1]
                        nrec[c, i] = half
                    rec_t[c, i, nrec[c, i]] = t + 1
                    rec_v[c, i, nrec[c, i]] = g
                    nrec[c, i] += 1
                    if c == 0:
                        rm0 = g
                    else:
                        rm1 = g


class _Simulation:
    def __init__(self, n_paths: int, max_len: int, seed: int, ref_cap: float,
                 min_rows: float, lam_scale: float, se_start: float, forgetting: float,
                 h_stop: float = math.inf, margin_slope: float = S.MARGIN):
        p = S.params(math.inf, math.inf, ref_cap=ref_cap, min_rows=min_rows,
                     lam_scale=lam_scale, se_start=se_start, margin_slope=margin_slope)
        self.margin_slope = margin_slope
        p[S.Q_HOTS] = p[S.Q_HOTL] = HOT  # the scale freezes at about half the thresholds
        self.n, self.max_len = n_paths, max_len
        self.rec_t = np.zeros((2, n_paths, MAX_RECORDS), np.int64)
        self.rec_v = np.zeros((2, n_paths, MAX_RECORDS))
        self.nrec = np.zeros((2, n_paths), np.int64)
        _seed(int(seed))
        self.h_stop = h_stop
        # the estimator's own fresh state (diffuse: no prior), classic band, k = 2
        est0 = K.init_state(np.zeros(2), np.full(2, np.inf))
        _run_paths(n_paths, max_len, h_stop, p, forgetting, t_table(0.95), est0, self.rec_t,
                   self.rec_v, self.nrec)

    def arl(self, chart: int, h: np.ndarray) -> np.ndarray:
        """Mean run length at thresholds ``h`` (censored at ``max_len``: biased low there)."""
        s = np.zeros(h.size)
        for i in range(self.n):
            m = self.nrec[chart, i]
            v = self.rec_v[chart, i, :m]
            tt = self.rec_t[chart, i, :m].astype(np.float64)
            j = np.searchsorted(v, h, side="right")
            s += np.where(j < m, tt[np.minimum(j, max(m - 1, 0))] if m else 0.0,
                          float(self.max_len))
        return s / self.n

    def solve(self, chart: int, arl0: float) -> float:
        # both statistics are 0 or above about their likelihood margin (split_glr: labels)
        lo = self.margin_slope if chart == 0 else S.MARGIN
        grid = np.linspace(lo, 25.0, 2401)
        a = self.arl(chart, grid)
        if a[-1] < arl0 or arl0 > self.max_len / 4:
            raise ValueError(f"arl0 = {arl0:g}: beyond what {self.max_len} observations per "
                             "path can design")
        if a[0] >= arl0:  # the slope chart's floor (the likelihood margin) already holds
            return float(grid[0])
        b = max(int(np.argmax(a >= arl0)), 1)
        a0, a1 = math.log(a[b - 1]), math.log(a[b])
        frac = 1.0 if a1 == a0 else (math.log(arl0) - a0) / (a1 - a0)
        return float(grid[b - 1] + frac * (grid[b] - grid[b - 1]))


@lru_cache(maxsize=16)
def _simulation(n_paths, max_len, seed, ref_cap, min_rows, lam_scale, se_start, forgetting,
                margin_slope=S.MARGIN):
    return _Simulation(n_paths, max_len, seed, ref_cap, min_rows, lam_scale, se_start, forgetting,
                       margin_slope=margin_slope)


def _key(ref_cap, min_rows, lam_scale, se_start, forgetting) -> tuple:
    return (float(ref_cap), float(min_rows), float(lam_scale), float(se_start), float(forgetting),
            S.NSLOT)


def split_thresholds(arl0: float, *, ref_cap: float = S.DEFAULT_REF_CAP,
                     min_rows: float = S.DEFAULT_MIN_ROWS,
                     lam_scale: float = S.DEFAULT_LAM_SCALE,
                     se_start: float = S.DEFAULT_SE_START, forgetting: float = 0.99,
                     n_paths: int = DEFAULT_PATHS, seed: int = 0) -> SplitThresholds:
    """Thresholds ``(h_slope, h_level)`` for in-control ARL ``arl0`` (observations per chart
    and series). Precomputed table for the default settings (interpolated in log arl0),
    else a simulation of ``n_paths`` paths (cached).

    >>> t = split_thresholds(20000)
    >>> t.method, 6.0 < t.slope < 12.0, 6.0 < t.level < 12.0
    ('precomputed', True, True)
    """
    arl0 = check_number("arl0", arl0, 20.0, 1e6)
    key = _key(ref_cap, min_rows, lam_scale, se_start, forgetting)
    if key[:4] + key[5:] == TABLE_KEY[:4] + TABLE_KEY[5:] and \
            FORGETTING_RANGE[0] <= forgetting <= FORGETTING_RANGE[1] and \
            n_paths == DEFAULT_PATHS and seed == 0:
        arls = np.array(sorted(PRECOMPUTED))
        if arls[0] <= arl0 <= arls[-1]:
            la = np.log(arls)
            hs = float(np.interp(math.log(arl0), la, [PRECOMPUTED[a][0] for a in arls]))
            hl = float(np.interp(math.log(arl0), la, [PRECOMPUTED[a][1] for a in arls]))
            return SplitThresholds(hs, hl, arl0, int(PRECOMPUTED[arls[0]][2]), "precomputed")
    n_paths = int(check_number("n_paths", n_paths, 20, 1e6, integer=True))
    max_len = int(min(max(8 * arl0, 2000), 2_000_000))
    sim = _simulation(n_paths, max_len, int(seed), *key[:5], S.slope_margin(arl0))
    return SplitThresholds(sim.solve(0, arl0), sim.solve(1, arl0), arl0, n_paths, "simulation")


def information(db: float, price_sd: float, noise_sd: float) -> float:
    """Information per observation about a slope change ``db``: ``db^2 price_sd^2 / (2
    noise_sd^2)`` (nats; normal errors, price variation after the controls)."""
    return db * db * price_sd * price_sd / (2.0 * noise_sd * noise_sd)


def information_bound(db: float, price_sd: float, noise_sd: float, arl0: float) -> float:
    """Lorden's (1971) asymptotic lower bound on the delay, ``log(arl0) / I`` (observations)."""
    return math.log(arl0) / information(db, price_sd, noise_sd)


def expected_delay(h: float, info: float) -> float:
    """Expected observations to detect a change with information ``info`` per observation at
    threshold ``h``: ``DELAY_FACTOR * h / info`` (NaN when ``info`` is not positive)."""
    if not (info > 0.0) or not math.isfinite(info):
        return math.nan
    return DELAY_FACTOR * h / info


#: the ARL0s of the precomputed table
PRECOMPUTED_ARLS = (500.0, 1000.0, 2000.0, 5000.0, 10000.0, 20000.0, 50000.0, 100000.0)


def _precompute(n_paths: int = 500, arls=PRECOMPUTED_ARLS) -> dict:  # pragma: no cover
    """The table: one simulation with the whole margin serves both charts from ARL0
    ``MARGIN_ARL0`` up and the level chart everywhere (its statistic does not see the slope
    alarm's margin); below, the slope chart's margin is smaller (:func:`split_glr.slope_margin`)
    and each ARL0 has a simulation of its own (same seed, ``40 arl0`` rows per path)."""
    args = (S.DEFAULT_REF_CAP, S.DEFAULT_MIN_ROWS, S.DEFAULT_LAM_SCALE, S.DEFAULT_SE_START, 0.99)
    sim = _Simulation(n_paths, 600_000, 12345, *args, h_stop=11.5)
    out = {}
    for a in arls:
        m = S.slope_margin(a)
        own = sim if m == S.MARGIN else _Simulation(n_paths, int(40 * a), 12345, *args,
                                                     margin_slope=m)
        out[a] = (round(own.solve(0, a), 4), round(sim.solve(1, a), 4), n_paths)
    return out


if __name__ == "__main__":  # pragma: no cover
    import pprint

    pprint.pprint(_precompute(), width=100)
