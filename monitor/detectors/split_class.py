"""Streaming form of the split GLR (:mod:`monitor.detectors.split_glr`) for one series.

Feed it, after each :meth:`~monitor.estimators.ElasticityRLS.learn_one`, the log price, the
response with the controls' effects removed and the estimator's innovation
(:meth:`SplitGLR.observe` does this from the estimator). It calls the same compiled step as the
pipeline and re-anchors itself after an alarm (the estimator is left to its own forgetting
here; see :mod:`monitor.pipeline.kernel` for what the pipeline does to it).

>>> import numpy as np
>>> from monitor.estimators import ElasticityRLS
>>> rng = np.random.default_rng(4)
>>> est, det = ElasticityRLS(forgetting=0.99), SplitGLR(arl0=20000)
>>> found = []
>>> for t in range(2500):
...     p = 10.0 * np.exp(rng.normal(0.0, 0.15))
...     b = -1.0 if t < 2000 else -1.8            # pivots around the typical price 10
...     q = 50.0 * (p / 10.0) ** b * np.exp(rng.normal(0.0, 0.15))
...     _ = est.learn_one({"price": p}, q)    # returns the estimator
...     if det.observe(est, np.log(p), np.log(q), ts=float(t)).alarm:
...         found.append((t, det.alarm, det.report["change_ts"]))
>>> t, kind, began = found[0]
>>> kind, 2000 <= t < 2100, abs(began - 2000) < 40
('elasticity_change', True, True)
"""

from __future__ import annotations

import math

import numpy as np

from monitor.detectors import split_controls as SC
from monitor.detectors import split_glr as S
from monitor.detectors.base import check_number, floats_from_json, floats_to_json
from monitor.detectors.split_design import expected_delay, split_thresholds
from monitor.estimators import kernel as K
from monitor.estimators.tquantile import t_quantile


def report_dict(rep: np.ndarray, level: float = 0.95) -> dict:
    """The report vector of :func:`~monitor.detectors.split_glr.split_report` as a dict with
    Student-t intervals (degrees of freedom from each sample's rows)."""
    def band(b, se, df):
        if not (math.isfinite(b) and math.isfinite(se)):
            return b, math.nan, math.nan
        q = t_quantile(level, max(df, 1.0))
        return b, b - q * se, b + q * se

    bb, bb_lo, bb_hi = band(rep[S.RP_BB], rep[S.RP_BB_SE], rep[S.RP_DFB])
    ba, ba_lo, ba_hi = band(rep[S.RP_BA], rep[S.RP_BA_SE], rep[S.RP_DFA])
    return {"change_ts": float(rep[S.RP_TS]), "rows_since_change": float(rep[S.RP_NA]),
            "beta_before": bb, "beta_before_lo": bb_lo, "beta_before_hi": bb_hi,
            "beta_after": ba, "beta_after_lo": ba_lo, "beta_after_hi": ba_hi,
            "level_change": float(rep[S.RP_LEVEL]), "level_change_se": float(rep[S.RP_LEVEL_SE]),
            "statistic": float(rep[S.RP_STAT])}


class SplitGLR:
    """Slope and level change charts of one series (see :mod:`monitor.detectors.split_glr`).

    Parameters
    ----------
    arl0 : float
        In-control ARL (observations) of each chart; the thresholds are designed from it
        (:func:`~monitor.detectors.split_design.split_thresholds`) unless given.
    h_slope, h_level : float, optional
        Thresholds in log-likelihood-ratio units.
    ref_cap, min_rows, se_start, lam_scale :
        Reference cap (observations), rows before the charts start, the slope chart's start
        rule (largest standard error of b), the scale's EW factor.
    """

    def __init__(self, arl0: float = 20000.0, h_slope: float | None = None,
                 h_level: float | None = None, *, ref_cap: float = S.DEFAULT_REF_CAP,
                 min_rows: float = S.DEFAULT_MIN_ROWS, se_start: float = S.DEFAULT_SE_START,
                 lam_scale: float = S.DEFAULT_LAM_SCALE):
        self.arl0 = check_number("arl0", arl0, 20.0, 1e6)
        self.ref_cap = check_number("ref_cap", ref_cap, 10.0, 1e9)
        self.min_rows = check_number("min_rows", min_rows, 3.0, 1e6)
        self.se_start = check_number("se_start", se_start, 0.0, 100.0, low_open=True)
        self.lam_scale = check_number("lam_scale", lam_scale, 0.5, 1.0, high_open=True)
        if h_slope is None or h_level is None:
            d = split_thresholds(self.arl0, ref_cap=self.ref_cap, min_rows=self.min_rows,
                                 lam_scale=self.lam_scale, se_start=self.se_start)
            h_slope = d.slope if h_slope is None else h_slope
            h_level = d.level if h_level is None else h_level
        self.h_slope = check_number("h_slope", h_slope, 0.0, 1e6, low_open=True)
        self.h_level = check_number("h_level", h_level, 0.0, 1e6, low_open=True)
        self._p = S.params(self.h_slope, self.h_level, ref_cap=self.ref_cap,
                           min_rows=self.min_rows, lam_scale=self.lam_scale,
                           se_start=self.se_start, margin_slope=S.slope_margin(self.arl0))
        self._state = np.zeros(S.SPLIT_SIZE)
        self._rep = np.empty(S.REPORT_SIZE)
        self._work = np.empty(SC.SCRATCH)
        self.alarm: str | None = None
        self.report: dict | None = None

    # ------------------------------------------------------------------ feeding
    def update(self, log_price: float, y_adjusted: float, innovation: float,
               ts: float = math.nan, n_obs: float = math.nan) -> "SplitGLR":
        """One row; sets :attr:`alarm` (``"elasticity_change"``, ``"level_shift"`` or None)
        and, on an alarm, :attr:`report` (change time, b before and after with intervals,
        level change), then re-anchors."""
        f = S.split_step(self._state, 0, float(log_price), float(y_adjusted), float(innovation),
                         float(n_obs), float(ts), self._p)
        self.alarm, self.report = None, None
        if f & S.SG_SLOPE:
            self._fire(True)
        elif f & S.SG_LEVEL:
            self._fire(False)
        return self

    def _fire(self, slope: bool) -> None:
        S.split_report(self._state, 0, slope, 0.0, self._rep, self._p)
        self.alarm = "elasticity_change" if slope else "level_shift"
        self.report = report_dict(self._rep)
        if slope:
            S.reanchor_slope(self._state, 0, self._p)
            SC.fit_partial(self._state, S.CFIT0, 0)
            SC.fit_partial(self._state, S.CFIT0, 1)
        else:
            S.reanchor_level(self._state, 0, self._p)
            SC.fit_partial(self._state, S.CFIT0, 0)

    def observe(self, est, log_price: float, log_q: float, row=None,
                ts: float = math.nan) -> "SplitGLR":
        """Update from an :class:`~monitor.estimators.ElasticityRLS` right after its
        ``learn_one`` (``row``: the design row, needed only with controls: the controls'
        effects are then removed with the detector's own fit of them,
        :mod:`monitor.detectors.split_controls`, and rows are fed once they are identified).
        Rows while the estimator is warming up enter only that fit."""
        st = est.state_vector
        k = est.row_width
        self.alarm, self.report = None, None
        if est.n_eff < max(est.min_n_eff, k + 2.0) or not math.isfinite(est.residual_sd):
            if row is not None and k > 2:     # warm-up rows enter only the control fit
                SC.fit_row(self._state, 0, np.asarray(row, dtype=np.float64), float(log_q), k,
                           st, np.nan)
            return self
        y = float(log_q)
        if row is not None and k > 2:
            r = np.asarray(row, dtype=np.float64)
            y, ready = SC.fit_response(self._state, 0, r, y, k, st, self._work, 0, np.nan)
            if not ready:
                return self
        f = S.split_step(self._state, 0, float(log_price), y, float(st[K.I_E]),
                         float(st[K.I_N]), float(ts), self._p)
        if f & S.SG_SLOPE:
            self._fire(True)
        elif f & S.SG_LEVEL:
            self._fire(False)
        return self

    # ------------------------------------------------------------------ reading
    @property
    def drift_detected(self) -> bool:
        return self.alarm is not None

    @property
    def statistics(self) -> tuple[float, float]:
        """``(G_slope, G_level)`` after the last row (0 while a chart has not started)."""
        return float(self._state[S.D_GS]), float(self._state[S.D_GL])

    def delay(self, db: float = 0.5) -> float:
        """Expected rows to detect a change ``db`` of b at this series' price variation and
        noise (:func:`~monitor.detectors.split_design.expected_delay`)."""
        return expected_delay(self.h_slope, float(S.info_per_obs(self._state, 0, db)))

    def to_state(self) -> dict:
        return {"params": {"arl0": self.arl0, "h_slope": self.h_slope, "h_level": self.h_level,
                           "ref_cap": self.ref_cap, "min_rows": self.min_rows,
                           "se_start": self.se_start, "lam_scale": self.lam_scale},
                "state": floats_to_json(self._state)}

    @classmethod
    def from_state(cls, state) -> "SplitGLR":
        p = dict(state["params"])
        det = cls(p.pop("arl0"), p.pop("h_slope"), p.pop("h_level"), **p)
        vec = floats_from_json(state["state"])
        # every layout before the moments of the prices' lag-1 autocorrelation (5 December
        # 2026) is first upgraded to the one just before them (``full`` floats), then they come
        # in as zeros, flag off (the slope score's autocorrelation is capped by the errors'
        # alone until they build up)
        full = S.SPLIT_SIZE - S.PX_SIZE
        if vec.size in (full - S.AL_ZS_SIZE, full - S.AL_ZS_SIZE - S.AL_SIZE):
            # saved before the aligned candidates' controls' sums (5 December 2026; this class
            # has no controls, the sums are never read): zeros at the end
            vec = np.concatenate([vec, np.zeros(S.AL_ZS_SIZE)])
        if vec.size in (full - S.AL_SIZE, full - S.AL_SIZE - S.ZS_SIZE,
                        full - S.AL_SIZE - S.ZS_SIZE - S.HX_SIZE):
            # saved before the aligned level candidates (5 December 2026): zeros, flags off
            # (each comes in when its CUSUM next resets); they follow the sums of x^3, x^4,
            # which the layout before those ends without (inserted below)
            at = min(S.AL0, vec.size)
            vec = np.concatenate([vec[:at], np.zeros(S.AL_SIZE), vec[at:]])
        if vec.size == full - S.ZS_SIZE - S.HX_SIZE:
            # saved before the after sample's sums of x^3, x^4 (5 December 2026): they come in
            # as zeros, flag off, until the window next restarts (split_glr)
            vec = np.concatenate([vec[:S.HX0], np.zeros(S.HX_SIZE), vec[S.HX0:]])
        if vec.size == full - S.ZS_SIZE:
            # saved before the controls' sums (5 December 2026; this class has no controls):
            # zeros
            vec = np.concatenate([vec, np.zeros(S.ZS_SIZE)])
        if vec.size == full:
            vec = np.concatenate([vec[:S.PX0], np.zeros(S.PX_SIZE), vec[S.PX0:]])
        det._state[:] = vec
        return det
