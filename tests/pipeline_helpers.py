"""Simulated log-log series for the pipeline tests (invented data with known truth)."""

from __future__ import annotations

import math

import numpy as np

T0 = np.datetime64("2026-01-05T00:00:00", "ns").astype(np.int64)
HOUR = 3_600 * 10**9


def simulate(n_series: int, n: int, *, beta: float = -1.5, change_at: int | None = None,
             beta_after: float = -2.0, level_at: int | None = None, level: float = 0.0,
             flat: tuple[int, int] | None = None, price_sd: float = 0.1, noise: float = 0.2,
             seed: int = 0, base_price: float = 10.0):
    """Rows in arrival order (time-major, then series): ``sid, X, y, ts``.

    ``log q = 4 + b_t (log p - log p0) + level_t + e``: a change of b pivots at the base price
    (sales at p0 stay put), so it is a pure slope change; ``level`` is added from ``level_at``
    (a pure level shift); prices are flat at p0 during ``flat = (start, stop)``.
    """
    rng = np.random.default_rng(seed)
    lp0 = math.log(base_price)
    lp = lp0 + price_sd * rng.standard_normal((n, n_series))
    if flat is not None:
        lp[flat[0]:flat[1]] = lp0
    t = np.arange(n)[:, None]
    b = np.where(t < change_at, beta, beta_after) if change_at is not None else beta
    lev = np.where(t >= level_at, level, 0.0) if level_at is not None else 0.0
    y = 4.0 + b * (lp - lp0) + lev + noise * rng.standard_normal((n, n_series))
    sid = np.tile(np.arange(n_series), n)
    X = np.column_stack([np.ones(n * n_series), lp.ravel()])
    ts = np.repeat(T0 + np.arange(n) * HOUR, n_series)
    return sid.astype(np.int64), X, y.ravel(), ts


def rows_of(sid: np.ndarray, s: int) -> np.ndarray:
    """Row indices of series ``s``."""
    return np.flatnonzero(sid == s)


def restores_without_block(pipe, row: np.ndarray, at: int, size: int,
                            filler: np.ndarray | None = None) -> np.ndarray:
    """The state ``row`` with its block ``[at, at + size)`` cut out, or replaced by ``filler``
    (a layout saved before the block existed, or with an older block there), restored by
    ``pipe.checked_state`` and through the JSON form: asserts the restored row has the current
    shape, every other number kept and the block zero; returns it."""
    mid = np.empty(0) if filler is None else filler
    old = np.concatenate([row[:at], mid, row[at + size:]])
    up = pipe.checked_state(old)
    assert up.shape == row.shape
    assert np.array_equal(up[:at], row[:at], equal_nan=True)
    assert np.array_equal(up[at + size:], row[at + size:], equal_nan=True)
    assert np.all(up[at:at + size] == 0.0)
    assert np.array_equal(pipe.state_from_json(pipe.state_to_json(old)), up, equal_nan=True)
    return up
