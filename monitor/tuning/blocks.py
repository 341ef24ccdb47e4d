"""Circular moving-block bootstrap: the indices of a resampled path and the block length.

Blocks of consecutive observations keep a series' autocorrelation within each block (Künsch
1989); starting points wrap around the end (circular blocks, Politis & Romano 1992), so every
observation is equally likely to be drawn.
"""

from __future__ import annotations

import math

import numpy as np


def block_length(z: np.ndarray) -> int:
    """Block length for the moving-block bootstrap of ``z``: ``max(2 m, ceil(n^(1/3)))``,
    capped at n / 2, where m is the first lag after which 5 sample autocorrelations in a row
    are inside ``+-2 / sqrt(n)`` (the first step of the rule of Politis & White 2004, from
    memory)."""
    n = z.size
    if n < 8:
        return max(1, n)
    x = z - z.mean()
    denom = float(x @ x) or 1.0
    lim = 2.0 / math.sqrt(n)
    run, m = 0, 0
    for lag in range(1, min(n // 2, 500)):
        r = float(x[:-lag] @ x[lag:]) / denom
        run = run + 1 if abs(r) < lim else 0
        if run == 5:
            m = lag - 5
            break
    else:
        m = min(n // 4, 500)
    return int(min(max(2 * m, math.ceil(n ** (1 / 3))), max(1, n // 2)))


def bootstrap_indices(n: int, length: int, block: int, rng: np.random.Generator) -> np.ndarray:
    """Indices of a circular moving-block bootstrap path of ``length`` from ``n`` observations."""
    k = -(-length // block)
    starts = rng.integers(0, n, size=k)
    return ((starts[:, None] + np.arange(block)[None, :]) % n).ravel()[:length]
