"""Retail price test: invented products in invented stores, prices randomized on a test ladder.

Model per series s and time step t (units: price in currency units, quantity in units sold
per step)::

    log q = alpha_s + beta_t * (log p - log p0_s) + 0.30 * promo + 0.25 * weekend
            [+ 0.60 * peak, hourly only] + e,      e ~ N(0, sigma^2)

so the log-log intercept is ``alpha_s - beta_t * log p0_s`` (a change in b pivots around the
base price p0: sales at the base price stay put). With ``noise="poisson"`` the quantity is a
Poisson count with mean ``exp`` of the right-hand side without ``e``.

Prices are ``p0 * m * (0.80 if promo)``, rounded to cents, with the multiplier ``m`` drawn
uniformly from the ladder (0.85, 0.92, 1.00, 1.08, 1.15) independently per series and per
``hold`` days (the headline series 0 runs a deeper test, 0.75 to 1.30: see
``HEADLINE_LADDER``); the draw ignores demand, so an OLS fit of the log-log model with the
controls ``promo`` and ``weekend`` is unbiased.

Default elasticities are drawn uniformly in [-2.8, -1.2]: around the means of two
meta-analyses of own-price elasticities, Tellis (1988), mean about -1.8, and Bijmolt,
van Heerde & Pieters (2005), mean about -2.6 (both from memory).

Series roles by sorted position k (k mod 12): 0 step change in b (series 0: -1.4 to -2.2, "a
competitor opens nearby", on a deeper price ladder), 1 gradual drift of b by -0.6, 2 flat-price
stretch, 3 stock-out run of zeros, 4 burst of prices logged in cents, 5 level shift of +0.35 in
log sales, 6..11 stable.
"""

from __future__ import annotations

import numpy as np

from simulators.base import (STEP_NS, Simulation, change, changes_frame, check_choice,
                             check_float, check_int, long_table, runs, slug, time_axis, weekday)

LADDER = (0.85, 0.92, 1.00, 1.08, 1.15)
#: the ladder of the headline series (series 0, role ``step``, b -1.4 -> -2.2): a deeper test,
#: 25% below to 30% above the base price (log-price sd 0.20 against 0.11), so that its change
#: of b carries enough information per day to be found within weeks at the production ARL0 of
#: 20,000 (Lorden's bound ln(ARL0) / I, I = db^2 Var(x~) / (2 sigma^2): about 20 days against
#: about 60 on the common ladder; issue 16). Same draws, mapped rung for rung; the other step
#: series keep the common ladder.
HEADLINE_LADDER = (0.75, 0.85, 1.00, 1.15, 1.30)
#: (product, base price, base units sold per day at the base price in an average store)
PRODUCTS = (("trail mix 250g", 4.49, 38.0), ("oat bar", 1.29, 95.0),
            ("cold brew 1l", 3.99, 42.0), ("rye crackers", 2.79, 30.0),
            ("apple cider 750ml", 5.49, 22.0), ("granola 500g", 4.99, 27.0),
            ("sparkling water 6x", 3.49, 60.0), ("dark chocolate 100g", 2.49, 55.0))
STORES = ("Harbor St", "Millbrook", "Quarry Rd", "Elm Cross", "Westgate Yard")
ROLES = ("step", "drift", "flat", "stockout", "cents", "level") + ("stable",) * 6
#: true coefficients of the controls (log scale): promo lift on top of the price cut, weekend
#: lift, hourly peak-hours lift (invented, plausible magnitudes)
COEF = {"promo": 0.30, "weekend": 0.25, "peak": 0.60}
PEAK_HOURS = (11, 12, 13, 17, 18, 19)


def catalogue(n_series: int) -> list[tuple[str, str, float, float]]:
    """Sorted (series id, label, base price, base daily units) for n_series product-store cells.

    Cell k pairs product k mod 8 with store k mod 5 (all 40 pairs for k < 40); further cells go
    to numbered branches ("Harbor St 2"). Ids read ``store/product``, e.g. ``harbor-st/oat-bar``.

    >>> [c[0] for c in catalogue(3)]
    ['harbor-st/trail-mix-250g', 'millbrook/oat-bar', 'quarry-rd/cold-brew-1l']
    """
    cells = []
    for k in range(n_series):
        product, price, units = PRODUCTS[k % len(PRODUCTS)]
        store = STORES[k % len(STORES)]
        if k >= len(PRODUCTS) * len(STORES):
            store = f"{store} {k // (len(PRODUCTS) * len(STORES)) + 1}"
        cells.append((f"{slug(store)}/{slug(product)}", f"{product} at {store}", price, units))
    return sorted(cells)


def retail(seed: int = 0, n_series: int = 12, length: int = 365, *, start: str = "2024-01-01",
           freq: str = "D", noise: str = "lognormal", sigma: float = 0.15, hold: int = 1,
           promo_share: float = 0.08, anomalies: bool = True) -> Simulation:
    """Simulate a randomized retail price test.

    Parameters
    ----------
    seed : int
        Seed of numpy's ``default_rng``; equal seeds give identical output.
    n_series : int
        Number of product-store series (default 12).
    length : int
        Time steps per series (default 365; days, or hours with ``freq="h"``); at least
        28 days.
    start : str
        First timestamp (UTC), default 2024-01-01 (a Monday).
    freq : {"D", "h"}
        Daily or hourly steps. Hourly adds the control ``peak`` (1 in hours 11-13 and 17-19).
    noise : {"lognormal", "poisson"}
        Multiplicative log-normal noise with standard deviation ``sigma`` on the log scale, or
        Poisson counts.
    hold : int
        Days each ladder price is held before the next random draw.
    promo_share : float
        Share of days on promotion (runs of 3-5 days; 20 % off and a display lift).
    anomalies : bool
        False gives every series the stable role (no change points).

    Returns
    -------
    Simulation
        ``(log, changes, path)``; log columns ``series, ts, price, quantity, promo, weekend``
        (+ ``peak`` hourly).
    """
    n_series = check_int("n_series", n_series)
    check_choice("freq", freq, ("D", "h"))
    spd = 1 if freq == "D" else 24
    length = check_int("length", length, minimum=28 * spd,
                       why="28 days: room for every series role")
    check_choice("noise", noise, ("lognormal", "poisson"))
    sigma = check_float("sigma", sigma, 0.0, 2.0)
    hold = check_int("hold", hold)
    promo_share = check_float("promo_share", promo_share, 0.0, 0.5)
    rng = np.random.default_rng(seed)
    S, T = n_series, length
    n_days = -(-T // spd)
    cells = catalogue(S)
    names = [c[0] for c in cells]
    p0 = np.array([c[2] for c in cells])[:, None]
    ts_ns = time_axis(start, T, freq)
    day = np.arange(T) // spd

    # -- draws (fixed order keeps every seed reproducible)
    size = rng.uniform(0.7, 1.4, S)[:, None]
    b0 = rng.uniform(-2.8, -1.2, S)
    rung = rng.integers(0, len(LADDER), (S, -(-n_days // hold)))
    starts = rng.random((S, n_days)) < promo_share / 4.0
    promo_len = rng.integers(3, 6, (S, n_days))
    z = rng.standard_normal((S, T))

    roles = [ROLES[k % len(ROLES)] if anomalies else "stable" for k in range(S)]
    if roles[0] == "step":
        b0[0] = -1.4
    promo = runs(starts, promo_len)[:, day]
    ladders = np.array([LADDER] * S)
    if roles[0] == "step":
        ladders[0] = HEADLINE_LADDER
    mult = np.take_along_axis(ladders, rung, axis=1)[:, day // hold]
    weekend = np.broadcast_to(weekday(ts_ns) >= 5, (S, T))
    peak = np.broadcast_to(np.isin((ts_ns // STEP_NS["h"]) % 24, PEAK_HOURS), (S, T))
    alpha = np.log(size * np.array([c[3] for c in cells])[:, None] / spd)
    if spd == 24:  # hourly: keep a day's expected total near the daily base
        n_pk = len(PEAK_HOURS)
        alpha = alpha - np.log((24 - n_pk + n_pk * np.exp(COEF["peak"])) / 24)
    alpha = np.broadcast_to(alpha, (S, T)).copy()
    beta = np.broadcast_to(b0[:, None], (S, T)).copy()

    def at(frac: float) -> int:
        return int(round(frac * n_days)) * spd

    changes, t = [], np.arange(T)
    lo_cents = np.zeros((S, T), dtype=bool)
    zero = np.zeros((S, T), dtype=bool)
    flat = np.zeros((S, T), dtype=bool)
    for s, role in enumerate(roles):
        if role == "step":
            c = at(0.45)
            b1 = b0[s] - 0.8
            beta[s, c:] = b1
            changes.append(change(names[s], ts_ns[c], "elasticity_change", beta_before=b0[s],
                                  beta_after=b1, note="step change: a competitor opens nearby"))
        elif role == "drift":
            c1, c2 = at(0.30), at(0.70) - 1
            ramp = np.clip((t - c1) / (c2 - c1), 0.0, 1.0)
            beta[s] = b0[s] - 0.6 * ramp
            changes.append(change(names[s], ts_ns[c1], "gradual_drift", end_ns=ts_ns[c2],
                                  beta_before=b0[s], beta_after=b0[s] - 0.6,
                                  note="b drifts linearly: shoppers slowly trade down"))
        elif role == "flat":
            c1, c2 = at(0.55), at(0.75)
            flat[s, c1:c2] = True
            changes.append(change(names[s], ts_ns[c1], "flat_price", end_ns=ts_ns[c2 - 1],
                                  note="price test paused: price held at base and no promos; "
                                       "b not identifiable"))
        elif role == "stockout":
            c1, c2 = at(0.60), at(0.60) + 7 * spd
            zero[s, c1:c2] = True
            changes.append(change(names[s], ts_ns[c1], "stockout", end_ns=ts_ns[c2 - 1],
                                  note="out of stock for 7 days: quantity 0"))
        elif role == "cents":
            c1, c2 = at(0.72), at(0.72) + 5 * spd
            lo_cents[s, c1:c2] = True
            changes.append(change(names[s], ts_ns[c1], "unit_error", end_ns=ts_ns[c2 - 1],
                                  note="prices logged in cents (x100) for 5 days"))
        elif role == "level":
            c = at(0.40)
            alpha[s, c:] += 0.35
            changes.append(change(names[s], ts_ns[c], "level_shift",
                                  note="log sales +0.35 at every price: shelf moved to the "
                                       "entrance"))
    promo &= ~flat
    price = np.round(p0 * np.where(flat, 1.0, mult) * np.where(promo, 0.80, 1.0), 2)
    intercept = alpha - beta * np.log(p0)
    mu = (intercept + beta * np.log(price) + COEF["promo"] * promo + COEF["weekend"] * weekend
          + (COEF["peak"] * peak if spd == 24 else 0.0))
    if noise == "lognormal":
        quantity = np.round(np.exp(mu + sigma * z), 3)
    else:
        quantity = rng.poisson(np.exp(mu)).astype(np.int64)
    quantity = np.where(zero, 0.0 if noise == "lognormal" else 0, quantity)
    logged = np.where(lo_cents, np.round(price * 100.0, 2), price)

    cols = {"price": logged, "quantity": quantity, "promo": promo.astype(np.int64),
            "weekend": weekend.astype(np.int64)}
    controls = ["promo", "weekend"]
    if spd == 24:
        cols["peak"] = peak.astype(np.int64)
        controls.append("peak")
    log = long_table(names, ts_ns, cols)
    path = long_table(names, ts_ns, {"beta": np.round(beta, 10),
                                     "intercept": np.round(intercept, 10)})
    meta = {"scenario": "retail", "seed": seed, "n_series": S, "length": T, "freq": freq,
            "noise": noise, "sigma": sigma if noise == "lognormal" else None,
            "controls": controls, "coefficients": {k: COEF[k] for k in controls},
            "roles": dict(zip(names, roles)), "labels": {c[0]: c[1] for c in cells},
            "randomized": True}
    return Simulation(log, changes_frame(changes), path, meta=meta)

