"""Scenario generators with known truth, and a live mode that replays them as a feed.

Every scenario is a function ``f(seed=0, n_series=..., length=..., **options)`` returning a
:class:`~simulators.base.Simulation` ``(log, changes, path)``, deterministic given ``seed``.
:data:`SCENARIOS` maps each name to ``(function, one-line description)``.

>>> log, changes, path = simulate("retail", seed=1, n_series=3, length=60)
>>> list(log.columns), len(log) == len(path) == 3 * 60
(['series', 'ts', 'price', 'quantity', 'promo', 'weekend'], True)
>>> first = changes[changes["series"] == log["series"].min()]
>>> first[["series", "kind", "ts", "beta_before", "beta_after"]].to_dict("records")
[{'series': 'harbor-st/trail-mix-250g', 'kind': 'elasticity_change',
  'ts': '2024-01-28T00:00:00Z', 'beta_before': -1.4, 'beta_after': -2.2}]
"""

from __future__ import annotations

import inspect
from typing import Callable

from monitor.errors import ConfigError
from simulators.baddata import BAD_KINDS, baddata
from simulators.base import (BAD_COLUMNS, CHANGE_COLUMNS, CHANGE_KINDS, PATH_COLUMNS,
                             Simulation, truth_companions, write_outputs, write_truth)
from simulators.flat import flat
from simulators.experiment import experiment, experiment_offladder
from simulators.live import LiveAppender
from simulators.load import load
from simulators.observational import observational
from simulators.retail import retail

#: name -> (scenario function, one-line description)
SCENARIOS: dict[str, tuple[Callable[..., Simulation], str]] = {
    "retail": (retail, "randomized retail price test, 12 product-store series x 365 days: a "
                       "step change in b (first series -1.4 to -2.2), drift, flat prices, "
                       "stock-out, prices in cents, level shift"),
    "load": (load, "hourly feeder load under the flex-evening tariff with randomized price "
                   "days, 6 feeders x 182 days: b -0.10 to -0.25 after a programme change, "
                   "demand-response events, meter outages"),
    "observational": (observational, "prices raised after high-demand days (no "
                                     "randomization), 4 series x 365 days: the naive log-log "
                                     "slope is biased"),
    "flat": (flat, "long flat-price stretches (b not identifiable) with a change hidden inside "
                   "one, 2 series x 365 days"),
    "baddata": (baddata, "a clean daily log mixed with every kind of bad row, each listed in "
                         "TRUTH_bad.csv (ingest tests); CSV only"),
    "experiment": (experiment, "randomized price-ladder test with known b (-1.6, constant), 6 "
                               "series x 28 baseline + 150 test days; meta holds its "
                               "[experiments] table"),
    "experiment_offladder": (experiment_offladder, "the same test with prices drifting off the "
                                                   "ladder from 40% of the way in (compromised)"),
}

__all__ = ["SCENARIOS", "Simulation", "LiveAppender", "simulate", "write_outputs", "write_truth",
           "truth_companions", "CHANGE_KINDS", "CHANGE_COLUMNS", "PATH_COLUMNS", "BAD_COLUMNS",
           "BAD_KINDS", "retail", "load", "observational", "flat", "baddata",
           "experiment", "experiment_offladder"]


def simulate(name: str, seed: int = 0, n_series: int | None = None, length: int | None = None,
             **options) -> Simulation:
    """Run scenario ``name``; ``None`` sizes take the scenario's defaults.

    Unknown scenario names and unknown options raise ConfigError naming what is allowed.
    """
    if name not in SCENARIOS:
        raise ConfigError(f"scenario {name!r}: unknown; choose one of {', '.join(SCENARIOS)}")
    func = SCENARIOS[name][0]
    params = inspect.signature(func).parameters
    allowed = [p for p in params if p not in ("seed", "n_series", "length")]
    for key in options:
        if key not in allowed:
            raise ConfigError(f"option {key!r}: not an option of scenario {name!r}; "
                              f"its options are {', '.join(allowed)}")
    if n_series is not None:
        options["n_series"] = n_series
    if length is not None:
        options["length"] = length
    return func(seed=seed, **options)
