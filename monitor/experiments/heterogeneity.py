"""How much the elasticity differs between the experiment's series, with its own interval.

The per-series estimates ``b_s`` with variances ``v_s = se_s^2`` are treated as a random-effects
meta-analysis: ``b_s ~ N(b, v_s + tau^2)``. ``tau`` (elasticity units) is the spread of the true
per-series elasticities around the pooled one.

- Point estimate: DerSimonian & Laird (1986),
  ``tau^2 = max(0, (Q - (k - 1)) / (sum w - sum w^2 / sum w))`` with ``w = 1 / v`` and Cochran's
  ``Q = sum w (b_s - b_w)^2``.
- Interval: the Q-profile method (Viechtbauer 2007): the generalised statistic
  ``Q(tau^2) = sum (b_s - b(tau^2))^2 / (v_s + tau^2)`` is chi-square with k - 1 degrees of
  freedom at the true tau^2 and decreases in tau^2; the bounds solve
  ``Q(tau^2) = chi2_{k-1}(1 - alpha/2)`` and ``chi2_{k-1}(alpha/2)`` (0 where Q(0) is already
  below the quantile).
- ``I^2 = max(0, (Q - (k - 1)) / Q)``: the share of the spread not explained by sampling error
  (Higgins & Thompson 2002).

The interval is a fixed-sample one (valid at a single look), unlike the confidence sequences
of the pooled and per-series b.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize, stats


def _q_gen(tau2: float, b: np.ndarray, v: np.ndarray) -> float:
    w = 1.0 / (v + tau2)
    mean = np.sum(w * b) / np.sum(w)
    return float(np.sum(w * (b - mean) ** 2))


def heterogeneity(b: np.ndarray, se: np.ndarray, level: float = 0.95) -> dict:
    """Spread of per-series elasticities: ``tau, tau_lo, tau_hi, i2, q, k, p_value``.

    Series with a missing estimate or standard error are left out (``k`` counts the rest);
    with fewer than 2 series every number is None and ``note`` says why.

    >>> out = heterogeneity(np.array([-1.2, -1.9, -1.5, -2.4]), np.array([0.1, 0.1, 0.1, 0.1]))
    >>> round(out["tau"], 3), out["k"], out["tau_lo"] > 0
    (0.51, 4, True)
    """
    b = np.asarray(b, np.float64)
    se = np.asarray(se, np.float64)
    keep = np.isfinite(b) & np.isfinite(se) & (se > 0)
    b, v = b[keep], se[keep] ** 2
    k = int(b.size)
    empty = {"tau": None, "tau_lo": None, "tau_hi": None, "i2": None, "q": None, "k": k,
             "p_value": None}
    if k < 2:
        return {**empty, "note": "fewer than 2 series with an estimate: no spread to measure"}
    w = 1.0 / v
    q = _q_gen(0.0, b, v)
    denom = w.sum() - (w ** 2).sum() / w.sum()
    tau2 = max(0.0, (q - (k - 1)) / denom)
    alpha = 1.0 - level
    hi_q = stats.chi2.ppf(1 - alpha / 2, k - 1)
    lo_q = stats.chi2.ppf(alpha / 2, k - 1)

    def bound(target: float) -> float:
        if q <= target:
            return 0.0
        top = max(1.0, tau2 * 4 + float(np.var(b)) * 4 + float(v.max()))
        while _q_gen(top, b, v) > target:
            top *= 4.0
        return float(optimize.brentq(lambda t2: _q_gen(t2, b, v) - target, 0.0, top,
                                     xtol=1e-14, rtol=1e-12))

    return {"tau": math.sqrt(tau2), "tau_lo": math.sqrt(bound(hi_q)),
            "tau_hi": math.sqrt(bound(lo_q)), "i2": max(0.0, (q - (k - 1)) / q) if q > 0 else 0.0,
            "q": q, "k": k, "p_value": float(stats.chi2.sf(q, k - 1)), "note": ""}
