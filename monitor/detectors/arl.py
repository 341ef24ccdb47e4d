"""Average run length (ARL) of CUSUM and EWMA charts, and threshold design from a target ARL.

The ARL is the expected number of observations until a chart signals. ``ARL0`` (shift 0) is
the mean time between false alarms; at a shift of ``delta`` standard deviations it is the mean
detection delay. Observations are standardized: ``X_t ~ N(delta, 1)``, independent. All
parameters (k, h, L, shift) are in standard-deviation units; ARLs are in observations.

Charts
------
- Tabular CUSUM (Page 1954): ``S+_t = max(0, S+_{t-1} + X_t - k)``,
  ``S-_t = max(0, S-_{t-1} - X_t - k)``, both from 0; signal when ``S+_t > h`` (one-sided) or
  either side ``> h`` (two-sided).
- EWMA (Roberts 1959): ``Z_t = (1 - lam) Z_{t-1} + lam X_t``, ``Z_0 = 0``; signal when
  ``|Z_t| > L sqrt(lam / (2 - lam))`` (asymptotic limits, zero-state ARL as tabled by
  Lucas & Saccucci 1990).

Methods
-------
``method="integral"`` solves the Fredholm equation for the ARL as a function of the start
value by Nystrom's method with composite Gauss-Legendre quadrature (Crowder 1987 for EWMA;
for CUSUM the probability atom of the statistic at zero is carried as its own unknown).
The kernels are smooth, so the error falls geometrically with the number of nodes; panels two
kernel standard deviations wide with 10 nodes each give about 10 significant digits for ARLs
up to about 1e7. Larger ARLs make the system nearly singular and cost digits: about 1e-8
relative near 1e9, 1e-5 near 1e12 (compared with an extended-precision solve).
``method="markov"`` is the Markov-chain approximation (Brook & Evans 1972; Lucas & Saccucci
1990), error O(width^2), with one Richardson extrapolation step. The two agree to about 1e-7
for ARLs below 1e6 and 1e-6 near 1e9.

Two-sided CUSUM: ``1/ARL = 1/ARL+ + 1/ARL-`` (Van Dobben de Bruyn 1968; Lucas & Crosier
1982). For two zero-start sides with k >= 0 it is exact: at a lower-side alarm the upper
statistic is necessarily zero (the downward run that took ``S-`` above h took ``S+`` to 0),
so the upper side restarts afresh, and by the renewal argument
``E N+ = E N + P(N- < N+) E N+`` and likewise for ``N-``; adding the two gives the relation.

ARLs above :data:`ARL_CEILING` are reported as ``inf``: the linear system is then too close
to singular for float64 to resolve them (in practice: the chart never signals).

Monte Carlo checks and simulation-based design live in :mod:`monitor.detectors.arl_mc`, which
builds on this one. This module is pure numerics: no I/O, no clock.
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
from numpy.polynomial.legendre import leggauss
from scipy.special import ndtr, ndtri

from monitor.errors import ConfigError


__all__ = [
    "ARL_CEILING", "cusum_arl", "siegmund_arl", "ewma_arl", "cusum_h_for_arl0",
    "ewma_L_for_arl0", "ewma_limit", "check_range", "check_arl0", "check_sides", "shift_grid",
]

#: ARLs above this many observations are returned as ``inf`` (beyond float64 resolution).
ARL_CEILING = 1e15
#: Most quadrature nodes / chain states a single solve may use (keeps one solve < ~1 s).
MAX_NODES = 3000
_ORDER = 10  # Gauss-Legendre nodes per panel
_SQRT_2PI = math.sqrt(2.0 * math.pi)


# --------------------------------------------------------------------------- validation
def check_range(name: str, value, *, low=None, high=None, low_open=False, high_open=False,
           what: str = "") -> float:
    """Return ``float(value)`` or raise ConfigError naming the parameter, value and range."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ConfigError(f"{name} = {value!r} is not a number{what}") from None
    ok = math.isfinite(v)
    if ok and low is not None:
        ok = v > low if low_open else v >= low
    if ok and high is not None:
        ok = v < high if high_open else v <= high
    if not ok:
        lo = "" if low is None else f"{'>' if low_open else '>='} {low:g}"
        hi = "" if high is None else f"{'<' if high_open else '<='} {high:g}"
        rng = " and ".join(s for s in (lo, hi) if s) or "finite"
        raise ConfigError(f"{name} = {value!r} is out of range: {name} must be {rng}{what}")
    return v


def check_sides(sides) -> int:
    if sides not in (1, 2) or isinstance(sides, bool):
        raise ConfigError(f"sides = {sides!r} is out of range: sides must be 1 or 2")
    return int(sides)


def check_arl0(arl0) -> float:
    return check_range("arl0", arl0, low=1.0, low_open=True, high=1e12,
                  what=" (in-control ARL, observations)")


def shift_grid(shift) -> np.ndarray:
    arr = np.asarray(shift, dtype=float)
    if not np.all(np.isfinite(arr)):
        raise ConfigError(f"shift = {shift!r} is out of range: every shift must be finite")
    return arr


def _finish(values: np.ndarray, shape: tuple):
    # a run lasts at least one observation; rounding can put a true 1 + tiny just below 1,
    # while a solve beyond float64 resolution gives values far off (even negative)
    values = np.where((values > ARL_CEILING) | ~(values >= 0.5), np.inf, np.maximum(values, 1.0))
    return float(values[0]) if shape == () else values.reshape(shape)


# --------------------------------------------------------------------------- quadrature
@lru_cache(maxsize=None)
def _legendre() -> tuple[np.ndarray, np.ndarray]:
    return leggauss(_ORDER)


def _nodes(a: float, b: float, panels: int) -> tuple[np.ndarray, np.ndarray]:
    """Composite Gauss-Legendre nodes and weights on [a, b] (``panels`` x ``_ORDER`` nodes)."""
    if panels * _ORDER > MAX_NODES:
        raise ConfigError(
            f"the ARL solve needs {panels * _ORDER} quadrature nodes (more than {MAX_NODES}): "
            "the decision interval is too wide relative to one step of the statistic; "
            "use a larger k (CUSUM) or lam (EWMA), or siegmund_arl for a CUSUM estimate")
    x, w = _legendre()
    edges = np.linspace(a, b, panels + 1)
    half, mid = 0.5 * np.diff(edges), 0.5 * (edges[1:] + edges[:-1])
    return (mid[:, None] + half[:, None] * x).ravel(), (half[:, None] * w).ravel()


def _phi(x: np.ndarray) -> np.ndarray:
    return np.exp(-0.5 * x * x) / _SQRT_2PI


def _richardson(width1: float, arl1: float, width2: float, arl2: float) -> float:
    """Eliminate the O(width^2) error term of two Markov-chain solutions."""
    return (width1**2 * arl2 - width2**2 * arl1) / (width1**2 - width2**2)


# --------------------------------------------------------------------------- CUSUM
def _cusum_upper_integral(k: float, h: float, shift: float, panels: int | None) -> float:
    """Zero-start ARL of the upper CUSUM by the integral equation.

    ``L(u) = 1 + L(0) Phi(k - shift - u) + int_0^h L(y) phi(y - u - shift + k) dy``: the first
    term is the atom (the statistic drops to exactly 0), the integral the continuous part.
    Unknowns: ``L(0)`` and ``L`` at the nodes; equations at ``u = 0`` and at the nodes.
    """
    x, w = _nodes(0.0, h, panels or max(1, math.ceil(h / 2.0)))
    mu = shift - k
    u = np.concatenate(([0.0], x))
    a = np.empty((u.size, u.size))
    a[:, 0] = ndtr(-u - mu)
    a[:, 1:] = w * _phi(x[None, :] - u[:, None] - mu)
    return float(np.linalg.solve(np.eye(u.size) - a, np.ones(u.size))[0])


def _cusum_upper_markov_once(k: float, h: float, shift: float, m: int) -> float:
    # Brook & Evans (1972): state 0 is [0, w/2), state i is [(i - 1/2) w, (i + 1/2) w);
    # above h = (m - 1/2) w is absorbing (the alarm).
    width = 2.0 * h / (2 * m - 1)
    i = np.arange(m)
    d = (i[None, :] - i[:, None]) * width
    mu = shift - k
    p = ndtr(d + 0.5 * width - mu) - ndtr(d - 0.5 * width - mu)
    p[:, 0] = ndtr(0.5 * width - i * width - mu)
    return float(np.linalg.solve(np.eye(m) - p, np.ones(m))[0])


def _cusum_upper_markov(k: float, h: float, shift: float, m: int | None) -> float:
    m = m or min(MAX_NODES, max(200, 50 * math.ceil(h)))
    if m > MAX_NODES:
        raise ConfigError(f"n_nodes = {m} is out of range: at most {MAX_NODES} chain states")
    m2 = max(2, m // 2)
    a1 = _cusum_upper_markov_once(k, h, shift, m2)
    a2 = _cusum_upper_markov_once(k, h, shift, m)
    return _richardson(2 * h / (2 * m2 - 1), a1, 2 * h / (2 * m - 1), a2)


def _cusum_raw(k, h, shift, sides, method, n_nodes) -> float:
    if method == "integral":
        panels = None if n_nodes is None else max(1, math.ceil(n_nodes / _ORDER))
        one = _cusum_upper_integral
    else:
        panels, one = n_nodes, _cusum_upper_markov
    up = one(k, h, shift, panels)
    if sides == 1:
        return up
    down = up if shift == 0.0 else one(k, h, -shift, panels)
    return 1.0 / (1.0 / up + 1.0 / down)


def cusum_arl(k, h, shift=0.0, sides=2, method="integral", n_nodes=None):
    """Zero-start ARL of a tabular CUSUM with reference value k and decision interval h.

    Parameters
    ----------
    k : float
        Reference value, >= 0, in standard deviations (usually half the shift to detect).
    h : float
        Decision interval, > 0, in standard deviations.
    shift : float or array_like
        Mean shift delta of the standardized observations, in standard deviations.
    sides : {1, 2}
        1: upper chart only (a lower chart at delta equals the upper at -delta);
        2: both, combined by ``1/ARL = 1/ARL+ + 1/ARL-`` (exact here, see module notes).
    method : {"integral", "markov"}
        Integral equation with Gauss-Legendre quadrature, or Brook & Evans' Markov chain.
    n_nodes : int, optional
        Quadrature nodes (integral; default 5 per unit of h) or chain states (markov;
        default 50 per unit of h, from 200 to 3000).

    Returns
    -------
    float or numpy.ndarray
        ARL in observations (``inf`` above :data:`ARL_CEILING`), shaped like ``shift``.

    Examples
    --------
    >>> round(cusum_arl(0.5, 4.0), 2)         # Lucas & Crosier (1982): 168
    167.68
    >>> cusum_arl(0.5, 4.0, shift=[0.5, 1.0]).round(2)
    array([26.63,  8.38])
    """
    k = check_range("k", k, low=0.0, what=" (reference value, standard deviations)")
    h = check_range("h", h, low=0.0, low_open=True, what=" (decision interval, standard deviations)")
    sides = check_sides(sides)
    if method not in ("integral", "markov"):
        raise ConfigError(f"method = {method!r} is out of range: method must be "
                          "'integral' or 'markov'")
    if n_nodes is not None:
        n_nodes = int(check_range("n_nodes", n_nodes, low=2, high=MAX_NODES))
    s = shift_grid(shift)
    out = np.array([_cusum_raw(k, h, d, sides, method, n_nodes) for d in s.ravel()])
    return _finish(out, s.shape)


def _siegmund_one(delta: np.ndarray, b: float) -> np.ndarray:
    x = 2.0 * delta * b
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        full = (np.exp(-x) + x - 1.0) / (2.0 * delta**2)
    series = b * b * (1.0 - x / 3.0 + x * x / 12.0)  # |x| small: avoids cancellation
    return np.where(np.abs(x) < 1e-3, series, full)


def siegmund_arl(k, h, shift=0.0, sides=2):
    """Siegmund's (1985) approximation to the CUSUM ARL.

    One side with drift ``D = delta - k`` per observation and ``b = h + 1.166``:
    ``ARL ~ (exp(-2 D b) + 2 D b - 1) / (2 D^2)`` (``b^2`` at ``D = 0``); the lower side uses
    ``D = -delta - k``; two sides combine as in :func:`cusum_arl`.

    Examples
    --------
    >>> round(siegmund_arl(0.5, 4.0), 1)      # exact (cusum_arl): 167.7
    169.0
    """
    k = check_range("k", k, low=0.0, what=" (reference value, standard deviations)")
    h = check_range("h", h, low=0.0, low_open=True, what=" (decision interval, standard deviations)")
    sides = check_sides(sides)
    s = shift_grid(shift)
    b = h + 1.166
    up = _siegmund_one(s.ravel() - k, b)
    if sides == 2:
        with np.errstate(divide="ignore"):
            up = 1.0 / (1.0 / up + 1.0 / _siegmund_one(-s.ravel() - k, b))
    return float(up[0]) if s.shape == () else up.reshape(s.shape)


# --------------------------------------------------------------------------- EWMA
def ewma_limit(lam, L) -> float:
    """Asymptotic EWMA control limit ``c = L sqrt(lam / (2 - lam))`` (standard deviations)."""
    return L * math.sqrt(lam / (2.0 - lam))


def _ewma_integral(lam: float, c: float, shift: float, panels: int | None) -> float:
    """``L(z) = 1 + int_{-c}^{c} L(y) phi((y - (1 - lam) z) / lam - shift) / lam dy``."""
    x, w = _nodes(-c, c, panels or max(1, math.ceil(c / lam)))
    kern = lambda z: _phi((x[None, :] - (1.0 - lam) * z[:, None]) / lam - shift) / lam  # noqa: E731
    arl = np.linalg.solve(np.eye(x.size) - w * kern(x), np.ones(x.size))
    return float(1.0 + (w * kern(np.zeros(1)))[0] @ arl)  # Nystrom interpolation at z = 0


def _ewma_markov_once(lam: float, c: float, shift: float, m: int) -> float:
    width = 2.0 * c / (2 * m + 1)  # 2m + 1 states; the middle one holds z = 0
    z = -c + (np.arange(2 * m + 1) + 0.5) * width
    centre = (z[None, :] - (1.0 - lam) * z[:, None]) / lam - shift
    p = ndtr(centre + 0.5 * width / lam) - ndtr(centre - 0.5 * width / lam)
    return float(np.linalg.solve(np.eye(z.size) - p, np.ones(z.size))[m])


def _ewma_markov(lam: float, c: float, shift: float, m: int | None) -> float:
    n = m or min(MAX_NODES, max(201, 20 * math.ceil(2.0 * c / lam) + 1))
    if n > MAX_NODES:
        raise ConfigError(f"n_nodes = {n} is out of range: at most {MAX_NODES} chain states")
    m1, m2 = max(1, n // 4), max(2, n // 2)
    a1, a2 = _ewma_markov_once(lam, c, shift, m1), _ewma_markov_once(lam, c, shift, m2)
    return _richardson(2 * c / (2 * m1 + 1), a1, 2 * c / (2 * m2 + 1), a2)


def _ewma_raw(lam, L, shift, method="integral", n_nodes=None) -> float:
    c = ewma_limit(lam, L)
    if method == "integral":
        panels = None if n_nodes is None else max(1, math.ceil(n_nodes / _ORDER))
        return _ewma_integral(lam, c, shift, panels)
    return _ewma_markov(lam, c, shift, n_nodes)


def ewma_arl(lam, L, shift=0.0, method="integral", n_nodes=None):
    """Zero-start ARL of the two-sided EWMA chart with asymptotic limits.

    Parameters
    ----------
    lam : float
        Smoothing constant, 0 < lam <= 1 (1 is the Shewhart chart).
    L : float
        Limit width, > 0: signal when ``|Z_t| > L sqrt(lam / (2 - lam))``.
    shift : float or array_like
        Mean shift of the standardized observations, in standard deviations.
    method : {"integral", "markov"}
        Nystrom solution of the integral equation (Crowder 1987), or the Markov chain of
        Lucas & Saccucci (1990) with Richardson extrapolation.
    n_nodes : int, optional
        Quadrature nodes (default 5 per ``lam`` of limit width) or chain states.

    Examples
    --------
    >>> round(ewma_arl(0.1, 2.814), 0)         # Lucas & Saccucci (1990): about 500
    500.0
    """
    lam = check_range("lam", lam, low=0.0, low_open=True, high=1.0, what=" (EWMA smoothing)")
    L = check_range("L", L, low=0.0, low_open=True, what=" (limit width, standard deviations)")
    if method not in ("integral", "markov"):
        raise ConfigError(f"method = {method!r} is out of range: method must be "
                          "'integral' or 'markov'")
    if n_nodes is not None:
        n_nodes = int(check_range("n_nodes", n_nodes, low=2, high=MAX_NODES))
    s = shift_grid(shift)
    out = np.array([_ewma_raw(lam, L, d, method, n_nodes) for d in s.ravel()])
    return _finish(out, s.shape)


# --------------------------------------------------------------------------- inverse design
def _solve_log(f, target: float, lo: float, hi: float, floor: float) -> float:
    """Root of ``log f(x) = log target``, f increasing; widen [lo, hi] until it brackets."""
    def g(x):
        value = f(x)  # beyond float64 resolution (huge, or garbage): treat as "too high"
        ok = 0.0 < value <= ARL_CEILING
        return math.log(value) - math.log(target) if ok else 50.0

    glo, ghi = g(lo), g(hi)
    for _ in range(60):
        if glo <= 0.0 <= ghi:
            break
        if glo > 0.0:
            lo, hi, ghi = max(floor, lo - 2.0 * (hi - lo)), lo, glo
            glo = g(lo)
        else:
            lo, hi, glo = hi, hi + 2.0 * (hi - lo), ghi
            ghi = g(hi)
    else:  # pragma: no cover - guarded by the callers' range checks
        raise ConfigError(f"could not bracket a threshold for ARL {target:g}")
    from scipy.optimize import brentq   # on first use: scipy.optimize is 0.15-0.45 s of a start

    return brentq(g, lo, hi, xtol=1e-12, rtol=1e-12)


@lru_cache(maxsize=4096)
def _cusum_h_cached(k: float, arl0: float, sides: int) -> float:
    # start from Siegmund's approximation, which is within a few percent in control
    def sieg(h):
        return float(siegmund_arl(k, h, 0.0, sides))
    if sieg(1e4) < arl0:  # only near k = 0; the exact solve would need > MAX_NODES nodes
        raise ConfigError(f"arl0 = {arl0:g} is out of range for k = {k:g}: it needs h > 1e4; "
                          "use a larger k")
    from scipy.optimize import brentq

    guess = 0.1 if sieg(1e-9) >= arl0 else \
        brentq(lambda h: math.log(sieg(h)) - math.log(arl0), 1e-9, 1e4)
    def exact(h):
        return _cusum_raw(k, h, 0.0, sides, "integral", None)
    return _solve_log(exact, arl0, max(1e-9, 0.95 * guess - 0.1), 1.05 * guess + 0.1, 1e-9)


def cusum_h_for_arl0(k, arl0, sides=2) -> float:
    """Decision interval h giving in-control ARL ``arl0`` (exact integral method, cached).

    Root of ``log cusum_arl(k, h) = log arl0`` by Brent's method, bracketed from Siegmund's
    approximation: the ARL at the returned h equals ``arl0`` to about 1e-10 relative for
    arl0 up to 1e6 (1e-5 at 1e12). An uncached call takes a few milliseconds for k >= 0.25.

    Examples
    --------
    >>> round(cusum_h_for_arl0(0.5, 168.0), 2)    # Lucas & Crosier (1982): h = 4 gives 168
    4.01
    """
    k = check_range("k", k, low=0.0, what=" (reference value, standard deviations)")
    arl0 = check_arl0(arl0)
    sides = check_sides(sides)
    smallest = 1.0 / (sides * float(ndtr(-k)))  # ARL as h -> 0: one step above k ends it
    if arl0 <= smallest:
        raise ConfigError(f"arl0 = {arl0:g} is out of range: with k = {k:g} and sides = {sides} "
                          f"every h > 0 gives ARL0 > {smallest:.4g}; arl0 must exceed that")
    return _cusum_h_cached(k, arl0, sides)


@lru_cache(maxsize=4096)
def _ewma_L_cached(lam: float, arl0: float) -> float:
    shewhart = float(ndtri(1.0 - 0.5 / arl0))  # lam = 1 needs exactly this L; smaller lam less
    return _solve_log(lambda L: _ewma_raw(lam, L, 0.0), arl0, 0.6 * shewhart, shewhart + 0.05,
                      1e-6)


def ewma_L_for_arl0(lam, arl0) -> float:
    """Limit width L giving in-control ARL ``arl0`` for the EWMA chart (cached).

    Root of ``log ewma_arl(lam, L) = log arl0`` by Brent's method, bracketed below the
    Shewhart (lam = 1) limit; accuracy as :func:`cusum_h_for_arl0`. An uncached call takes a
    few milliseconds for lam >= 0.05 (about 30 ms at lam = 0.01, arl0 = 1e6).

    Examples
    --------
    >>> round(ewma_L_for_arl0(0.1, 500.0), 3)    # Lucas & Saccucci (1990): L = 2.814
    2.814
    """
    lam = check_range("lam", lam, low=0.0, low_open=True, high=1.0, what=" (EWMA smoothing)")
    return _ewma_L_cached(lam, check_arl0(arl0))
