"""Partial pooling along an estimate history: each row pooled with its group as it stood then.

For replay's ``estimates.csv`` every estimate row gains ``beta_pooled`` and ``beta_pooled_se``:
the row's series shrunk toward its group, using every member's *current* estimate at that row's
time (the newest earlier-or-same row of each member). It is the online form of
:func:`monitor.groups.pooling.pool_group` (same formulas: DerSimonian & Laird 1986 tau2, the
modified Hartung-Knapp variance of the group mean, Efron & Morris 1975 shrinkage), computed by a
compiled loop that costs O(group size) per row; a test holds it equal to the snapshot function
at every row to 1e-12.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np
import pandas as pd
from numba import njit

from monitor.groups.pooling import MIN_SERIES


@njit(cache=True)
def _pool_rows(sid, b, se, gid, gstart, gmembers, hksj):  # pragma: no cover - compiled
    n = len(sid)
    ns = len(gid)
    cur_b = np.full(ns, np.nan)
    cur_v = np.full(ns, np.nan)
    out_b = np.full(n, np.nan)
    out_se = np.full(n, np.nan)
    for r in range(n):
        s = sid[r]
        ok = np.isfinite(b[r]) and np.isfinite(se[r]) and se[r] > 0.0
        if ok:
            cur_b[s] = b[r]
            cur_v[s] = se[r] * se[r]
        else:
            cur_b[s] = np.nan
            cur_v[s] = np.nan
        g = gid[s]
        if g < 0 or not ok:
            continue
        k = 0
        sw = 0.0
        swb = 0.0
        sw2 = 0.0
        for j in range(gstart[g], gstart[g + 1]):
            m = gmembers[j]
            if np.isfinite(cur_v[m]):
                w = 1.0 / cur_v[m]
                k += 1
                sw += w
                swb += w * cur_b[m]
                sw2 += w * w
        if k < MIN_SERIES:
            continue
        mu_fe = swb / sw
        q = 0.0
        for j in range(gstart[g], gstart[g + 1]):
            m = gmembers[j]
            if np.isfinite(cur_v[m]):
                d = cur_b[m] - mu_fe
                q += d * d / cur_v[m]
        denom = sw - sw2 / sw
        tau2 = 0.0
        if denom > 0.0:
            tau2 = max(0.0, (q - (k - 1)) / denom)
        sws = 0.0
        swsb = 0.0
        for j in range(gstart[g], gstart[g + 1]):
            m = gmembers[j]
            if np.isfinite(cur_v[m]):
                w = 1.0 / (cur_v[m] + tau2)
                sws += w
                swsb += w * cur_b[m]
        mean = swsb / sws
        var_mean = 1.0 / sws
        if hksj:
            acc = 0.0
            for j in range(gstart[g], gstart[g + 1]):
                m = gmembers[j]
                if np.isfinite(cur_v[m]):
                    d = cur_b[m] - mean
                    acc += d * d / (cur_v[m] + tau2)
            var_hk = acc / ((k - 1) * sws)
            if var_hk > var_mean:
                var_mean = var_hk
        v = cur_v[s]
        shrink = tau2 / (tau2 + v)
        out_b[r] = mean + shrink * (cur_b[s] - mean)
        out_se[r] = np.sqrt(shrink * v + (1.0 - shrink) ** 2 * var_mean)
    return out_b, out_se


def pooled_columns(estimates: pd.DataFrame, group_of: Mapping[str, str | None],
                   method: str = "hksj") -> pd.DataFrame:
    """``group``, ``beta_pooled``, ``beta_pooled_se`` for every row of an estimate history.

    Parameters
    ----------
    estimates : pandas.DataFrame
        Columns ``series``, ``ts`` (ISO text or int64 ns; sortable), ``beta``, ``beta_se``; any
        row order (rows are visited in time order, ties in their given order).
    group_of : mapping
        Series -> group label (``None`` or absent: no group).

    Returns
    -------
    pandas.DataFrame
        Same index as ``estimates``. Pooled fields are NaN where the row has no standard error
        (``warming_up``), the series has no group, or fewer than
        :data:`~monitor.groups.pooling.MIN_SERIES` of its group's series have a current
        standard error.
    """
    if method not in ("hksj", "wald"):
        raise ValueError(f"method {method!r}: must be 'hksj' or 'wald'")
    n = len(estimates)
    codes, names = pd.factorize(estimates["series"].astype(object), sort=False)
    labels = np.array([group_of.get(s) for s in names], dtype=object)
    has = np.array([lab is not None for lab in labels], dtype=bool)
    gcodes = np.full(len(names), -1, dtype=np.int64)
    if has.any():
        gc, _ = pd.factorize(labels[has], sort=False)
        gcodes[has] = gc
    ngroups = int(gcodes.max()) + 1 if len(gcodes) else 0
    order_members = np.argsort(gcodes, kind="stable")
    order_members = order_members[gcodes[order_members] >= 0]
    counts = np.bincount(gcodes[gcodes >= 0], minlength=ngroups)
    gstart = np.zeros(ngroups + 1, dtype=np.int64)
    gstart[1:] = np.cumsum(counts)
    order = np.argsort(estimates["ts"].to_numpy(), kind="stable")
    b = estimates["beta"].to_numpy(dtype=np.float64, na_value=np.nan)[order]
    se = estimates["beta_se"].to_numpy(dtype=np.float64, na_value=np.nan)[order]
    pb, pse = _pool_rows(codes[order].astype(np.int64), b, se, gcodes, gstart,
                         order_members.astype(np.int64), method == "hksj")
    out_b = np.full(n, np.nan)
    out_se = np.full(n, np.nan)
    out_b[order] = pb
    out_se[order] = pse
    group_col = pd.Series(labels[codes] if n else [], index=estimates.index, dtype=object)
    return pd.DataFrame({"group": group_col, "beta_pooled": out_b, "beta_pooled_se": out_se},
                        index=estimates.index)
