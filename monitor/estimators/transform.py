"""Log-log design rows: ``log q = a + b log p + c' z``.

The design row for one observation is ``x = [1, log p, z_1, ..., z_m]`` where each control
``z_j`` enters as given or in logs (per its :class:`ControlSpec`), and the response is
``y = log q``. Quantities of zero cannot be logged: the estimator refuses them, and the ingest
layer applies the configured zero policy (see :mod:`monitor.rows.validate`).

>>> specs = parse_controls(["promo"], ["temperature"])
>>> parameter_names(specs)
['intercept', 'elasticity', 'promo', 'log_temperature']
>>> row = design_row({"price": 10.0, "promo": 1.0, "temperature": 20.0}, specs)
>>> [round(float(v), 4) for v in row]
[1.0, 2.3026, 1.0, 2.9957]
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Iterable, Mapping, Sequence

import numpy as np

from monitor.errors import ValidationError


@dataclass(frozen=True)
class ControlSpec:
    """A control variable: its column name and whether it enters in logs."""

    name: str
    log: bool = False

    @property
    def coef_name(self) -> str:
        return f"log_{self.name}" if self.log else self.name


def parse_controls(linear: Iterable[str] = (), logged: Iterable[str] = ()) -> tuple[ControlSpec, ...]:
    """Build control specs from two name lists, refusing duplicates and reserved names."""
    specs = [ControlSpec(n, False) for n in linear] + [ControlSpec(n, True) for n in logged]
    seen: set[str] = set()
    for s in specs:
        if s.name in ("price", "quantity", "series", "ts"):
            raise ValidationError(f"control '{s.name}' is a reserved column name", field=s.name)
        if s.name in seen:
            raise ValidationError(f"control '{s.name}' is given twice", field=s.name)
        seen.add(s.name)
    return tuple(specs)


def parameter_names(controls: Sequence[ControlSpec]) -> list[str]:
    """Names of the coefficients, in design-row order."""
    return ["intercept", "elasticity"] + [c.coef_name for c in controls]


def _finite_float(value: object, field: str) -> float:
    try:
        v = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise ValidationError(f"field '{field}' = {value!r}: not a number", field=field,
                              value=value, rule="number") from None
    if not math.isfinite(v):
        raise ValidationError(f"field '{field}' = {value!r}: must be finite (not NaN or infinity)",
                              field=field, value=value, rule="finite")
    return v


def check_price(value: object) -> float:
    """Return the price as float, or raise ValidationError (must be finite and > 0)."""
    p = _finite_float(value, "price")
    if p <= 0.0:
        raise ValidationError(f"field 'price' = {value!r}: price must be > 0", field="price",
                              value=value, rule="positive")
    return p


def check_quantity(value: object) -> float:
    """Return the quantity as float; it must be finite and > 0 to be logged."""
    q = _finite_float(value, "quantity")
    if q < 0.0:
        raise ValidationError(f"field 'quantity' = {value!r}: quantity must be >= 0", field="quantity",
                              value=value, rule="non_negative")
    if q == 0.0:
        raise ValidationError("field 'quantity' = 0: a zero quantity cannot be logged; "
                              "the ingest zero policy decides whether such rows are rejected or skipped",
                              field="quantity", value=value, rule="zero")
    return q


def design_row(x: Mapping[str, object], controls: Sequence[ControlSpec]) -> np.ndarray:
    """The design row ``[1, log p, z...]`` for one observation (validated)."""
    if "price" not in x:
        raise ValidationError("field 'price' is missing", field="price", rule="missing")
    row = np.empty(2 + len(controls), dtype=np.float64)
    row[0] = 1.0
    row[1] = math.log(check_price(x["price"]))
    for j, c in enumerate(controls):
        if c.name not in x:
            raise ValidationError(f"control '{c.name}' is missing", field=c.name, rule="missing")
        v = _finite_float(x[c.name], c.name)
        if c.log:
            if v <= 0.0:
                raise ValidationError(f"field '{c.name}' = {v!r}: a logged control must be > 0",
                                      field=c.name, value=v, rule="positive")
            v = math.log(v)
        row[2 + j] = v
    return row


def design_matrix(price: np.ndarray, control_values: Mapping[str, np.ndarray],
                  controls: Sequence[ControlSpec]) -> np.ndarray:
    """Vectorized design matrix for already-validated columns (shape ``(n, 2 + m)``)."""
    price = np.asarray(price, dtype=np.float64)
    n = price.shape[0]
    X = np.empty((n, 2 + len(controls)), dtype=np.float64)
    X[:, 0] = 1.0
    np.log(price, out=X[:, 1])
    for j, c in enumerate(controls):
        v = np.asarray(control_values[c.name], dtype=np.float64)
        X[:, 2 + j] = np.log(v) if c.log else v
    return X
