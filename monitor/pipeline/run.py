"""One configuration of the core: estimator -> detectors -> rules, over many series at once.

The live service and the replay both call :meth:`Pipeline.run` with the rows of a batch, so they
produce the same estimates and alerts on the same rows; the whole step is compiled
(:mod:`monitor.pipeline.kernel`). Calling ``run`` on a batch split in two, with the states
carried over, gives exactly the result of one call (tests/test_pipeline.py).

Signals and what watches them
-----------------------------
- the standardized one-step innovation ``z`` -> the *level* chart (default two-sided CUSUM,
  k = 0.5) -> ``level_shift``;
- the fast-minus-reference slope statistic ``d`` (:mod:`monitor.detectors.slope`) -> the
  *slope* chart (default CUSUM, k = 1) -> ``elasticity_change``;
- ``(b, lo, hi)`` -> bounds (``out_of_bounds``) and a confident positive elasticity
  (``sign_flip``); the estimator status -> ``low_variation`` (informational).

Every chart threshold not given explicitly is designed by simulation for the in-control ARL
``arl0`` of :class:`~monitor.pipeline.settings.DetectorSettings` and the estimator's forgetting
(:mod:`monitor.detectors.design`).

State row of one series (float64; offsets in :meth:`Pipeline.layout`)
---------------------------------------------------------------------
``estimator`` (:func:`monitor.estimators.kernel.state_size`), ``slope`` (20),
``level_chart`` (10), ``level_episode`` (17), ``slope_chart`` (10), ``slope_episode`` (17),
``bounds`` (6), ``bounds_run`` (8), ``sign`` (6), ``sign_run`` (8), ``low_variation`` (6),
``low_variation_run`` (8), ``rules`` (5 x 8, kinds in :data:`monitor.pipeline.rules.KINDS` order).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd

from monitor.detectors.base import floats_from_json, floats_to_json
from monitor.detectors.bounds_kernel import BOUNDS_SIZE, MODES
from monitor.detectors.design import DesignedThreshold, pipeline_threshold
from monitor.detectors.kernels import CHART_SIZE
from monitor.detectors.slope_kernel import SLOPE_SIZE
from monitor.detectors.spec import CHART_CODES, pack_chart
from monitor.errors import ConfigError
from monitor.estimators import feedback as FB
from monitor.estimators import kernel as K
from monitor.estimators.batch import initial_states
from monitor.estimators.dispatch import step_form, work_size
from monitor.detectors import split_glr as SG
from monitor.detectors.split_design import split_thresholds
from monitor.pipeline.kernel import L_SIZE, L_SPLIT, NSIG, pipeline_run
from monitor.pipeline.split_events import WORK_SIZE, delay50_all
from monitor.pipeline.messages import NEV, events_frame
from monitor.pipeline.rules import EP_SIZE, KINDS, RULE_SIZE, RUN_SIZE, rule_params
from monitor.pipeline.settings import (BoundsSettings, DetectorSettings, RuleSettings,
                                       settings_from_config)


BLOCKS = (("slope", SLOPE_SIZE), ("level_chart", CHART_SIZE), ("level_episode", EP_SIZE),
          ("slope_chart", CHART_SIZE), ("slope_episode", EP_SIZE), ("bounds", BOUNDS_SIZE),
          ("bounds_run", RUN_SIZE), ("sign", BOUNDS_SIZE), ("sign_run", RUN_SIZE),
          ("low_variation", BOUNDS_SIZE), ("low_variation_run", RUN_SIZE),
          ("rules", 5 * RULE_SIZE), ("split", SG.SPLIT_SIZE))
#: floats of the split detector's control block in earlier layouts (none; the slow control
#: means and counts) that :meth:`Pipeline.checked_state` upgrades
PREVIOUS_CONTROL_BLOCKS = (0, 2 * SG.NCF)
#: blocks of the previous charts, empty (size 0) with the split detector, and vice versa
CHART_BLOCKS = ("slope", "level_chart", "level_episode", "slope_chart", "slope_episode")
SIGNAL_COLUMNS = ["d", "b_fast", "b_fast_lo", "b_fast_hi", "level_stat", "slope_stat",
                  "level_flags", "slope_flags"]


@dataclass
class PipelineResult:
    """Outputs of :meth:`Pipeline.run` for the rows of one batch.

    ``out`` (n, NOUT): estimator outputs (columns of :mod:`monitor.estimators.kernel`; its
    status column is the estimator's own); ``status`` (n,) int8: the final status after the
    detectors (3 out_of_bounds, 4 changed); ``states``: the updated state rows; ``records``:
    raw event records; ``signals`` (n, 8) when ``keep_signals`` (columns
    :data:`SIGNAL_COLUMNS`).
    """

    out: np.ndarray
    status: np.ndarray
    states: np.ndarray
    records: np.ndarray
    sid: np.ndarray
    ts: np.ndarray | None = None
    names: list | None = None
    signals: np.ndarray | None = None
    interval_mode: bool = True
    wording: str = "retail"                     # [rules] wording of the alert texts
    feedback: np.ndarray | None = None          # per-row price-feedback outputs (FB_* columns)
    feedback_events: list = field(default_factory=list)
    _events: pd.DataFrame | None = field(default=None, repr=False)

    @property
    def events(self) -> pd.DataFrame:
        """Alert events: ``row, sid, kind, action, severity, beta, beta_lo, beta_hi, message,
        details`` (one row per open or clear decision, in row order)."""
        if self._events is None:
            self._events = events_frame(self.records, self.sid, self.names, self.interval_mode,
                                        self.feedback, self.feedback_events, self.wording)
        return self._events

    def signals_frame(self) -> pd.DataFrame:
        if self.signals is None:
            raise ValueError("run the pipeline with keep_signals=True to get the signals")
        return pd.DataFrame(self.signals, columns=SIGNAL_COLUMNS)


class Pipeline:
    """The estimator prototype plus detectors and alert rules, compiled together.

    Parameters
    ----------
    estimator : ElasticityRLS
        Supplies the estimator's hyperparameters.
    detectors, bounds, rules : settings objects of :mod:`monitor.pipeline.settings`
    """

    def __init__(self, estimator, detectors: DetectorSettings | None = None,
                 bounds: BoundsSettings | None = None, rules: RuleSettings | None = None):
        self.estimator = estimator
        self.detectors = detectors or DetectorSettings()
        self.bounds = bounds or BoundsSettings()
        self.rules = rules or RuleSettings()
        self.designs: dict[str, DesignedThreshold | None] = {}
        self.split = self.detectors.change_detector == "split_glr"
        if self.split:
            self._charts = {s: (CHART_CODES["none"], pack_chart("none", 0.0, 0))
                            for s in ("level", "slope")}
            self._gp = self._design_split()
        else:
            self._charts = {s: self._design(s) for s in ("level", "slope")}
            self._gp = SG.params(math.inf, math.inf)
        self._layout = self._make_layout()
        low, high = self.bounds.limits()
        b = self.bounds
        self._bparams = np.array([0.0, low, high, MODES[b.mode], b.persistence, b.clear_after])
        r = self.rules
        self._gparams = np.array([0.0, -math.inf, 0.0, 0.0, r.sign_flip_persistence,
                                  r.sign_flip_clear_after])
        self._vparams = np.array([r.low_variation_persistence, r.low_variation_clear_after,
                                  estimator.min_price_sd])
        on = {"out_of_bounds": r.out_of_bounds, "elasticity_change": r.elasticity_change
              and (self.split or self.detectors.slope_chart != "none"),
              "level_shift": r.level_shift and (self.split or self.detectors.level_chart != "none"),
              "sign_flip": r.sign_flip,
              "low_variation": r.low_variation}
        self._rparams = np.vstack([rule_params(kd, r.clear_after, r.cooldown, on[kd])
                                   for kd in KINDS])

    @classmethod
    def from_config(cls, config, estimator) -> "Pipeline":
        return cls(estimator, *settings_from_config(config))

    # ------------------------------------------------------------------ set-up
    def _design(self, signal: str) -> tuple[int, np.ndarray]:
        d = self.detectors
        chart, given, kw = d.chart(signal)
        burn = d.level_burn_in if signal == "level" else d.slope_burn_in
        if chart == "none":
            self.designs[signal] = None
            return CHART_CODES["none"], pack_chart("none", 0.0, 0)
        if given is None:
            try:
                design = pipeline_threshold(
                    signal, chart, d.arl0, forgetting=self.estimator.forgetting,
                    fast_forgetting=d.fast_forgetting, reference_forgetting=d.reference_forgetting,
                    n_paths=d.design_paths, seed=d.design_seed, **kw)
            except ValueError as exc:
                raise ConfigError(f"[detectors] cannot design the {signal} {chart} threshold: "
                                  f"{exc}") from None
        else:
            design = DesignedThreshold(float(given), math.nan, math.nan, math.nan, 0, "given")
        self.designs[signal] = design
        return CHART_CODES[chart], pack_chart(chart, design.threshold, burn, **kw)

    def _design_split(self) -> np.ndarray:
        """Both split-GLR thresholds for ``arl0`` (:mod:`monitor.detectors.split_design`)."""
        d = self.detectors
        try:
            t = split_thresholds(d.arl0, forgetting=self.estimator.forgetting,
                                 n_paths=d.design_paths, seed=d.design_seed)
        except ValueError as exc:
            raise ConfigError(f"[detectors] cannot design the split GLR thresholds: {exc}") from None
        for signal, h in (("level", t.level), ("slope", t.slope)):
            self.designs[signal] = DesignedThreshold(h, t.arl0, math.nan, math.nan, t.n_paths,
                                                     t.method)
        # the Poisson model's rows enter with their working weights (split_glr, "Working
        # weights"); the log-log models' with weight 1
        return SG.params(t.slope, t.level, margin_slope=SG.slope_margin(d.arl0),
                         weighted=getattr(self.estimator, "model", "") == "poisson")

    def delay50_obs(self, states: np.ndarray) -> np.ndarray:
        """Per series: expected observations to detect a change of 0.5 in b at its price
        variation and noise and the configured ARL0 (NaN where b is not identified yet or with
        the previous charts)."""
        out = np.full(states.shape[0], np.nan)
        if self.split and states.shape[0]:
            delay50_all(np.ascontiguousarray(states), int(self._layout[L_SPLIT]),
                        float(self._gp[SG.Q_HS]), out)
        return out

    def _make_layout(self) -> np.ndarray:
        offs = [self.estimator.state_size]
        for name, size in BLOCKS:
            if (name == "split") != self.split and (name == "split" or name in CHART_BLOCKS):
                size = 0  # the other detector's blocks are empty
            elif name == "split":
                size += self._split_zs() - SG.ZS_SIZE   # no controls: no controls' sums
            offs.append(offs[-1] + size)
        lay = np.array(offs, dtype=np.int64)
        assert lay.size == L_SIZE + 1
        return lay

    def _split_zs(self) -> int:
        """Floats of the split detector's controls' sums in this layout: ``ZS_SIZE`` where the
        rows have columns beyond ``(1, log p)`` (controls, or an instrument model's
        instruments: the detector's control fit reads them), else 0."""
        return SG.ZS_SIZE if self.estimator.row_width > 2 else 0

    def layout(self) -> dict[str, tuple[int, int]]:
        """``{block: (start, stop)}`` offsets of one series' state row."""
        names = ["estimator"] + [n for n, _ in BLOCKS]
        starts = np.r_[0, self._layout[:-1]]
        return {n: (int(a), int(b)) for n, a, b in zip(names, starts, self._layout)}

    @property
    def state_size(self) -> int:
        """The layout's blocks, then the price-feedback diagnostic's state (issue 17)."""
        return int(self._layout[-1]) + FB.STATE_SIZE

    def feedback_states(self, states: np.ndarray) -> np.ndarray:
        """The price-feedback part of state rows (a view)."""
        return states[:, int(self._layout[-1]):]

    def settings(self) -> dict:
        """The settings used (for summary.json): each chart with its threshold and design."""
        out = {"detectors": asdict(self.detectors), "bounds": asdict(self.bounds),
               "rules": asdict(self.rules), "thresholds": {}}
        for signal, design in self.designs.items():
            chart, _, kw = ("split_glr", None, {}) if self.split else self.detectors.chart(signal)
            out["thresholds"][signal] = None if design is None else {
                "chart": chart, **kw, "threshold": design.threshold, "arl0": design.arl0
                if math.isfinite(design.arl0) else None, "method": design.method,
                "arl_se": design.arl_se if math.isfinite(design.arl_se) else None,
                "n_paths": design.n_paths}
        return out

    # ------------------------------------------------------------------ state
    def new_states(self, n_series: int) -> np.ndarray:
        """``(n_series, state_size)`` fresh rows: the estimator's prior, zeros elsewhere."""
        st = np.zeros((int(n_series), self.state_size))
        st[:, :self._layout[0]] = initial_states(self.estimator, int(n_series))
        return st

    def state_to_json(self, vector) -> list:
        """One series' state row as JSON-able floats (NaN as None; exact round trip)."""
        return floats_to_json(vector)

    def state_from_json(self, obj) -> np.ndarray:
        return self.checked_state(floats_from_json(obj))

    def checked_state(self, vec: np.ndarray) -> np.ndarray:
        """One series' stored state row, checked against this pipeline's length.

        Rows written by earlier layouts of the split detector's control block are upgraded:
        the block before the slow control means (99 floats) and the one with them (111: 2 x
        ``NCF`` means and counts, 4 December 2026) both become the detector's own control fit
        (:mod:`monitor.detectors.split_controls`) started afresh: the slow means are dropped,
        the fit's flag and normal equations are inserted as zeros, everything else resumes
        exactly. A series with controls is then fed to its charts again once the new fit has
        identified its controls; a series without controls resumes as it was. Rows of the layout
        without the split detector's sums of ``x^3``, ``x^4`` (``HX_SIZE`` floats fewer, 5
        December 2026) get them as zeros with their flag off: the after sample's variance is
        the average's until the window next restarts. Rows of the layout without the
        controls' sums (``ZS_SIZE`` floats fewer where the rows have controls, 5 December
        2026, :mod:`~monitor.detectors.split_glr`) get them as zeros with their flag off: the
        detector's response sums keep the control fit's ``c`` as it was when each row came
        until a slope alarm drops every sum. Without controls the layout has no such block and
        rows of the previous layout resume as they are. Rows of every layout before the
        split detector's aligned level candidates (``AL_SIZE`` floats, 5 December 2026) get
        them as zeros with their flags off: each comes in when its CUSUM next resets. Where the
        rows have controls, rows of the layouts before the aligned candidates' controls' sums
        (``AL_ZS_SIZE`` floats fewer at the end of the controls' sums, 5 December 2026) get them
        as zeros and the candidates' flags off (their response sums are not in the fit's
        current ``c``): each comes in when its CUSUM next resets. Rows of every layout before the
        split detector's moments of the prices' lag-1 autocorrelation (``PX_SIZE`` floats, 5
        December 2026) get them as zeros, flag off: the slope score's autocorrelation is capped
        by the errors' alone until they build up.
        Any other length raises :class:`~monitor.errors.ConfigError`."""
        vec = np.asarray(vec, dtype=np.float64)
        if vec.shape == (self.state_size,):
            return vec
        if self.split and vec.ndim == 1 and vec.size < self.state_size:
            # every earlier layout lacks the split detector's moments of the prices' lag-1
            # autocorrelation (``PX_SIZE`` floats, 5 December 2026): upgraded to the layout
            # just before them, then they come in as zeros, flag off (the slope score's
            # autocorrelation is capped by the errors' alone until they build up)
            vec = self._before_px(vec)
            at = int(self._layout[L_SPLIT]) + SG.PX0
            return np.concatenate([vec[:at], np.zeros(SG.PX_SIZE), vec[at:]])
        raise ConfigError(f"checkpoint state has length {vec.size}; this pipeline needs "
                          f"{self.state_size} (estimator controls or layout changed)")

    def _before_px(self, vec: np.ndarray) -> np.ndarray:
        """``vec`` (an earlier layout) upgraded to the layout just before the split detector's
        prices' lag-1 moments (:meth:`checked_state`)."""
        size = self.state_size - SG.PX_SIZE
        zs0 = SG.ZS0 - SG.PX_SIZE
        if self._split_zs() and vec.size in (size - SG.AL_ZS_SIZE,
                                             size - SG.AL_ZS_SIZE - SG.AL_SIZE):
            # the layouts before the aligned candidates' controls' sums (with or without the
            # candidates): the sums are padded at the end of the controls' sums, the candidates
            # are unset until their CUSUMs next reset (split_glr, "The controls' sums")
            split = int(self._layout[L_SPLIT])
            at = split + zs0 + SG.ZS_SIZE - SG.AL_ZS_SIZE
            if vec.size != size - SG.AL_ZS_SIZE:
                at -= SG.AL_SIZE
            vec = np.concatenate([vec[:at], np.zeros(SG.AL_ZS_SIZE), vec[at:]])
            if vec.size == size:
                vec[split + SG.AL0 + 1:split + SG.AL0 + SG.AL_SIZE:SG.AL_W] = 0.0
                return vec
        if vec.size == size:
            return vec
        if vec.size < size:
            # the layouts before the split detector's aligned level candidates (``AL_SIZE``
            # floats, 5 December 2026): upgraded to that layout, then the candidates come in
            # as zeros, flags off, until their CUSUMs next reset (split_glr)
            up = self._upgraded(vec, size - SG.AL_SIZE, zs0 - SG.AL_SIZE)
            at = int(self._layout[L_SPLIT]) + SG.AL0
            return np.concatenate([up[:at], np.zeros(SG.AL_SIZE), up[at:]])
        raise ConfigError(f"checkpoint state has length {vec.size}; this pipeline needs "
                          f"{self.state_size} (estimator controls or layout changed)")

    def _upgraded(self, vec: np.ndarray, size: int, zs0: int) -> np.ndarray:
        """``vec`` upgraded to the split layout of ``size`` floats whose controls' sums start at
        ``zs0`` in the split block (:meth:`checked_state`'s earlier layouts)."""
        if vec.size == size:
            return vec
        zs = self._split_zs()
        if zs and vec.size == size - zs:
            # the layout before the controls' sums (5 December 2026): they come in as zeros,
            # flag off (the response sums keep the fit's c as it was when each row came, as
            # before), until every sum is dropped by a slope alarm (split_glr)
            at = int(self._layout[L_SPLIT]) + zs0
            return np.concatenate([vec[:at], np.zeros(SG.ZS_SIZE), vec[at:]])
        if vec.size == size - SG.HX_SIZE - zs:
            # the layout before the after sample's sums of x^3, x^4 (5 December 2026): they
            # come in as zeros, flag off, until the window next restarts (split_glr); the
            # controls' sums as above
            at = int(self._layout[L_SPLIT]) + SG.HX0
            return np.concatenate([vec[:at], np.zeros(SG.HX_SIZE + zs), vec[at:]])
        new = zs0 + zs - SG.CFIT_ON
        for old in PREVIOUS_CONTROL_BLOCKS:
            if vec.size == size - new + old:
                at = int(self._layout[L_SPLIT]) + SG.CFIT_ON
                return np.concatenate([vec[:at], np.zeros(new), vec[at + old:]])
        raise ConfigError(f"checkpoint state has length {vec.size}; this pipeline needs "
                          f"{self.state_size} (estimator controls or layout changed)")

    # ------------------------------------------------------------------ running
    def run(self, sid, X, y, n_series: int, states: np.ndarray | None = None, ts=None, *,
            names=None, low=None, high=None, keep_signals: bool = False,
            offset=None) -> PipelineResult:
        """Run rows ``(sid[j], X[j], y[j])`` in order (each series' rows in time order).

        ``ts``: int64 ns UTC per row (messages and "started at"); ``names``: series names by
        index (messages); ``low`` / ``high``: per-series bounds overriding ``[bounds]`` (NaN:
        no bound on that side); ``states`` is updated in place; ``offset``: log exposure per
        row (Poisson model; ``y`` is then the quantity itself, zeros allowed).
        """
        X = np.ascontiguousarray(X, dtype=np.float64)
        y = np.ascontiguousarray(y, dtype=np.float64)
        sid = np.ascontiguousarray(sid, dtype=np.int64)
        n = X.shape[0]
        if X.ndim != 2 or X.shape[1] != self.estimator.row_width:
            raise ValueError(f"X has shape {X.shape}; expected (n, {self.estimator.row_width})")
        if y.shape != (n,) or sid.shape != (n,):
            raise ValueError("sid, X and y must have the same number of rows")
        if n and (sid.min() < 0 or sid.max() >= n_series):
            raise ValueError(f"sid must be in 0..{n_series - 1}")
        if states is None:
            states = self.new_states(n_series)
        elif states.shape != (n_series, self.state_size) and not (
                states.shape[0] >= n_series and states.shape[1] == self.state_size):
            raise ValueError(f"states has shape {states.shape}; expected ({n_series}, "
                             f"{self.state_size})")
        tsf = np.full(n, np.nan) if ts is None else np.asarray(ts, dtype=np.int64).astype(np.float64)
        bparams, bon = self._bounds_arrays(states.shape[0], low, high)
        out = np.empty((n, getattr(self.estimator, "nout", K.NOUT)))
        status = np.empty(n, dtype=np.int8)
        sig = np.empty((n if keep_signals else 1, NSIG))
        records, start, cap = [], 0, max(256, n // 64)
        est = self.estimator
        off = np.empty(0) if offset is None else np.ascontiguousarray(offset, dtype=np.float64)
        if off.size and off.shape != (n,):
            raise ValueError("offset must have one value per row")
        args = (*est.dispatch_args, off)
        form = step_form(est.model, X.shape[1], est.band_code)
        d = self.detectors
        (lkind, lp), (skind, sp) = self._charts["level"], self._charts["slope"]
        while True:
            ev = np.zeros((cap, NEV))     # zeros: a field a record leaves unset reads 0
            stop, ne = pipeline_run(form, self.split, states, sid, X, y, tsf, start,
                                    self._layout, args, d.fast_forgetting,
                                    d.reference_forgetting, lkind, lp, skind, sp, bparams, bon,
                                    self._gparams, self._vparams, self._rparams, out, ev, status,
                                    sig, keep_signals, np.empty(work_size(est.model, X.shape[1])),
                                    self._gp, np.empty(WORK_SIZE))
            records.append(ev[:ne])
            if stop >= n:
                break
            start, cap = stop, cap * 2
        fb, fb_events = FB.pipeline_pass(self.feedback_states(states), sid, X[:, 1], out,
                                         est.forgetting, getattr(est, "model", "") == "iv")
        return PipelineResult(feedback=fb, feedback_events=fb_events,
                              out=out, status=status, states=states,
                              records=np.concatenate(records) if records else np.empty((0, NEV)),
                              sid=sid, ts=None if ts is None else np.asarray(ts),
                              names=None if names is None else list(names),
                              signals=sig if keep_signals else None,
                              interval_mode=self.bounds.mode == "interval",
                              wording=self.rules.wording)

    def _bounds_arrays(self, n_series: int, low, high) -> tuple[np.ndarray, np.ndarray]:
        bp = np.tile(self._bparams, (n_series, 1))
        if low is not None:
            v = np.asarray(low, dtype=np.float64)
            bp[:, 1] = np.where(np.isnan(v), -np.inf, v)
        if high is not None:
            v = np.asarray(high, dtype=np.float64)
            bp[:, 2] = np.where(np.isnan(v), np.inf, v)
        bad = ~(bp[:, 1] < bp[:, 2])
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise ConfigError(f"bounds of series {i}: low = {bp[i, 1]} must be below high = "
                              f"{bp[i, 2]}")
        on = (np.isfinite(bp[:, 1]) | np.isfinite(bp[:, 2])) & bool(self.rules.out_of_bounds)
        return bp, on
