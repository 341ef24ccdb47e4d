"""Change-detection grid: many seeded series with one known change (or none), as arrays.

The scenarios of the detection benchmark (issue 12) and of ``tests/test_detection_grid.py``.
Each series ``s`` follows the log-log model

    log q_t = a_t + b_t x_t + c z_t + u_t,     x_t = log p_t

with the typical price ``p0`` (``x`` is centred on ``mu = log p0``), one control ``z`` with
coefficient ``c = 0.5`` (only in the ``collinear`` price pattern), and errors ``u``.

Price patterns (``prices``)
    ``independent``: ``x_t = mu + sd e_t`` with ``e_t`` iid N(0, 1);
    ``steps``: a level ``mu + sd e`` held for 7 to 28 observations (uniform), as shops set
    prices; ``flat_then_move``: exactly flat for the first ``flat_obs`` observations and for a
    second flat stretch in the middle of the pre-change part, independent moves otherwise;
    ``collinear``: independent prices, but for a stretch of ``flat_obs`` observations the price
    is set from the control, ``x_t = mu + z_t`` (b is not identified there).
Error patterns (``errors``)
    ``iid``: N(0, sigma^2); ``ar1``: ``u_t = rho u_{t-1} + e_t`` with stationary sd sigma;
    ``growing``: sd ``sigma exp(g (x_t - mu)) / exp(g^2 sd^2)`` (g = 3), larger at higher
    prices, with mean variance sigma^2 under independent prices.
Changes (``change``, at observation ``change_at``)
    ``none``; ``slope_pivot``: b moves by ``size`` and the intercept moves so that demand at
    the typical price is unchanged (``a_1 = a_0 - size mu``); ``slope_held``: b moves by
    ``size`` with the intercept held (demand at the typical price moves by ``size mu`` on the
    log scale as well); ``level``: ``a`` moves by ``log(1 + size)`` (``size = -0.2``: demand
    20% lower at every price); ``two_slopes``: a pivot change of ``size`` at ``change_at`` and
    a second one of ``-size`` (back) at ``change_at + second_gap``; ``second_only``: only that
    second change (b starts at ``b0 + size``): the fresh-series comparison.

The direction of each slope change alternates between series (even series: b falls by
``size``, odd series: it rises), so both sides of the detector are exercised.

:func:`simulate` returns the rows in arrival order (time-major: all series at step 0, then
step 1, ...), ready for :meth:`monitor.pipeline.Pipeline.run`; :func:`information` gives the
Kullback-Leibler information per observation of the slope part of the change computed from the
simulated design itself (Lorden 1971: the detection delay of any procedure with in-control ARL
``A`` is at least about ``ln(A) / I``).

>>> sim = simulate(Scenario("s", change="slope_pivot", size=0.8, n_obs=400, change_at=200),
...                n_series=4, seed=1)
>>> sim.X.shape, sim.n_series, int(sim.change_at)
((1600, 2), 4, 200)
>>> bool(abs(sim.information().mean() - 0.64 * 0.0225 / (2 * 0.0225)) < 0.1)
True
"""

from __future__ import annotations

import math
import zlib
from dataclasses import dataclass, field, replace

import numpy as np

PRICES = ("independent", "steps", "flat_then_move", "collinear")
ERRORS = ("iid", "ar1", "growing")
CHANGES = ("none", "slope_pivot", "slope_held", "level", "two_slopes", "second_only")
#: coefficient of the control z in log q (collinear pattern)
CONTROL_COEF = 0.5
#: heteroscedasticity slope g of the ``growing`` errors (sd ratio exp(g * 0.3) at +2 sd of 0.15)
GROWTH = 3.0


@dataclass(frozen=True)
class Scenario:
    """One cell of the grid (see the module docstring for the patterns).

    Units: ``price_sd`` and ``noise_sd`` are standard deviations on the log scale; ``size`` is a
    change of b (slope changes) or a relative change of demand (``level``: -0.2 = 20% lower);
    ``change_at``, ``second_gap``, ``n_obs``, ``flat_obs`` count observations per series.
    """

    name: str
    prices: str = "independent"
    price_sd: float = 0.15
    errors: str = "iid"
    rho: float = 0.0
    noise_sd: float = 0.15
    change: str = "none"
    size: float = 0.0
    b0: float = -1.0
    p0: float = 10.0
    change_at: int = 1000
    second_gap: int = 150
    n_obs: int = 2000
    flat_obs: int = 300
    hold_min: int = 7
    hold_max: int = 28
    tags: dict = field(default_factory=dict, compare=False)

    def __post_init__(self):
        for key, allowed in (("prices", PRICES), ("errors", ERRORS), ("change", CHANGES)):
            if getattr(self, key) not in allowed:
                raise ValueError(f"{key} = {getattr(self, key)!r}: must be one of "
                                 f"{', '.join(allowed)}")
        if self.change != "none" and not 0 < self.true_change_at < self.n_obs:
            raise ValueError(f"change_at = {self.change_at}: the change must fall in 1..n_obs-1 "
                             f"(n_obs = {self.n_obs}, second_gap = {self.second_gap})")
        if not -1.0 < self.rho < 1.0:
            raise ValueError(f"rho = {self.rho}: must be in (-1, 1)")
        if self.price_sd <= 0 or self.noise_sd <= 0:
            raise ValueError("price_sd and noise_sd must be > 0")
        if self.change == "level" and not self.size > -1.0:
            raise ValueError(f"size = {self.size}: a level change must be > -1 (-100%)")

    @property
    def controls(self) -> int:
        """Number of control columns in the design (1 for ``collinear``)."""
        return 1 if self.prices == "collinear" else 0

    @property
    def slope_change(self) -> bool:
        return self.change in ("slope_pivot", "slope_held", "two_slopes", "second_only")

    @property
    def true_change_at(self) -> int:
        """Observation index of the change to be detected (the second one for
        ``second_only`` / ``two_slopes``: see :attr:`Simulation.second_at`)."""
        return self.change_at + (self.second_gap if self.change == "second_only" else 0)

    def with_(self, **kw) -> "Scenario":
        return replace(self, **kw)


@dataclass
class Simulation:
    """Rows of a grid cell in arrival order, and the truth.

    ``sid`` (n,), ``X`` (n, 2 + controls) = ``[1, log p, z...]``, ``y`` (n,) = log q, ``t`` (n,)
    the observation index within the series, ``sign`` (S,) the direction of each series'
    slope change (+1 / -1), ``sigma`` (n,) the error sd of each row (innovation sd for AR
    errors), ``change_at`` the observation of the (first) change, ``second_at`` that of the
    second change (or -1).
    """

    scenario: Scenario
    sid: np.ndarray
    X: np.ndarray
    y: np.ndarray
    t: np.ndarray
    sign: np.ndarray
    sigma: np.ndarray
    change_at: int
    second_at: int
    n_series: int

    @property
    def n_obs(self) -> int:
        return self.scenario.n_obs

    def ts(self, step_ns: int = 86_400 * 10**9, start: str = "2024-01-01") -> np.ndarray:
        """int64 ns UTC timestamps (one step per observation, daily by default)."""
        return np.datetime64(start, "ns").astype(np.int64) + self.t.astype(np.int64) * step_ns

    def information(self, at: int | None = None, size: float | None = None) -> np.ndarray:
        """Per series: the Kullback-Leibler information per observation of the slope part of
        the change, ``I = db^2 mean_t(w_t^2) / 2`` over the rows from ``at`` (default: the
        change to detect) to the end, where ``w_t`` is the log price after the intercept and
        the control (least-squares residual over those rows), divided by the error sd of the
        row and, for AR(1) errors, pre-whitened: ``w_t = (x~_t - rho x~_{t-1}) / s_e``.
        For a pure level change, the information of the level part, ``log(1 + size)^2 /
        (2 sigma^2)`` averaged the same way. Units: nats per observation."""
        sc = self.scenario
        at = sc.true_change_at if at is None else at
        db = abs(sc.size if size is None else size)
        S, T = self.n_series, sc.n_obs
        x = self.X[:, 1].reshape(T, S)[at:]
        sig = self.sigma.reshape(T, S)[at:]
        if sc.change == "level":
            w = np.ones_like(x) / sig
            db = abs(math.log1p(sc.size))
        else:
            cols = [np.ones_like(x)] + [self.X[:, 2 + i].reshape(T, S)[at:]
                                        for i in range(sc.controls)]
            xt = np.empty_like(x)
            for s in range(S):
                A = np.column_stack([c[:, s] for c in cols])
                coef, *_ = np.linalg.lstsq(A, x[:, s], rcond=None)
                xt[:, s] = x[:, s] - A @ coef
            w = xt / sig
        if sc.errors == "ar1" and sc.rho != 0.0:
            w = np.vstack([w[:1] * math.sqrt(1.0 - sc.rho ** 2), w[1:] - sc.rho * w[:-1]])
        return db * db * np.mean(w * w, axis=0) / 2.0

    def bound(self, arl0: float, **kw) -> float:
        """Lorden's (1971) bound on the detection delay, ``ln(ARL0) / I`` (observations), with
        ``I`` the mean over series of :meth:`information`."""
        return math.log(arl0) / float(np.mean(self.information(**kw)))


def _prices(sc: Scenario, S: int, rng, z: np.ndarray) -> np.ndarray:
    T, mu, sd = sc.n_obs, math.log(sc.p0), sc.price_sd
    if sc.prices == "steps":
        x = np.empty((T, S))
        level = mu + sd * rng.standard_normal(S)
        left = rng.integers(sc.hold_min, sc.hold_max + 1, S)
        for t in range(T):
            new = left <= 0
            if new.any():
                level[new] = mu + sd * rng.standard_normal(int(new.sum()))
                left[new] = rng.integers(sc.hold_min, sc.hold_max + 1, int(new.sum()))
            x[t] = level
            left -= 1
        return x
    x = mu + sd * rng.standard_normal((T, S))
    if sc.prices == "flat_then_move":
        x[:sc.flat_obs] = mu
        mid = max(sc.flat_obs, (sc.change_at - sc.flat_obs) // 2)
        x[mid:min(mid + sc.flat_obs // 2, sc.change_at)] = mu
    elif sc.prices == "collinear":
        a = max(0, sc.change_at // 2 - sc.flat_obs // 2)
        x[a:a + sc.flat_obs] = mu + z[a:a + sc.flat_obs]
    return x


def _errors(sc: Scenario, S: int, rng, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(u, s)``: errors (T, S) and the sd of each row's innovation."""
    T = sc.n_obs
    e = rng.standard_normal((T, S))
    if sc.errors == "ar1":
        se = sc.noise_sd * math.sqrt(1.0 - sc.rho ** 2)
        u = np.empty((T, S))
        u[0] = sc.noise_sd * e[0]
        for t in range(1, T):
            u[t] = sc.rho * u[t - 1] + se * e[t]
        return u, np.full((T, S), se)
    if sc.errors == "growing":
        mu = math.log(sc.p0)
        s = sc.noise_sd * np.exp(GROWTH * (x - mu) - GROWTH ** 2 * sc.price_sd ** 2)
        return s * e, s
    return sc.noise_sd * e, np.full((T, S), sc.noise_sd)


def simulate(sc: Scenario, n_series: int, seed: int) -> Simulation:
    """The rows of ``n_series`` seeded series of scenario ``sc`` (arrival order)."""
    rng = np.random.default_rng([seed, zlib.crc32(sc.name.encode())])
    S, T = int(n_series), sc.n_obs
    mu = math.log(sc.p0)
    z = 0.15 * rng.standard_normal((T, S)) if sc.controls else np.zeros((T, S))
    x = _prices(sc, S, rng, z)
    u, s = _errors(sc, S, rng, x)
    sign = np.where(np.arange(S) % 2 == 0, -1.0, 1.0)
    t = np.arange(T)[:, None]
    b = np.full((T, S), sc.b0)
    a = np.full((T, S), 4.0 - sc.b0 * mu)            # about e^4 = 55 units at the typical price
    after = t >= sc.change_at
    second = -1
    if sc.change in ("slope_pivot", "slope_held", "two_slopes"):
        db = sign * abs(sc.size)
        b = b + after * db
        if sc.change != "slope_held":
            a = a - after * db * mu
        if sc.change == "two_slopes":
            second = sc.change_at + sc.second_gap
            back = t >= second
            b = b - back * db
            a = a + back * db * mu
    elif sc.change == "second_only":
        second = sc.change_at + sc.second_gap
        db = sign * abs(sc.size)
        b = b + db
        a = a - db * mu
        back = t >= second
        b = b - back * db
        a = a + back * db * mu
    elif sc.change == "level":
        a = a + after * math.log1p(sc.size)
    y = a + b * x + CONTROL_COEF * z + u
    cols = [np.ones(T * S), x.ravel()] + ([z.ravel()] if sc.controls else [])
    return Simulation(scenario=sc, sid=np.tile(np.arange(S, dtype=np.int64), T),
                      X=np.column_stack(cols), y=y.ravel(), t=np.repeat(np.arange(T), S),
                      sign=sign, sigma=s.ravel(), change_at=sc.change_at, second_at=second,
                      n_series=S)
