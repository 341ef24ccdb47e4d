"""A randomized price-ladder experiment with known b, and a variant whose prices drift off it.

Model per series s and day t (invented shops and products from :func:`simulators.retail.catalogue`)::

    log q = alpha_s + b * (log p - log p0_s) + 0.25 * weekend + e,   e ~ N(0, sigma^2)

For ``baseline`` days the price is held at the base price ``p0_s``; then the test starts and each
series draws a ladder rung (multipliers :data:`LADDER` of ``p0_s``) independently every day,
rounded to cents. b is the same in every series and never changes. The ``experiment_offladder``
variant lets prices drift off the ladder from 40% of the test on (a creeping markdown of 0.3%
a day that store staff apply on top of the assigned rung, as when a local promotion overrides
the test), so a monitor should call that test compromised.

``Simulation.meta["experiment"]`` is the ``[experiments.NAME]`` table that describes the test.
:func:`ladder_arrays` is the same design as plain numpy arrays, for Monte Carlo studies.
"""

from __future__ import annotations

import numpy as np

from simulators.base import (Simulation, change, changes_frame, check_float, check_int,
                             iso_z, long_table, time_axis, weekday)
from simulators.retail import catalogue

LADDER = (0.85, 0.92, 1.00, 1.08, 1.15)
COEF = {"weekend": 0.25}
DRIFT_FROM = 0.4
DRIFT_PER_DAY = -0.003


def experiment(seed: int = 0, n_series: int = 6, length: int = 150, *,
               start: str = "2024-02-01", baseline: int = 28, b: float = -1.6,
               sigma: float = 0.15, off_ladder: bool = False) -> Simulation:
    """Simulate a randomized price-ladder test.

    Parameters
    ----------
    seed : int
        Seed of numpy's ``default_rng``.
    n_series : int
        Product-store series in the test.
    length : int
        Days of the test (after the baseline).
    start : str
        First day of the baseline (UTC); the test starts ``baseline`` days later.
    baseline : int
        Days at the base price before the test (they fix the pre-test price).
    b : float
        True elasticity (same in every series, constant).
    sigma : float
        Standard deviation of the log-scale noise.
    off_ladder : bool
        Let prices drift off the ladder from 40% of the test on.

    Returns
    -------
    Simulation
        log columns ``series, ts, price, quantity, weekend``; meta ``experiment`` (the config
        table), ``b``, ``test_start``.
    """
    S = check_int("n_series", n_series)
    T = check_int("length", length, minimum=10)
    B = check_int("baseline", baseline, minimum=0)
    b = check_float("b", b, -10.0, 10.0)
    sigma = check_float("sigma", sigma, 0.0, 2.0)
    rng = np.random.default_rng(seed)
    cells = catalogue(S)
    names = [c[0] for c in cells]
    p0 = np.array([c[2] for c in cells])[:, None]
    ts_ns = time_axis(start, B + T, "D")
    weekend = np.broadcast_to(weekday(ts_ns) >= 5, (S, B + T))
    alpha = np.log(rng.uniform(0.7, 1.4, S) * np.array([c[3] for c in cells]))[:, None]
    mult = np.ones((S, B + T))
    mult[:, B:] = np.asarray(LADDER)[rng.integers(0, len(LADDER), (S, T))]
    day = np.arange(B + T) - B
    drift_at = int(round(DRIFT_FROM * T))
    if off_ladder:
        creep = np.where(day >= drift_at, np.exp(DRIFT_PER_DAY * (day - drift_at + 1)), 1.0)
        mult = mult * creep[None, :]
    price = np.round(p0 * mult, 2)
    z = rng.standard_normal((S, B + T))
    intercept = alpha - b * np.log(p0)
    quantity = np.round(np.exp(intercept + b * np.log(price) + COEF["weekend"] * weekend
                               + sigma * z), 4)
    log = long_table(names, ts_ns, {"price": price, "quantity": quantity,
                                    "weekend": weekend.astype(np.int64)})
    path = long_table(names, ts_ns, {"beta": np.full((S, B + T), b),
                                     "intercept": np.broadcast_to(intercept, (S, B + T))})
    changes = []
    if off_ladder:
        changes = [change(n, ts_ns[B + drift_at], "gradual_drift", end_ns=ts_ns[-1],
                          beta_before=b, beta_after=b,
                          note="charged prices drift off the planned ladder (b unchanged)")
                   for n in names]
    test_start = str(iso_z(ts_ns[B]))
    plan = {"series": sorted({n.split("/")[0] + "/*" for n in names}), "start": test_start,
            "ladder": list(LADDER), "ladder_kind": "multipliers", "target_halfwidth": 0.2}
    meta = {"scenario": "experiment_offladder" if off_ladder else "experiment", "seed": seed,
            "n_series": S, "length": B + T, "freq": "D", "noise": "lognormal", "sigma": sigma,
            "controls": ["weekend"], "coefficients": dict(COEF), "randomized": True, "b": b,
            "test_start": test_start, "experiment": plan,
            "labels": {c_[0]: c_[1] for c_ in cells}}
    return Simulation(log, changes_frame(changes), path, meta=meta)


def experiment_offladder(seed: int = 0, n_series: int = 6, length: int = 150, *,
                         start: str = "2024-02-01", baseline: int = 28, b: float = -1.6,
                         sigma: float = 0.15) -> Simulation:
    """:func:`experiment` with prices drifting off the ladder from 40% of the test on."""
    return experiment(seed, n_series, length, start=start, baseline=baseline, b=b, sigma=sigma,
                      off_ladder=True)


def ladder_arrays(rng: np.random.Generator, n_experiments: int, n_obs: int, n_series: int = 4,
                  b: float = -1.6, sigma: float = 0.15) -> tuple[np.ndarray, np.ndarray,
                                                                  np.ndarray]:
    """Many independent ladder tests as arrays: ``(codes, log_p, log_q)``.

    Observations arrive round-robin over ``n_series`` series (row i belongs to series
    ``i mod n_series``); prices are the base price (series-specific) times a random rung of
    :data:`LADDER`; ``log q = alpha_s + b log p + e``. ``codes`` has shape (n_obs,),
    ``log_p`` and ``log_q`` (n_experiments, n_obs).
    """
    codes = np.arange(n_obs) % n_series
    base = np.log(rng.uniform(1.0, 6.0, (n_experiments, n_series)))
    alpha = rng.uniform(2.0, 5.0, (n_experiments, n_series))
    rung = np.log(np.asarray(LADDER))[rng.integers(0, len(LADDER), (n_experiments, n_obs))]
    log_p = base[:, codes] + rung
    log_q = alpha[:, codes] + b * log_p + sigma * rng.standard_normal((n_experiments, n_obs))
    return codes, log_p, log_q
