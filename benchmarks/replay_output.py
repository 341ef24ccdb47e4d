"""Replay's output and validation costs (issue 15), each beside its reference in the same run.

On a generated 3M-row CSV (1,000 series x 3,000 hourly steps, ``series,ts,price,quantity``).
Replays and the parse are timed warm (a small replay through the same code paths runs first, so
numba's compile or cache load is not counted) and as process CPU time, every thread counted:
the machine is shared, and wall time there measures the neighbours (the wall time is noted).

- ``elmon replay`` (:func:`monitor.replay.driver.replay`, no progress bar) writing every
  estimate as Parquet (``--estimates-format parquet``), as CSV (the default), and as Parquet
  with ``--sample-every 24``; reference: ``pyarrow.csv.read_csv`` of the same file (parse only).
  Targets (issue 15): Parquet <= 3x the parse, ``--sample-every 24`` <= 2x. Check: the Parquet
  estimates equal the CSV estimates read back with the same types, to the bit.
- the same number of rows over 100,000 series x 30 steps: cost per row against the
  1,000-series file (target <= 1.2x); and writing that run's ``summary.json``
  (:func:`monitor.replay.driver.summary_json`) against ``json.dumps(summary, indent=2,
  sort_keys=True)`` of the same summary, equal JSON values checked.
- the ordered validation checks (duplicates, late rows, unit errors) on the 3M rows
  (:func:`monitor.rows.validate.ordered_checks`, medians from ascending copies of the
  series' windows kept in order as rows are accepted) against the previous form compiled here
  (``np.median`` per row); identical codes.
"""

from __future__ import annotations

import json
import shutil
import time

import numpy as np

from benchmarks.common import Context, Row, median, timed
from benchmarks.data import loglog_frame, write_csv


def _cpu_timed(fn):
    """(CPU seconds of the process, wall seconds, result) of ``fn()``. The machine is shared
    (load 8-13 on 2 cores while the last runs were taken), so wall time says more about the
    neighbours than about the code: the figures are process CPU time, every thread counted
    (pyarrow's parser and elmon's reader thread alike)."""
    t, res = timed(fn)
    return t * timed.cpu_share, t, res


def _replays(ctx: Context, path, runs: int, **kw) -> tuple[list[float], dict, list[float]]:
    """CPU seconds of ``runs`` warm replays of ``path`` (median taken by the caller), the last
    summary, and the wall seconds of each run."""
    from monitor.replay.driver import replay

    times, walls, summary = [], [], None
    for r in range(runs):
        out = ctx.tmp / f"ro-{r}"
        c, t, summary = _cpu_timed(lambda: replay(path, out, progress=False, **kw))
        times.append(c)
        walls.append(t)
        if r + 1 < runs:
            shutil.rmtree(out)
    return times, summary, walls


def _warm_up(ctx: Context, small) -> float:
    """Replay a small log through every path the timed runs take (whole file and in chunks, CSV
    and Parquet estimates, sampled), so numba's compile or cache load is never on the clock;
    returns its wall seconds."""
    from monitor.replay.driver import replay

    t0 = time.perf_counter()
    for i, kw in enumerate(({}, dict(estimates_format="parquet"),
                            dict(chunk_rows=700, estimates_format="parquet"),
                            dict(chunk_rows=700, estimates_format="parquet", sample_every=24))):
        out = ctx.tmp / f"ro-warm-{i}"
        replay(small, out, progress=False, **kw)
        shutil.rmtree(out)
    return time.perf_counter() - t0


def _ordered_old():
    """The ordered checks as they were (np.median of the recent prices per row): reference."""
    from numba import njit

    @njit(cache=False)
    def old(sid, ts, lp, last_ts, ring, ring_ts, count, lateness_ns, log_ratio, code,
            batch_median):
        w = ring.shape[1]
        tmp = np.empty(w)
        for j in range(sid.shape[0]):
            s = sid[j]
            if count[s] > 0 or last_ts[s] != np.iinfo(np.int64).min:
                dup = ts[j] == last_ts[s]
                for i in range(min(count[s], w)):
                    if ring_ts[s, i] == ts[j]:
                        dup = True
                if dup:
                    code[j] = 1
                    continue
                if ts[j] < last_ts[s] - lateness_ns:
                    code[j] = 2
                    continue
            c = min(count[s], w)
            if c >= 2:
                for i in range(c):
                    tmp[i] = ring[s, i]
                med = np.median(tmp[:c])
            else:
                med = batch_median[s]
            if med == med and abs(lp[j] - med) >= log_ratio:
                code[j] = 3
                continue
            ring[s, count[s] % w] = lp[j]
            ring_ts[s, count[s] % w] = ts[j]
            count[s] += 1
            if ts[j] > last_ts[s]:
                last_ts[s] = ts[j]
    return old


def _ordered_rows(ctx: Context) -> list[Row]:
    from monitor.rows.validate import WINDOW, ordered_checks

    S, T = ctx.size(1_000, 200), ctx.size(3_000, 500)
    rng = np.random.default_rng(21)
    sid = np.repeat(np.arange(S, dtype=np.int64), T)
    ts = np.tile(np.arange(T, dtype=np.int64) * 3_600 * 10**9, S)
    dup = rng.random(sid.size) < 0.01
    ts[1:][dup[1:]] = ts[:-1][dup[1:]]                      # 1% duplicates
    lp = np.log(rng.uniform(2, 8, S))[sid] + rng.normal(0, 0.1, sid.size)
    lp[rng.random(sid.size) < 0.01] += np.log(100.0)        # 1% unit errors
    bm = np.full(S, np.nan)
    old = _ordered_old()

    def fresh():
        return (np.full(S, np.iinfo(np.int64).min), np.zeros((S, WINDOW)),
                np.zeros((S, WINDOW), dtype=np.int64), np.zeros(S, dtype=np.int64),
                np.zeros(sid.size, dtype=np.int8))

    def run_new():
        st = fresh()
        ordered_checks(sid, ts, lp, *st[:4], 0, np.log(50.0), False, st[4], bm,
                       np.zeros(sid.size), np.zeros((S, WINDOW)), np.zeros(S, np.int64), 0.0)
        return st

    def run_old():
        st = fresh()
        old(sid, ts, lp, *st[:4], 0, np.log(50.0), st[4], bm)
        return st

    run_new(), run_old()                       # compile outside the clock
    t_new, t_old, a, b = [], [], None, None
    for _ in range(ctx.runs):
        t, a = timed(run_new)
        t_new.append(t)
        t, b = timed(run_old)
        t_old.append(t)
    same = all(np.array_equal(x, y) for x, y in zip(a, b))
    codes = np.bincount(a[4], minlength=4)
    n = sid.size
    rn, ro = n / median(t_new), n / median(t_old)
    main = Row(f"validation, ordered checks (duplicate, late, unit error) on {n:,} rows of "
               f"{S:,} series", rn, "rows/s", [n / t for t in t_new], target="report",
               check=(f"median of the last {WINDOW} accepted prices from a sorted copy of the "
                      f"window kept in order; codes "
                      f"{codes[1]:,} duplicates, {codes[2]:,} late, {codes[3]:,} unit errors"))
    ref = Row("the same checks in their previous form (np.median per row, compiled here)", ro,
              "rows/s", [n / t for t in t_old], reference=True, ratio=f"elmon {rn / ro:.1f}x faster",
              check=f"codes and per-series state identical: {'agrees' if same else '**DIFFERS**'}")
    return [main, ref]


def _parquet_equals_csv(out) -> str:
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    par = pq.read_table(out / "estimates.parquet")
    # an empty CSV field is a missing value (a row without a band, while warming up): Parquet
    # keeps it as null, so the CSV is read back with empty strings as nulls too
    opts = pacsv.ConvertOptions(column_types=par.schema, strings_can_be_null=True)
    return par, pacsv.read_csv(out / "estimates.csv", convert_options=opts)


def run(ctx: Context) -> list[Row]:
    import pyarrow.csv as pacsv

    rows: list[Row] = []
    S, T = ctx.size(1_000, 100), ctx.size(3_000, 1_000)
    n = S * T
    path = ctx.tmp / "ro-log.csv"
    write_csv(loglog_frame(S, T, seed=15), path)
    small = ctx.tmp / "ro-warm.csv"
    write_csv(loglog_frame(4, 500, seed=6), small)
    t_warm = _warm_up(ctx, small)

    parse, parse_wall = [], []
    for _ in range(ctx.runs):
        c, t, tbl = _cpu_timed(lambda: pacsv.read_csv(path))
        parse.append(c)
        parse_wall.append(t)
        del tbl
    tp = median(parse)

    t_par, s_par, w_par = _replays(ctx, path, ctx.runs, estimates_format="parquet")
    par_dir = ctx.tmp / "ro-par"
    shutil.move(str(ctx.tmp / f"ro-{ctx.runs - 1}"), par_dir)
    t_csv, s_csv, w_csv = _replays(ctx, path, ctx.runs)
    csv_dir = ctx.tmp / f"ro-{ctx.runs - 1}"
    shutil.copy(par_dir / "estimates.parquet", csv_dir / "estimates.parquet")
    a, b = _parquet_equals_csv(csv_dir)
    same = a.num_rows == n and a.equals(b)
    shutil.rmtree(csv_dir)
    shutil.rmtree(par_dir)
    t_s24, s_s24, w_s24 = _replays(ctx, path, ctx.runs, estimates_format="parquet",
                                   sample_every=24)
    shutil.rmtree(ctx.tmp / f"ro-{ctx.runs - 1}")

    def rrow(label, times, walls, target, limit, extra=""):
        r = median(times) / tp
        return Row(f"replay of a {n / 1e6:.0f}M-row CSV ({S:,} series), {label}, CPU time",
                   median(times), "s", times, target=target,
                   met=(r <= limit) if limit else None, better="lower",
                   ratio=f"{r:.1f}x pyarrow's parse CPU time",
                   check=(f"{extra}; wall {median(walls):.1f} s (shared machine); warm: a "
                          f"replay of 2,000 rows through the same paths ran first "
                          f"({t_warm:.1f} s, not counted)"))

    rows.append(rrow("every estimate as Parquet (--estimates-format parquet)", t_par, w_par,
                     "<= 3x pyarrow parse", 3.0,
                     f"{n / median(t_par) / 1e6:.2f}M rows per CPU-second; {s_par['accepted']:,} of {n:,} "
                     f"rows accepted; estimates.parquet equals estimates.csv read back with the "
                     f"same types ({n:,} rows, every column, to the bit): "
                     f"{'agrees' if same else '**DIFFERS**'}"))
    rows.append(rrow("every estimate as CSV (default)", t_csv, w_csv, "report", None,
                     f"{n / median(t_csv) / 1e6:.2f}M rows per CPU-second; CSV stays the "
                     f"default for small logs"))
    rows.append(rrow("--sample-every 24, Parquet", t_s24, w_s24, "<= 2x pyarrow parse", 2.0,
                     f"{s_s24['estimates_written']:,} estimates written"))
    rows.append(Row("pyarrow.csv.read_csv of the same file (parse only), CPU time", tp, "s",
                    parse, reference=True, better="lower",
                    check=(f"{n / tp / 1e6:.1f}M rows per CPU-second, multi-threaded (CPU of "
                           f"every thread), defaults; wall {median(parse_wall):.2f} s")))
    path.unlink()

    # ---- the same number of rows over 100,000 series
    S2, T2 = ctx.size(100_000, 10_000), n // ctx.size(100_000, 10_000)
    path2 = ctx.tmp / "ro-wide.csv"
    write_csv(loglog_frame(S2, T2, seed=16), path2)
    runs2 = max(1, min(ctx.runs, 2))
    t_wide, s_wide, _ = _replays(ctx, path2, runs2, estimates_format="parquet")
    shutil.rmtree(ctx.tmp / f"ro-{runs2 - 1}")
    path2.unlink()
    per_wide = median(t_wide) / (S2 * T2)
    per_narrow = median(t_par) / n
    r = per_wide / per_narrow
    rows.append(Row(f"replay CPU cost per row, {S2:,} series x {T2:,} steps (Parquet estimates)",
                    per_wide * 1e6, "us", [t / (S2 * T2) * 1e6 for t in t_wide],
                    target="<= 1.2x the 1,000-series cost", met=r <= 1.2, better="lower",
                    ratio=f"{r:.2f}x the cost per row at {S:,} series",
                    check=(f"{s_wide['accepted']:,} rows accepted, {s_wide['series']:,} series "
                           f"in summary.json")))
    rows.append(Row(f"  the same, {S:,} series x {T:,} steps (the Parquet run above)",
                    per_narrow * 1e6, "us", [t / n * 1e6 for t in t_par], reference=True,
                    better="lower"))

    # ---- summary.json of the 100k-series run
    from monitor.replay.driver import summary_json

    t_new, t_old = [], []
    for _ in range(ctx.runs):
        t, new = timed(lambda: summary_json(s_wide))
        t_new.append(t)
        t, old = timed(lambda: json.dumps(s_wide, indent=2, sort_keys=True))
        t_old.append(t)
    same = json.loads(new) == json.loads(old)
    rows.append(Row(f"writing summary.json of {s_wide['series']:,} series (summary_json)",
                    median(t_new), "s", t_new, target="report", better="lower",
                    ratio=f"{median(t_old) / median(t_new):.1f}x faster than the reference",
                    check=(f"{len(new) / 1e6:.1f} MB; one line per series; json.loads of both "
                           f"equal: {'agrees' if same else '**DIFFERS**'}")))
    rows.append(Row("json.dumps(summary, indent=2, sort_keys=True) of the same summary",
                    median(t_old), "s", t_old, reference=True, better="lower",
                    check="the previous way (the standard library's Python encoder with indent)"))
    rows += _ordered_rows(ctx)
    small.unlink()
    return rows
