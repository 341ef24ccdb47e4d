"""Shared fixtures. Numba kernels are compiled once per process (cache=True keeps them on disk)."""

from __future__ import annotations

import os

import numpy as np
import pytest

os.environ.setdefault("ELMON_TEST", "1")


@pytest.fixture
def rng():
    return np.random.default_rng(20261201)


def simulate_loglog(rng, n, beta=-1.5, intercept=5.0, price_sd=0.1, noise_sd=0.2, base=10.0):
    """Synthetic stationary log-log series (invented data for tests of the estimator)."""
    lp = np.log(base) + rng.normal(0.0, price_sd, n)
    y = intercept + beta * lp + rng.normal(0.0, noise_sd, n)
    return lp, y
