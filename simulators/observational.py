"""Observational pricing: a manager moves prices after high-demand days (no randomization).

Model per series s and day t (price in currency units, quantity in units per day)::

    u_t   = rho * u_{t-1} + eta_t                      persistent demand shock, sd shock_sd
    log q = alpha_s + beta_t * (log p_t - log p0_s) + 0.25 * weekend + u_t + e_t
    log p_t = log p0_s + clip(reaction * (log q_{t-1} - alpha_s - 0.25 * weekend_{t-1})
                              + v_t, -0.3, 0.3)        rounded to cents

The manager raises the price after a day that sold above normal. Because ``u`` persists,
today's price is correlated with today's unobserved shock, so the naive log-log OLS slope is
biased toward zero (upward here); more data does not remove the bias. This is the
simultaneity problem of demand estimation (common practice; e.g. Wooldridge 2010, from
memory). The scenario exists to show elmon's caution: estimates from
observational prices are evidence, not the elasticity; randomized price tests are the sound
basis.

Every series has one elasticity change (b to b + 0.6: less price-sensitive), so the truth file
carries the caution in its ``note`` column.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from simulators.base import (Simulation, change, changes_frame, check_float, check_int,
                             long_table, time_axis, weekday)
from simulators.retail import catalogue

COEF = {"weekend": 0.25}
NOTE = ("observational prices (raised after high-demand days; no randomization): the naive "
        "log-log slope is biased toward zero; use a randomized price test")


@njit(cache=True)
def _feedback(alpha, beta, logp0, weekend, u0, eta, rho, eps, v, reaction, w_coef):
    """Shock and price-reaction recursions over (S, T) arrays; returns (price, log q)."""
    S, T = beta.shape
    price = np.empty((S, T))
    logq = np.empty((S, T))
    for s in range(S):
        dev = 0.0
        u = u0[s]
        for t in range(T):
            if t > 0:
                u = rho * u + eta[s, t]
            x = min(max(reaction * dev + v[s, t], -0.3), 0.3)
            p = round(np.exp(logp0[s] + x) * 100.0) / 100.0
            mu = alpha[s] + beta[s, t] * (np.log(p) - logp0[s]) + w_coef * weekend[t]
            price[s, t] = p
            logq[s, t] = mu + u + eps[s, t]
            dev = logq[s, t] - alpha[s] - w_coef * weekend[t]
    return price, logq


def observational(seed: int = 0, n_series: int = 4, length: int = 365, *,
                  start: str = "2024-01-01", reaction: float = 0.3, persistence: float = 0.85,
                  shock_sd: float = 0.12, sigma: float = 0.05, price_noise: float = 0.02
                  ) -> Simulation:
    """Simulate observational (demand-reactive) prices; the naive log-log slope is biased.

    Parameters
    ----------
    seed : int
        Seed of numpy's ``default_rng``.
    n_series : int
        Number of product-store series (default 4).
    length : int
        Days per series (default 365).
    start : str
        First timestamp (UTC).
    reaction : float
        Log-price response of the manager to yesterday's log demand above normal.
    persistence : float
        AR(1) coefficient rho of the unobserved demand shock u.
    shock_sd : float
        Stationary standard deviation of u (log scale).
    sigma : float
        Standard deviation of the day's own noise e (log scale).
    price_noise : float
        Standard deviation of the manager's random price moves v (log scale).

    Returns
    -------
    Simulation
        log columns ``series, ts, price, quantity, weekend``; control ``weekend``.
    """
    n_series = check_int("n_series", n_series)
    length = check_int("length", length, minimum=28)
    reaction = check_float("reaction", reaction, 0.0, 2.0)
    persistence = check_float("persistence", persistence, 0.0, 0.99)
    shock_sd = check_float("shock_sd", shock_sd, 0.0, 1.0)
    sigma = check_float("sigma", sigma, 0.0, 1.0)
    price_noise = check_float("price_noise", price_noise, 0.0, 1.0)
    rng = np.random.default_rng(seed)
    S, T = n_series, length
    cells = catalogue(S)
    names = [c[0] for c in cells]
    p0 = np.array([c[2] for c in cells])
    ts_ns = time_axis(start, T, "D")
    weekend = (weekday(ts_ns) >= 5).astype(np.float64)

    alpha = np.log(rng.uniform(0.7, 1.4, S) * np.array([c[3] for c in cells]))
    b0 = rng.uniform(-2.6, -1.6, S)
    eta = rng.normal(0.0, shock_sd * np.sqrt(1.0 - persistence**2), (S, T))
    eps = rng.normal(0.0, sigma, (S, T))
    v = rng.normal(0.0, price_noise, (S, T))
    u0 = rng.normal(0.0, shock_sd, S)

    cuts = np.round(T * np.linspace(0.45, 0.65, S)).astype(int) if S > 1 else np.array([T // 2])
    beta = np.broadcast_to(b0[:, None], (S, T)).copy()
    changes = []
    for s in range(S):
        beta[s, cuts[s]:] = b0[s] + 0.6
        changes.append(change(names[s], ts_ns[cuts[s]], "elasticity_change",
                              beta_before=b0[s], beta_after=b0[s] + 0.6, note=NOTE))
    price, logq = _feedback(alpha, beta, np.log(p0), weekend, u0, eta, persistence, eps, v,
                            reaction, COEF["weekend"])
    intercept = alpha[:, None] - beta * np.log(p0)[:, None]
    cols = {"price": price, "quantity": np.round(np.exp(logq), 3),
            "weekend": np.broadcast_to(weekend.astype(np.int64), (S, T))}
    log = long_table(names, ts_ns, cols)
    path = long_table(names, ts_ns, {"beta": np.round(beta, 10),
                                     "intercept": np.round(intercept, 10)})
    meta = {"scenario": "observational", "seed": seed, "n_series": S, "length": T, "freq": "D",
            "noise": "lognormal", "sigma": sigma, "controls": ["weekend"],
            "coefficients": dict(COEF), "randomized": False, "note": NOTE,
            "labels": {c[0]: c[1] for c in cells}}
    return Simulation(log, changes_frame(changes), path, meta=meta)
