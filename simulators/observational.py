"""Observational pricing: a manager moves prices after high-demand days (no randomization).

Model per series s and day t (price in currency units, quantity in units per day)::

    u_t   = rho * u_{t-1} + eta_t                      persistent demand shock, sd shock_sd
    log q = alpha_s + beta_t * (log p_t - log p0_s) + 0.25 * weekend + u_t + e_t
    log c_t = log c0_s + k_t,   k_t ~ N(0, cost_sd^2) independent of everything else
    log p_t = log p0_s + clip(reaction * (log q_{t-1} - alpha_s - 0.25 * weekend_{t-1})
                              + pass_through * k_t + v_t, -0.3, 0.3)   rounded to cents

The manager raises the price after a day that sold above normal. Because ``u`` persists,
today's price is correlated with today's unobserved shock, so the naive log-log OLS slope is
biased toward zero (upward here); more data does not remove the bias. This is the
simultaneity problem of demand estimation (common practice; e.g. Wooldridge 2010, from
memory).

The log also carries the supplier's unit cost ``unit_cost = c_t`` (currency units per unit,
``c0_s`` half the base price). It moves the price (``pass_through`` of a log-cost change) and
not demand, so it is a valid instrument: ``log(unit_cost)`` is the instrument that
:class:`monitor.estimators.iv.ElasticityIV` needs, and ``meta["instrument_truth"]`` records it.
The day-to-day cost moves are independent over time, so the robust (HC) band of the IV fit is
valid even though the demand shock ``u`` persists. The scenario exists to show elmon's caution: estimates from
observational prices are evidence, not the elasticity; randomized price tests are the sound
basis.

Every series has one elasticity change (b to b + ``change_size``, default 0.6: less
price-sensitive; ``change_size=0`` keeps b constant), so the truth file carries the caution in
its ``note`` column.
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
def _feedback(alpha, beta, logp0, weekend, u0, eta, rho, eps, v, reaction, w_coef, push):
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
            x = min(max(reaction * dev + push[s, t] + v[s, t], -0.3), 0.3)
            p = round(np.exp(logp0[s] + x) * 100.0) / 100.0
            mu = alpha[s] + beta[s, t] * (np.log(p) - logp0[s]) + w_coef * weekend[t]
            price[s, t] = p
            logq[s, t] = mu + u + eps[s, t]
            dev = logq[s, t] - alpha[s] - w_coef * weekend[t]
    return price, logq


def observational(seed: int = 0, n_series: int = 4, length: int = 365, *,
                  start: str = "2024-01-01", reaction: float = 0.3, persistence: float = 0.85,
                  shock_sd: float = 0.12, sigma: float = 0.05, price_noise: float = 0.02,
                  cost_sd: float = 0.04, pass_through: float = 0.5, change_size: float = 0.6
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
    cost_sd : float
        Standard deviation of the day's log unit-cost move k (independent over days).
    pass_through : float
        Log-price response to a log-cost move (0 makes ``unit_cost`` an irrelevant instrument).
    change_size : float
        Size of each series' elasticity change (0: none, and no change rows).

    Returns
    -------
    Simulation
        log columns ``series, ts, price, quantity, weekend, unit_cost``; control ``weekend``;
        instrument ``unit_cost`` (enter it in logs), its truth in ``meta["instrument_truth"]``.
    """
    n_series = check_int("n_series", n_series)
    length = check_int("length", length, minimum=28)
    reaction = check_float("reaction", reaction, 0.0, 2.0)
    persistence = check_float("persistence", persistence, 0.0, 0.99)
    shock_sd = check_float("shock_sd", shock_sd, 0.0, 1.0)
    sigma = check_float("sigma", sigma, 0.0, 1.0)
    price_noise = check_float("price_noise", price_noise, 0.0, 1.0)
    cost_sd = check_float("cost_sd", cost_sd, 0.0, 1.0)
    pass_through = check_float("pass_through", pass_through, 0.0, 2.0)
    change_size = check_float("change_size", change_size, -3.0, 3.0)
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
    kcost = rng.normal(0.0, cost_sd, (S, T))
    c0 = 0.5 * p0

    cuts = np.round(T * np.linspace(0.45, 0.65, S)).astype(int) if S > 1 else np.array([T // 2])
    beta = np.broadcast_to(b0[:, None], (S, T)).copy()
    changes = []
    for s in range(S):
        if change_size == 0.0:
            break
        beta[s, cuts[s]:] = b0[s] + change_size
        changes.append(change(names[s], ts_ns[cuts[s]], "elasticity_change",
                              beta_before=b0[s], beta_after=b0[s] + change_size, note=NOTE))
    price, logq = _feedback(alpha, beta, np.log(p0), weekend, u0, eta, persistence, eps, v,
                            reaction, COEF["weekend"], pass_through * kcost)
    intercept = alpha[:, None] - beta * np.log(p0)[:, None]
    cols = {"price": price, "quantity": np.round(np.exp(logq), 3),
            "weekend": np.broadcast_to(weekend.astype(np.int64), (S, T)),
            "unit_cost": np.round(c0[:, None] * np.exp(kcost), 4)}
    log = long_table(names, ts_ns, cols)
    path = long_table(names, ts_ns, {"beta": np.round(beta, 10),
                                     "intercept": np.round(intercept, 10)})
    meta = {"scenario": "observational", "seed": seed, "n_series": S, "length": T, "freq": "D",
            "noise": "lognormal", "sigma": sigma, "controls": ["weekend"],
            "coefficients": dict(COEF), "randomized": False, "note": NOTE,
            "instruments": ["unit_cost"],
            "instrument_truth": {"unit_cost": {"enters": "log", "pass_through": pass_through,
                                               "cost_sd": cost_sd, "demand_effect": 0.0,
                                               "base": "half the base price"}},
            "labels": {c[0]: c[1] for c in cells}}
    return Simulation(log, changes_frame(changes), path, meta=meta)
