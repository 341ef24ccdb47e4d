"""An experiment's definition (``[experiments.NAME]`` in the TOML config) and its checks.

A price experiment is a set of series (glob patterns on series ids, ``*``, ``?`` and ``[...]``
as in SQLite's GLOB and :func:`fnmatch.fnmatchcase`), a window ``[start, end]``, a precision
target (the half-width of the confidence sequence on the pooled elasticity b, in elasticity
units) and a level. Optionally the planned price ladder: the price points the design assigns,
either as prices (``ladder_kind = "prices"``, currency units) or as multipliers of each
series' pre-test price (``ladder_kind = "multipliers"``, the default; the pre-test price is the
median charged price over the ``baseline_days`` before ``start``).

Keys of ``[experiments.NAME]`` (defaults in brackets)::

    series            list of glob patterns (required)
    start             ISO 8601 date or time, UTC when naive (required)
    end               ISO 8601 [none: open]
    target_halfwidth  half-width of the band on b that counts as precise [0.2]
    level             confidence level of the band and of the confidence sequence [0.95]
    ladder            planned prices or multipliers [none]
    ladder_kind       "multipliers" or "prices" ["multipliers"]
    ladder_tolerance  relative distance to a ladder point still counted on the ladder [0.005]
    max_off_ladder    share of charged prices off the ladder that compromises the test [0.05]
    baseline_days     days before start whose median price is the pre-test price [28]
    cs_precision      precision phi of the normal mixture on (b - b0) / sigma [1.0]
    stall_window      recent observations per series checked for moving prices [14]

>>> plan = plan_from_config("spring", {"series": ["harbor-*"], "start": "2024-03-01"})
>>> plan.target_halfwidth, plan.level, plan.matches("harbor-st/oat-bar"), plan.matches("x")
(0.2, 0.95, True, False)
"""

from __future__ import annotations

import fnmatch
from dataclasses import asdict, dataclass, field
from typing import Any, Mapping

import pandas as pd

from monitor.errors import ConfigError

#: key -> (types, default); ``None`` default with ``required`` below means the key must be given
EXPERIMENT_KEYS: dict[str, tuple[Any, Any]] = {
    "series": (list, None),
    "start": (str, None),
    "end": (str, None),
    "target_halfwidth": ((int, float), 0.2),
    "level": ((int, float), 0.95),
    "ladder": (list, None),
    "ladder_kind": (str, "multipliers"),
    "ladder_tolerance": ((int, float), 0.005),
    "max_off_ladder": ((int, float), 0.05),
    "baseline_days": ((int, float), 28.0),
    "cs_precision": ((int, float), 1.0),
    "stall_window": (int, 14),
}
REQUIRED_KEYS = ("series", "start")
LADDER_KINDS = ("multipliers", "prices")


def _timestamp(where: str, key: str, value: str) -> pd.Timestamp:
    try:
        ts = pd.Timestamp(value)
    except (TypeError, ValueError):
        raise ConfigError(f"{where} {key} = {value!r}: not an ISO 8601 date or time") from None
    return ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")


@dataclass(frozen=True)
class ExperimentPlan:
    """One experiment's definition; see the module docstring for every field and its unit."""

    name: str
    series: tuple[str, ...]
    start: pd.Timestamp
    end: pd.Timestamp | None = None
    target_halfwidth: float = 0.2
    level: float = 0.95
    ladder: tuple[float, ...] | None = None
    ladder_kind: str = "multipliers"
    ladder_tolerance: float = 0.005
    max_off_ladder: float = 0.05
    baseline_days: float = 28.0
    cs_precision: float = 1.0
    stall_window: int = 14
    extra: dict = field(default_factory=dict, compare=False)

    def matches(self, series_id: str) -> bool:
        """True when ``series_id`` matches one of the glob patterns (case-sensitive)."""
        return any(fnmatch.fnmatchcase(series_id, pat) for pat in self.series)

    @property
    def baseline_start(self) -> pd.Timestamp:
        """First time read for the pre-test price: ``start - baseline_days``."""
        return self.start - pd.Timedelta(days=self.baseline_days)

    def as_dict(self) -> dict:
        """Plain JSON-able form (timestamps as ISO text)."""
        out = asdict(self)
        out.pop("extra")
        out["series"] = list(self.series)
        out["ladder"] = None if self.ladder is None else list(self.ladder)
        out["start"] = self.start.isoformat()
        out["end"] = None if self.end is None else self.end.isoformat()
        return out


def plan_from_config(name: str, spec: Mapping) -> ExperimentPlan:
    """Validate one ``[experiments.NAME]`` table; ConfigError names the key, value and rule."""
    where = f"[experiments.{name}]"
    if not isinstance(spec, Mapping):
        raise ConfigError(f"{where}: expected a table of settings, got {spec!r}")
    for key, value in spec.items():
        if key not in EXPERIMENT_KEYS:
            raise ConfigError(f"{where} {key}: unknown key (known: {', '.join(EXPERIMENT_KEYS)})")
        types = EXPERIMENT_KEYS[key][0]
        if types == (int, float):
            ok = isinstance(value, (int, float)) and not isinstance(value, bool)
        elif types is int:
            ok = isinstance(value, int) and not isinstance(value, bool)
        else:
            ok = isinstance(value, types)
        if not ok:
            kind = {list: "a list", str: "a string", int: "a whole number"}.get(types, "a number")
            raise ConfigError(f"{where} {key} = {value!r}: must be {kind}")
    for key in REQUIRED_KEYS:
        if key not in spec:
            raise ConfigError(f"{where} {key}: required")
    series = spec["series"]
    if not series or not all(isinstance(s, str) and s for s in series):
        raise ConfigError(f"{where} series = {series!r}: must be a non-empty list of glob patterns")
    start = _timestamp(where, "start", spec["start"])
    end = _timestamp(where, "end", spec["end"]) if spec.get("end") is not None else None
    if end is not None and end <= start:
        raise ConfigError(f"{where} end = {spec['end']!r}: must be after start {spec['start']!r}")
    vals = {k: spec.get(k, d) for k, (_, d) in EXPERIMENT_KEYS.items()}
    if not vals["target_halfwidth"] > 0:
        raise ConfigError(f"{where} target_halfwidth = {vals['target_halfwidth']!r}: must be > 0")
    if not 0.5 <= vals["level"] < 1:
        raise ConfigError(f"{where} level = {vals['level']!r}: must be in [0.5, 1)")
    if vals["ladder_kind"] not in LADDER_KINDS:
        raise ConfigError(f"{where} ladder_kind = {vals['ladder_kind']!r}: must be one of "
                          f"{', '.join(LADDER_KINDS)}")
    ladder = vals["ladder"]
    if ladder is not None:
        bad = [v for v in ladder if isinstance(v, bool) or not isinstance(v, (int, float))
               or not v > 0]
        if not ladder or bad:
            raise ConfigError(f"{where} ladder = {ladder!r}: must be a non-empty list of numbers "
                              f"> 0 (prices or multipliers of the pre-test price)")
        ladder = tuple(sorted(float(v) for v in ladder))
    for key, low, high in (("ladder_tolerance", 0.0, 0.5), ("max_off_ladder", 0.0, 1.0)):
        if not low <= vals[key] <= high:
            raise ConfigError(f"{where} {key} = {vals[key]!r}: must be in [{low}, {high}]")
    if vals["baseline_days"] < 0:
        raise ConfigError(f"{where} baseline_days = {vals['baseline_days']!r}: must be >= 0")
    if not vals["cs_precision"] > 0:
        raise ConfigError(f"{where} cs_precision = {vals['cs_precision']!r}: must be > 0")
    if vals["stall_window"] < 2:
        raise ConfigError(f"{where} stall_window = {vals['stall_window']!r}: must be >= 2")
    return ExperimentPlan(
        name=name, series=tuple(series), start=start, end=end,
        target_halfwidth=float(vals["target_halfwidth"]), level=float(vals["level"]),
        ladder=ladder, ladder_kind=vals["ladder_kind"],
        ladder_tolerance=float(vals["ladder_tolerance"]),
        max_off_ladder=float(vals["max_off_ladder"]), baseline_days=float(vals["baseline_days"]),
        cs_precision=float(vals["cs_precision"]), stall_window=int(vals["stall_window"]))


def check_experiments(content: Any) -> None:
    """Validator of the free-form ``[experiments]`` section (registered with the config)."""
    plans_from_section(content)


def plans_from_section(content: Any) -> dict[str, ExperimentPlan]:
    """``{name: ExperimentPlan}`` from the ``[experiments]`` table (empty when absent)."""
    if content is None:
        return {}
    if not isinstance(content, Mapping):
        raise ConfigError("[experiments] must be a table of named experiments, "
                          "e.g. [experiments.spring-test]")
    return {name: plan_from_config(name, spec) for name, spec in content.items()}


#: What :mod:`monitor.settings` composes: (section name, keys or None, validator).
EXPERIMENTS_SECTION = ("experiments", None, check_experiments)
