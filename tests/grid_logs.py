"""Observation logs (and truth files) written from the change-detection grid
(:mod:`simulators.change_grid`), for tests that go through files as a user does (replay,
tune). Invented series names; one observation per day from 2018-01-01."""

from __future__ import annotations

import numpy as np
import pandas as pd

from simulators.change_grid import Simulation

DAY = 86_400 * 10**9
#: first day of every log (2,000 days end in 2023: no row is in the future for the validation)
START = "2018-01-01"


def series_names(n: int) -> list[str]:
    return [f"quarry-lane/item-{i:02d}" for i in range(n)]


def write_grid_log(sim: Simulation, path, truth=None) -> list[str]:
    """Write ``sim`` as a CSV log (series, ts, price, quantity[, z1]) and, with ``truth``, its
    change points as a truth file (series, ts, kind, beta_before, beta_after). Returns the
    series names in series-code order."""
    names = series_names(sim.n_series)
    ts = sim.ts(DAY, start=START)
    iso = pd.to_datetime(ts, utc=True).strftime("%Y-%m-%dT%H:%M:%SZ")
    frame = pd.DataFrame({"series": np.array(names, dtype=object)[sim.sid], "ts": iso,
                          "price": np.round(np.exp(sim.X[:, 1]), 6),
                          "quantity": np.round(np.exp(sim.y), 6)})
    if sim.X.shape[1] > 2:
        frame["z1"] = sim.X[:, 2]
    frame.to_csv(path, index=False)
    if truth is not None:
        sc = sim.scenario
        kind = "level_shift" if sc.change == "level" else "elasticity_change"
        at = sim.second_at if sc.change == "second_only" else sim.change_at
        when = pd.Timestamp(int(ts[0] + at * DAY), tz="UTC").strftime("%Y-%m-%dT%H:%M:%SZ")
        b0 = sc.b0 + (sim.sign * abs(sc.size) if sc.change == "second_only" else 0.0)
        b1 = sc.b0 + (0.0 if sc.change in ("level", "second_only") else sim.sign * abs(sc.size))
        pd.DataFrame({"series": names, "ts": when, "kind": kind,
                      "beta_before": np.broadcast_to(b0, (sim.n_series,)),
                      "beta_after": np.broadcast_to(b1, (sim.n_series,))}).to_csv(truth, index=False)
    return names
