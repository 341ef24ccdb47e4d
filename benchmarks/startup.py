"""Start time of the ``elmon`` command against ``python -c "import pandas"`` (issue 15).

Each figure is the wall time of a fresh interpreter, started in turn (elmon, then the
reference) so both see the same load on the shared machine:

- ``elmon --help`` (``python -m monitor --help``: the console script runs the same
  ``monitor.cli:main``); target <= 0.75x the reference;
- the reference: ``python -c "import pandas"``, the import every data command needs anyway;
- ``python -c "import monitor.cli"``: the parser's modules alone.

The check: the modules ``elmon --help`` loaded (``python -X importtime``) include none of numba,
pandas, scipy, pyarrow, streamlit or sqlite_utils (they are imported by the commands that use
them).
"""

from __future__ import annotations

import subprocess
import sys
import time

from benchmarks.common import ROOT, Context, Row, median

HEAVY = ("numba", "pandas", "scipy", "pyarrow", "streamlit", "sqlite_utils")


def _wall(args: list[str]) -> float:
    t0 = time.perf_counter()
    subprocess.run([sys.executable, *args], cwd=ROOT, check=True, stdout=subprocess.DEVNULL,
                   stderr=subprocess.DEVNULL)
    return time.perf_counter() - t0


def heavy_imports(args: list[str]) -> list[str]:
    """Top-level packages among ``HEAVY`` that ``python -X importtime ARGS`` imported."""
    out = subprocess.run([sys.executable, "-X", "importtime", *args], cwd=ROOT, check=True,
                         stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True).stderr
    seen = {line.rsplit("|", 1)[-1].strip().split(".")[0] for line in out.splitlines()
            if line.startswith("import time:")}
    return sorted(seen & set(HEAVY))


def run(ctx: Context) -> list[Row]:
    runs = max(ctx.runs, 5)          # a start is short: more runs for a stable median
    help_cmd = ["-m", "monitor", "--help"]
    pandas_cmd = ["-c", "import pandas"]
    cli_cmd = ["-c", "import monitor.cli"]
    for cmd in (help_cmd, pandas_cmd):       # warm the page cache and the .pyc files
        _wall(cmd)
    t_help, t_pandas, t_cli = [], [], []
    for _ in range(runs):
        t_help.append(_wall(help_cmd))
        t_pandas.append(_wall(pandas_cmd))
        t_cli.append(_wall(cli_cmd))
    h, p = median(t_help), median(t_pandas)
    heavy = heavy_imports(help_cmd)
    ratio = h / p
    main = Row("start of elmon --help (fresh interpreter, wall)", h, "s", t_help,
               target="<= 0.75x import pandas", met=ratio <= 0.75, better="lower",
               ratio=f"{ratio:.2f}x the reference",
               check=(f"heavy packages loaded by elmon --help: {', '.join(heavy) or 'none'} "
                      f"(checked with python -X importtime: {', '.join(HEAVY)}); each command "
                      "imports what it uses when it runs"))
    ref = Row('python -c "import pandas" (fresh interpreter, wall)', p, "s", t_pandas,
              reference=True, better="lower", ratio=f"elmon --help / this = {ratio:.2f}x",
              check="the same interpreter, started alternately with elmon --help")
    cli = Row('python -c "import monitor.cli" (the parser modules alone)', median(t_cli), "s",
              t_cli, reference=True, better="lower",
              check="what every command pays before its own imports")
    return [main, ref, cli]
