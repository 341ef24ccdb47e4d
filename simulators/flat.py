"""Flat prices: long stretches where the price does not move, so b is not identifiable.

Model per series (as in :mod:`simulators.retail`, without promotions)::

    log q = alpha_s + beta_t * (log p - log p0_s) + 0.25 * weekend + e,   e ~ N(0, sigma^2)

Prices follow the randomized test ladder in [0, 25 %) and [60 %, 75 %) of the history and
are held flat in [25 %, 60 %) and [75 %, 100 %). Even-numbered series (sorted) hold the base
price exactly; odd-numbered ones move by at most one cent (near-flat: low variation, not none).
The elasticity changes inside the first flat stretch (at 42 %), so it cannot be seen until
prices move again: a monitor should report low variation there, not a confident estimate.
"""

from __future__ import annotations

import numpy as np

from simulators.base import (Simulation, change, changes_frame, check_float, check_int,
                             long_table, time_axis, weekday)
from simulators.retail import LADDER, catalogue

COEF = {"weekend": 0.25}
FLAT = ((0.25, 0.60), (0.75, 1.0))
CHANGE_AT = 0.42


def flat(seed: int = 0, n_series: int = 2, length: int = 365, *, start: str = "2024-01-01",
         sigma: float = 0.15) -> Simulation:
    """Simulate series with long flat-price stretches and a change hidden inside one.

    Parameters
    ----------
    seed : int
        Seed of numpy's ``default_rng``.
    n_series : int
        Number of series (default 2: one exactly flat, one near-flat).
    length : int
        Days per series (default 365).
    start : str
        First timestamp (UTC).
    sigma : float
        Standard deviation of the log-scale noise.

    Returns
    -------
    Simulation
        log columns ``series, ts, price, quantity, weekend``; control ``weekend``.
    """
    n_series = check_int("n_series", n_series)
    length = check_int("length", length, minimum=40)
    sigma = check_float("sigma", sigma, 0.0, 2.0)
    rng = np.random.default_rng(seed)
    S, T = n_series, length
    cells = catalogue(S)
    names = [c[0] for c in cells]
    p0 = np.array([c[2] for c in cells])[:, None]
    ts_ns = time_axis(start, T, "D")
    weekend = np.broadcast_to(weekday(ts_ns) >= 5, (S, T))

    alpha = np.log(rng.uniform(0.7, 1.4, S) * np.array([c[3] for c in cells]))[:, None]
    b0 = rng.uniform(-2.4, -1.4, S)
    b0[0] = -1.8
    mult = np.asarray(LADDER)[rng.integers(0, len(LADDER), (S, T))]
    cent = rng.integers(0, 2, (S, T)) * 0.01
    z = rng.standard_normal((S, T))

    t = np.arange(T)
    bounds = [(int(round(a * T)), int(round(b * T))) for a, b in FLAT]
    is_flat = np.zeros(T, dtype=bool)
    for a, b in bounds:
        is_flat[a:b] = True
    near = (np.arange(S) % 2 == 1)[:, None]
    held = np.round(p0, 2) + np.where(near, cent, 0.0)
    price = np.round(np.where(is_flat, held, p0 * mult), 2)
    c = int(round(CHANGE_AT * T))
    beta = np.where(t < c, b0[:, None], b0[:, None] + 0.7)
    intercept = alpha - beta * np.log(p0)
    mu = intercept + beta * np.log(price) + COEF["weekend"] * weekend
    quantity = np.round(np.exp(mu + sigma * z), 3)

    changes = []
    for s in range(S):
        how = "within one cent of base" if near[s, 0] else "exactly at base"
        for a, b in bounds:
            changes.append(change(names[s], ts_ns[a], "flat_price", end_ns=ts_ns[b - 1],
                                  note=f"price held {how}: b not identifiable"))
        changes.append(change(names[s], ts_ns[c], "elasticity_change", beta_before=b0[s],
                              beta_after=b0[s] + 0.7,
                              note="change while prices are flat: invisible until prices "
                                   "move again"))
    cols = {"price": price, "quantity": quantity, "weekend": weekend.astype(np.int64)}
    log = long_table(names, ts_ns, cols)
    path = long_table(names, ts_ns, {"beta": np.round(beta, 10),
                                     "intercept": np.round(intercept, 10)})
    meta = {"scenario": "flat", "seed": seed, "n_series": S, "length": T, "freq": "D",
            "noise": "lognormal", "sigma": sigma, "controls": ["weekend"],
            "coefficients": dict(COEF), "randomized": True,
            "labels": {c_[0]: c_[1] for c_ in cells}}
    return Simulation(log, changes_frame(changes), path, meta=meta)
