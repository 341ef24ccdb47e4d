"""Slope-change statistic: the standardized difference of a fast and a reference estimate of b.

Statistic
---------
Two exponentially weighted regressions of ``y* = log q - c' z`` (the controls' effects taken
from the pipeline's estimator) on ``x = log p`` with an intercept run beside the estimator: a
*fast* one with forgetting ``lam_f`` (default 0.95, an effective window of about 39) and a
*reference* one with ``lam_r`` (default 0.998, about 1,000). Each slope is a weighted
least-squares slope, ``b_a = Sxy_a / Sxx_a`` with the weighted centred sums
``Sxx_a = sum w_a (x - m_a)^2`` and ``Sxy_a = sum w_a (x - m_a)(y* - my_a)``, ``w_a = lam_a^(t-s)``
(updated exactly by West's 1979 recursions). Under no change

    Var(b_f - b_r) ~ sigma^2 (B_ff / Sxx_f^2 + B_rr / Sxx_r^2 - 2 B_fr / (Sxx_f Sxx_r))

with ``B_ab = sum w_a w_b (x - m_a)(x - m_b)`` and ``sigma`` the estimator's residual sd; the
statistic is

    d_t = (b_f - b_r) / sqrt(Var(b_f - b_r))

About N(0, 1) at each t while b is constant, but strongly autocorrelated (the fast window
overlaps itself for tens of observations): the thresholds of any chart on ``d_t`` are
therefore designed by simulating the in-control process (:mod:`monitor.detectors.design`),
never from the iid-normal ARL tables. After an alarm the pipeline *re-anchors* the reference on
the fast regression (:func:`reanchor`), so the new regime becomes the baseline and the
statistic returns to zero instead of staying high while a 1,000-observation window catches up.

Why a level shift does not move it
----------------------------------
Both slopes come from regressions *with an intercept*, on prices centred within each window.
A shift of the level ``a`` by ``Delta`` (demand up or down by the same factor at every price)
adds ``Delta * sum w (x - m) 1[s > tau] / Sxx`` to each slope: a weighted covariance between the
price and a step in time, zero in expectation when prices are not set in step with the shift,
and small against the noise for realistic shifts. Meanwhile the residual sd ``sigma`` grows
while the estimator's intercept catches up, which shrinks ``d``. A change in ``b`` instead moves
``b_f`` to the new value within the fast window while ``b_r`` lags, so ``d`` drifts by about
``Delta b / sd(b_f - b_r)``. The one-step innovations, by contrast, react to a level shift
first, which is why the level-shift rule watches those.

Why a long reference: the information about a slope change of ``Delta b`` per observation is
about ``(Delta b * sd(log p) / sigma)^2 / 2`` (Kullback-Leibler, normal errors), so detection
needs about ``log(ARL0)`` divided by that many observations (Lorden 1971): 124 for
``Delta b = 0.8``, price sd 0.1, noise sd 0.2 and ARL0 = 20,000. A reference of the
estimator's own window (about 200) has moved most of the way to the new b by then and the
signal fades before the chart fires; the 1,000-observation reference keeps it.

While the excitation guard pauses the estimator's forgetting (flat prices), both windows pause
too, so neither forgets its informative observations.

>>> import numpy as np
>>> from monitor.estimators import ElasticityRLS
>>> rng = np.random.default_rng(5)
>>> est, sig = ElasticityRLS(forgetting=0.99), FastSlowSlope()
>>> d = []
>>> for t in range(1500):
...     p = 10.0 * np.exp(rng.normal(0.0, 0.1))
...     b = -1.2 if t < 1200 else -2.0           # the elasticity steps at t = 1200
...     q = 60.0 * (p / 10.0) ** b * np.exp(rng.normal(0.0, 0.2))
...     d.append(sig.observe(est.learn_one({"price": p}, q), np.log(p), np.log(q)))
>>> bool(abs(np.nanmean(d[300:1200])) < 0.5), bool(np.mean(d[1240:1300]) < -2.0)
(True, True)
"""

from __future__ import annotations

import math

import numpy as np

from monitor.detectors.base import check_number, floats_from_json, floats_to_json
from monitor.detectors.cusum import CUSUM
from monitor.detectors.slope_kernel import (DEFAULT_FAST, DEFAULT_REFERENCE, G_BF, G_D, G_SIGMA,
                                            G_SXXS, G_SXYS, SLOPE_SIZE, adjusted_response,
                                            fast_interval, reanchor, slope_step)
from monitor.detectors.spec import DEFAULT_ARL0
from monitor.estimators import kernel as K
from monitor.estimators.tquantile import t_table


DEFAULT_SLOPE_K = 1.0


class FastSlowSlope:
    """Streaming form of the statistic ``d_t`` (see the module docstring).

    Parameters
    ----------
    fast_forgetting : float in (0, reference_forgetting)
        Forgetting of the fast regression (0.95: an effective window of about 39).
    reference_forgetting : float in (fast_forgetting, 1]
        Forgetting of the reference regression (0.998: about 1,000).
    level : float in (0, 1)
        Confidence level of the fast estimate's interval (reported in alert messages).
    """

    def __init__(self, fast_forgetting: float = DEFAULT_FAST,
                 reference_forgetting: float = DEFAULT_REFERENCE, level: float = 0.95):
        self.reference_forgetting = check_number("reference_forgetting", reference_forgetting,
                                                 0.0, 1.0, low_open=True)
        self.fast_forgetting = check_number("fast_forgetting", fast_forgetting, 0.0,
                                            self.reference_forgetting, low_open=True,
                                            high_open=True)
        self.level = check_number("level", level, 0.0, 1.0, low_open=True, high_open=True)
        self._tq = t_table(self.level)
        self._state = np.zeros(SLOPE_SIZE)

    def update(self, log_price: float, y_adjusted: float, resid_sd: float,
               paused: bool = False) -> float:
        """One observation; returns ``d`` (NaN while undefined)."""
        self._state[G_SIGMA] = resid_sd
        return float(slope_step(self._state, 0, float(log_price), float(y_adjusted),
                                float(resid_sd), 1.0 if paused else 0.0, self.fast_forgetting,
                                self.reference_forgetting))

    def observe(self, est, log_price: float, log_q: float, row=None) -> float:
        """Update from an :class:`~monitor.estimators.ElasticityRLS` right after its
        ``learn_one`` (``row``: the design row, needed only with controls)."""
        y = log_q if row is None else adjusted_response(est.state_vector, np.asarray(row, float),
                                                        float(log_q), est.row_width)
        sd = est.residual_sd
        return self.update(log_price, y, sd if math.isfinite(sd) else math.nan,
                           bool(est.state_vector[K.I_PAUSED]))

    def reanchor(self) -> "FastSlowSlope":
        """Re-anchor the reference on the fast regression (what the pipeline does at an alarm)."""
        reanchor(self._state, 0)
        return self

    @property
    def fast_estimate(self) -> tuple[float, float, float, float]:
        """``(b_f, se_f, lo_f, hi_f)`` of the fast regression (NaN while undefined)."""
        se, lo, hi = fast_interval(self._state, 0, self._state[G_SIGMA], self._tq)
        return float(self._state[G_BF]), float(se), float(lo), float(hi)

    @property
    def reference_estimate(self) -> float:
        """``b_r``, the reference slope (NaN while undefined)."""
        g = self._state
        return float(g[G_SXYS] / g[G_SXXS]) if g[G_SXXS] > 0 else math.nan

    @property
    def value(self) -> float:
        """The last ``d``."""
        return float(self._state[G_D])

    def to_state(self) -> dict:
        return {"params": {"fast_forgetting": self.fast_forgetting,
                           "reference_forgetting": self.reference_forgetting,
                           "level": self.level}, "state": floats_to_json(self._state)}

    @classmethod
    def from_state(cls, state) -> "FastSlowSlope":
        sig = cls(**state["params"])
        sig._state[:] = floats_from_json(state["state"])
        return sig


class SlopeChangeDetector(CUSUM):
    """Two-sided CUSUM on the slope statistic ``d_t``, with its default threshold designed by
    simulation of the in-control process for the given forgetting factors.

    Same parameters as :class:`~monitor.detectors.cusum.CUSUM` (default ``k = 1``) plus
    ``forgetting`` (the estimator's), ``fast_forgetting`` and ``reference_forgetting`` (those
    of :class:`FastSlowSlope`); feed it ``d_t``. The pipeline also re-anchors the statistic's
    reference at each alarm; this class only sees ``d_t``.
    """

    def __init__(self, k: float = DEFAULT_SLOPE_K, h: float | None = None,
                 arl0: float = DEFAULT_ARL0, burn_in: int = 0, forgetting: float = 0.99,
                 fast_forgetting: float = DEFAULT_FAST,
                 reference_forgetting: float = DEFAULT_REFERENCE):
        self.forgetting = check_number("forgetting", forgetting, 0.0, 1.0, low_open=True)
        self.reference_forgetting = check_number("reference_forgetting", reference_forgetting,
                                                 0.0, 1.0, low_open=True)
        self.fast_forgetting = check_number("fast_forgetting", fast_forgetting, 0.0,
                                            self.reference_forgetting, low_open=True,
                                            high_open=True)
        if h is None:
            from monitor.detectors.design import pipeline_threshold

            h = pipeline_threshold("slope", "cusum", check_number("arl0", arl0, 2.0, 1e9),
                                   forgetting=self.forgetting,
                                   fast_forgetting=self.fast_forgetting,
                                   reference_forgetting=self.reference_forgetting,
                                   k=check_number("k", k, 0.0, 20.0)).threshold
        super().__init__(k=k, h=h, arl0=arl0, burn_in=burn_in)

    def _params(self) -> dict:
        return {**super()._params(), "forgetting": self.forgetting,
                "fast_forgetting": self.fast_forgetting,
                "reference_forgetting": self.reference_forgetting}
