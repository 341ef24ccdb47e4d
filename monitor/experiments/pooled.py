"""The experiment's estimate: b pooled over its series with series-specific intercepts.

Model (forgetting 1 from the experiment's start, every observation weighted equally)::

    log q_i = a_s(i) + b log p_i + c' z_i + e_i,     e_i ~ N(0, sigma^2)

with one intercept ``a_s`` per series, common control coefficients ``c`` and one elasticity b
(log quantity per log price, dimensionless). The fit is the within (fixed-effects) estimator:
by Frisch-Waugh-Lovell it equals OLS with a dummy per series. It needs, per series, only the
count and the centred cross-products of ``w = (log p, z, log q)``; they are updated one
observation at a time by Welford's rule::

    C_s <- C_s + (n - 1) / n * (w - m_s)(w - m_s)',   m_s <- m_s + (w - m_s) / n

so the estimate after *every* observation comes from one cumulative sum over the rows
(:func:`pooled_path`), never from refits. With ``C = sum_s C_s`` split into the regressor block
``R = (log p, z)`` and ``y = log q``::

    theta = C_RR^-1 C_Ry,   RSS = C_yy - C_yR theta,   df = n - S - (1 + k)
    sigma^2 = RSS / df,     I_b = 1 / (C_RR^-1)_bb,    se(b) = sigma / sqrt(I_b)

``I_b`` is the information on b left after the intercepts and controls are partialled out
(sum of squared residual log price, log-price units squared). Per-series fits
(:func:`series_fits`) use the same formulas on one ``C_s`` with its own intercept and controls.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class PooledPath:
    """The pooled fit after each observation (arrays of length n, in row order).

    ``n`` observations so far, ``n_series`` series seen, ``b`` the pooled elasticity,
    ``sigma`` the residual sd (log units), ``info`` the partial information ``I_b``,
    ``df`` the residual degrees of freedom. Entries are NaN until the fit is identified
    (``df >= 1`` and the regressor block non-singular). ``innovation`` is each row's one-step
    prediction error ``log q - a_s - b log p - c'z`` (log units) with the fit of the rows
    before it (NaN on a series' first row or before the fit is identified).
    """

    n: np.ndarray
    n_series: np.ndarray
    b: np.ndarray
    sigma: np.ndarray
    info: np.ndarray
    df: np.ndarray
    controls: np.ndarray | None = None
    innovation: np.ndarray | None = None

    @property
    def se(self) -> np.ndarray:
        """Standard error of b: ``sigma / sqrt(I_b)``."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return self.sigma / np.sqrt(self.info)


def _group_ranks(codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per row: 1-based count of its series so far, and the order that sorts rows by series
    (stable, so time order is kept inside each series)."""
    order = np.argsort(codes, kind="stable")
    sc = codes[order]
    start = np.r_[0, np.flatnonzero(sc[1:] != sc[:-1]) + 1]
    lengths = np.diff(np.r_[start, len(sc)])
    rank_sorted = np.arange(len(sc)) - np.repeat(start, lengths) + 1
    rank = np.empty_like(rank_sorted)
    rank[order] = rank_sorted
    return rank, order


def welford_increments(codes: np.ndarray, w: np.ndarray
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-row increments ``(n-1)/n (w - m_old)(w - m_old)'`` of the centred cross-products.

    Parameters
    ----------
    codes : (n,) int array
        Series code of each row (rows in time order).
    w : (n, d) float64 array
        ``(log p, z..., log q)`` per row.

    Returns
    -------
    (inc, rank, dev) : ((n, d, d) float64, (n,) int, (n, d) float64)
        The increments, each row's 1-based position within its series, and ``w - m_old``
        (NaN on a series' first row, which has no earlier mean).
    """
    rank, order = _group_ranks(codes)
    ws = w[order]
    cs = np.cumsum(ws, axis=0)
    # sum of the series' earlier rows = cumsum up to the row before, minus the group's offset
    starts = np.flatnonzero(np.r_[True, codes[order][1:] != codes[order][:-1]])
    before = np.vstack([np.zeros((1, w.shape[1])), cs[:-1]])
    group_of = np.cumsum(np.r_[True, codes[order][1:] != codes[order][:-1]]) - 1
    offs = before[starts][group_of]
    prev_sum = before - offs
    rs = rank[order].astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        m_old = np.where(rs[:, None] > 1, prev_sum / np.maximum(rs - 1, 1)[:, None], ws)
    dev = ws - m_old
    inc_s = ((rs - 1) / rs)[:, None, None] * dev[:, :, None] * dev[:, None, :]
    inc = np.empty_like(inc_s)
    inc[order] = inc_s
    dev_out = np.empty_like(dev)
    dev_out[order] = np.where(rs[:, None] > 1, dev, np.nan)
    return inc, rank, dev_out


def _solve_path(C: np.ndarray, n: np.ndarray, n_series: np.ndarray) -> tuple:
    """theta, sigma, info, df from stacked cross-product matrices C (m, d, d)."""
    m, d, _ = C.shape
    p = d - 1
    df = n - n_series - p
    b = np.full(m, np.nan)
    sigma = np.full(m, np.nan)
    info = np.full(m, np.nan)
    theta = np.full((m, p), np.nan)
    RR, Ry, yy = C[:, :p, :p], C[:, :p, p], C[:, p, p]
    if p == 1:
        ok = (df >= 1) & (RR[:, 0, 0] > 1e-12 * np.maximum(yy, 1e-300))
        theta[ok, 0] = Ry[ok, 0] / RR[ok, 0, 0]
        info[ok] = RR[ok, 0, 0]
    else:
        diag = np.einsum("mii->mi", RR)
        sign, logdet = np.linalg.slogdet(RR)
        with np.errstate(divide="ignore", invalid="ignore"):
            rel = logdet - np.log(np.where(diag > 0, diag, np.nan)).sum(axis=1)
        ok = (df >= 1) & (sign > 0) & np.isfinite(rel) & (rel > np.log(1e-10))
        if ok.any():
            inv = np.linalg.inv(RR[ok])
            theta[ok] = np.einsum("mij,mj->mi", inv, Ry[ok])
            info[ok] = 1.0 / inv[:, 0, 0]
    b[ok] = theta[ok, 0]
    rss = yy - np.einsum("mi,mi->m", Ry, np.nan_to_num(theta))
    with np.errstate(invalid="ignore", divide="ignore"):
        sigma[ok] = np.sqrt(np.maximum(rss[ok], 0.0) / df[ok])
    return b, sigma, info, df.astype(np.float64), theta


def design_matrix(log_p: np.ndarray, z: np.ndarray | None, log_q: np.ndarray) -> np.ndarray:
    """Stack ``(log p, z..., log q)`` as an (n, 1 + k + 1) float64 array."""
    cols = [np.asarray(log_p, np.float64)[:, None]]
    if z is not None and np.size(z):
        cols.append(np.asarray(z, np.float64).reshape(len(log_p), -1))
    cols.append(np.asarray(log_q, np.float64)[:, None])
    return np.hstack(cols)


def pooled_path(codes: np.ndarray, w: np.ndarray) -> PooledPath:
    """The pooled within-series fit after every row (rows in time order).

    >>> rng = np.random.default_rng(0)
    >>> codes = np.repeat([0, 1], 50)
    >>> x = rng.normal(0, 0.1, 100)
    >>> y = np.where(codes == 0, 3.0, 5.0) - 1.5 * x + rng.normal(0, 0.05, 100)
    >>> path = pooled_path(codes, design_matrix(x, None, y))
    >>> round(float(path.b[-1]), 2), int(path.df[-1])
    (-1.47, 97)
    """
    codes = np.asarray(codes)
    inc, rank, dev = welford_increments(codes, np.asarray(w, np.float64))
    C = np.cumsum(inc, axis=0)
    n = np.arange(1, len(codes) + 1)
    n_series = np.cumsum(rank == 1)
    b, sigma, info, df, theta = _solve_path(C, n, n_series)
    # a_s = m_y - theta' m_R with the series' earlier means, so the error is dev_y - theta' dev_R
    prev = np.vstack([np.full((1, theta.shape[1]), np.nan), theta[:-1]])
    innovation = dev[:, -1] - np.einsum("ij,ij->i", prev, dev[:, :-1])
    return PooledPath(n=n, n_series=n_series, b=b, sigma=sigma, info=info, df=df,
                      controls=theta[:, 1:] if theta.shape[1] > 1 else None,
                      innovation=innovation)


def series_cross_products(codes: np.ndarray, w: np.ndarray, n_codes: int) -> tuple:
    """Per-series centred cross-products ``C_s`` (S, d, d) and counts (S,), two-pass."""
    d = w.shape[1]
    counts = np.bincount(codes, minlength=n_codes).astype(np.float64)
    sums = np.zeros((n_codes, d))
    np.add.at(sums, codes, w)
    with np.errstate(invalid="ignore", divide="ignore"):
        means = sums / counts[:, None]
    dev = w - means[codes]
    C = np.zeros((n_codes, d, d))
    np.add.at(C, codes, dev[:, :, None] * dev[:, None, :])
    return C, counts


def series_fits(codes: np.ndarray, w: np.ndarray, n_codes: int) -> dict[str, np.ndarray]:
    """Each series' own fit (own intercept, own control coefficients).

    Returns arrays of length ``n_codes``: ``n, b, sigma, info, df`` (NaN where a series has
    too few observations or no price variation to identify its b).
    """
    C, counts = series_cross_products(np.asarray(codes), np.asarray(w, np.float64), n_codes)
    b, sigma, info, df, _ = _solve_path(C, counts, np.ones(n_codes))
    return {"n": counts, "b": b, "sigma": sigma, "info": info, "df": df}
