"""Start time of the ``elmon`` command against ``python -c "import pandas"`` (issue 15).

Each figure is the wall time of a fresh interpreter, started in turn (elmon, then the
reference) so both see the same load on the shared machine:

- ``elmon --help`` (``python -m monitor --help``: the console script runs the same
  ``monitor.cli:main``); target <= 0.75x the reference;
- the reference: ``python -c "import pandas"``, the import every data command needs anyway;
- ``python -c "import monitor.cli"``: the parser's modules alone;
- ``elmon status --db STORE`` on a store of a simulated year (12 series, daily, written by
  ``elmon ingest`` before the clock): target <= 1.5x the reference (it reads the store with
  pandas, so the import is part of its work).

The check: the modules ``elmon --help`` loaded (``python -X importtime``) include none of numba,
pandas, scipy, pyarrow, streamlit or sqlite_utils (they are imported by the commands that use
them).

First run after install (cold compile): the CPU seconds (user + sys, ``resource.getrusage`` of
the child) of ``elmon replay`` on a small simulated log (3 series x 300 rows) in a fresh
interpreter with an empty ``NUMBA_CACHE_DIR``: what a user's first command, and every fresh CI
clone, pays to compile the kernels of the default configuration; beside it the same replay with
the cache filled, and the default pipeline's speed (``Pipeline.run``, observations per
CPU-second on 2,000 series x 500 steps), so a cut in compile time that slowed the loop shows.
CPU time, not wall time: the machine is shared. One run each (a cold compile takes tens of
CPU-seconds).
"""

from __future__ import annotations

import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from benchmarks.common import ROOT, Context, Row, attempt, median, rate_row

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


def _child_cpu(args: list[str], env: dict) -> float:
    """CPU seconds (user + sys) of ``python ARGS`` in a fresh interpreter."""
    r0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    subprocess.run([sys.executable, *args], cwd=ROOT, env=env, check=True,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    r1 = resource.getrusage(resource.RUSAGE_CHILDREN)
    return (r1.ru_utime - r0.ru_utime) + (r1.ru_stime - r0.ru_stime)


def _pipeline_rate(ctx: Context) -> tuple[list[float], int]:
    """Observations per CPU-second of the default pipeline (warm cache), one value per run."""
    import numpy as np

    from benchmarks.data import panel
    from monitor.estimators import ElasticityRLS
    from monitor.pipeline.run import Pipeline

    p = panel(ctx.size(2_000, 200), 500, seed=9, change_every=10, change_at=300, change_by=-0.8)
    ts = np.datetime64("2024-01-01T00:00:00", "ns").astype(np.int64) + p.step * 3_600 * 10**9
    pipe = Pipeline(ElasticityRLS(forgetting=0.995))
    pipe.run(p.sid[:5000] % 5, p.X[:5000], p.y[:5000], n_series=5, ts=ts[:5000])  # load
    rates = []
    for _ in range(ctx.runs):
        states = pipe.new_states(p.n_series)
        c0 = time.process_time()
        pipe.run(p.sid, p.X, p.y, n_series=p.n_series, states=states, ts=ts)
        rates.append(p.n / max(time.process_time() - c0, 1e-9))
    return rates, p.n


def cold_compile_rows(ctx: Context) -> list[Row]:
    """The first-run figures (module docstring)."""
    with tempfile.TemporaryDirectory(prefix="elmon-cold-") as tmp:
        log = Path(tmp) / "log.csv"
        env = {**os.environ, "PYTHONPATH": str(ROOT)}
        subprocess.run([sys.executable, "-m", "monitor", "simulate", "retail", "--out", str(log),
                        "--series", "3", "--length", "300", "--seed", "1"], cwd=ROOT, env=env,
                       check=True, capture_output=True)
        replay = ["-m", "monitor", "replay", str(log), "--out"]
        cache = Path(tmp) / "numba-cache"
        cache.mkdir()
        cold_env = {**env, "NUMBA_CACHE_DIR": str(cache)}
        cold = _child_cpu(replay + [str(Path(tmp) / "cold")], cold_env)
        warm = _child_cpu(replay + [str(Path(tmp) / "warm")], cold_env)
        same = all((Path(tmp) / "cold" / f).read_bytes() == (Path(tmp) / "warm" / f).read_bytes()
                   for f in ("alerts.csv", "estimates.csv"))
    rates, n = _pipeline_rate(ctx)
    first = Row("first replay after install: elmon replay of 900 rows with an empty numba cache "
                "(CPU)", cold, "CPU-s", [cold], better="lower",
                check=(f"the same replay with that cache filled: {warm:.1f} CPU-s; outputs of the "
                       f"two {'identical' if same else '**DIFFER**'} (alerts.csv, estimates.csv); "
                       "the pipeline compiles one loop per estimator form and detector family "
                       "(monitor.pipeline.kernel.LOOPS): the default's alone, about 170 CPU-s "
                       "for the single loop holding every model and detector before"))
    speed = rate_row(f"default pipeline beside it (Pipeline.run, warm cache, {n:,} rows)", n,
                     [n / r for r in rates], unit="obs/s", reference=True, better="higher",
                     check="observations per CPU-second of the loop whose compile time is above")
    return [first, speed]


def _status_store(tmp: Path) -> Path:
    """A store of a simulated retail year (12 series x 365 days) written by ``elmon ingest``."""
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    log, db = tmp / "log.csv", tmp / "status.sqlite"
    subprocess.run([sys.executable, "-m", "monitor", "simulate", "retail", "--out", str(log),
                    "--seed", "1"], cwd=ROOT, env=env, check=True, capture_output=True)
    subprocess.run([sys.executable, "-m", "monitor", "ingest", str(log), "--db", str(db),
                    "--quiet"], cwd=ROOT, env=env, check=True, capture_output=True)
    return db


def status_rows(ctx: Context, runs: int) -> list[Row]:
    """``elmon status`` against ``import pandas``, started in turn (module docstring)."""
    with tempfile.TemporaryDirectory(prefix="elmon-status-") as tmp:
        db = _status_store(Path(tmp))
        status_cmd = ["-m", "monitor", "status", "--db", str(db)]
        pandas_cmd = ["-c", "import pandas"]
        _wall(status_cmd)
        t_status, t_pandas = [], []
        for _ in range(runs):
            t_status.append(_wall(status_cmd))
            t_pandas.append(_wall(pandas_cmd))
    s, p = median(t_status), median(t_pandas)
    ratio = s / p
    return [Row("start and run of elmon status on a store of 12 series x 365 days (fresh "
                "interpreter, wall)", s, "s", t_status, target="<= 1.5x import pandas",
                met=ratio <= 1.5, better="lower", ratio=f"{ratio:.2f}x the reference",
                check=f"python -c \"import pandas\" started alternately with it: {p:.3f} s "
                      f"(median of {runs})")]


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
    status = attempt("elmon status start", lambda: status_rows(ctx, runs))
    cold = attempt("first replay after install (cold compile)", lambda: cold_compile_rows(ctx))
    return [main, ref, cli, *status, *cold]
