"""One table per change chart: everything the rest of elmon needs to know about a chart.

A row (:class:`ChartSpec`) holds the chart's name (the value of ``[detectors] level_chart`` /
``slope_chart`` and the command-line choice), its kernel code (:mod:`monitor.detectors.kernels`),
the name of its threshold parameter, its ``[detectors]`` keys per signal (the given threshold and
the chart parameters, each with default and range; keys shared by both signals apart), its
design inputs with their defaults, how its parameters are packed for the kernel, the threshold
that never fires (calibration), and its normal-theory threshold where one exists.

Derived from :data:`CHARTS`: the ``[detectors]`` keys and ranges
(:mod:`monitor.pipeline.settings`), the design inputs (:mod:`monitor.detectors.design`), the
calibration signals and tuning keys (:func:`threshold_key`), and the command-line choices
(:data:`CHART_CHOICES`). A new chart is its kernel step (``kernels.py``), its class module, and
its row here.

>>> threshold_key("slope", "ewma"), CHARTS["page_hinkley"].threshold_param
('slope_ewma_L', 'threshold')
>>> CHART_CHOICES
['cusum', 'ewma', 'page_hinkley', 'none']
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, Mapping, NamedTuple

import numpy as np

from monitor.detectors.arl import cusum_h_for_arl0, ewma_L_for_arl0, ewma_limit
from monitor.detectors.kernels import (CHART_CUSUM, CHART_EWMA, CHART_NONE, CHART_PARAMS, CHART_PH,
                                       P_A, P_B, P_BURN, P_C, P_THRESHOLD)


SIGNALS = ("level", "slope")
#: in-control ARL (observations per series) a default threshold is designed for
DEFAULT_ARL0 = 20_000.0


class Key(NamedTuple):
    """A ``[detectors]`` key of a chart: default and allowed range (``None`` default: designed)."""

    default: float | None
    low: float
    high: float
    low_open: bool = False
    high_open: bool = False
    integer: bool = False


@dataclass(frozen=True)
class ChartSpec:
    """One change chart (see the module docstring).

    ``threshold_keys[signal]`` is the ``[detectors]`` key of a given threshold;
    ``param_keys[signal]`` maps each design input to its ``[detectors]`` key; ``shared_keys``
    does the same for inputs that both signals share; ``keys`` gives every key's default and
    range; ``design_defaults`` the design inputs in order with their defaults; ``pack(p,
    threshold, kw)`` writes the kernel parameters ``P_THRESHOLD, P_A, P_B, P_C``;
    ``initial_guess(kw, arl0)`` a starting threshold in statistic units for the design;
    ``normal_theory(kw, arl0)`` the threshold for iid N(0, 1) inputs (None: no solution);
    ``statistic_scale(kw)`` the statistic per threshold unit (EWMA: ``sqrt(lam / (2 - lam))``,
    as the threshold L is in sd of Z).
    """

    name: str
    code: int
    threshold_param: str
    threshold_keys: Mapping[str, str]
    param_keys: Mapping[str, Mapping[str, str]]
    shared_keys: Mapping[str, str]
    keys: Mapping[str, Key]
    design_defaults: tuple[tuple[str, float], ...]
    pack: Callable[[np.ndarray, float, dict], None]
    initial_guess: Callable[[dict, float], float]
    normal_theory: Callable[[dict, float], float] | None
    out_of_reach: float
    statistic_scale: Callable[[dict], float] = lambda kw: 1.0


def _pack_cusum(p, threshold, kw):
    p[P_THRESHOLD], p[P_A] = threshold, kw.get("k", 0.5)


def _pack_ewma(p, threshold, kw):
    lam = kw.get("lam", 0.1)
    p[P_THRESHOLD], p[P_A] = threshold * math.sqrt(lam / (2.0 - lam)), lam


def _pack_ph(p, threshold, kw):
    p[P_THRESHOLD], p[P_A] = threshold, kw.get("delta", 0.5)
    p[P_B], p[P_C] = kw.get("alpha", 1.0), kw.get("min_instances", 30)


_THRESHOLD = Key(None, 0.0, 1e6, low_open=True)
CHARTS: dict[str, ChartSpec] = {spec.name: spec for spec in (
    ChartSpec(
        name="cusum", code=CHART_CUSUM, threshold_param="h",
        threshold_keys={"level": "cusum_h", "slope": "slope_h"},
        param_keys={"level": {"k": "cusum_k"}, "slope": {"k": "slope_k"}}, shared_keys={},
        keys={"cusum_k": Key(0.5, 0.0, 10.0), "cusum_h": _THRESHOLD,
              "slope_k": Key(1.0, 0.0, 10.0), "slope_h": _THRESHOLD},
        design_defaults=(("k", 0.5),), pack=_pack_cusum,
        initial_guess=lambda kw, arl0: cusum_h_for_arl0(kw["k"], arl0),
        normal_theory=lambda kw, arl0: float(cusum_h_for_arl0(kw["k"], arl0)),
        out_of_reach=1e6),
    ChartSpec(
        name="ewma", code=CHART_EWMA, threshold_param="L",
        threshold_keys={"level": "ewma_L", "slope": "slope_ewma_L"},
        param_keys={"level": {"lam": "ewma_lambda"}, "slope": {"lam": "slope_ewma_lambda"}},
        shared_keys={},
        keys={"ewma_lambda": Key(0.1, 0.0, 1.0, low_open=True),
              "ewma_L": Key(None, 0.0, 1e3, low_open=True),
              "slope_ewma_lambda": Key(0.1, 0.0, 1.0, low_open=True),
              "slope_ewma_L": Key(None, 0.0, 1e3, low_open=True)},
        design_defaults=(("lam", 0.1),), pack=_pack_ewma,
        initial_guess=lambda kw, arl0: ewma_limit(kw["lam"], ewma_L_for_arl0(kw["lam"], arl0)),
        normal_theory=lambda kw, arl0: float(ewma_L_for_arl0(kw["lam"], arl0)),
        out_of_reach=1e3,
        statistic_scale=lambda kw: math.sqrt(kw["lam"] / (2.0 - kw["lam"]))),
    ChartSpec(
        name="page_hinkley", code=CHART_PH, threshold_param="threshold",
        threshold_keys={"level": "ph_threshold", "slope": "slope_ph_threshold"},
        param_keys={"level": {"delta": "ph_delta"}, "slope": {"delta": "slope_ph_delta"}},
        shared_keys={"alpha": "ph_alpha", "min_instances": "ph_min_instances"},
        keys={"ph_delta": Key(0.5, 0.0, 10.0), "ph_threshold": _THRESHOLD,
              "slope_ph_delta": Key(1.0, 0.0, 10.0), "slope_ph_threshold": _THRESHOLD,
              "ph_alpha": Key(1.0, 0.0, 1.0, low_open=True),
              "ph_min_instances": Key(30, 1, 1e6, integer=True)},
        design_defaults=(("delta", 0.5), ("alpha", 1.0), ("min_instances", 30.0)),
        pack=_pack_ph,
        initial_guess=lambda kw, arl0: cusum_h_for_arl0(kw["delta"], arl0),
        normal_theory=None, out_of_reach=1e6),
)}

#: chart name -> kernel code ("none": no chart on that signal)
CHART_CODES = {"none": CHART_NONE, **{name: spec.code for name, spec in CHARTS.items()}}
#: the command-line choices of --level-chart / --slope-chart
CHART_CHOICES = [*CHARTS, "none"]


def chart_spec(chart: str) -> ChartSpec:
    """The row of ``chart``; ValueError naming the known charts."""
    try:
        return CHARTS[chart]
    except KeyError:
        raise ValueError(f"chart = {chart!r}: must be one of {', '.join(CHARTS)}") from None


def threshold_key(signal: str, chart: str) -> str:
    """The ``[detectors]`` key of a given threshold of ``chart`` on ``signal``."""
    return chart_spec(chart).threshold_keys[signal]


def detector_keys() -> dict[str, Key]:
    """Every chart's ``[detectors]`` keys, in table order."""
    return {key: k for spec in CHARTS.values() for key, k in spec.keys.items()}


def chart_inputs(chart: str, signal: str, values: Mapping[str, object]) -> dict:
    """The design inputs of ``chart`` on ``signal`` read from ``[detectors]`` ``values``."""
    spec = chart_spec(chart)
    kw = {p: values[key] for p, key in spec.param_keys[signal].items()}
    kw.update({p: values[key] for p, key in spec.shared_keys.items()})
    return kw


def design_inputs(chart: str, kw: Mapping[str, object]) -> tuple[tuple[str, float], ...]:
    """``((name, float value), ...)`` of the design inputs, defaults filled (a cache key)."""
    return tuple((name, float(kw.get(name, default)))
                 for name, default in chart_spec(chart).design_defaults)


def pack_chart(chart: str, threshold: float, burn_in: float, **kw) -> np.ndarray:
    """Parameter vector for :func:`monitor.detectors.kernels.chart_step`. ``threshold`` is in
    the chart's own units (h for CUSUM, L for EWMA, converted here to the limit on Z, lambda
    for Page-Hinkley); ``kw`` the chart's design inputs."""
    p = np.zeros(CHART_PARAMS)
    p[P_BURN] = burn_in
    if chart != "none":
        chart_spec(chart).pack(p, threshold, kw)
    return p
