"""Replay of a 10M-row CSV end to end, against pyarrow's parse time of the same file.

The file (1,000 series x 10,000 hourly steps, ``series,ts,price,quantity``, ISO 8601 times with
``Z``, about 0.5 GB) is generated once in the run's temporary directory and removed with it.
Both sides read it from the page cache.

- reference: ``pyarrow.csv.read_csv(path)`` with its defaults (multi-threaded parse and type
  inference into an Arrow table, nothing else);
- elmon: what ``elmon replay LOG --out DIR`` runs, :func:`monitor.replay.driver.replay` with
  its defaults (a log this size is read in chunks of 1M rows; every row validated, the compiled
  pipeline over every series, ``estimates.csv`` with one row per observation, ``alerts.csv``,
  ``rejects.csv`` and ``summary.json``), no progress bar; output removed after each run.
  (:func:`monitor.replay.driver.run_replay`, the whole-file form, where the driver is absent.)

Target (issue 8): replay <= 2x the parse time. The check: every row accepted, and the final
estimate of one series in ``summary.json`` equals :func:`monitor.estimators.run_batch` on that
series' rows as written in the file (same rounded prices and quantities).
"""

from __future__ import annotations

import shutil

import numpy as np

from benchmarks.common import (Context, Row, has_module, median, not_measured, profile_shares,
                               shares_text, timed)
from benchmarks.data import loglog_frame, write_csv


NEED_GB = 4.0     # input ~0.5 GB plus estimates.csv ~2.2 GB, with room


def run(ctx: Context) -> list[Row]:
    import pyarrow.csv as pacsv

    S, T = ctx.size(1_000, 200), ctx.size(10_000, 5_000)
    n = S * T
    figure = f"replay of a {n / 1e6:.0f}M-row CSV end to end"
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

    if has_module("monitor.replay.driver"):
        from monitor.replay.driver import replay as driver

        how = "replay_engine.replay, as elmon replay"
        go = lambda out, log=path: driver(log, out, progress=False)   # noqa: E731
    else:
        from monitor.replay.driver import run_replay

        how = "run_replay"
        go = lambda out, log=path: run_replay(log, out)               # noqa: E731
    small = ctx.tmp / "warm.csv"          # compile / load the kernels outside the clock
    write_csv(loglog_frame(4, 500, seed=6), small)
    t_warm, _ = timed(lambda: go(ctx.tmp / "warm-out", small))
    shutil.rmtree(ctx.tmp / "warm-out")
    small.unlink()
    ctx.log(f"    warm-up replay of 2,000 rows: {t_warm:.1f} s")
    replay, summary, cut = [], None, False
    for r in range(ctx.runs):
        out = ctx.tmp / f"replay-{r}"
        t, summary = timed(lambda: go(out))
        ctx.log(f"    replay run {r + 1}: {t:.1f} s")
        shutil.rmtree(out)
        replay.append(t)
        if r + 1 < ctx.runs and ctx.time_left() < 1.1 * t:   # the whole bench ends in time
            cut = True
            break
    path.unlink()
    shares = _profile(ctx, go)

    tp, trp = median(parse), median(replay)
    ratio = trp / tp
    timing = summary["timing"]
    main = Row(f"{figure} ({how})", trp, "s", replay, target="<= 2x pyarrow parse", met=ratio <= 2.0,
               ratio=f"{ratio:.1f}x pyarrow's parse time", profile=shares)
    main.check = (f"{n / trp / 1e6:.2f}M rows/s; {size_mb:.0f} MB file; last run: "
                  f"{_split(timing, how)}; a warm-up replay of 2,000 rows first (compiling or "
                  f"loading the kernels) took {t_warm:.1f} s, not counted; "
                  f"{_check(summary, first_series, first_rows, n)}; where the time goes (cProfile "
                  f"of a 1M-row replay): {shares_text(shares) or 'not profiled'}"
                  + (f"; {len(replay)} run(s) only: the time budget of the whole benchmark "
                     f"left no room for more" if cut else ""))
    ref = Row("pyarrow.csv.read_csv of the same file (parse only)", tp, "s", parse,
              reference=True, better="lower", ratio=f"replay / parse = {ratio:.1f}x",
              check=f"{n / tp / 1e6:.1f}M rows/s, multi-threaded, defaults")
    return [main, ref]


#: parts of a replay for the profile (file fragment, function): they do not nest
PARTS = {
    "writing outputs": [("replay_engine.py", "write"), ("logio.py", "write_table")],
    "validation": [("validate.py", "validate_frame")],
    "reading": [("logio.py", "read_log"), ("chunks.py", "iter_chunks")],
    "pipeline kernel": [("pipeline_kernel.py", "pipeline_run")],
    "estimates table": [("replay_kernel.py", "estimates_table"), ("replay.py", "estimates_frame")],
}


def _profile(ctx: Context, go) -> dict[str, float]:
    """Shares of a 1M-row replay's time by part (one run under cProfile, not timed)."""
    small = ctx.tmp / "profile.csv"
    write_csv(loglog_frame(ctx.size(200, 40), 5_000, seed=8), small)
    try:
        return profile_shares(lambda: go(ctx.tmp / "profile-out", small), PARTS)
    finally:
        shutil.rmtree(ctx.tmp / "profile-out", ignore_errors=True)
        small.unlink()


def _split(timing: dict, how: str) -> str:
    read_s, core_s, wall = timing.get("read_s") or 0.0, timing["core_s"], timing["wall_s"]
    if how.startswith("run_replay"):     # core_s there is validate + estimate, after reading
        return (f"read {read_s:.1f} s, validate + estimate {core_s:.1f} s, write outputs "
                f"{wall - read_s - core_s:.1f} s")
    # the chunked driver writes as it goes: core_s runs from the start and includes reading
    peak = timing.get("peak_rss_mb")
    return (f"read {read_s:.1f} s, validate + estimate + write {core_s - read_s:.1f} s, "
            f"summary {wall - core_s:.1f} s, {timing.get('chunks')} chunks"
            + (f", peak RSS {peak:,.0f} MB" if peak else ""))


def _check(summary: dict, series: str, rows, n: int) -> str:
    from monitor.estimators import run_batch
    from monitor.settings import Config, estimator_from_config

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
