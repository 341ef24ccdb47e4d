"""Replay of a 10M-row CSV end to end, against pyarrow's parse time of the same file.

The file (1,000 series x 10,000 hourly steps, ``series,ts,price,quantity``, ISO 8601 times with
``Z``, about 0.5 GB) is generated once in the run's temporary directory and removed with it.
Both sides read it from the page cache.

- reference: ``pyarrow.csv.read_csv(path)`` with its defaults (multi-threaded parse and type
  inference into an Arrow table, nothing else);
- elmon: :func:`monitor.replay.run_replay` (read, validate every row, the compiled pipeline over
  every series, and write ``estimates.csv`` with one row per observation, ``alerts.csv``,
  ``rejects.csv`` and ``summary.json``), output removed after each run.

Target (issue 8): replay <= 2x the parse time. The check: every row accepted, and the final
estimate of one series in ``summary.json`` equals :func:`monitor.estimators.run_batch` on that
series' rows as written in the file (same rounded prices and quantities).
"""

from __future__ import annotations

import shutil

import numpy as np

from benchmarks.common import Context, Row, median, not_measured, timed
from benchmarks.data import loglog_frame, write_csv

NEED_GB = 4.0     # input ~0.5 GB plus estimates.csv ~2.2 GB, with room


def run(ctx: Context) -> list[Row]:
    import pyarrow.csv as pacsv

    S, T = ctx.size(1_000, 200), ctx.size(10_000, 5_000)
    n = S * T
    figure = f"replay of a {n / 1e6:.0f}M-row CSV end to end (run_replay)"
    free_gb = shutil.disk_usage(ctx.tmp).free / 1e9
    if free_gb < NEED_GB:
        return [not_measured(figure, f"only {free_gb:.1f} GB free in {ctx.tmp}; needs {NEED_GB} GB",
                             target="<= 2x pyarrow parse")]
    path = ctx.tmp / "log.csv"
    t_gen, tbl = timed(lambda: loglog_frame(S, T, seed=5))
    first_series = tbl.column("series")[0].as_py()
    first_rows = tbl.slice(0, T).to_pandas()
    t_write, _ = timed(lambda: write_csv(tbl, path))
    del tbl
    size_mb = path.stat().st_size / 1e6
    ctx.log(f"    generated {n:,} rows ({size_mb:.0f} MB) in {t_gen + t_write:.0f} s")

    parse = []
    for _ in range(ctx.runs):
        t, table = timed(lambda: pacsv.read_csv(path))
        assert table.num_rows == n
        del table
        parse.append(t)

    from monitor.replay import run_replay

    replay, summary, cut = [], None, False
    for r in range(ctx.runs):
        out = ctx.tmp / f"replay-{r}"
        t, summary = timed(lambda: run_replay(path, out))
        shutil.rmtree(out)
        replay.append(t)
        if r + 1 < ctx.runs and ctx.time_left() < 1.1 * t:   # the whole bench ends in time
            cut = True
            break
    path.unlink()

    tp, trp = median(parse), median(replay)
    ratio = trp / tp
    timing = summary["timing"]
    main = Row(figure, trp, "s", replay, target="<= 2x pyarrow parse", met=ratio <= 2.0,
               ratio=f"{ratio:.1f}x pyarrow's parse time")
    read_s, core_s = timing["read_s"], timing["core_s"]
    write_s = timing["wall_s"] - read_s - core_s
    main.check = (f"{n / trp / 1e6:.2f}M rows/s; {size_mb:.0f} MB file; last run: read "
                  f"{read_s:.1f} s, validate + estimate {core_s:.1f} s, write outputs "
                  f"{write_s:.1f} s; {_check(summary, first_series, first_rows, n)}"
                  + (f"; {len(replay)} run(s) only: the time budget of the whole benchmark "
                     f"left no room for more" if cut else ""))
    ref = Row(f"pyarrow.csv.read_csv of the same file (parse only)", tp, "s", parse,
              reference=True, better="lower", ratio=f"replay / parse = {ratio:.1f}x",
              check=f"{n / tp / 1e6:.1f}M rows/s, multi-threaded, defaults")
    return [main, ref]


def _check(summary: dict, series: str, rows, n: int) -> str:
    from monitor.estimators import run_batch
    from monitor.config import Config, estimator_from_config

    est = estimator_from_config(Config())
    lp = np.log(rows["price"].to_numpy())
    X = np.column_stack([np.ones(lp.size), lp])
    y = np.log(rows["quantity"].to_numpy())
    b = run_batch(est, np.zeros(lp.size, dtype=np.int64), X, y).beta[-1]
    got = summary["final"][series]["beta"]
    d = abs(got - b)
    ok = summary["accepted"] == n and summary["rejected"] == 0 and d <= 1e-12
    return (f"check: {summary['accepted']:,} of {n:,} rows accepted, {summary['rejected']} "
            f"rejected; final b of {series} {got:.6f} vs run_batch on its rows {b:.6f} "
            f"(|diff| {d:.0e}, tolerance 1e-12): {'agrees' if ok else '**DIFFERS**'}")
