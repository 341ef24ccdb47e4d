"""In-control count paths for the no-truth check of the split detector under the Poisson model.

``elmon tune LOG --arl0 A`` with ``[estimator] model = "poisson"``: the steps of
:mod:`monitor.tuning.alert_check` (fit, resample, count, reference, verdict) with the
resampling of counts instead of an autoregressive sieve of log-log innovations, which a count
series with zeros does not have.

Fit. Per series (at least ``MIN_ROWS`` rows past the estimator's warm-up) the constant
coefficients ``theta`` of a Poisson regression of ``q`` on the series' design rows
``[1, log p, controls]`` with offset ``log(exposure)`` (iteratively reweighted least squares,
the Poisson pseudo-maximum-likelihood fit: Santos Silva & Tenreyro 2006), and the fitted means
``mu_t = exp(x_t' theta + offset_t)``. Over-dispersion: the negative binomial (NB2) variance
``Var q = mu + alpha mu^2``, ``alpha`` from the auxiliary regression of Cameron & Trivedi (1990;
Cameron & Trivedi 2013, Regression Analysis of Count Data, 2nd ed., sec. 3.4)
``((q - mu)^2 - q) / mu = alpha mu + e`` by least squares without intercept, i.e.
``alpha = sum((q - mu)^2 - q) / sum(mu^2)``, with its t statistic. ``alpha`` is used where it is
positive and at least 3 standard errors from 0 (the rule :mod:`monitor.tuning.alert_check`
uses for the price-linked variance), else 0 (Poisson). Beside it the Pearson dispersion
``phi = sum((q - mu)^2 / mu) / (n - k)`` (1 for Poisson counts) is reported.

Resample (parametric bootstrap). A path keeps the series' own prices, controls and exposures,
in their own order, and draws ``q*_t ~ Poisson(mu_t)`` where ``alpha = 0``, else the gamma
mixture ``q*_t ~ Poisson(mu_t G_t)``, ``G_t ~ Gamma(1 / alpha, alpha)`` (mean 1, variance
``alpha``), which is NB2 with mean ``mu_t``. No change happens inside a path.

Reference. The same paths drawn from ``Poisson(mu_t)``: the model the estimator assumes,
on the data's own prices. When the data's paths are over the design and the reference is not,
the counts' over-dispersion breaks it; when both are, the price pattern does.

What it finds. The split detector weighs each row by its Poisson working weight and scales by
the Pearson dispersion (:mod:`monitor.detectors.split_glr`, "Working weights"): on Poisson
counts its design holds (measured at means 2 and 10: 0.9-1.3x the design per chart at ARL0
2,000 and 20,000; conservative at a mean of 0.5), but a constant dispersion does not carry the
heavy tails of over-dispersed counts, and on negative binomial counts the level chart runs
over its design (means 2 and 10, ARL0 2,000: NB2 alpha 1 2.4-3.9x, alpha 3 4.5-7.1x; more at
20,000; the slope chart stays within it at 2,000 and runs at 4-6x at 20,000). So the check flags
over-dispersion where the design breaks, and names it as the cause (the Poisson reference on
the same means holds).

Not carried: autocorrelation of the counts beyond their mean (the paths are independent
given ``mu_t``). The lag-1 autocorrelation of each series' Pearson residuals is reported, and
the message names the series where it is beyond ``3 / sqrt(n)``.
"""

from __future__ import annotations

import math

import numpy as np

from monitor.estimators import kernel as K

#: rows past warm-up a series needs to be resampled (as monitor.tuning.alert_check.MIN_ROWS)
MIN_ROWS = 60
#: standard errors from 0 at which over-dispersion (alpha) and autocorrelation are used / named
Z_LEVEL = 3.0


def poisson_fit(X: np.ndarray, q: np.ndarray, offset: np.ndarray | None = None,
                iters: int = 50, tol: float = 1e-12) -> np.ndarray:
    """Poisson regression ``log E[q] = X theta + offset`` by iteratively reweighted least
    squares (Newton's method on the Poisson log-likelihood; McCullagh & Nelder 1989, sec. 2.5).

    Starts from least squares of ``log(q + 0.5) - offset``; stops when no coefficient moves by
    more than ``tol`` (relative) or after ``iters`` steps. Returns ``theta`` (NaN when the
    weighted normal equations are singular).
    """
    off = np.zeros(q.size) if offset is None else offset
    theta = np.linalg.lstsq(X, np.log(q + 0.5) - off, rcond=None)[0]
    for _ in range(iters):
        eta = X @ theta + off
        mu = np.exp(np.minimum(eta, 700.0))
        z = eta - off + (q - mu) / mu
        Xw = X * mu[:, None]
        try:
            new = np.linalg.solve(X.T @ Xw, Xw.T @ z)
        except np.linalg.LinAlgError:
            return np.full(X.shape[1], math.nan)
        done = np.all(np.abs(new - theta) <= tol * (1.0 + np.abs(theta)))
        theta = new
        if done:
            break
    return theta


def dispersion(q: np.ndarray, mu: np.ndarray, k: int) -> dict:
    """Over-dispersion of counts ``q`` about fitted means ``mu`` (module docstring):
    ``alpha`` (NB2, Cameron & Trivedi 1990 auxiliary regression), its t statistic, the
    Pearson dispersion ``phi`` and the lag-1 autocorrelation of the Pearson residuals."""
    n = q.size
    a = ((q - mu) ** 2 - q) / mu
    smm = float(mu @ mu)
    alpha = float((a * mu).sum() / smm)
    resid = a - alpha * mu
    se = math.sqrt(float(resid @ resid) / max(n - 1, 1) / smm)
    pr = (q - mu) / np.sqrt(mu)
    phi = float(pr @ pr) / max(n - k, 1)
    c = pr - pr.mean()
    ac1 = float(c[1:] @ c[:-1] / (c @ c)) if c @ c > 0 else 0.0
    return {"alpha": alpha, "alpha_t": alpha / se if se > 0 else math.inf, "phi": phi,
            "resid_ac1": ac1, "autocorrelated": abs(ac1) >= Z_LEVEL / math.sqrt(n)}


def count_models(rows, pipe, min_rows: int = MIN_ROWS) -> list[dict]:
    """Per usable series: ``name``, ``X``, ``offset`` (log exposure, zeros without one),
    ``theta``, the fitted means ``mu`` over all its rows, the NB2 ``alpha`` used (0: Poisson)
    and its :func:`dispersion` figures (``health``)."""
    n_series = len(rows.names)
    off_all = getattr(rows, "offset", None)
    res = pipe.run(rows.sid, rows.X, rows.y, n_series=n_series, ts=rows.ts, offset=off_all)
    usable = res.out[:, K.O_STATUS] != K.ST_WARMING_UP
    out = []
    for s, a, b, m in rows.usable_spans(usable, min_rows):
        X, q = rows.X[a:b], rows.y[a:b]
        off = np.zeros(b - a) if off_all is None else off_all[a:b]
        if not q[m].any():               # no count at all: nothing to fit
            continue
        theta = poisson_fit(X[m], q[m], off[m])
        if not np.all(np.isfinite(theta)):
            continue
        mu = np.exp(np.minimum(X @ theta + off, 700.0))
        h = dispersion(q[m], mu[m], X.shape[1])
        alpha = h["alpha"] if h["alpha"] > 0 and h["alpha_t"] >= Z_LEVEL else 0.0
        out.append({"name": rows.names[s], "X": X, "offset": off, "theta": theta, "mu": mu,
                    "alpha": alpha, "health": h})
    return out


def count_path(mu: np.ndarray, alpha: float, rng) -> np.ndarray:
    """In-control counts with means ``mu``: Poisson (``alpha`` 0) or NB2 with ``Var = mu +
    alpha mu^2`` as a gamma mixture of Poissons (Cameron & Trivedi 2013, sec. 4.2)."""
    if alpha > 0:
        mu = mu * rng.gamma(1.0 / alpha, alpha, mu.size)
    return rng.poisson(mu).astype(np.float64)


def count_health(models: list[dict]) -> dict:
    """Summary of the series' :func:`dispersion` figures for the report and the message."""
    hs = [m["health"] for m in models]
    return {"series": len(models),
            "overdispersed": sum(m["alpha"] > 0 for m in models),
            "median_nb_alpha": float(np.median([m["alpha"] for m in models])),
            "median_pearson_dispersion": float(np.median([h["phi"] for h in hs])),
            "autocorrelated": sum(h["autocorrelated"] for h in hs),
            "median_resid_ac1": float(np.median([h["resid_ac1"] for h in hs]))}


def count_errors_text(health: dict) -> str:
    """What the message says about the counts (in place of the log-log residual health)."""
    text = (f"({health['overdispersed']} of {health['series']} series over-dispersed, median "
            f"Pearson dispersion {health['median_pearson_dispersion']:.2f} against 1 for "
            f"Poisson counts, median NB2 alpha {health['median_nb_alpha']:.3g}")
    if health["autocorrelated"]:
        text += (f"; {health['autocorrelated']} with autocorrelated counts, which these paths "
                 "do not carry, so the check may understate the rate")
    return text + ")"
