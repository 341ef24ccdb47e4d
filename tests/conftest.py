"""Shared fixtures. Numba kernels are compiled once per process (cache=True keeps them on disk)."""

from __future__ import annotations

import os

import numpy as np
import pytest

os.environ.setdefault("ELMON_TEST", "1")


@pytest.fixture
def store(tmp_path):
    """A new store (SQLite file on disk, the writer connection), closed after the test."""
    from monitor import store as ms

    s = ms.Store.open(tmp_path / "elmon.sqlite")
    yield s
    s.close()


@pytest.fixture(scope="module")
def cluster():
    """A local Dask cluster (2 worker processes, 1 thread each) shared by a module's tests."""
    from distributed import LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1",
                      dashboard_address=None) as c:
        yield c


@pytest.fixture
def rng():
    return np.random.default_rng(20261201)


def simulate_loglog(rng, n, beta=-1.5, intercept=5.0, price_sd=0.1, noise_sd=0.2, base=10.0):
    """Synthetic stationary log-log series (invented data for tests of the estimator)."""
    lp = np.log(base) + rng.normal(0.0, price_sd, n)
    y = intercept + beta * lp + rng.normal(0.0, noise_sd, n)
    return lp, y


def designed_thresholds(forgetting: float = 0.99, arl0: float = 20000.0) -> dict[str, float]:
    """``{"cusum_h", "slope_h"}``: the level and slope CUSUM thresholds the pipeline designs
    for the default charts (read from the design table, :mod:`monitor.detectors.design`), for
    tests that give them explicitly so that no process pays the design time."""
    from monitor.detectors.design import pipeline_threshold
    from monitor.detectors.slope_kernel import DEFAULT_FAST, DEFAULT_REFERENCE

    level = pipeline_threshold("level", "cusum", arl0, forgetting=forgetting, k=0.5)
    slope = pipeline_threshold("slope", "cusum", arl0, forgetting=forgetting, k=1.0,
                               fast_forgetting=DEFAULT_FAST,
                               reference_forgetting=DEFAULT_REFERENCE)
    return {"cusum_h": round(level.threshold, 6), "slope_h": round(slope.threshold, 6)}


#: the designed thresholds of the default settings (ARL0 20000, forgetting 0.99)
DESIGNED = designed_thresholds()


def pytest_configure(config):
    """Fill the numba cache once before xdist starts its workers (tests/warm_numba.py); a
    worker (``workerinput``) or ELMON_TEST_NO_WARMUP=1 skips it. A failure here is reported
    and the tests compile for themselves."""
    if hasattr(config, "workerinput") or os.environ.get("ELMON_TEST_NO_WARMUP") == "1":
        return
    import subprocess
    import sys
    import time
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    t0 = time.monotonic()
    done = subprocess.run([sys.executable, str(root / "tests" / "warm_numba.py")], cwd=root,
                          capture_output=True, text=True,
                          env={**os.environ, "PYTHONPATH": str(root)})
    msg = (f"numba cache warmed in {time.monotonic() - t0:.0f} s" if done.returncode == 0 else
           f"numba warm-up failed (exit {done.returncode}); tests compile for themselves:\n"
           f"{done.stderr[-2000:]}")
    print(f"\nelmon tests: {msg}", file=sys.stderr)
