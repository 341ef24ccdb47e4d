"""Partial pooling: each series' elasticity shrunk toward its group's mean (empirical Bayes).

Model (a normal-normal random-effects model, one per group g)::

    b_i_hat | b_i ~ N(b_i, v_i),   v_i = se_i^2      (series i's own estimate and standard error)
    b_i          ~ N(mu_g, tau2_g)                   (the series' true b around the group mean)

Between-series variance, DerSimonian & Laird (1986) moment estimator, with the fixed weights
``w_i = 1 / v_i``::

    mu_fe = sum w_i b_i / sum w_i
    Q     = sum w_i (b_i - mu_fe)^2
    tau2  = max(0, (Q - (k - 1)) / (sum w_i - sum w_i^2 / sum w_i))

Group mean with weights ``w*_i = 1 / (v_i + tau2)``: ``mu = sum w*_i b_i / sum w*_i``. Its
standard error is the Hartung & Knapp (2001) / Sidik & Jonkman (2002) form
``se_mu^2 = sum w*_i (b_i - mu)^2 / ((k - 1) sum w*_i)``, floored at the plain
``1 / sum w*_i`` (the "modified" rule of Roever, Knapp & Friede 2015, so the band is never
narrower than the one that treats tau2 as known), and the band uses Student-t with ``k - 1``
degrees of freedom. The plain Wald band (``method="wald"``) is available; with 50 series a
group and standard errors that are themselves estimated from 30-60 observations it covers less
than its level, which is why it is not the default (tests/test_groups_pooling.py).

Shrinkage (Efron & Morris 1975), per series::

    B_i         = tau2 / (tau2 + v_i)                 (weight on the series' own estimate)
    b_pooled_i  = mu + B_i (b_i - mu)
    se_pooled_i = sqrt(B_i v_i + (1 - B_i)^2 se_mu^2)

The second term of ``se_pooled`` carries the uncertainty of the group mean (Morris 1983); the
uncertainty of tau2 itself is not carried, so the pooled band is a little narrow for a small
group. All quantities are elasticities (dimensionless: d log q / d log p) and their variances.

Series that differ from their group: the test of ``b_i = mu`` against the group mean without
series i (so a series cannot pull the mean toward itself)::

    z_i = (b_i - mu_(-i)) / sqrt(v_i + 1 / (sum w* - w*_i)),   mu_(-i) = sum_(j != i) w*_j b_j / sum_(j != i) w*_j

with a two-sided normal p-value, and the Benjamini & Hochberg (1995) step-up rule at
false-discovery rate ``fdr`` over every pooled series at once. The spread tau2 is deliberately
not in the denominator: a few far-off series inflate tau2 and would hide themselves (masking),
and "confidently different from the group's mean" is what an analyst asks. With tau2 > 0 every
series differs a little; a flag says the difference is clear at this series' precision, not
that it is large, and nothing about why (a different market, a data problem, a price test that
ran differently).

Only series with a finite b and a standard error > 0 enter (``warming_up`` estimates have none);
a group needs :data:`MIN_SERIES` of them, else its series get no pooled estimate.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

#: Fewest series with a standard error for a group to be pooled (tau2 needs k - 1 >= 2).
MIN_SERIES = 3
METHODS = ("hksj", "wald")


def dl_tau2(b: np.ndarray, v: np.ndarray) -> tuple[float, float, float]:
    """DerSimonian-Laird between-series variance.

    Parameters
    ----------
    b, v : array of float
        Estimates (elasticities) and their variances (se^2), all finite, ``v > 0``.

    Returns
    -------
    (tau2, Q, mu_fe) : tuple of float
        Between-series variance (>= 0), Cochran's Q and the fixed-weight mean.
    """
    b = np.asarray(b, dtype=np.float64)
    w = 1.0 / np.asarray(v, dtype=np.float64)
    sw = w.sum()
    mu_fe = float((w * b).sum() / sw)
    q = float((w * (b - mu_fe) ** 2).sum())
    denom = sw - (w * w).sum() / sw
    k = len(b)
    tau2 = max(0.0, (q - (k - 1)) / denom) if denom > 0 else 0.0
    return float(tau2), q, mu_fe


@dataclass(frozen=True)
class PooledGroup:
    """Pooling of one group. Arrays are in the order of the inputs.

    Attributes
    ----------
    k : int
        Series pooled.
    tau2 : float
        Between-series variance of b (DerSimonian & Laird).
    q : float
        Cochran's Q.
    mean, mean_se, mean_lo, mean_hi : float
        Group mean of b, its standard error and band at ``level``.
    pooled, pooled_se : ndarray
        Shrunk b per series and its standard error.
    shrink : ndarray
        ``B_i``: weight of the series' own estimate (0 = all group, 1 = all own).
    z, p : ndarray
        Standardized difference from the group mean without the series, two-sided p-value.
    """

    k: int
    tau2: float
    q: float
    mean: float
    mean_se: float
    mean_lo: float
    mean_hi: float
    pooled: np.ndarray
    pooled_se: np.ndarray
    shrink: np.ndarray
    z: np.ndarray
    p: np.ndarray


def pool_group(b, se, level: float = 0.95, method: str = "hksj") -> PooledGroup:
    """Pool one group of series (formulas in the module docstring).

    >>> g = pool_group([-1.2, -1.5, -1.9, -1.4], [0.3, 0.2, 0.4, 0.25])
    >>> round(g.mean, 3), g.k
    (-1.458, 4)
    >>> bool(g.pooled_se.max() <= 0.4)
    True
    """
    if method not in METHODS:
        raise ValueError(f"method {method!r}: must be one of {METHODS}")
    if not 0.0 < level < 1.0:
        raise ValueError(f"level {level!r}: must be in (0, 1)")
    b = np.asarray(b, dtype=np.float64)
    se = np.asarray(se, dtype=np.float64)
    k = len(b)
    from scipy import stats      # here, not at import: elmon ingest's start (issue 15)

    if k < MIN_SERIES:
        raise ValueError(f"pool_group: {k} series, at least {MIN_SERIES} are needed")
    if not (np.isfinite(b).all() and np.isfinite(se).all() and (se > 0).all()):
        raise ValueError("pool_group: every b must be finite and every se finite and > 0")
    v = se * se
    tau2, q, _ = dl_tau2(b, v)
    ws = 1.0 / (v + tau2)
    sws = ws.sum()
    mean = float((ws * b).sum() / sws)
    var_plain = 1.0 / sws
    if method == "hksj":
        var_hk = float((ws * (b - mean) ** 2).sum() / ((k - 1) * sws))
        var_mean = max(var_hk, var_plain)
        crit = float(stats.t.ppf(0.5 + level / 2.0, k - 1))
    else:
        var_mean = var_plain
        crit = float(stats.norm.ppf(0.5 + level / 2.0))
    mean_se = float(np.sqrt(var_mean))
    shrink = tau2 / (tau2 + v)
    pooled = mean + shrink * (b - mean)
    pooled_se = np.sqrt(shrink * v + (1.0 - shrink) ** 2 * var_mean)
    # b_i against the group mean without series i (weights w* with the group's tau2)
    rest = sws - ws
    mean_rest = ((ws * b).sum() - ws * b) / rest
    z = (b - mean_rest) / np.sqrt(v + 1.0 / rest)
    p = 2.0 * stats.norm.sf(np.abs(z))
    return PooledGroup(k=k, tau2=tau2, q=q, mean=mean, mean_se=mean_se,
                       mean_lo=mean - crit * mean_se, mean_hi=mean + crit * mean_se,
                       pooled=pooled, pooled_se=pooled_se, shrink=shrink, z=z, p=p)


def bh_reject(p, fdr: float = 0.05) -> np.ndarray:
    """Benjamini & Hochberg (1995) step-up rule: which hypotheses are rejected at ``fdr``.

    Reject the ``r`` smallest p-values, ``r = max{i : p_(i) <= i fdr / m}``. NaN p-values are
    never rejected and do not count in ``m``.

    >>> bh_reject([0.001, 0.02, 0.03, 0.5], 0.05).tolist()
    [True, True, True, False]
    """
    if not 0.0 < fdr < 1.0:
        raise ValueError(f"fdr {fdr!r}: must be in (0, 1)")
    p = np.asarray(p, dtype=np.float64)
    out = np.zeros(len(p), dtype=bool)
    ok = np.flatnonzero(np.isfinite(p))
    m = len(ok)
    if m == 0:
        return out
    order = ok[np.argsort(p[ok], kind="stable")]
    below = p[order] <= fdr * np.arange(1, m + 1) / m
    if below.any():
        r = int(np.flatnonzero(below)[-1]) + 1
        out[order[:r]] = True
    return out


#: Per-series columns of :func:`pool_snapshot`.
SERIES_COLUMNS = ["series", "group", "beta", "beta_se", "beta_pooled", "beta_pooled_se",
                  "shrink", "z", "p", "differs"]
#: Per-group columns of :func:`pool_snapshot`.
GROUP_COLUMNS = ["group", "n_series", "n_pooled", "mean", "mean_se", "mean_lo", "mean_hi",
                 "tau2", "tau", "q", "n_differ"]


def pool_snapshot(current: pd.DataFrame, level: float = 0.95, fdr: float = 0.05,
                  method: str = "hksj") -> tuple[pd.DataFrame, pd.DataFrame]:
    """Pool the current estimates of many series in their groups.

    Parameters
    ----------
    current : pandas.DataFrame
        One row per series: ``series``, ``group`` (``None`` = no group), ``beta``, ``beta_se``
        (NaN where the series has no standard error yet).
    level : float
        Level of the group mean's band.
    fdr : float
        False-discovery rate of the "differs from its group" flags, over all pooled series.

    Returns
    -------
    (per_series, per_group) : tuple of DataFrame
        Columns :data:`SERIES_COLUMNS` and :data:`GROUP_COLUMNS`. A series outside a group, without
        a standard error, or in a group of fewer than :data:`MIN_SERIES` usable series has NaN
        pooled fields and ``differs = False``.
    """
    n = len(current)
    b = current["beta"].to_numpy(dtype=np.float64, na_value=np.nan)
    se = current["beta_se"].to_numpy(dtype=np.float64, na_value=np.nan)
    groups = current["group"].to_numpy(dtype=object)
    usable = np.isfinite(b) & np.isfinite(se) & (se > 0)
    pooled = np.full(n, np.nan)
    pooled_se = np.full(n, np.nan)
    shrink = np.full(n, np.nan)
    z = np.full(n, np.nan)
    p = np.full(n, np.nan)
    group_rows = []
    has_group = np.array([g is not None and g == g for g in groups], dtype=bool)
    labels = pd.unique(groups[has_group]) if has_group.any() else []
    for g in labels:
        members = has_group & (groups == g)
        idx = np.flatnonzero(members & usable)
        row = {"group": g, "n_series": int(members.sum()), "n_pooled": int(len(idx))}
        if len(idx) >= MIN_SERIES:
            res = pool_group(b[idx], se[idx], level=level, method=method)
            pooled[idx], pooled_se[idx], shrink[idx] = res.pooled, res.pooled_se, res.shrink
            z[idx], p[idx] = res.z, res.p
            row.update(mean=res.mean, mean_se=res.mean_se, mean_lo=res.mean_lo,
                       mean_hi=res.mean_hi, tau2=res.tau2, tau=float(np.sqrt(res.tau2)), q=res.q)
        else:
            row.update(mean=np.nan, mean_se=np.nan, mean_lo=np.nan, mean_hi=np.nan,
                       tau2=np.nan, tau=np.nan, q=np.nan)
        group_rows.append(row)
    differs = bh_reject(p, fdr)
    per_series = pd.DataFrame({"series": current["series"].to_numpy(dtype=object),
                               "group": groups, "beta": b, "beta_se": se,
                               "beta_pooled": pooled, "beta_pooled_se": pooled_se,
                               "shrink": shrink, "z": z, "p": p, "differs": differs})
    per_group = pd.DataFrame(group_rows, columns=GROUP_COLUMNS[:-1])
    if len(per_group):
        counts = per_series[per_series["differs"]].groupby("group").size()
        per_group["n_differ"] = per_group["group"].map(counts).fillna(0).astype(int)
    else:
        per_group["n_differ"] = pd.Series(dtype=int)
    return per_series, per_group[GROUP_COLUMNS]
