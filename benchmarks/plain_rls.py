"""A plain Python recursive-least-squares loop: the reference elmon's compiled kernel is timed
and checked against.

Floats and lists only, no numpy in the loop; the textbook update with exponential forgetting
(Ljung & Soderstrom 1983, ch. 2), the covariance in the same symmetric form as elmon:

    e = y - x' theta,   u = P x,   d = lam + x' u
    theta <- theta + u e / d
    P     <- (P - u u' / d) / lam

It computes only theta and P (no variance, interval, effective window or status), so it does
less per observation than elmon's step: the speed ratio flatters the reference, not elmon.

>>> rls = PlainRLS(2, lam=1.0, prior_var=[1e6, 1e6])
>>> for x1, y in [(0.0, 1.0), (1.0, 3.0), (2.0, 5.0)]:
...     _ = rls.update([1.0, x1], y)
>>> [round(v, 4) for v in rls.theta]
[1.0, 2.0]
"""

from __future__ import annotations


class PlainRLS:
    """RLS with forgetting factor ``lam`` and prior ``N(theta0, diag(prior_var))``."""

    def __init__(self, k: int, lam: float, prior_var, theta0=None):
        self.k = k
        self.lam = float(lam)
        self.theta = [0.0] * k if theta0 is None else [float(v) for v in theta0]
        self.P = [[float(prior_var[i]) if i == j else 0.0 for j in range(k)] for i in range(k)]

    def update(self, x, y: float) -> float:
        """One observation (design row ``x``, response ``y``); returns the prediction error."""
        k, P, th, lam = self.k, self.P, self.theta, self.lam
        e = y
        for i in range(k):
            e -= th[i] * x[i]
        u = [0.0] * k
        r = 0.0
        for i in range(k):
            acc = 0.0
            Pi = P[i]
            for j in range(k):
                acc += Pi[j] * x[j]
            u[i] = acc
            r += x[i] * acc
        inv_d = 1.0 / (lam + r)
        g = e * inv_d
        inv_l = 1.0 / lam
        for i in range(k):
            th[i] += u[i] * g
        for i in range(k):
            Pi = P[i]
            for j in range(i, k):
                v = (Pi[j] - u[i] * u[j] * inv_d) * inv_l
                Pi[j] = v
                P[j][i] = v
        return e


def run_path(X, y, lam: float, prior_var, coef: int = 1) -> list[float]:
    """Run one series through :class:`PlainRLS`; the path of coefficient ``coef`` (b) after
    each observation."""
    rls = PlainRLS(len(X[0]), lam, prior_var)
    path = []
    for xi, yi in zip(X, y):
        rls.update(xi, yi)
        path.append(rls.theta[coef])
    return path
