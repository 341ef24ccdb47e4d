"""Load response: hourly load of invented feeders under the invented ``flex-evening`` tariff.

Model per feeder s and hour t (price in currency units per kWh, quantity in kWh per hour)::

    log q = alpha_s + beta_t * (log p - log 0.24) + 0.25 * shoulder + 0.45 * peak
            + 0.035 * hdd + 0.060 * cdd - 0.10 * event + e,      e ~ N(0, sigma^2)

- Tariff blocks: off-peak 0.16 (22:00-06:59), shoulder 0.24 (07:00-16:59), peak 0.38
  (17:00-21:59) per kWh. Each feeder's daily tariff level is multiplied by a factor drawn at
  random from (0.80, 0.90, 1.00, 1.12, 1.25) ("price days" of a tariff trial), independently of
  load, so b is identified within each block and an OLS fit with the block dummies is unbiased.
- ``temperature`` (deg C, hourly, shared by all feeders): seasonal cycle plus a persistent daily
  anomaly plus a daily cycle. ``hdd = max(15.5 - temperature, 0)`` and
  ``cdd = max(temperature - 22, 0)`` in deg C for that hour (15.5 deg C base: common practice).
- ``event``: demand-response call (1 in the peak hours of event days, more likely on hot days),
  cutting load by about 10 % (exp(-0.10) - 1 = -9.5 %): the order of the peak cuts of
  time-varying pricing pilots surveyed by Faruqui & Sergici (2010), a few percent for plain
  time-of-use and more with critical-peak prices (from memory).
- Short-run own-price elasticity of residential demand: about -0.1 to -0.3 (Labandeira,
  Labeaga & Lopez-Otero 2017 meta-analysis, from memory); stable feeders draw b uniformly in
  [-0.30, -0.10], programme feeders move from about -0.10 to -0.25 when they join the
  programme (in-home displays and price alerts).

Roles by sorted position k (k mod 6): 0 and 4 programme change in b, 1 meter outage with rows
missing (36 hours), 2 level shift (+0.12: a new housing block connected), 3 meter fault with
zero reads (12 hours), 5 stable.
"""

from __future__ import annotations

import numpy as np

from simulators.base import (STEP_NS, Simulation, change, changes_frame, check_float, check_int,
                             iso_z, long_table, time_axis)

FEEDERS = ("feeder-north-07", "feeder-east-12", "feeder-harbor-03", "feeder-mill-21",
           "feeder-quarry-14", "feeder-west-09")
AREAS = ("north", "east", "harbor", "mill", "quarry", "west", "ridge", "delta")
TARIFF = {"name": "flex-evening", "off_peak": 0.16, "shoulder": 0.24, "peak": 0.38}
P_REF = 0.24
PRICE_DAYS = (0.80, 0.90, 1.00, 1.12, 1.25)
COEF = {"shoulder": 0.25, "peak": 0.45, "hdd": 0.035, "cdd": 0.060, "event": -0.10}
ROLES = ("programme", "gap", "level", "zero_reads", "programme", "stable")


def feeder_names(n_series: int) -> list[str]:
    """Sorted feeder ids: the six named ones, then ``feeder-<area>-<nn>``.

    >>> feeder_names(2)
    ['feeder-east-12', 'feeder-north-07']
    """
    names = list(FEEDERS[:n_series])
    k = 0
    while len(names) < n_series:
        names.append(f"feeder-{AREAS[k % len(AREAS)]}-{30 + k:02d}")
        k += 1
    return sorted(names)


def temperature_path(rng: np.random.Generator, ts_ns: np.ndarray) -> np.ndarray:
    """Hourly temperature (deg C, rounded to 0.1): season + AR(1) daily anomaly + daily cycle."""
    day = (ts_ns - ts_ns[0]) // (24 * STEP_NS["h"])
    n_days = int(day[-1]) + 1
    doy = (ts_ns // (24 * STEP_NS["h"])) % 365.25
    hour = (ts_ns // STEP_NS["h"]) % 24
    shocks = rng.normal(0.0, 2.2, n_days)
    anomaly = np.empty(n_days)
    acc = 0.0
    for d in range(n_days):  # n_days is small (days, not rows)
        acc = 0.75 * acc + shocks[d]
        anomaly[d] = acc
    temp = (12.0 - 9.0 * np.cos(2 * np.pi * (doy - 20) / 365.25) + anomaly[day]
            + 4.0 * np.sin(2 * np.pi * (hour - 9) / 24))
    return np.round(temp, 1)


def load(seed: int = 0, n_series: int = 6, length: int = 4368, *, start: str = "2024-04-01",
         sigma: float = 0.05, event_share: float = 0.05) -> Simulation:
    """Simulate hourly feeder load under a time-varying tariff with randomized price days.

    Parameters
    ----------
    seed : int
        Seed of numpy's ``default_rng``.
    n_series : int
        Number of feeders (default 6).
    length : int
        Hours per feeder before outages remove rows (default 4368 = 182 days).
    start : str
        First timestamp (UTC), default 2024-04-01: spring heating into summer cooling.
    sigma : float
        Standard deviation of the log-scale noise (default 0.05: 5 % hourly noise).
    event_share : float
        Base share of days with a demand-response event (hot days get more).

    Returns
    -------
    Simulation
        log columns ``series, ts, price, quantity, temperature, hdd, cdd, event, shoulder,
        peak``; controls ``hdd, cdd, event, shoulder, peak``.
    """
    n_series = check_int("n_series", n_series)
    length = check_int("length", length, minimum=240, why="10 days of hours")
    sigma = check_float("sigma", sigma, 0.0, 1.0)
    event_share = check_float("event_share", event_share, 0.0, 0.5)
    rng = np.random.default_rng(seed)
    S, T = n_series, length
    names = feeder_names(S)
    ts_ns = time_axis(start, T, "h")
    day = np.arange(T) // 24
    n_days = int(day[-1]) + 1
    hour = (ts_ns // STEP_NS["h"]) % 24

    # -- draws (fixed order)
    temp = temperature_path(rng, ts_ns)
    alpha0 = np.log(rng.uniform(300.0, 1500.0, S))
    b0 = rng.uniform(-0.30, -0.10, S)
    b_prog = rng.uniform(-0.15, -0.08, S)
    level_draw = rng.integers(0, len(PRICE_DAYS), (S, n_days))
    day_max = np.maximum.reduceat(temp, np.arange(0, T, 24))
    event_day = rng.random(n_days) < event_share + 0.30 * (day_max > 27.0)
    z = rng.standard_normal((S, T))

    shoulder = (hour >= 7) & (hour < 17)
    peak = (hour >= 17) & (hour < 22)
    block = np.where(peak, TARIFF["peak"], np.where(shoulder, TARIFF["shoulder"],
                                                    TARIFF["off_peak"]))
    price = np.round(block * np.asarray(PRICE_DAYS)[level_draw][:, day], 4)
    hdd = np.round(np.maximum(15.5 - temp, 0.0), 1)
    cdd = np.round(np.maximum(temp - 22.0, 0.0), 1)
    event = event_day[day] & peak

    roles = [ROLES[k % len(ROLES)] for k in range(S)]
    beta = np.broadcast_to(b0[:, None], (S, T)).copy()
    alpha = np.broadcast_to(alpha0[:, None], (S, T)).copy()
    keep = np.ones((S, T), dtype=bool)
    zero = np.zeros((S, T), dtype=bool)
    changes = []

    def at(frac: float) -> int:
        return int(round(frac * n_days)) * 24

    for s, role in enumerate(roles):
        if role == "programme":
            c = at(0.5) if s < 6 else at(0.35 + 0.3 * (s % 7) / 6)
            before = -0.10 if s == 0 else b_prog[s]
            beta[s, :c] = before
            beta[s, c:] = before - 0.15
            changes.append(change(names[s], ts_ns[c], "elasticity_change", beta_before=before,
                                  beta_after=before - 0.15,
                                  note="feeder joins the flex-evening programme (in-home "
                                       "displays and price alerts)"))
        elif role == "gap":
            c1 = at(0.65) + 9
            keep[s, c1:c1 + 36] = False
            changes.append(change(names[s], ts_ns[c1], "outage", end_ns=ts_ns[c1 + 35],
                                  note="meter outage: 36 hourly rows missing"))
        elif role == "level":
            c = at(0.30)
            alpha[s, c:] += 0.12
            changes.append(change(names[s], ts_ns[c], "level_shift",
                                  note="log load +0.12: a new housing block connected"))
        elif role == "zero_reads":
            c1 = at(0.40) + 6
            zero[s, c1:c1 + 12] = True
            changes.append(change(names[s], ts_ns[c1], "outage", end_ns=ts_ns[c1 + 11],
                                  note="meter fault: 12 hours of zero reads"))

    intercept = alpha - beta * np.log(P_REF)
    mu = (intercept + beta * np.log(price) + COEF["shoulder"] * shoulder + COEF["peak"] * peak
          + COEF["hdd"] * hdd + COEF["cdd"] * cdd + COEF["event"] * event)
    quantity = np.where(zero, 0.0, np.round(np.exp(mu + sigma * z), 3))

    def wide(x):
        return np.broadcast_to(x, (S, T))

    cols = {"price": price, "quantity": quantity, "temperature": wide(temp), "hdd": wide(hdd),
            "cdd": wide(cdd), "event": wide(event.astype(np.int64)),
            "shoulder": wide(shoulder.astype(np.int64)), "peak": wide(peak.astype(np.int64))}
    log = long_table(names, ts_ns, cols, keep)
    path = long_table(names, ts_ns, {"beta": np.round(beta, 10),
                                     "intercept": np.round(intercept, 10)}, keep)
    controls = ["hdd", "cdd", "event", "shoulder", "peak"]
    meta = {"scenario": "load", "seed": seed, "n_series": S, "length": T, "freq": "h",
            "noise": "lognormal", "sigma": sigma, "controls": controls,
            "coefficients": {k: COEF[k] for k in controls}, "roles": dict(zip(names, roles)),
            "tariff": dict(TARIFF), "randomized": True,
            "event_days": [str(x)[:10] for x in iso_z(ts_ns[::24][event_day])]}
    return Simulation(log, changes_frame(changes), path, meta=meta)
