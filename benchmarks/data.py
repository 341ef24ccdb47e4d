"""Invented benchmark data: log-log demand with a known elasticity per series (seeded).

Per series s and step t::

    log p = log p0_s + u,          u ~ N(0, 0.1^2)   (prices vary by about 10%)
    log q = a_s + b_s log p + e,   e ~ N(0, 0.2^2)

with p0_s in [2, 8], a_s in [3, 5] and b_s uniform in [-2.8, -1.2] (the range the retail
simulator uses; invented values). Controls, when asked for, are a promotion flag, a weekend
flag, a temperature-like smooth series and a competitor's log price, with invented
coefficients. Rows come in arrival order (``layout="time"``: every series' step t, then step
t + 1), as a live batch or an interleaved feed presents them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

CONTROL_COEF = (0.30, 0.25, -0.01, 0.40)     # promo, weekend, temperature, competitor log price


@dataclass
class Panel:
    sid: np.ndarray        # (n,) int64 series index
    step: np.ndarray       # (n,) int64 step within the series
    X: np.ndarray          # (n, k) design rows [1, log p, controls...]
    y: np.ndarray          # (n,) log q
    beta: np.ndarray       # (n_series,) true elasticity
    n_series: int
    length: int
    changed: np.ndarray | None = None   # (n_series,) bool: b changes at ``change_at``

    @property
    def n(self) -> int:
        return self.y.shape[0]

    def series_rows(self, s: int) -> np.ndarray:
        return np.flatnonzero(self.sid == s)


def panel(n_series: int, length: int, controls: int = 0, seed: int = 0,
          layout: str = "time", change_every: int = 0, change_at: int = 0,
          change_by: float = 0.0) -> Panel:
    """``n_series`` series of ``length`` steps (see the module docstring).

    With ``change_every = m > 0`` every m-th series (0, m, 2m, ...) has its elasticity moved by
    ``change_by`` from step ``change_at`` on (a step change pivoting at the base price, so the
    level at the base price stays put); ``Panel.changed`` marks them.
    """
    rng = np.random.default_rng(seed)
    n = n_series * length
    if layout == "time":
        sid = np.tile(np.arange(n_series, dtype=np.int64), length)
        step = np.repeat(np.arange(length, dtype=np.int64), n_series)
    else:
        sid = np.repeat(np.arange(n_series, dtype=np.int64), length)
        step = np.tile(np.arange(length, dtype=np.int64), n_series)
    lp0 = np.log(rng.uniform(2.0, 8.0, n_series))
    a = rng.uniform(3.0, 5.0, n_series)
    b = rng.uniform(-2.8, -1.2, n_series)
    X = np.empty((n, 2 + controls))
    X[:, 0] = 1.0
    X[:, 1] = lp0[sid] + rng.normal(0.0, 0.1, n)
    y = a[sid] + b[sid] * X[:, 1]
    changed = np.zeros(n_series, dtype=bool)
    if change_every:
        changed[::change_every] = True
        hit = changed[sid] & (step >= change_at)
        y[hit] += change_by * (X[hit, 1] - lp0[sid[hit]])
    if controls:
        cols = [
            (rng.random(n) < 0.15).astype(np.float64),                   # promo flag
            ((step % 7) >= 5).astype(np.float64),                        # weekend flag
            15.0 + 8.0 * np.sin(2 * np.pi * step / 365.0) + rng.normal(0, 2, n),  # temperature
            lp0[sid] + rng.normal(0.0, 0.08, n),                         # competitor log price
        ]
        for j in range(controls):
            X[:, 2 + j] = cols[j]
            y += CONTROL_COEF[j] * cols[j]
    y += rng.normal(0.0, 0.2, n)
    return Panel(sid, step, X, y, b, n_series, length, changed)


def loglog_frame(n_series: int, length: int, seed: int = 0, start: str = "2024-01-01T00:00:00"):
    """A raw observation table (series, ts, price, quantity) as a pyarrow Table, hourly steps,
    rows sorted by series then time, prices rounded to cents and quantities to 0.001."""
    import pyarrow as pa
    import pyarrow.compute as pc

    p = panel(n_series, length, seed=seed, layout="series")
    names = np.array([f"store{i % 40:02d}/item{i:06d}" for i in range(n_series)])
    t0 = np.datetime64(start, "s").astype(np.int64)
    ts = pa.array(t0 + 3600 * p.step, type=pa.int64()).cast(pa.timestamp("s", tz="UTC"))
    price = np.round(np.exp(p.X[:, 1]), 2)
    qty = np.round(np.exp(p.y), 3)
    return pa.table({
        "series": pa.DictionaryArray.from_arrays(pa.array(p.sid.astype(np.int32)),
                                                 pa.array(names)).cast(pa.string()),
        "ts": pc.strftime(ts, format="%Y-%m-%dT%H:%M:%SZ"),
        "price": price, "quantity": qty,
    })


def write_csv(table, path) -> None:
    """Write a pyarrow Table as CSV, strings quoted only where needed."""
    import pyarrow.csv as pacsv

    pacsv.write_csv(table, path, pacsv.WriteOptions(quoting_style="needed"))
