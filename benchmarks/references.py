"""The reference estimators, each driven on the same rows elmon gets, one model per series.

Inputs are converted to each library's native form (dicts for river, arrays for statsmodels,
lists for the plain loop) before the clock starts; only the learning is timed. Each function
returns the seconds taken and a result used by the equivalence checks.

river's BayesianLinearRegression with ``smoothing = s`` keeps (Bishop 2006, eq. 3.51, with an
exponential moving average; river's source, ``linear_model/bayesian_lin_reg.py``)::

    S_N   = s^N I / alpha + (1 - s) beta sum_k s^(N-k) x_k x_k'
    eta_N = (1 - s) beta sum_k s^(N-k) x_k y_k,        posterior mean m_N = S_N^-1 eta_N

Dividing both by (1 - s) beta gives exactly the exponentially weighted least-squares solution
that RLS with forgetting lam = s reaches from theta_0 = 0 and P_0 = alpha (1 - s) beta I, so with
``alpha = P_0 / ((1 - s) beta)`` its posterior mean of the log-price coefficient is the same
number as elmon's b at every step (:func:`blr_matched_alpha`). river allocates at least 8 feature
slots; the unused ones keep precision s^N / alpha, which underflows after about
ln(1e-308 alpha) / ln(s) updates (about 141,500 at s = 0.995, alpha = 1), after which
``inv(S)`` is no longer finite and every prediction is NaN.
"""

from __future__ import annotations

import math
import time

import numpy as np

from benchmarks.plain_rls import PlainRLS


def blr_matched_alpha(prior_var: float, s: float, beta: float = 1.0) -> float:
    """river's ``alpha`` whose posterior equals RLS from ``P_0 = prior_var * I`` (see above)."""
    return prior_var / ((1.0 - s) * beta)


def _river_rows(X: np.ndarray, const: bool) -> list[dict]:
    names = ["const", "log_price"] + [f"z{j}" for j in range(X.shape[1] - 2)]
    start = 0 if const else 1
    return [dict(zip(names[start:], row[start:])) for row in X.tolist()]


def river_blr(sid, X, y, smoothing: float, alpha: float = 1.0, path: bool = False):
    """Time river's BayesianLinearRegression(alpha, beta=1, smoothing) with a constant feature.

    Returns (seconds, paths) where ``paths`` (if asked) is the posterior mean of the log-price
    coefficient after each row.
    """
    from river import linear_model

    rows = _river_rows(X, const=True)
    yl = y.tolist()
    sl = sid.tolist()
    models = {s: linear_model.BayesianLinearRegression(alpha=alpha, beta=1.0, smoothing=smoothing)
              for s in set(sl)}
    out = np.empty(len(yl)) if path else None
    t0 = time.perf_counter()
    if path:
        probe_hi, probe_lo = {"log_price": 1.0}, {"log_price": 0.0}
        for j, (s, x, yy) in enumerate(zip(sl, rows, yl)):
            m = models[s]
            m.learn_one(x, yy)
            out[j] = m.predict_one(probe_hi) - m.predict_one(probe_lo)
    else:
        for s, x, yy in zip(sl, rows, yl):
            models[s].learn_one(x, yy)
    return time.perf_counter() - t0, out


def river_blr_first_nan(X, y, smoothing: float, max_updates: int, max_seconds: float):
    """Feed one series to river's BLR (alpha = beta = 1) until its prediction is not finite.

    Returns (updates until the first non-finite prediction or None, updates done, seconds,
    what happened).
    """
    from river import linear_model

    m = linear_model.BayesianLinearRegression(smoothing=smoothing)
    names = ("const", "log_price")
    t0 = time.perf_counter()
    deadline = t0 + max_seconds
    n = min(max_updates, X.shape[0])
    lp = X[:n, 1].tolist()
    yl = y[:n].tolist()
    for j in range(n):
        x = dict(zip(names, (1.0, lp[j])))
        try:
            m.learn_one(x, yl[j])
            v = m.predict_one(x)
        except np.linalg.LinAlgError as exc:
            return j + 1, j + 1, time.perf_counter() - t0, f"LinAlgError: {exc}"
        if not math.isfinite(v):
            return j + 1, j + 1, time.perf_counter() - t0, f"prediction {v}"
        if (j & 1023) == 0 and time.perf_counter() > deadline:
            return None, j + 1, time.perf_counter() - t0, "time limit"
    return None, n, time.perf_counter() - t0, "all finite"


def river_sgd(sid, X, y):
    """Time river's LinearRegression (SGD, its default optimizer and intercept); returns
    (seconds, {series: final log-price weight})."""
    from river import linear_model

    rows = _river_rows(X, const=False)
    yl = y.tolist()
    sl = sid.tolist()
    models = {s: linear_model.LinearRegression() for s in set(sl)}
    t0 = time.perf_counter()
    for s, x, yy in zip(sl, rows, yl):
        models[s].learn_one(x, yy)
    dt = time.perf_counter() - t0
    return dt, {s: m.weights.get("log_price", math.nan) for s, m in models.items()}


def recursive_ls(sid, X, y, prior_var=None):
    """Time statsmodels' RecursiveLS, filter only (lambda = 1, exact diffuse start), one model per
    series; returns (seconds, {series: path of coefficient vectors, shape (k, n_s)}).

    With ``prior_var`` each series' rows are preceded by k pseudo-observations
    ``x = e_i / sqrt(prior_var_i)``, ``y = 0``: after them the diffuse filter holds exactly the
    prior N(0, diag(prior_var)), so the path that follows is the one RLS from that prior takes
    (elmon's, with forgetting 1). The pseudo-rows are dropped from the returned path.
    """
    import statsmodels.api as sm

    k = X.shape[1]
    groups = {}
    for s in np.unique(sid):
        rows = np.flatnonzero(sid == s)
        ys, Xs = y[rows], X[rows]
        if prior_var is not None:
            Xs = np.vstack([np.diag(1.0 / np.sqrt(np.asarray(prior_var, dtype=float))), Xs])
            ys = np.concatenate([np.zeros(k), ys])
        groups[int(s)] = (np.ascontiguousarray(ys), np.ascontiguousarray(Xs))
    paths = {}
    t0 = time.perf_counter()
    for s, (ys, Xs) in groups.items():
        res = sm.RecursiveLS(ys, Xs).filter(return_ssm=True)
        paths[s] = res.filtered_state
    dt = time.perf_counter() - t0
    if prior_var is not None:
        paths = {s: v[:, k:] for s, v in paths.items()}
    return dt, paths


def plain_loop(sid, X, y, lam: float, prior_var, path: bool = False):
    """Time :class:`benchmarks.plain_rls.PlainRLS`, one per series; returns (seconds, b path)."""
    k = X.shape[1]
    rows = X.tolist()
    yl = y.tolist()
    sl = sid.tolist()
    models = {s: PlainRLS(k, lam, prior_var) for s in set(sl)}
    out = np.empty(len(yl)) if path else None
    t0 = time.perf_counter()
    if path:
        for j, (s, x, yy) in enumerate(zip(sl, rows, yl)):
            m = models[s]
            m.update(x, yy)
            out[j] = m.theta[1]
    else:
        for s, x, yy in zip(sl, rows, yl):
            models[s].update(x, yy)
    return time.perf_counter() - t0, out


def bare_compiled(sid, X, y, lam: float, prior_var):
    """Time a bare compiled RLS update (theta and P only, k = 2, numba): the floor of what any
    RLS kernel can do per observation on this machine; returns (seconds, b path)."""
    n_series = int(sid.max()) + 1
    st = np.zeros((n_series, 5))
    st[:, 2] = prior_var[0]
    st[:, 4] = prior_var[1]
    out = np.empty(y.shape[0])
    _bare(st[:1], sid[:2] * 0, X[:2], y[:2], lam, out[:2])       # compile outside the clock
    st[0] = (0.0, 0.0, prior_var[0], 0.0, prior_var[1])
    t0 = time.perf_counter()
    _bare(st, sid, X, y, lam, out)
    return time.perf_counter() - t0, out


def _bare_impl(st, sid, X, y, lam, out):
    # state per series: a, b, P00, P01, P11 (same update as benchmarks.plain_rls)
    inv_l = 1.0 / lam
    for j in range(X.shape[0]):
        s = st[sid[j]]
        x1 = X[j, 1]
        a, b, p00, p01, p11 = s[0], s[1], s[2], s[3], s[4]
        e = y[j] - a - b * x1
        u0 = p00 + p01 * x1
        u1 = p01 + p11 * x1
        inv_d = 1.0 / (lam + u0 + u1 * x1)
        g = e * inv_d
        s[0] = a + u0 * g
        s[1] = b + u1 * g
        s[2] = (p00 - u0 * u0 * inv_d) * inv_l
        s[3] = (p01 - u0 * u1 * inv_d) * inv_l
        s[4] = (p11 - u1 * u1 * inv_d) * inv_l
        out[j] = s[1]


def _compiled():
    from numba import njit

    return njit(cache=False)(_bare_impl)


class _Lazy:
    fn = None

    def __call__(self, *args):
        if _Lazy.fn is None:
            _Lazy.fn = _compiled()
        return _Lazy.fn(*args)


_bare = _Lazy()
