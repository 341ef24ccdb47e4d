"""Thresholds designed from an in-control ARL by simulating the statistic the chart watches.

Why simulation
--------------
The normal-theory ARL tables of :mod:`monitor.detectors.arl` assume independent N(0, 1) values. Two of
the pipeline's signals are not:

- the *standardized innovations* ``z_t`` of a recursive least-squares estimator *with
  forgetting*: the intercept follows the recent level, so ``z_t`` is slightly negatively
  autocorrelated at long lags (the innovations of an exponentially weighted level estimate
  have spectral density 0 at frequency 0). Over the hundreds of observations a CUSUM
  accumulates in control this matters: at forgetting 0.99, k = 0.5 and the normal-theory h for
  ARL0 = 20,000, the measured in-control ARL is about 44,000;
- the *slope statistic* ``d_t`` of :mod:`monitor.detectors.slope`, a smooth, strongly
  autocorrelated quantity;

and the Page-Hinkley statistic re-estimates the mean after every reset, so it is not iid-normal
even on iid input. Each of these thresholds is therefore designed here by Monte Carlo.

In-control process simulated
----------------------------
``log p ~ N(log 10, 0.1^2)`` iid, ``log q = 5 - 1.5 log p + e``, ``e ~ N(0, 0.2^2)``, run
through the real compiled estimator step (:func:`monitor.estimators.kernel.step_two`, excitation
guard on, default guard settings) and the real slope statistic. Both signals are standardized,
so the scales (price sd, noise sd, b) drop out; what matters is the forgetting factors and the
chart. Each path is warmed up for ``5 (1 + lam) / (1 - lam)`` observations (1,000 at lam = 1)
before the chart starts, so the designed ARL0 is the steady-state mean number of observations
between false alarms of a series (after an alarm the chart restarts, the estimator does not).
The burn-in at a series' start is outside this budget.

Method
------
With the threshold set to +inf, a chart never resets, and its first passage above any h is the
first time the running maximum of its statistic (:func:`~monitor.detectors.kernels.chart_stat`)
exceeds h. Each path is simulated until its running maximum passes ``h_hi`` and its record
values (time, new maximum) are kept, which gives every path's run length at every h <= h_hi
from one simulation; ``h_hi`` is raised (continuing the same paths) until
``ARL(h_hi) >= 1.25 arl0``. ``ARL(h) = arl0`` is then solved on a fine grid with log-linear
interpolation (the same estimator as :func:`monitor.detectors.arl_mc.design_threshold_by_simulation`, which
works on whole paths; this version stops each path at its own crossing, which costs about
``n_paths * ARL`` steps instead of ``n_paths * max run length``). The ARL's relative standard
error is about ``1 / sqrt(n_paths)``.

Checked on long pipeline runs (tests/test_pipeline.py and measurements while building it): the
level CUSUM's alarm rate matches the design (994 alarms for 1,000 expected at ARL0 = 1,000; 75
for 70 at 20,000). The slope chart's *first* alarm from the steady state matches; after an
alarm the pipeline re-anchors the slope reference, which is then young, and the next alarm
comes somewhat sooner (mean 860 instead of 1,000 at ARL0 = 1,000; about 20,800, within noise,
at 20,000). Alerts are deduplicated, so this moves alarm counts, not alert openings. While
flat prices pause the estimator's forgetting its innovations are no longer autocorrelated the
same way and the level chart's false-alarm rate is higher (about 1.5x over such stretches).
Designed ARL0s count informative observations: the slope chart and the bounds skip rows whose
status is not ``ok`` or whose forgetting is paused.

Defaults are precomputed (:data:`PRECOMPUTED`, 2,000 paths; regenerate with
``python -m monitor.detectors.design``); any other setting is simulated on first use
(400 paths: about 1 to 3 s for ARL0 = 20,000) and cached for the process.
"""

from __future__ import annotations

import math
from functools import lru_cache
from typing import NamedTuple

import numpy as np
from numba import njit

from monitor.detectors.base import check_number
from monitor.detectors.design_table import PRECOMPUTED
from monitor.detectors.kernels import CHART_SIZE, F_USED, P_THRESHOLD, chart_stat, chart_step
from monitor.detectors.slope_kernel import DEFAULT_FAST, DEFAULT_REFERENCE, SLOPE_SIZE, slope_step
from monitor.detectors.spec import CHART_CODES, chart_spec, design_inputs, pack_chart
from monitor.estimators import kernel as K
from monitor.estimators.tquantile import t_table


SIGNALS = {"iid": 0, "level": 1, "slope": 2}
DEFAULT_PATHS = 400
MAX_RECORDS = 1024
# in-control model of the simulation (any values give the same standardized signals)
_LP0, _PSD, _A, _B, _SIG = math.log(10.0), 0.1, 5.0, -1.5, 0.2


class DesignedThreshold(NamedTuple):
    """A threshold with the in-control ARL it was designed for and the design's precision.

    ``threshold`` is in the chart's own units (CUSUM h, EWMA L, Page-Hinkley lambda);
    ``arl_se`` is the standard error of the simulated ARL at the threshold (observations);
    ``threshold_se`` the resulting standard error of the threshold; ``method`` says how it was
    obtained ("simulation", "precomputed").
    """

    threshold: float
    arl0: float
    arl_se: float
    threshold_se: float
    n_paths: int
    method: str


@njit(cache=True)
def _seed(seed):  # pragma: no cover - numba
    np.random.seed(seed)


@njit(cache=True, _nrt=False)
def _warm(signal, est, sig, lam, lf, lr, tq, n_warm, out):  # pragma: no cover - numba
    for i in range(est.shape[0]):
        e = est[i]
        g = sig[i]
        for _ in range(n_warm):
            x = _LP0 + _PSD * np.random.standard_normal()
            y = _A + _B * x + _SIG * np.random.standard_normal()
            K.step_two(e, x, y, lam, True, 0.8, 0.02, 10.0, tq, out)
            if signal == 2:
                slope_step(g, 0, x, y, out[K.O_RESID_SD], e[K.I_PAUSED], lf, lr)


@njit(cache=True, _nrt=False)
def _advance(signal, kind, p, est, sig, cs, lam, lf, lr, tq, t, runmax, rec_t, rec_v, nrec,
             h_hi, max_len, out):  # pragma: no cover - numba
    """Continue every path until its running maximum exceeds ``h_hi`` (or ``max_len``);
    compiled without reference counting, as :mod:`monitor.pipeline.kernel`."""
    cap = rec_t.shape[1]
    for i in range(est.shape[0]):
        e = est[i]
        g = sig[i]
        c = cs[i]
        ti = t[i]
        rm = runmax[i]
        while rm <= h_hi and ti < max_len:
            if signal == 0:
                v = np.random.standard_normal()
            else:
                x = _LP0 + _PSD * np.random.standard_normal()
                y = _A + _B * x + _SIG * np.random.standard_normal()
                K.step_two(e, x, y, lam, True, 0.8, 0.02, 10.0, tq, out)
                if signal == 1:
                    v = out[K.O_Z]
                else:
                    v = slope_step(g, 0, x, y, out[K.O_RESID_SD], e[K.I_PAUSED], lf, lr)
            flags = chart_step(kind, c, 0, v, p)
            if flags & F_USED:
                ti += 1
                s = chart_stat(kind, c, 0, p)
                if s > rm:
                    rm = s
                    if nrec[i] == cap:  # thin: keep every other record (within-run steps)
                        half = cap // 2
                        for jj in range(half):
                            rec_t[i, jj] = rec_t[i, 2 * jj + 1]
                            rec_v[i, jj] = rec_v[i, 2 * jj + 1]
                        nrec[i] = half
                    rec_t[i, nrec[i]] = ti
                    rec_v[i, nrec[i]] = s
                    nrec[i] += 1
        t[i] = ti
        runmax[i] = rm


class _Simulation:
    """Paths of one in-control statistic, extendable to higher thresholds."""

    def __init__(self, signal: str, chart: str, forgetting: float, fast_forgetting: float,
                 reference_forgetting: float, n_paths: int, seed: int, chart_kw: dict):
        self.signal, self.chart = signal, chart
        self.lam, self.lf, self.lr = forgetting, fast_forgetting, reference_forgetting
        self.kw = chart_kw
        self.kind = CHART_CODES[chart]
        p = pack_chart(chart, 1.0, 0.0, **chart_kw)
        p[P_THRESHOLD] = np.inf
        self.p = p
        self.scale = chart_spec(chart).statistic_scale(chart_kw)
        n = n_paths
        self.n = n
        self.tq = t_table(0.95)
        self.est = np.tile(K.init_state(np.zeros(2), np.full(2, 1e6)), (n, 1))
        self.sig = np.zeros((n, SLOPE_SIZE))
        self.cs = np.zeros((n, CHART_SIZE))
        self.t = np.zeros(n, np.int64)
        self.runmax = np.full(n, -np.inf)
        self.rec_t = np.zeros((n, MAX_RECORDS), np.int64)
        self.rec_v = np.zeros((n, MAX_RECORDS))
        self.nrec = np.zeros(n, np.int64)
        self.h_hi = -np.inf
        self.max_len = 0
        _seed(int(seed))
        if SIGNALS[signal] > 0:
            slowest = max(forgetting, reference_forgetting if signal == "slope" else 0.0)
            n_warm = 1000 if slowest >= 1.0 else int(round(5 * (1 + slowest) / (1 - slowest)))
            _warm(SIGNALS[signal], self.est, self.sig, self.lam, self.lf, self.lr, self.tq,
                  n_warm, np.empty(K.NOUT))

    def advance(self, h_hi: float, max_len: int) -> None:
        self.h_hi, self.max_len = max(self.h_hi, h_hi), max(self.max_len, max_len)
        _advance(SIGNALS[self.signal], self.kind, self.p, self.est, self.sig, self.cs, self.lam,
                 self.lf, self.lr, self.tq, self.t, self.runmax, self.rec_t, self.rec_v, self.nrec,
                 self.h_hi, self.max_len, np.empty(K.NOUT))

    def moments(self, h: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Mean and sd of the run lengths at statistic thresholds ``h`` (sorted); a path that
        has not passed h counts the steps it ran (censored, biasing the ARL low)."""
        s1 = np.zeros(h.size)
        s2 = np.zeros(h.size)
        for i in range(self.n):
            m = self.nrec[i]
            v, tt = self.rec_v[i, :m], self.rec_t[i, :m].astype(np.float64)
            j = np.searchsorted(v, h, side="right")
            tau = np.where(j < m, tt[np.minimum(j, max(m - 1, 0))] if m else 0.0, float(self.t[i]))
            s1 += tau
            s2 += tau * tau
        mean = s1 / self.n
        var = np.maximum(s2 / self.n - mean * mean, 0.0) * self.n / (self.n - 1)
        return mean, np.sqrt(var)

    def arl(self, h: float) -> float:
        return float(self.moments(np.array([h]))[0][0])

    def solve(self, arl0: float) -> DesignedThreshold:
        """Threshold (chart units) with simulated ARL ``arl0``, extending the paths as needed."""
        max_len = int(100 * arl0)
        h_hi = self.h_hi if self.h_hi > -np.inf else chart_spec(self.chart).initial_guess(self.kw, arl0)
        for _ in range(40):
            self.advance(h_hi, max_len)
            a = self.arl(self.h_hi)
            if a >= 1.25 * arl0 or self.t.min() >= max_len:
                break
            lo_h = self.h_hi * 0.8 if self.h_hi > 0 else self.h_hi - 1.0
            a_lo = self.arl(lo_h)
            slope = (math.log(a) - math.log(max(a_lo, 1.0))) / (self.h_hi - lo_h)
            step = (math.log(1.4 * arl0) - math.log(a)) / slope if slope > 1e-9 else abs(self.h_hi)
            h_hi = self.h_hi + min(max(step, 0.02 * abs(self.h_hi) + 0.01), abs(self.h_hi) + 1.0)
        lo = float(np.min(np.where(self.nrec > 0, self.rec_v[:, 0], np.inf)))
        grid = np.linspace(min(lo, self.h_hi), self.h_hi, 401)
        arl = self.moments(grid)[0]
        if arl[-1] < arl0:
            raise ValueError(f"arl0 = {arl0:g}: the simulation reached ARL {arl[-1]:.4g} only "
                             f"(paths cut at {max_len} steps)")
        b = int(np.argmax(arl >= arl0))
        if b > 0:  # refine between the two coarse grid points around the crossing
            grid = np.linspace(grid[b - 1], grid[b], 401)
            arl = self.moments(grid)[0]
            b = max(int(np.argmax(arl >= arl0)), 1)
            a0, a1 = math.log(arl[b - 1]), math.log(arl[b])
            frac = 1.0 if a1 == a0 else (math.log(arl0) - a0) / (a1 - a0)
            h = float(grid[b - 1] + frac * (grid[b] - grid[b - 1]))
        else:
            h = float(grid[0])
        mean, sd = self.moments(np.array([h * math.exp(-0.05), h, h * math.exp(0.05)]))
        arl_se = float(sd[1] / math.sqrt(self.n))
        slope = (math.log(mean[2]) - math.log(max(mean[0], 1.0))) / (h * (math.exp(0.05) - math.exp(-0.05)))
        h_se = arl_se / arl0 / slope if slope > 0 else math.inf
        return DesignedThreshold(h / self.scale, float(arl0), arl_se, h_se / self.scale, self.n,
                                 "simulation")


@lru_cache(maxsize=64)
def _simulation(signal, chart, forgetting, fast_forgetting, reference_forgetting, n_paths, seed,
                kw) -> _Simulation:
    return _Simulation(signal, chart, forgetting, fast_forgetting, reference_forgetting, n_paths,
                       seed, dict(kw))


def pipeline_threshold(signal: str, chart: str, arl0: float, *, forgetting: float = 0.99,
                       fast_forgetting: float = DEFAULT_FAST,
                       reference_forgetting: float = DEFAULT_REFERENCE,
                       n_paths: int = DEFAULT_PATHS, seed: int = 0,
                       **chart_kw) -> DesignedThreshold:
    """Threshold of ``chart`` on ``signal`` ("level": standardized innovations, "slope": the
    fast/slow statistic, "iid": N(0, 1) values) for in-control ARL ``arl0`` (observations).

    ``chart_kw``: ``k`` (CUSUM), ``lam`` (EWMA), ``delta, alpha, min_instances``
    (Page-Hinkley). Uses :data:`PRECOMPUTED` when it holds the setting; otherwise simulates
    (cached in-process). Raises ValueError naming a parameter out of range.

    >>> d = pipeline_threshold("level", "cusum", 20000, forgetting=0.99, k=0.5)
    >>> d.method, round(d.threshold, 2)
    ('precomputed', 8.08)
    """
    if signal not in SIGNALS:
        raise ValueError(f"signal = {signal!r}: must be one of {', '.join(SIGNALS)}")
    arl0 = check_number("arl0", arl0, 20.0, 1e6)
    forgetting = check_number("forgetting", forgetting, 0.5, 1.0)
    reference_forgetting = check_number("reference_forgetting", reference_forgetting, 0.5, 1.0)
    fast_forgetting = check_number("fast_forgetting", fast_forgetting, 0.0,
                                   reference_forgetting, low_open=True, high_open=True)
    if signal != "slope":
        fast_forgetting = reference_forgetting = 0.0
    if signal == "iid":
        forgetting = 1.0
    n_paths = int(check_number("n_paths", n_paths, 20, 1e6, integer=True))
    kw = design_inputs(chart, chart_kw)
    key = (signal, chart, forgetting, fast_forgetting, reference_forgetting, kw, arl0)
    if n_paths == DEFAULT_PATHS and seed == 0 and key in PRECOMPUTED:
        h, arl_se, h_se, paths = PRECOMPUTED[key]
        return DesignedThreshold(h, arl0, arl_se, h_se, paths, "precomputed")
    return _simulation(signal, chart, forgetting, fast_forgetting, reference_forgetting, n_paths,
                       int(seed), kw).solve(arl0)


def iid_threshold(chart: str, arl0: float, **chart_kw) -> float:
    """Threshold for iid N(0, 1) input (used where no normal-theory solution exists)."""
    return pipeline_threshold("iid", chart, arl0, **chart_kw).threshold




def _precompute(n_paths: int = 2000) -> dict:  # pragma: no cover - offline generator
    table = {}
    targets = (1000.0, 5000.0, 10000.0, 20000.0, 50000.0)
    specs = [("level", "cusum", 0.99, 0.0, 0.0, {"k": 0.5}),
             ("slope", "cusum", 0.99, DEFAULT_FAST, DEFAULT_REFERENCE, {"k": 1.0}),
             ("level", "ewma", 0.99, 0.0, 0.0, {"lam": 0.1}),
             ("slope", "ewma", 0.99, DEFAULT_FAST, DEFAULT_REFERENCE, {"lam": 0.1}),
             ("level", "page_hinkley", 0.99, 0.0, 0.0, {"delta": 0.5}),
             ("slope", "page_hinkley", 0.99, DEFAULT_FAST, DEFAULT_REFERENCE, {"delta": 1.0}),
             ("iid", "page_hinkley", 1.0, 0.0, 0.0, {"delta": 0.5})]
    for signal, chart, lam, lf, lr, kw in specs:
        sim = _Simulation(signal, chart, lam, lf, lr, n_paths, 12345, dict(design_inputs(chart, kw)))
        for a in sorted(targets, reverse=True):
            d = sim.solve(a)
            table[(signal, chart, lam, lf, lr, design_inputs(chart, kw), a)] = (
                round(d.threshold, 4), round(d.arl_se, 1), round(d.threshold_se, 4), n_paths)
    return table


if __name__ == "__main__":  # pragma: no cover
    import pprint

    pprint.pprint(_precompute(), width=110)
