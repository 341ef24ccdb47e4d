"""Settings of the detectors, bounds and alert rules, and their TOML sections.

Config sections (all keys optional; defaults in brackets)::

    [detectors]  arl0 [20000]: in-control ARL, observations per series, of every designed
                 threshold; level_chart ["cusum"] and slope_chart ["cusum"]: "cusum", "ewma",
                 "page_hinkley" or "none"; cusum_k [0.5], cusum_h [designed] (level CUSUM);
                 slope_k [1.0], slope_h [designed] (slope CUSUM); ewma_lambda [0.1],
                 ewma_L [designed]; slope_ewma_lambda [0.1], slope_ewma_L [designed];
                 ph_delta [0.5], ph_threshold [designed]; slope_ph_delta [1.0],
                 slope_ph_threshold [designed]; ph_alpha [1.0], ph_min_instances [30];
                 fast_forgetting [0.95], reference_forgetting [0.998]; level_burn_in [20],
                 slope_burn_in [50]; design_paths [400], design_seed [0]
    [bounds]     low, high [none]: allowed elasticity range; mode ["interval"] or "point";
                 persistence [3]; clear_after [5]
    [rules]      cooldown [50]; clear_after [200] (quiet observations before an elasticity
                 change or level shift clears); out_of_bounds, elasticity_change, level_shift,
                 sign_flip, low_variation [true]: switch each kind; sign_flip_persistence [5],
                 sign_flip_clear_after [5]; low_variation_persistence [5],
                 low_variation_clear_after [20]

Every value is checked when the pipeline is built; a bad one raises
:class:`monitor.errors.ConfigError` naming ``[section] key``, the value and the allowed range.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

from monitor.detectors.base import check_number
from monitor.detectors.charts import CHART_CODES
from monitor.errors import ConfigError
from monitor.settings import register_section


NUM = (int, float)
DETECTOR_KEYS = {
    "arl0": (NUM, 20000.0), "level_chart": (str, "cusum"), "slope_chart": (str, "cusum"),
    "cusum_k": (NUM, 0.5), "cusum_h": (NUM, None), "slope_k": (NUM, 1.0), "slope_h": (NUM, None),
    "ewma_lambda": (NUM, 0.1), "ewma_L": (NUM, None), "slope_ewma_lambda": (NUM, 0.1),
    "slope_ewma_L": (NUM, None), "ph_delta": (NUM, 0.5), "ph_threshold": (NUM, None),
    "slope_ph_delta": (NUM, 1.0), "slope_ph_threshold": (NUM, None), "ph_alpha": (NUM, 1.0),
    "ph_min_instances": (NUM, 30), "fast_forgetting": (NUM, 0.95),
    "reference_forgetting": (NUM, 0.998), "level_burn_in": (NUM, 20), "slope_burn_in": (NUM, 50),
    "design_paths": (NUM, 400), "design_seed": (NUM, 0)}
BOUNDS_KEYS = {"low": (NUM, None), "high": (NUM, None), "mode": (str, "interval"),
               "persistence": (NUM, 3), "clear_after": (NUM, 5)}
RULE_KEYS = {"cooldown": (NUM, 50), "clear_after": (NUM, 200), "out_of_bounds": (bool, True),
             "elasticity_change": (bool, True), "level_shift": (bool, True),
             "sign_flip": (bool, True), "low_variation": (bool, True),
             "sign_flip_persistence": (NUM, 5), "sign_flip_clear_after": (NUM, 5),
             "low_variation_persistence": (NUM, 5), "low_variation_clear_after": (NUM, 20)}
register_section("detectors", DETECTOR_KEYS)
register_section("bounds", BOUNDS_KEYS)
register_section("rules", RULE_KEYS)

_INT = {"ph_min_instances", "level_burn_in", "slope_burn_in", "design_paths", "design_seed",
        "persistence", "clear_after", "cooldown", "sign_flip_persistence",
        "sign_flip_clear_after", "low_variation_persistence", "low_variation_clear_after"}
# (low, high, low_open, high_open) per numeric key
_RANGES = {
    "arl0": (20.0, 1e6, False, False), "cusum_k": (0.0, 10.0, False, False),
    "cusum_h": (0.0, 1e6, True, False), "slope_k": (0.0, 10.0, False, False),
    "slope_h": (0.0, 1e6, True, False), "ewma_lambda": (0.0, 1.0, True, False),
    "ewma_L": (0.0, 1e3, True, False), "slope_ewma_lambda": (0.0, 1.0, True, False),
    "slope_ewma_L": (0.0, 1e3, True, False), "ph_delta": (0.0, 10.0, False, False),
    "ph_threshold": (0.0, 1e6, True, False), "slope_ph_delta": (0.0, 10.0, False, False),
    "slope_ph_threshold": (0.0, 1e6, True, False), "ph_alpha": (0.0, 1.0, True, False),
    "ph_min_instances": (1, 1e6, False, False), "fast_forgetting": (0.0, 1.0, True, True),
    "reference_forgetting": (0.5, 1.0, False, False), "level_burn_in": (0, 1e6, False, False),
    "slope_burn_in": (0, 1e6, False, False), "design_paths": (20, 1e6, False, False),
    "design_seed": (0, 2**32 - 1, False, False), "persistence": (1, 1e6, False, False),
    "clear_after": (1, 1e6, False, False), "cooldown": (0, 1e9, False, False),
    "sign_flip_persistence": (1, 1e6, False, False), "sign_flip_clear_after": (1, 1e6, False, False),
    "low_variation_persistence": (1, 1e6, False, False),
    "low_variation_clear_after": (1, 1e6, False, False)}


def _checked(section: str, key: str, value):
    if value is None or isinstance(value, (str, bool)):
        return value
    lo, hi, lo_open, hi_open = _RANGES[key]
    try:
        v = check_number(f"[{section}] {key}", value, lo, hi, low_open=lo_open, high_open=hi_open,
                         integer=key in _INT)
    except ValueError as exc:
        raise ConfigError(str(exc)) from None
    return int(v) if key in _INT else v


def _validate(obj, section: str) -> None:
    for f in dataclasses.fields(obj):
        object.__setattr__(obj, f.name, _checked(section, f.name, getattr(obj, f.name)))


@dataclass(frozen=True)
class DetectorSettings:
    """``[detectors]``: which chart watches each signal, its parameters and the ARL budget."""

    arl0: float = 20000.0
    level_chart: str = "cusum"
    slope_chart: str = "cusum"
    cusum_k: float = 0.5
    cusum_h: float | None = None
    slope_k: float = 1.0
    slope_h: float | None = None
    ewma_lambda: float = 0.1
    ewma_L: float | None = None
    slope_ewma_lambda: float = 0.1
    slope_ewma_L: float | None = None
    ph_delta: float = 0.5
    ph_threshold: float | None = None
    slope_ph_delta: float = 1.0
    slope_ph_threshold: float | None = None
    ph_alpha: float = 1.0
    ph_min_instances: int = 30
    fast_forgetting: float = 0.95
    reference_forgetting: float = 0.998
    level_burn_in: int = 20
    slope_burn_in: int = 50
    design_paths: int = 400
    design_seed: int = 0

    def __post_init__(self):
        _validate(self, "detectors")
        for key in ("level_chart", "slope_chart"):
            if getattr(self, key) not in CHART_CODES:
                raise ConfigError(f"[detectors] {key} = {getattr(self, key)!r}: must be one of "
                                  f"{', '.join(CHART_CODES)}")
        if not self.fast_forgetting < self.reference_forgetting:
            raise ConfigError(f"[detectors] fast_forgetting = {self.fast_forgetting!r}: must be "
                              f"below reference_forgetting = {self.reference_forgetting!r}")

    def chart(self, signal: str) -> tuple[str, float | None, dict]:
        """``(chart, given threshold or None, chart parameters)`` of ``signal`` (level/slope)."""
        if signal == "level":
            c = self.level_chart
            given = {"cusum": self.cusum_h, "ewma": self.ewma_L,
                     "page_hinkley": self.ph_threshold}.get(c)
            kw = {"cusum": {"k": self.cusum_k}, "ewma": {"lam": self.ewma_lambda},
                  "page_hinkley": {"delta": self.ph_delta}}.get(c, {})
        else:
            c = self.slope_chart
            given = {"cusum": self.slope_h, "ewma": self.slope_ewma_L,
                     "page_hinkley": self.slope_ph_threshold}.get(c)
            kw = {"cusum": {"k": self.slope_k}, "ewma": {"lam": self.slope_ewma_lambda},
                  "page_hinkley": {"delta": self.slope_ph_delta}}.get(c, {})
        if c == "page_hinkley":
            kw = {**kw, "alpha": self.ph_alpha, "min_instances": self.ph_min_instances}
        return c, given, kw


@dataclass(frozen=True)
class BoundsSettings:
    """``[bounds]``: the allowed elasticity range (None: no bound on that side)."""

    low: float | None = None
    high: float | None = None
    mode: str = "interval"
    persistence: int = 3
    clear_after: int = 5

    def __post_init__(self):
        for key in ("low", "high"):
            v = getattr(self, key)
            if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float))
                                  or math.isnan(v)):
                raise ConfigError(f"[bounds] {key} = {v!r}: must be a number")
        for key in ("persistence", "clear_after"):
            object.__setattr__(self, key, _checked("bounds", key, getattr(self, key)))
        if self.mode not in ("interval", "point"):
            raise ConfigError(f"[bounds] mode = {self.mode!r}: must be 'interval' or 'point'")
        if self.low is not None and self.high is not None and not self.low < self.high:
            raise ConfigError(f"[bounds] low = {self.low!r}, high = {self.high!r}: low must be "
                              "below high")

    @property
    def enabled(self) -> bool:
        return self.low is not None or self.high is not None

    def limits(self) -> tuple[float, float]:
        return (-math.inf if self.low is None else float(self.low),
                math.inf if self.high is None else float(self.high))


@dataclass(frozen=True)
class RuleSettings:
    """``[rules]``: the alert policy."""

    cooldown: int = 50
    clear_after: int = 200
    out_of_bounds: bool = True
    elasticity_change: bool = True
    level_shift: bool = True
    sign_flip: bool = True
    low_variation: bool = True
    sign_flip_persistence: int = 5
    sign_flip_clear_after: int = 5
    low_variation_persistence: int = 5
    low_variation_clear_after: int = 20

    def __post_init__(self):
        _validate(self, "rules")


def settings_from_config(config) -> tuple[DetectorSettings, BoundsSettings, RuleSettings]:
    """The three settings objects from a :class:`monitor.settings.Config`."""
    return (DetectorSettings(**config.section("detectors")),
            BoundsSettings(**config.section("bounds")),
            RuleSettings(**config.section("rules")))
