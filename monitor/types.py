"""Plain value types passed between the layers of elmon.

Units
-----
- ``price``: the price (or tariff) in the series' own currency unit, > 0.
- ``quantity``: units sold, or load (for example kWh per hour), >= 0.
- ``beta``: the elasticity b, dimensionless: d log q / d log p.
- ``beta_se``: its standard error (sandwich form, see :mod:`monitor.estimators.rls`).
- ``beta_lo`` / ``beta_hi``: the confidence interval at the configured level (Student-t with
  ``n_eff - k`` degrees of freedom).
- ``n_eff``: Kish's effective number of observations, (sum w)^2 / sum w^2.
- ``ts``: timestamps are UTC; in tables they are ISO 8601 strings with a ``Z`` suffix, in arrays
  int64 nanoseconds since the epoch.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import IntEnum
from typing import Mapping


class Status(IntEnum):
    """Status of an estimate, stored as text (``Status.OK.label == 'ok'``)."""

    WARMING_UP = 0
    OK = 1
    LOW_VARIATION = 2
    OUT_OF_BOUNDS = 3
    CHANGED = 4
    WEAK_INSTRUMENT = 5

    @property
    def label(self) -> str:
        return STATUS_LABELS[int(self)]

    @classmethod
    def from_label(cls, label: str) -> "Status":
        return cls(STATUS_LABELS.index(label))


STATUS_LABELS = ("warming_up", "ok", "low_variation", "out_of_bounds", "changed",
                 "weak_instrument")


@dataclass(frozen=True)
class Observation:
    """One observation of one series: price, quantity, optional controls, UTC timestamp."""

    series: str
    ts: str
    price: float
    quantity: float
    controls: Mapping[str, float] = field(default_factory=dict)


@dataclass(frozen=True)
class Estimate:
    """The estimator's state for one series after one observation."""

    series: str
    ts: str
    beta: float
    beta_se: float
    beta_lo: float
    beta_hi: float
    n_eff: float
    status: str


@dataclass(frozen=True)
class Alert:
    """An alert decision: a rule fired for a series at a time."""

    series: str
    ts: str
    rule: str
    beta: float
    beta_lo: float
    beta_hi: float
    message: str
    severity: str = "warning"
