"""Compile elmon's numba kernels once, before the test workers start.

``pytest -n 2`` on a fresh clone has no numba cache: each worker, and each service or CLI
process a test starts, would compile the kernels it uses on its own (tens of CPU-seconds each
on a 2-core machine). conftest.py runs this script once in the controlling process; it writes
the cache (``cache=True`` kernels, in ``__pycache__`` or ``NUMBA_CACHE_DIR``) that every later
process loads.

The pipeline compiles one loop per (estimator step form, detector family)
(:data:`monitor.pipeline.kernel.LOOPS`), and the tests use all of them, so two processes run
side by side (the machine class has 2 cores):

- part 1: what a user's first command runs: a simulated log replayed through the command line
  (row checks, the pipeline with the default detector, the price-feedback pass, output
  frames), then the other estimators' loops with the split detector (which reuse the split
  detector's compiled step the replay cached);
- part 2: the estimators' batch runs alone (``run_batch``, ``run_iv``), then every
  estimator's loop with the previous charts.
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
from pathlib import Path


def _loops(split: bool, models: tuple[str, ...]) -> None:
    """Run a tiny pipeline through the loop of each model (and step form) with ``split``."""
    import numpy as np

    from monitor.estimators import ElasticityPoisson, ElasticityRLS
    from monitor.estimators.iv import ElasticityIV
    from monitor.pipeline.run import Pipeline
    from monitor.pipeline.settings import DetectorSettings

    rng = np.random.default_rng(0)
    n = 200
    sid = np.zeros(n, dtype=np.int64)
    lp = 0.1 * rng.standard_normal(n)
    extra = rng.standard_normal(n)
    y = 3.0 - 1.5 * lp + 0.1 * rng.standard_normal(n)
    det = DetectorSettings(change_detector="split_glr" if split else "charts")
    runs = {"two": (ElasticityRLS(), [lp], y, None),
            "linear": (ElasticityRLS(controls=["c"]), [lp, extra], y, None),
            "poisson": (ElasticityPoisson(exposure="e"), [lp], np.round(np.exp(y)),
                        np.zeros(n)),
            "iv": (ElasticityIV(instruments=["z"]), [lp, lp + 0.1 * extra], y, None)}
    for model in models:
        est, cols, yy, off = runs[model]
        X = np.column_stack([np.ones(n), *cols])
        Pipeline(est, det).run(sid, X, yy, 1, offset=off, keep_signals=True)


def _batches() -> None:
    """The batch runs of the estimators alone (``run_batch``: one compiled loop for every model,
    inlined, the longest compile of the project; ``run_iv``), used by the band, feedback and
    reference tests. Compiled in a test worker on a loaded machine it took over 10 minutes."""
    import numpy as np

    from monitor.estimators import ElasticityRLS
    from monitor.estimators.batch import run_batch
    from monitor.estimators.iv import ElasticityIV, run_iv

    rng = np.random.default_rng(0)
    n = 200
    sid = np.zeros(n, dtype=np.int64)
    lp = 0.1 * rng.standard_normal(n)
    y = 3.0 - 1.5 * lp + 0.1 * rng.standard_normal(n)
    run_batch(ElasticityRLS(), sid, np.column_stack([np.ones(n), lp]), y)
    run_iv(ElasticityIV(instruments=["z"]), sid,
           np.column_stack([np.ones(n), lp, lp + 0.1 * rng.standard_normal(n)]), y)


def _replay() -> None:
    with tempfile.TemporaryDirectory(prefix="elmon-warm-") as tmp:
        log = Path(tmp) / "log.csv"
        cmd = [sys.executable, "-m", "monitor"]
        subprocess.run(cmd + ["simulate", "retail", "--out", str(log), "--series", "3",
                              "--length", "300", "--seed", "1"], check=True, capture_output=True)
        subprocess.run(cmd + ["replay", str(log), "--out", str(Path(tmp) / "a")], check=True,
                       capture_output=True)


def main(argv: list[str]) -> int:
    if argv == ["1"]:
        _replay()
        _loops(True, ("linear", "poisson", "iv"))
        return 0
    if argv == ["2"]:
        _batches()
        _loops(False, ("two", "linear", "poisson", "iv"))
        return 0
    parts = [subprocess.Popen([sys.executable, __file__, part], stderr=subprocess.PIPE,
                              text=True) for part in ("1", "2")]
    failed = 0
    for p in parts:
        _, err = p.communicate()
        if p.returncode:
            sys.stderr.write(err[-3000:])
            failed = p.returncode
    return failed


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
