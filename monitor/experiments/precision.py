"""Time to precision: how many more observations until the band on b is as narrow as planned.

With n observations so far, noise sd ``sigma`` and partial information ``I_n`` on b, each new
observation adds about ``iota = I_n / n`` (log-price units squared per observation) if prices
keep varying as they have. The half-width of the confidence sequence after m observations is
then about (:func:`monitor.experiments.sequence.halfwidth_for_plan`)::

    h(m) = sigma * R(iota m, m - p) / sqrt(iota m)

and the forecast is the smallest m >= n with ``h(m) <= target`` (found by doubling and
bisection, vectorized over many experiments). ``eta_obs = m - n``; the date comes from the
series' cadences: the experiment gathers ``sum_s 1 / cadence_s`` observations per second, with
``cadence_s`` the median spacing of series s.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from monitor.experiments.sequence import halfwidth_for_plan

#: largest horizon searched (observations); beyond it the forecast is "not within reach"
MAX_OBS = 10**9


def observations_to_target(n, sigma, info_rate, n_params, target, alpha, phi) -> np.ndarray:
    """Total observations m at which the confidence-sequence half-width reaches ``target``.

    All arguments broadcast; NaN where the inputs are not finite or ``info_rate <= 0``, and
    where the target is out of reach within :data:`MAX_OBS`. Returns float64 whole numbers.

    >>> float(observations_to_target(200, 0.15, 0.011, 5, 0.1, 0.05, 1.0)[()])
    1953.0
    """
    args = np.broadcast_arrays(*(np.asarray(v, np.float64) for v in
                                 (n, sigma, info_rate, n_params, target)))
    shape = args[0].shape
    n, sigma, rate, p, target = (np.atleast_1d(a).ravel() for a in args)
    out = np.full(n.shape, np.nan)
    ok = np.isfinite(n) & np.isfinite(sigma) & np.isfinite(rate) & (rate > 0) & (sigma >= 0)
    if not ok.any():
        return out.reshape(shape)

    def h(m, idx):
        return halfwidth_for_plan(m, sigma[idx], rate[idx], p[idx], alpha, phi)

    idx = np.flatnonzero(ok)
    lo = np.maximum(n[idx], p[idx] + 1)
    done = h(lo, idx) <= target[idx]
    hi = lo.copy()
    # doubling until the bound is met or out of reach
    pending = ~done
    while pending.any():
        hi[pending] = np.minimum(hi[pending] * 2, MAX_OBS)
        met = h(hi[pending], idx[pending]) <= target[idx[pending]]
        reach = hi[pending] < MAX_OBS
        still = np.zeros_like(pending)
        still[pending] = ~met & reach
        pending = still
    reachable = done | (h(hi, idx) <= target[idx])
    a = np.where(done, lo, np.floor(hi / 2))
    b = hi
    # bisection on whole numbers: h(a) > target >= h(b)
    active = ~done & reachable
    while active.any() and (b[active] - a[active] > 1).any():
        mid = np.floor((a + b) / 2)
        met = h(mid, idx) <= target[idx]
        b = np.where(active & met, mid, b)
        a = np.where(active & ~met, mid, a)
        active = active & (b - a > 1)
    res = np.where(done, lo, b)
    res[~reachable] = np.nan
    out[idx] = res
    return out.reshape(shape)


def cadence_seconds(codes: np.ndarray, ts_seconds: np.ndarray, n_codes: int) -> np.ndarray:
    """Median spacing of each series' observation times (seconds); NaN with < 2 observations."""
    df = pd.DataFrame({"c": codes, "t": ts_seconds}).sort_values(["c", "t"], kind="stable")
    gaps = df.groupby("c")["t"].diff()
    med = gaps.groupby(df["c"]).median()
    out = np.full(n_codes, np.nan)
    out[med.index.to_numpy()] = med.to_numpy()
    return out


def eta_timestamp(last_ts: pd.Timestamp, eta_obs: float, cadences: np.ndarray) -> pd.Timestamp | None:
    """When ``eta_obs`` more observations will have arrived at the series' cadences."""
    rate = np.nansum(1.0 / cadences[np.isfinite(cadences) & (cadences > 0)])
    if not np.isfinite(eta_obs) or rate <= 0:
        return None
    return last_ts + pd.Timedelta(seconds=float(eta_obs) / rate)
