"""Compile elmon's numba kernels once, before the test workers start.

``pytest -n 2`` on a fresh clone has no numba cache: each worker, and each service or CLI
process a test starts, would compile the pipeline kernel on its own (minutes of CPU each on a
2-core machine). conftest.py runs this script once in the controlling process; it writes the
cache (``cache=True`` kernels, in ``__pycache__``) that every later process loads. It runs what
a user's first command runs: a simulated log replayed through the command line (row checks, the
pipeline with the default detector, the price-feedback pass, output frames).
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
from pathlib import Path


def main() -> int:
    with tempfile.TemporaryDirectory(prefix="elmon-warm-") as tmp:
        log = Path(tmp) / "log.csv"
        cmd = [sys.executable, "-m", "monitor"]
        subprocess.run(cmd + ["simulate", "retail", "--out", str(log), "--series", "3", "--length", "300",
                              "--seed", "1"], check=True, capture_output=True)
        subprocess.run(cmd + ["replay", str(log), "--out", str(Path(tmp) / "a")], check=True,
                       capture_output=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
