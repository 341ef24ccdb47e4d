"""Drift detectors on standardized signals (river's shape: ``update(x)``, ``drift_detected``).

- :class:`BoundsDetector`: the elasticity within [low, high], persistence and hysteresis;
- :class:`CUSUM`: two-sided tabular CUSUM (Page 1954);
- :class:`EWMAChart`: EWMA chart (Roberts 1959);
- :class:`PageHinkley`: two-sided Page-Hinkley test;
- :class:`SlopeChangeDetector` and :class:`FastSlowSlope`: a change in b, not in the level;
- :class:`RiverDetector`: any of river's drift detectors (ADWIN, KSWIN, PageHinkley) on any
  of these signals (streaming only; it is not part of the compiled pipeline).

Thresholds default to a design from an in-control ARL (:mod:`monitor.detectors.design`).
"""

from monitor.detectors.bounds import BoundsDetector
from monitor.detectors.cusum import CUSUM
from monitor.detectors.ewma import EWMAChart
from monitor.detectors.page_hinkley import PageHinkley
from monitor.detectors.river_adapter import RiverDetector, false_alarm_rate, run_per_series
from monitor.detectors.slope import FastSlowSlope, SlopeChangeDetector


__all__ = ["BoundsDetector", "CUSUM", "EWMAChart", "PageHinkley", "SlopeChangeDetector",
           "FastSlowSlope", "RiverDetector", "run_per_series", "false_alarm_rate"]
