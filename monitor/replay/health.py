"""Per-series residual health: do a series' data keep what the change detector's design assumes?

The detector's thresholds are designed (issue 12) for independent errors of constant variance
around the log-log line. Two departures matter most on real data and are measured here from the
estimator's innovations ``e_t`` (one-step prediction errors, the ``innovation`` column of
estimates.csv) and the log prices ``x_t``, rows past warm-up only:

- serial correlation: the lag-1 autocorrelation ``r1 = sum (e_t - m)(e_{t-1} - m) / sum
  (e_t - m)^2`` with standard error ``1 / sqrt(n)`` under independence (Bartlett 1946);
- variance linked to price: ``g``, the least-squares slope of ``log e_t^2`` on ``x_t``
  (multiplicative heteroscedasticity, Harvey 1976: ``Var e_t = s^2 exp(g x_t)``), with its
  ordinary standard error. ``exp(g sd_x / 2)`` is the ratio of error sds one log-price sd apart.

A series is flagged where its data break the design, at levels measured on the detection grid
(simulators/change_grid.py; the pipeline over 600 series x 2,000 observations at ARL0 2,000;
false alerts per 10,000 against the design, elasticity_change / level_shift):

- ``autocorrelated`` when ``r1 >= 0.7`` or ``r1 <= -0.7`` and ``|r1| >= 3 / sqrt(n)``: AR(1)
  errors of 0.6 gave 0.73 / 1.10 (the detector's own correction holds), 0.75 gave 0.59 / 1.37
  and 0.9 gave 0.49 / 1.83;
- ``price_linked_variance`` when the sd ratio one log-price sd apart is at least 1.45 (or at
  most 1 / 1.45) and ``|g| >= 3 se(g)``: a ratio of 1.35 gave 1.06 / 1.10, 1.57 gave 1.31 /
  1.54 and 1.82 gave 1.74 / 2.92.

Three standard errors keep each flag off for independent errors of constant variance in all
but about 0.3% of series (normal approximation). ``elmon tune LOG --arl0 A`` measures the rates
themselves (:mod:`monitor.tuning.alert_check`).

The sums are additive over consecutive chunks of a series (:class:`HealthSums`), so the replay
keeps them chunk by chunk without holding residuals.

>>> import numpy as np
>>> rng = np.random.default_rng(0)
>>> e = rng.standard_normal(4000); x = 2.3 + 0.15 * rng.standard_normal(4000)
>>> h = health_of_arrays(e, x)
>>> h["flags"], abs(h["resid_ac1"]) < 0.05
('', True)
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from numba import njit

#: flag levels (see the module docstring)
AC1_LEVEL = 0.7
SD_RATIO_LEVEL = 1.45
Z_LEVEL = 3.0
#: fields of one series' sums
_FIELDS = ("n", "se", "see", "np", "sp", "sx", "sxx", "sl", "sxl", "sll", "last")
HEALTH_COLUMNS = ["resid_ac1", "var_price_slope", "var_price_slope_se", "sd_ratio_per_price_sd",
                  "health"]


class HealthSums:
    """Additive sums per series (rows in time order within each series), grown on demand.

    ``n, se, see``: count, sum and sum of squares of innovations; ``np, sp``: number and sum of
    products of consecutive innovations; ``sx, sxx, sl, sxl, sll``: sums of log price ``x``,
    ``x^2``, ``l = log e^2``, ``x l``, ``l^2``; ``last``: the series' newest innovation (NaN
    before any)."""

    def __init__(self, n_series: int = 0):
        self.a = np.zeros((len(_FIELDS), 0))
        self.grow(n_series)

    def grow(self, n_series: int) -> None:
        have = self.a.shape[1]
        if n_series > have:
            more = np.zeros((len(_FIELDS), n_series - have))
            more[_FIELDS.index("last")] = np.nan
            self.a = np.concatenate([self.a, more], axis=1)

    def add(self, sid: np.ndarray, e: np.ndarray, x: np.ndarray, usable: np.ndarray) -> None:
        """Add rows ``(sid, e, x)`` in processing order (each series' rows in time order; rows
        of different series may interleave); ``usable`` marks rows past warm-up. Rows with a
        non-finite ``e`` or ``x`` are left out. One compiled pass; the sums of a series are
        added in its row order, so chunk boundaries do not change them."""
        sid = np.ascontiguousarray(sid, dtype=np.int64)
        if not sid.size:
            return
        self.grow(int(sid.max()) + 1)
        _add_rows(self.a, sid, np.ascontiguousarray(e, dtype=np.float64),
                  np.ascontiguousarray(x, dtype=np.float64),
                  np.ascontiguousarray(usable, dtype=np.bool_))

    def frame(self, names, codes=None) -> pd.DataFrame:
        """:data:`HEALTH_COLUMNS` per series (index ``names``): of every series in code order,
        or of the series ``codes``."""
        return health_frame(self.a if codes is None else self.a[:, np.asarray(codes, np.int64)],
                            names)


def health_frame(a: np.ndarray, names) -> pd.DataFrame:
    """Health columns from the sums ``a`` (fields x series); NaN where a series has fewer than
    30 usable rows (``health`` then ``"too_few_rows"``)."""
    f = {k: a[i] for i, k in enumerate(_FIELDS)}
    n = f["n"]
    with np.errstate(divide="ignore", invalid="ignore"):
        m = f["se"] / n
        ss = f["see"] - n * m * m
        # sum (e_t - m)(e_{t-1} - m) over the np pairs = sp - m (2 se - e_first - e_last)
        # + np m^2; the end terms m (e_first + e_last) are dropped (O(1) against O(n) sums)
        r1 = (f["sp"] - 2 * m * f["se"] + f["np"] * m * m) / ss
        sxx = f["sxx"] - f["sx"] ** 2 / n
        sxl = f["sxl"] - f["sx"] * f["sl"] / n
        sll = f["sll"] - f["sl"] ** 2 / n
        g = sxl / sxx
        resid = np.maximum(sll - g * sxl, 0.0) / np.maximum(n - 2, 1)
        g_se = np.sqrt(resid / sxx)
        sd_x = np.sqrt(sxx / n)
        ratio = np.exp(g * sd_x / 2)
    ok = n >= 30
    r1, g, g_se, ratio = (np.where(ok, v, np.nan) for v in (r1, g, g_se, ratio))
    flags = []
    for i in range(n.size):
        if not ok[i]:
            flags.append("too_few_rows")
            continue
        out = []
        if abs(r1[i]) >= AC1_LEVEL and abs(r1[i]) >= Z_LEVEL / math.sqrt(n[i]):
            out.append("autocorrelated")
        if np.isfinite(ratio[i]) and max(ratio[i], 1 / ratio[i]) >= SD_RATIO_LEVEL \
                and abs(g[i]) >= Z_LEVEL * g_se[i]:
            out.append("price_linked_variance")
        flags.append(" ".join(out))
    return pd.DataFrame({"resid_ac1": r1, "var_price_slope": g, "var_price_slope_se": g_se,
                         "sd_ratio_per_price_sd": ratio, "health": flags},
                        index=pd.Index(list(names), name="series"))


def health_of_arrays(e: np.ndarray, x: np.ndarray) -> dict:
    """The health of one series from its usable innovations ``e`` and log prices ``x`` (time
    order): ``resid_ac1``, ``var_price_slope`` (+ ``_se``), ``sd_ratio_per_price_sd``,
    ``flags``."""
    h = HealthSums(1)
    h.add(np.zeros(len(e), np.int64), np.asarray(e, float), np.asarray(x, float),
          np.ones(len(e), bool))
    row = h.frame(["s"]).iloc[0]
    return {"resid_ac1": float(row["resid_ac1"]), "var_price_slope": float(row["var_price_slope"]),
            "var_price_slope_se": float(row["var_price_slope_se"]),
            "sd_ratio_per_price_sd": float(row["sd_ratio_per_price_sd"]), "flags": row["health"]}


@njit(cache=True)
def _add_rows(A, sid, e, x, use):      # pragma: no cover - compiled
    for j in range(sid.size):
        ej, xj = e[j], x[j]
        if not use[j] or not (np.isfinite(ej) and np.isfinite(xj)):
            continue
        s = sid[j]
        A[0, s] += 1.0
        A[1, s] += ej
        A[2, s] += ej * ej
        prev = A[10, s]
        if np.isfinite(prev):
            A[3, s] += 1.0
            A[4, s] += ej * prev
        lj = math.log(max(ej * ej, 1e-300))
        A[5, s] += xj
        A[6, s] += xj * xj
        A[7, s] += lj
        A[8, s] += xj * lj
        A[9, s] += lj * lj
        A[10, s] = ej


#: share of a series' quantities that are zero from which, under the log-log model, its entry
#: in summary.json recommends the Poisson model (issue 13: at a mean of 2 units a day, 14% zeros,
#: the log-log b was -0.98 against a true -1.5)
ZERO_NOTE_SHARE = 0.05


def zero_counts(v) -> pd.Series:
    """Zero quantities per series in a validated chunk: the rows skipped under ``zero_policy =
    "skip"`` and the rows rejected because a zero cannot be logged."""
    parts = []
    if len(v.zero_skipped) and "series" in v.zero_skipped:
        parts.append(v.zero_skipped["series"].astype(str))
    r = v.rejects
    if len(r):
        zero = (r["field"] == "quantity") & r["reason"].astype(str).str.contains(
            "zero quantity cannot be logged", regex=False)
        parts.append(r.loc[zero, "series"].astype(str))
    if not parts:
        return pd.Series(dtype=np.int64)
    return pd.concat(parts).value_counts().astype(np.int64)


def zero_fields(model: str, zeros: int, n_obs: int) -> dict:
    """``zero_quantities`` and, for the log-log model when they are at least
    :data:`ZERO_NOTE_SHARE` of the series' rows, a ``note`` recommending the Poisson model."""
    zeros = int(zeros)
    out = {"zero_quantities": zeros}
    total = zeros + int(n_obs)
    if model == "loglinear" and total and zeros / total >= ZERO_NOTE_SHARE:
        out["note"] = (f"{zeros / total:.0%} of its quantities are zero: the log-log model cannot "
                       "use them and is biased on small counts; use the Poisson model "
                       "(--model poisson, [estimator] model = \"poisson\"), which takes zeros "
                       "as data")
    return out
