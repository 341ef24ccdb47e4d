"""Anytime-valid confidence sequences for a regression coefficient, beside the fixed band.

A fixed-sample band ``b_hat +- t_{1-alpha/2, df} se`` covers b with probability 1 - alpha at
*one* planned look; an analyst who looks after every observation and stops at the first
exclusion errs far more often (Armitage, McPherson & Rowe 1969). A confidence sequence covers b
at *every* look at once: ``P(b in CS_n for all n) >= 1 - alpha`` (Howard, Ramdas, McAuliffe &
Sekhon 2021).

Construction (Lindon, Ham, Tingley & Bojinov 2022, the t-statistic form for one coefficient of
a Gaussian linear model with unknown variance): for a candidate value b0, with
``t = (b_hat - b0) / se``, residual degrees of freedom ``nu`` and the mixture
``(b - b0) / sigma ~ N(0, 1 / phi)``, the Bayes factor of the maximal invariant

    G_n(b0) = sqrt(r) * ((1 + t^2 / nu) / (1 + r t^2 / nu)) ** ((nu + 1) / 2),
    r = phi / (phi + I_n)

is a nonnegative martingale under b = b0 (``I_n`` is the partial information on b, the sum of
squared residual log prices; with unit-variance regressors it is n, the form of the paper).
By Ville's inequality ``{b0 : G_n(b0) < 1 / alpha}`` is a confidence sequence. Solving for t::

    |b_hat - b0| < se * R,   R^2 = nu (1 - P) / (P - r),   P = (r alpha^2) ** (1 / (nu + 1))

(no bound, R = inf, while ``P <= r``). As nu -> inf this becomes the normal-mixture boundary
``R^2 = (1 + phi / I) log((phi + I) / (phi alpha^2))`` of Howard et al. (2021). R is smallest,
about 1.55 times 1.96 at alpha = 0.05, near ``I = 10 phi``, and stays under 2 x 1.96 for I
between about ``phi`` and ``10^4 phi``.

>>> round(float(cs_radius(np.array([22.0]), np.array([1998.0]), 0.05, 1.0)[0]), 3)
3.092
>>> round(float(fixed_radius(np.array([1998.0]), 0.95)[0]), 3)
1.961
"""

from __future__ import annotations

import numpy as np
from scipy import stats


def cs_radius(info: np.ndarray, df: np.ndarray, alpha: float, phi: float) -> np.ndarray:
    """Radius R of the confidence sequence in units of the standard error (inf: no bound yet).

    Parameters
    ----------
    info : array
        Partial information ``I_n`` on b (log-price units squared).
    df : array
        Residual degrees of freedom ``nu``.
    alpha : float
        1 - level.
    phi : float
        Precision of the normal mixture on ``(b - b0) / sigma``.
    """
    info, nu = np.broadcast_arrays(np.asarray(info, np.float64), np.asarray(df, np.float64))
    out = np.full(info.shape, np.inf)
    ok = (nu >= 1) & np.isfinite(info) & (info > 0)
    r = phi / (phi + info[ok])
    P = np.exp((np.log(r) + 2.0 * np.log(alpha)) / (nu[ok] + 1.0))
    R = np.full(P.shape, np.inf)
    good = P > r
    R[good] = np.sqrt(nu[ok][good] * (1.0 - P[good]) / (P[good] - r[good]))
    out[ok] = R
    return out


def fixed_radius(df: np.ndarray, level: float) -> np.ndarray:
    """Student-t quantile ``t_{(1+level)/2, df}`` of the fixed-sample band (inf where df < 1)."""
    df = np.asarray(df, np.float64)
    out = np.full(df.shape, np.inf)
    ok = df >= 1
    out[ok] = stats.t.ppf(0.5 + level / 2.0, df[ok])
    return out


def log_bayes_factor(t2: np.ndarray, df: np.ndarray, info: np.ndarray, phi: float) -> np.ndarray:
    """``log G_n`` above, for checks and for the sequential p-value ``min(1, 1 / max G)``."""
    r = phi / (phi + np.asarray(info, np.float64))
    nu = np.asarray(df, np.float64)
    return 0.5 * np.log(r) + 0.5 * (nu + 1.0) * (np.log1p(t2 / nu) - np.log1p(r * t2 / nu))


def running_intersection(lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(max_{m<=n} lo_m, min_{m<=n} hi_m)``: the intersection of a confidence sequence with its
    past is again a confidence sequence (Howard et al. 2021). NaN entries are skipped."""
    lo = np.where(np.isfinite(lo), lo, -np.inf)
    hi = np.where(np.isfinite(hi), hi, np.inf)
    return np.maximum.accumulate(lo), np.minimum.accumulate(hi)


def halfwidth_for_plan(n: np.ndarray, sigma: np.ndarray, info_rate: np.ndarray,
                       n_params: np.ndarray, alpha: float, phi: float) -> np.ndarray:
    """Confidence-sequence half-width expected after ``n`` observations when each adds
    ``info_rate`` information and the noise sd is ``sigma``: ``sigma R(I, nu) / sqrt(I)`` with
    ``I = info_rate n`` and ``nu = n - n_params``."""
    n = np.asarray(n, np.float64)
    info = np.asarray(info_rate, np.float64) * n
    R = cs_radius(info, n - n_params, alpha, phi)
    with np.errstate(invalid="ignore", divide="ignore"):
        return sigma * R / np.sqrt(info)
