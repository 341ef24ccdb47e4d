"""Student-t quantiles as a table over ``u = 1 / df`` for use inside compiled kernels.

The kernels need the two-sided quantile ``t_{1 - alpha/2}(df)`` at every update with a
non-integer ``df = n_eff - k``. scipy cannot be called from numba, so the quantile is tabulated
once per level on a grid in ``u = 1/df`` in [0, 1] (u = 0 is the normal limit) and interpolated
linearly; the grid is dense enough that the table agrees with ``scipy.stats.t.ppf`` to within
1e-9 relative for df >= 1.

The table is computed with ``scipy.special`` (``stdtrit``, ``ndtri``: the functions
``scipy.stats.t.ppf`` and ``scipy.stats.norm.ppf`` call; the table equals theirs to the bit,
tests/test_ingest_startup.py): importing ``scipy.stats`` cost about 0.3 s of every command's start
(``elmon ingest`` among them).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from numba import njit
from scipy import special

#: grid points in u = 1/df; quantiles are smooth in u except near df = 1, hence the size.
N_GRID = 40001


@lru_cache(maxsize=16)
def t_table(level: float) -> np.ndarray:
    """Table of two-sided Student-t quantiles at ``level`` on the grid u = i / (N_GRID - 1)."""
    if not 0.0 < level < 1.0:
        raise ValueError(f"level = {level!r}: must be in (0, 1)")
    u = np.linspace(0.0, 1.0, N_GRID)
    q = np.empty(N_GRID)
    prob = 0.5 + level / 2.0
    q[0] = special.ndtri(prob)
    q[1:] = special.stdtrit(1.0 / u[1:], prob)
    q.setflags(write=False)
    return q


@njit(cache=True, inline="always")
def t_lookup(table: np.ndarray, df: float) -> float:
    """Interpolated quantile for ``df >= 1`` (NaN below)."""
    if not (df >= 1.0):
        return np.nan
    return t_lookup_inv(table, df, 1.0 / df)


@njit(cache=True, inline="always")
def t_lookup_inv(table: np.ndarray, df: float, u: float) -> float:
    """:func:`t_lookup` given ``u = 1 / df`` already computed (the k = 2 step computes it in one
    vector division with others); the same value to the bit."""
    if not (df >= 1.0):
        return np.nan
    m = table.shape[0] - 1
    pos = u * m
    i = int(pos)
    if i >= m:
        return table[m]
    f = pos - i
    return table[i] + f * (table[i + 1] - table[i])


def t_quantile(level: float, df: float) -> float:
    """Python-side access to the same table the kernels use."""
    return float(t_lookup(t_table(level), float(df)))
