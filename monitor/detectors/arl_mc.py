"""Run lengths by simulation: Monte Carlo checks of :mod:`monitor.detectors.arl`, and threshold design
for statistics that normal-theory tables do not cover.

Pure numerics (numpy, numba): no I/O, no clock. The public names are re-exported by
:mod:`monitor.detectors.arl`.

Monte Carlo
-----------
:func:`cusum_arl_mc` and :func:`ewma_arl_mc` simulate independent zero-start runs of the
charts of :mod:`monitor.detectors.arl` on ``N(shift, 1)`` observations (numba-compiled loops) and return
the mean run length with its standard error ``sd / sqrt(n_runs)``.

Design by simulation
--------------------
:func:`design_threshold_by_simulation` takes any in-control statistic that signals when it
exceeds a threshold (autocorrelated or heavy-tailed ones included: a fast-minus-slow
difference of estimates, a score that multiplies two noisy terms) and finds the threshold with
a target in-control ARL from one batch of simulated paths, without re-simulating per trial
threshold. For path i let ``M_i(t)`` be the running maximum of the statistic; the run length
at threshold h is ``tau_i(h) = 1 + #{t : M_i(t) <= h}``, so one pass that histograms the
running maxima gives ``ARL(h) = mean_i tau_i(h)`` at every candidate h at once. This needs the
statistic itself not to depend on h before the first alarm (true of CUSUM, EWMA and
Page-Hinkley statistics; the reset after an alarm restarts the same process).
"""

from __future__ import annotations

import math
from typing import Callable, Iterable, NamedTuple

import numba
import numpy as np

from monitor.detectors.arl import check_arl0, check_range, check_sides, ewma_limit, shift_grid
from monitor.errors import ConfigError


__all__ = ["MonteCarloARL", "SimulatedThreshold", "cusum_arl_mc", "ewma_arl_mc",
           "design_threshold_by_simulation"]


class MonteCarloARL(NamedTuple):
    """Monte Carlo ARL: estimate, standard error, runs, and runs cut off at ``max_len``.

    With ``n_censored > 0`` the estimate is biased low (a cut-off run counts ``max_len``).
    ``arl``, ``se`` and ``n_censored`` are arrays shaped like ``shift`` when it is one.
    """

    arl: float | np.ndarray
    se: float | np.ndarray
    n_runs: int
    n_censored: int | np.ndarray


@numba.njit(cache=True)
def _cusum_runs(k, h, shift, two_sided, n_runs, max_len, seed):  # pragma: no cover - numba
    np.random.seed(seed)
    lengths = np.empty(n_runs, np.float64)
    censored = 0
    for r in range(n_runs):
        up = 0.0
        down = 0.0
        t = 0
        alarm = False
        while t < max_len:
            t += 1
            x = np.random.normal(shift, 1.0)
            up = max(0.0, up + x - k)
            if two_sided:
                down = max(0.0, down - x - k)
            if up > h or down > h:
                alarm = True
                break
        lengths[r] = t
        censored += 0 if alarm else 1
    return lengths, censored


@numba.njit(cache=True)
def _ewma_runs(lam, c, shift, n_runs, max_len, seed):  # pragma: no cover - numba
    np.random.seed(seed)
    lengths = np.empty(n_runs, np.float64)
    censored = 0
    for r in range(n_runs):
        z = 0.0
        t = 0
        alarm = False
        while t < max_len:
            t += 1
            z = (1.0 - lam) * z + lam * np.random.normal(shift, 1.0)
            if abs(z) > c:
                alarm = True
                break
        lengths[r] = t
        censored += 0 if alarm else 1
    return lengths, censored


def _mc_settings(n_runs, seed, max_len) -> tuple[int, int, int]:
    n_runs = int(check_range("n_runs", n_runs, low=2, high=1e9))
    seed = int(check_range("seed", seed, low=0, high=2**32 - 1))
    max_len = int(check_range("max_len", max_len, low=1, high=1e12))
    return n_runs, seed, max_len


def _collect(run, shift, n_runs) -> MonteCarloARL:
    s = shift_grid(shift)
    arl, se, cens = [], [], []
    for d in s.ravel():
        lengths, censored = run(float(d))
        arl.append(lengths.mean())
        se.append(lengths.std(ddof=1) / math.sqrt(n_runs))
        cens.append(censored)
    if s.shape == ():
        return MonteCarloARL(float(arl[0]), float(se[0]), n_runs, int(cens[0]))
    return MonteCarloARL(np.reshape(arl, s.shape), np.reshape(se, s.shape), n_runs,
                         np.reshape(cens, s.shape))


def cusum_arl_mc(k, h, shift=0.0, sides=2, n_runs=10_000, seed=0, max_len=10_000_000):
    """Monte Carlo ARL of the zero-start tabular CUSUM (see :func:`monitor.detectors.arl.cusum_arl`).

    Each run simulates ``X_t ~ N(shift, 1)`` until ``S+_t > h`` (or, two-sided, either side
    ``> h``) or ``max_len`` observations. The same ``seed`` is used at every shift (common
    random numbers). Cost is about ``n_runs * ARL`` steps of a few nanoseconds each.

    Returns
    -------
    MonteCarloARL
        ``(arl, se, n_runs, n_censored)``, in observations.

    Examples
    --------
    >>> est = cusum_arl_mc(0.5, 4.0, shift=1.0, n_runs=4000, seed=1)
    >>> abs(est.arl - 8.383) < 4 * est.se     # exact value from cusum_arl
    True
    """
    k = check_range("k", k, low=0.0, what=" (reference value, standard deviations)")
    h = check_range("h", h, low=0.0, low_open=True, what=" (decision interval, standard deviations)")
    two_sided = check_sides(sides) == 2
    n_runs, seed, max_len = _mc_settings(n_runs, seed, max_len)
    return _collect(lambda d: _cusum_runs(k, h, d, two_sided, n_runs, max_len, seed),
                    shift, n_runs)


def ewma_arl_mc(lam, L, shift=0.0, n_runs=10_000, seed=0, max_len=10_000_000):
    """Monte Carlo ARL of the zero-start two-sided EWMA chart (see
    :func:`monitor.detectors.arl.ewma_arl`): ``Z_t = (1 - lam) Z_{t-1} + lam X_t`` until
    ``|Z_t| > L sqrt(lam / (2 - lam))`` or ``max_len`` observations.

    Examples
    --------
    >>> est = ewma_arl_mc(0.1, 2.814, shift=1.0, n_runs=4000, seed=1)
    >>> abs(est.arl - 10.331) < 4 * est.se    # exact value from ewma_arl
    True
    """
    lam = check_range("lam", lam, low=0.0, low_open=True, high=1.0, what=" (EWMA smoothing)")
    L = check_range("L", L, low=0.0, low_open=True, what=" (limit width, standard deviations)")
    n_runs, seed, max_len = _mc_settings(n_runs, seed, max_len)
    c = ewma_limit(lam, L)
    return _collect(lambda d: _ewma_runs(lam, c, d, n_runs, max_len, seed), shift, n_runs)


class SimulatedThreshold(NamedTuple):
    """Threshold designed by simulation.

    ``arl_se`` is the standard error of the simulated ARL at ``threshold`` (observations);
    ``threshold_se`` the resulting standard error of the threshold (delta method, through the
    slope of log ARL); ``n_steps`` the simulated length of every path; ``n_censored`` the paths
    that had not crossed ``threshold`` when simulation stopped (each counted as ``n_steps``,
    which biases the ARL low and the threshold high, i.e. to fewer false alarms).
    """

    threshold: float
    threshold_se: float
    arl_se: float
    n_paths: int
    n_steps: int
    n_censored: int


def design_threshold_by_simulation(
    simulate_paths: Callable[[int, np.random.Generator], Iterable[np.ndarray] | np.ndarray],
    arl0, lower, upper, *, n_paths=200, seed=0, max_len=None, n_bins=2000, max_censored=0.01,
) -> SimulatedThreshold:
    """Threshold h in [lower, upper] at which a statistic's in-control ARL equals ``arl0``.

    Parameters
    ----------
    simulate_paths : callable
        ``simulate_paths(n_paths, rng)`` returns in-control values of the statistic, either
        one array of shape ``(n_paths, T)`` or an iterable of such arrays (consecutive chunks
        of the same paths, so long paths need not be held in memory). The chart signals at
        the first t with ``value > h``; for a two-sided rule pass ``max(S+, S-)`` or ``|Z|``.
    arl0 : float
        Target in-control ARL, observations.
    lower, upper : float
        Search range for h (a grid of ``n_bins`` equal steps).
    n_paths : int
        Independent paths; the ARL's relative standard error is about ``1 / sqrt(n_paths)``.
    seed : int
        Seed of the ``numpy.random.Generator`` passed to ``simulate_paths``.
    max_len : int, optional
        Stop reading chunks after this many steps (default ``50 * arl0``). Reading also stops
        once every path has crossed a threshold whose ARL already exceeds ``arl0``.
    max_censored : float
        Largest allowed fraction of paths that never crossed the designed threshold.

    Returns
    -------
    SimulatedThreshold
        h by log-linear interpolation of ``ARL(h)`` between grid points.

    Examples
    --------
    A Shewhart rule on iid N(0, 1) values, whose exact ARL is ``1 / P(X > h)``:

    >>> def paths(n, rng):
    ...     for _ in range(100):
    ...         yield rng.standard_normal((n, 100))
    >>> d = design_threshold_by_simulation(paths, 100.0, 1.0, 4.0, n_paths=2000, seed=3)
    >>> abs(d.threshold - 2.326) < 0.03       # scipy.stats.norm.isf(0.01) = 2.326
    True
    """
    arl0 = check_arl0(arl0)
    lower = check_range("lower", lower)
    upper = check_range("upper", upper, low=lower, low_open=True)
    n_paths = int(check_range("n_paths", n_paths, low=2, high=1e7))
    n_bins = int(check_range("n_bins", n_bins, low=1, high=1e6))
    max_len = int(check_range("max_len", 50 * arl0 if max_len is None else max_len, low=1))
    max_censored = check_range("max_censored", max_censored, low=0.0, high=1.0)
    edges = np.linspace(lower, upper, n_bins + 1)
    width = n_bins + 2  # bin 0: M <= lower; bin j: edges[j-1] < M <= edges[j]; last: M > upper
    counts = np.zeros(n_paths * width, np.int64)
    running = np.full(n_paths, -np.inf)
    offsets = (np.arange(n_paths) * width)[:, None]
    steps = 0
    chunks = simulate_paths(n_paths, np.random.default_rng(int(seed)))
    if isinstance(chunks, np.ndarray):
        chunks = [chunks]
    for number, chunk in enumerate(chunks):
        chunk = np.asarray(chunk, dtype=float)
        if chunk.ndim != 2 or chunk.shape[0] != n_paths:
            raise ConfigError(f"simulate_paths chunk {number} has shape {chunk.shape}: "
                              f"expected ({n_paths}, steps)")
        if not np.all(np.isfinite(chunk)):
            i, t = np.argwhere(~np.isfinite(chunk))[0]
            raise ConfigError(f"simulate_paths chunk {number}, path {i}, step {t}: value "
                              f"{float(chunk[i, t])!r} is not finite")
        chunk = chunk[:, : max_len - steps]
        run_max = np.maximum(np.maximum.accumulate(chunk, axis=1), running[:, None])
        running = run_max[:, -1]
        steps += chunk.shape[1]
        bins = np.searchsorted(edges, run_max, side="left")
        counts += np.bincount((offsets + bins).ravel(), minlength=counts.size)
        passed = int(np.searchsorted(edges, running.min(), side="left")) - 1  # all M > edge
        if passed >= 0:
            done = 1.0 + counts.reshape(n_paths, width)[:, : passed + 1].sum() / n_paths
            if done >= arl0:
                break
        if steps >= max_len:
            break
    if steps == 0:
        raise ConfigError("simulate_paths produced no steps")
    below = np.cumsum(counts.reshape(n_paths, width), axis=1)[:, : n_bins + 1]
    censored = running[:, None] <= edges[None, :]
    tau = below + 1 - censored  # run length at each edge; a censored path counts n_steps
    arl = tau.mean(axis=0)
    if arl[0] >= arl0:
        raise ConfigError(f"lower = {lower:g} is too high: the simulated ARL there is already "
                          f"{arl[0]:.4g} >= arl0 = {arl0:g}")
    if arl[-1] < arl0:
        why = (f"paths stopped after max_len = {max_len} steps" if censored[:, -1].any()
               else f"upper = {upper:g} is too low")
        raise ConfigError(f"the simulated ARL at upper = {upper:g} is {arl[-1]:.4g} < arl0 = "
                          f"{arl0:g}: {why}")
    b = int(np.argmax(arl >= arl0))
    a0, a1 = math.log(arl[b - 1]), math.log(arl[b])
    frac = 1.0 if a1 == a0 else (math.log(arl0) - a0) / (a1 - a0)
    threshold = float(edges[b - 1] + frac * (edges[b] - edges[b - 1]))
    n_cens = int(censored[:, b].sum())
    if n_cens > max_censored * n_paths:
        raise ConfigError(f"{n_cens} of {n_paths} paths never crossed h = {threshold:.4g} "
                          f"within {steps} steps (max_censored = {max_censored:g}): raise "
                          "max_len or supply longer paths")
    arl_se = float(tau[:, b].std(ddof=1) / math.sqrt(n_paths))
    lo = int(np.argmax(arl >= arl0 * math.exp(-0.1)))  # slope of log ARL over +-10%
    hi = int(np.argmax(arl >= arl0 * math.exp(0.1))) if arl[-1] >= arl0 * math.exp(0.1) \
        else n_bins
    slope = (math.log(arl[hi]) - math.log(arl[lo])) / max(edges[hi] - edges[lo], 1e-300)
    threshold_se = arl_se / arl0 / slope if slope > 0 else math.inf
    return SimulatedThreshold(threshold, float(threshold_se), arl_se, n_paths, steps, n_cens)
