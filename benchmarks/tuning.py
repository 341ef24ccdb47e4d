"""Threshold tuning: settings x observations per second, local processes and Dask.

Data: the retail simulator (invented products and stores, known change points), 48 series x
365 days, written as a CSV log with its truth file. Search space: ``[detectors] arl0 = [2000,
20000]`` x ``slope_k = [0.5, 1.0]`` x ``[estimator] forgetting = [0.98, 0.99]`` (8 settings
plus the defaults row, so 9 replays of the whole log, each threshold designed for its setting).

- local: :func:`monitor.tuning.tune` with ``engine="local"`` and 2 worker processes (the
  machine's cores);
- Dask: the same call with ``engine="dask"`` on a LocalCluster (127.0.0.1) the benchmark starts
  with 2 single-threaded workers (started before the clock; series partitioned over them).

Both figures are settings x observations per second of wall time (``tune``'s own
``timing.setting_observations_per_s``); median of up to 2 runs per engine (1 when the time
budget of the whole benchmark is nearly used up; tuning runs last). The check: both engines score every
setting the same (detection rate, false alarms, delays in ``tuning.csv``), as
:mod:`monitor.tuning.space` promises.
"""

from __future__ import annotations

import shutil

import numpy as np
import pandas as pd

from benchmarks.common import Context, Row, median, timed


SPACE = {"detectors": {"arl0": [2000, 20000], "slope_k": [0.5, 1.0]},
         "estimator": {"forgetting": [0.98, 0.99]}}
RUNS = 2        # per engine at most, fewer when the 15-minute budget is nearly used up
COMPARE = ["detection_rate", "false_alarms", "detected", "changes", "median_delay_obs"]


def _data(ctx: Context):
    from simulators import simulate, write_outputs

    sim = simulate("retail", seed=3, n_series=ctx.size(48, 12), length=365)
    paths = write_outputs(sim, ctx.tmp / "tune-log.csv", ctx.tmp / "tune-truth.csv")
    return paths["log"], paths["truth"], len(sim.log)


def _runs(ctx: Context, log, truth, engine: str, **kw):
    from monitor.tuning.tune import tune

    rates, res, t = [], None, 0.0
    for r in range(min(ctx.runs, RUNS)):
        if r and ctx.time_left() < 1.2 * t * (2 if engine == "local" else 1):
            break                        # leave room for the other engine: end within 15 min
        out = ctx.tmp / f"tune-{engine}-{r}"
        t, summary = timed(lambda: tune(log, out, truth=truth, space=SPACE, engine=engine,
                                        progress=False, **kw))
        rates.append(summary["timing"]["setting_observations_per_s"])
        res = pd.read_csv(out / "tuning.csv")
        shutil.rmtree(out)
    return rates, res, summary


def _warm() -> float:
    """Design the grid's thresholds once outside the clock (compiles the design kernels; the
    designs are then reused within the process, as in a session that tunes repeatedly)."""
    from monitor.settings import Config
    from monitor.tuning import grid as R
    from monitor.tuning.space import grid, space_from_dict

    t, _ = timed(lambda: R.with_thresholds(Config(), [{}] + grid(space_from_dict(SPACE))))
    return t


def run(ctx: Context) -> list[Row]:
    log, truth, n_obs = _data(ctx)
    t_warm = _warm()
    ctx.log(f"    threshold designs warmed in {t_warm:.0f} s")
    rates, local, summary = _runs(ctx, log, truth, "local", workers=2)
    n_set = summary["settings"]
    main = Row(f"tuning, local: {n_set} settings x {n_obs:,} observations, 2 worker processes",
               median(rates), "setting-obs/s", rates, target="report",
               check=(f"wall {n_set * n_obs / median(rates):.1f} s per tuning run (worker "
                      f"processes spawned per call); designing the grid's thresholds the first "
                      f"time in a process took {t_warm:.0f} s, done before the clock"))
    rows = [main]

    from dask.distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1",
                           dashboard_address=None, processes=True)
    client = Client(cluster)
    try:
        drates, dres, _ = _runs(ctx, log, truth, "dask", scheduler=cluster.scheduler_address)
    finally:
        client.close()
        cluster.close()
    a = local[COMPARE].to_numpy(dtype=float)
    b = dres[COMPARE].to_numpy(dtype=float)
    same = a.shape == b.shape and bool(np.all((a == b) | (np.isnan(a) & np.isnan(b))))
    dask = Row("tuning, Dask LocalCluster (2 workers x 1 thread), same grid and log",
               median(drates), "setting-obs/s", drates, target="report",
               ratio=f"local / Dask = {median(rates) / median(drates):.2f}x",
               check=(f"check: every setting's {', '.join(COMPARE)} equal to the local engine's: "
                      f"{'agrees' if same else '**DIFFERS**'}"))
    rows.append(dask)
    for p in (log, truth):
        p.unlink(missing_ok=True)
    return rows
