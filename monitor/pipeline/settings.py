"""Settings of the detectors, bounds and alert rules, and their TOML sections.

Config sections (all keys optional; defaults in brackets)::

    [detectors]  arl0 [20000]: in-control ARL, observations per series, of every designed
                 threshold; change_detector ["split_glr"]: "split_glr" = the split likelihood-ratio
                 detector of a change in b or the level (monitor.detectors.split_glr), or
                 "charts": the previous charts below on the innovations and the
                 fast-minus-reference slope (the keys below apply to "charts" only);
                 level_chart ["cusum"] and slope_chart ["cusum"]: "cusum", "ewma",
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
from monitor.detectors.spec import CHART_CODES, CHARTS, SIGNALS, Key, chart_inputs, detector_keys
from monitor.errors import ConfigError


NUM = (int, float)
#: every numeric [detectors] key with default and range: arl0, each chart's own keys from the
#: chart table (monitor.detectors.spec), then the keys all charts share
DETECTOR_RANGES: dict[str, Key] = {
    "arl0": Key(20000.0, 20.0, 1e6), **detector_keys(),
    "fast_forgetting": Key(0.95, 0.0, 1.0, low_open=True, high_open=True),
    "reference_forgetting": Key(0.998, 0.5, 1.0),
    "level_burn_in": Key(20, 0, 1e6, integer=True), "slope_burn_in": Key(50, 0, 1e6, integer=True),
    "design_paths": Key(400, 20, 1e6, integer=True),
    "design_seed": Key(0, 0, 2**32 - 1, integer=True)}
DETECTOR_KEYS = {"arl0": (NUM, 20000.0), "change_detector": (str, "split_glr"),
                 "level_chart": (str, "cusum"),
                 "slope_chart": (str, "cusum"),
                 **{k: (NUM, r.default) for k, r in DETECTOR_RANGES.items() if k != "arl0"}}
BOUNDS_KEYS = {"low": (NUM, None), "high": (NUM, None), "mode": (str, "interval"),
               "persistence": (NUM, 3), "clear_after": (NUM, 5), "file": (str, "")}
RULE_KEYS = {"cooldown": (NUM, 50), "clear_after": (NUM, 200), "out_of_bounds": (bool, True),
             "elasticity_change": (bool, True), "level_shift": (bool, True),
             "sign_flip": (bool, True), "low_variation": (bool, True),
             "sign_flip_persistence": (NUM, 5), "sign_flip_clear_after": (NUM, 5),
             "low_variation_persistence": (NUM, 5), "low_variation_clear_after": (NUM, 20),
             "wording": (str, "retail")}
#: the sections this module owns, for monitor.settings to compose
SECTIONS = {"detectors": DETECTOR_KEYS, "bounds": BOUNDS_KEYS, "rules": RULE_KEYS}

_RULE_RANGES = {
    "persistence": Key(3, 1, 1e6, integer=True), "clear_after": Key(5, 1, 1e6, integer=True),
    "cooldown": Key(50, 0, 1e9, integer=True),
    "sign_flip_persistence": Key(5, 1, 1e6, integer=True),
    "sign_flip_clear_after": Key(5, 1, 1e6, integer=True),
    "low_variation_persistence": Key(5, 1, 1e6, integer=True),
    "low_variation_clear_after": Key(20, 1, 1e6, integer=True)}
# the rules' clear_after shares its range with the bounds' one (1 .. 1e6, whole)
_RANGES = {**DETECTOR_RANGES, **_RULE_RANGES}


def _checked(section: str, key: str, value):
    if value is None or isinstance(value, (str, bool)):
        return value
    r = _RANGES[key]
    try:
        v = check_number(f"[{section}] {key}", value, r.low, r.high, low_open=r.low_open,
                         high_open=r.high_open, integer=r.integer)
    except ValueError as exc:
        raise ConfigError(str(exc)) from None
    return int(v) if r.integer else v


def _validate(obj, section: str) -> None:
    for f in dataclasses.fields(obj):
        object.__setattr__(obj, f.name, _checked(section, f.name, getattr(obj, f.name)))


#: ``[rules] wording``: the trades the alert texts can speak to
WORDINGS = ("retail", "load")

#: ``[detectors] change_detector``: the split GLR (default) or the previous charts
CHANGE_DETECTORS = ("split_glr", "charts")


def _detector_post_init(self):
    _validate(self, "detectors")
    if self.change_detector not in CHANGE_DETECTORS:
        raise ConfigError(f"[detectors] change_detector = {self.change_detector!r}: must be "
                          f"one of {', '.join(CHANGE_DETECTORS)}")
    for key in ("level_chart", "slope_chart"):
        if getattr(self, key) not in CHART_CODES:
            raise ConfigError(f"[detectors] {key} = {getattr(self, key)!r}: must be one of "
                              f"{', '.join(CHART_CODES)}")
    if not self.fast_forgetting < self.reference_forgetting:
        raise ConfigError(f"[detectors] fast_forgetting = {self.fast_forgetting!r}: must be "
                          f"below reference_forgetting = {self.reference_forgetting!r}")


def _detector_chart(self, signal: str) -> tuple[str, float | None, dict]:
    """``(chart, given threshold or None, chart parameters)`` of ``signal`` (level/slope)."""
    if signal not in SIGNALS:
        raise ValueError(f"signal = {signal!r}: must be one of {', '.join(SIGNALS)}")
    chart = getattr(self, f"{signal}_chart")
    if chart not in CHARTS:
        return chart, None, {}
    values = dataclasses.asdict(self)
    return chart, values[CHARTS[chart].threshold_keys[signal]], chart_inputs(chart, signal, values)


#: ``[detectors]``: which chart watches each signal, its parameters and the ARL budget; one
#: field per key of :data:`DETECTOR_KEYS` (the charts' own keys come from the chart table)
DetectorSettings = dataclasses.make_dataclass(
    "DetectorSettings",
    [(k, (float | None) if d is None else type(d) if isinstance(d, str) else
      (int if DETECTOR_RANGES.get(k, Key(0, 0, 0)).integer else float), dataclasses.field(default=d))
     for k, (_, d) in DETECTOR_KEYS.items()],
    namespace={"__post_init__": _detector_post_init, "chart": _detector_chart,
               "__doc__": "``[detectors]``: which chart watches each signal, its parameters "
                          "and the ARL budget (fields: the keys of ``DETECTOR_KEYS``)."},
    frozen=True)
DetectorSettings.__module__ = __name__


@dataclass(frozen=True)
class BoundsSettings:
    """``[bounds]``: the allowed elasticity range (None: no bound on that side)."""

    low: float | None = None
    high: float | None = None
    mode: str = "interval"
    persistence: int = 3
    clear_after: int = 5
    #: a table ``series,low,high`` of per-series bounds (:mod:`monitor.ingest.bounds_file`);
    #: the pipeline only carries the name, its readers apply it
    file: str = ""

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
    #: words of the alert texts: "retail" (shops, price tests) or "load" (feeders, tariffs);
    #: the texts are in :data:`monitor.pipeline.messages.WORDING`
    wording: str = "retail"

    def __post_init__(self):
        _validate(self, "rules")
        if self.wording not in WORDINGS:
            raise ConfigError(f"[rules] wording = {self.wording!r}: must be one of "
                              f"{', '.join(WORDINGS)} (the trade whose words the alert texts use)")


def settings_from_config(config) -> tuple[DetectorSettings, BoundsSettings, RuleSettings]:
    """The three settings objects from a :class:`monitor.settings.Config`."""
    return (DetectorSettings(**config.section("detectors")),
            BoundsSettings(**config.section("bounds")),
            RuleSettings(**config.section("rules")))
