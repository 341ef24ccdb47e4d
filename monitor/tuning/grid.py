"""Running a tuning grid: the log's rows validated once, every setting through the pipeline.

Local engine: the validated rows are saved as ``.npy`` files in a temporary folder and worker
processes (``spawn``, one per core) map them read-only, so memory does not grow with the
number of workers; each worker evaluates whole settings. Dask engine: the series are
partitioned over the cluster's workers as in the replay (:mod:`monitor.replay.dask`) and each
partition evaluates every setting on its own series; the scores of the partitions are merged
per setting (:meth:`monitor.replay.detection.Scores.merge`), which gives the same numbers as one pass.
"""

from __future__ import annotations

import os
import tempfile
from concurrent.futures import ProcessPoolExecutor
from multiprocessing import get_context
from pathlib import Path

import numpy as np
import pandas as pd

from monitor.detectors.spec import CHARTS, SIGNALS
from monitor.errors import ConfigError
from monitor.ingest.logio import column_names
from monitor.progress import Progress
from monitor.replay.detection import Scores, score
from monitor.settings import Config, estimator_from_config
from monitor.tuning.rows import Rows, rows_from_frames, validation_setup
from monitor.tuning.space import setting_config


def opened_alerts(rows: Rows, events: pd.DataFrame | None) -> pd.DataFrame:
    """``series, ts (ns), rule`` of the events that open an alert."""
    if events is None or not len(events):
        return pd.DataFrame({"series": pd.Series(dtype=object), "ts": pd.Series(dtype="int64"),
                             "rule": pd.Series(dtype=object)})
    ev = events[events["action"] == "open"]
    r = ev["row"].to_numpy(dtype=np.int64)
    names = np.asarray(rows.names, dtype=object)
    return pd.DataFrame({"series": names[rows.sid[r]], "ts": rows.ts[r],
                         "rule": ev["kind"].astype(str).to_numpy(dtype=object)})


def evaluate(rows: Rows, truth: pd.DataFrame, base: Config, setting: dict, horizon: int,
             partial: bool = False) -> Scores:
    """Scores of one setting: the pipeline over ``rows``, its opened alerts against ``truth``."""
    from monitor.pipeline.run import Pipeline

    cfg = setting_config(base, setting)
    est = estimator_from_config(cfg)
    base_est = estimator_from_config(base)
    if est.parameter_names != base_est.parameter_names:
        raise ConfigError("the controls cannot be part of the search space (they change the "
                          "design matrix); set them in the base config")
    pipe = Pipeline.from_config(cfg, est)
    res = pipe.run(rows.sid, rows.X, rows.y, n_series=len(rows.names), ts=rows.ts,
                   offset=rows.offset)      # the Poisson model's log exposure (issue 13)
    return score(rows.sid, rows.ts, rows.names, opened_alerts(rows, res.events), truth, horizon,
                 partial=partial)


#: config key of each chart's threshold, per signal
#: [detectors] key of each chart's threshold per signal (from the chart table)
THRESHOLD_KEYS = {signal: {name: spec.threshold_keys[signal] for name, spec in CHARTS.items()}
                  for signal in SIGNALS}


def with_thresholds(base: Config, settings: list[dict], say=None,
                    every_s: float = 5.0) -> list[dict]:
    """Each setting plus its designed chart thresholds as explicit ``[detectors]`` keys.

    The designs are simulated here, once, in grid order from an empty design cache
    (:mod:`monitor.detectors.design` caches and extends its simulations per process), so every
    worker and every engine, in any process, evaluates the same thresholds; tuning.csv
    reports them. ``say`` (a function of one line of text), when given, hears how many
    settings are designed, at most every ``every_s`` seconds and at the end (issue 16: a
    38-79 s run printed nothing until it was over).
    """
    import time

    from monitor.detectors import design
    from monitor.pipeline.run import Pipeline

    # A design extends cached simulations, so its last digits depend on what the process
    # designed before; start from an empty cache so the thresholds depend on the grid alone.
    clear = getattr(getattr(design, "_simulation", None), "cache_clear", None)
    if clear is not None:
        clear()
    out = []
    t0 = last = time.monotonic()
    for i, s in enumerate(settings, start=1):
        cfg = setting_config(base, s)
        pipe = Pipeline.from_config(cfg, estimator_from_config(cfg))
        full = dict(s)
        for signal, th in pipe.settings()["thresholds"].items():
            if th is not None and th["chart"] in THRESHOLD_KEYS[signal]:
                full[("detectors", THRESHOLD_KEYS[signal][th["chart"]])] = float(th["threshold"])
        out.append(full)
        now = time.monotonic()
        if say is not None and (now - last >= every_s or i == len(settings)):
            last = now
            say(f"chart thresholds designed for {i} of {len(settings)} settings "
                f"({now - t0:.1f} s)")
    return out


# --------------------------------------------------------------------------- local pool
_WORKER: dict = {}
#: setting x observation steps below which a grid runs in this process (a worker takes ~3 s to start)
POOL_MIN_WORK = 5_000_000


def _init_worker(folder: str, names: list[str], truth, base_data: dict, horizon: int) -> None:
    # copy-on-write maps: shared pages, and writable arrays (the compiled kernels' usual types)
    a = {k: np.load(Path(folder) / f"{k}.npy", mmap_mode="c") for k in ("sid", "X", "y", "ts")}
    off = Path(folder) / "offset.npy"      # the Poisson model's log exposure, when it has one
    a["offset"] = np.load(off, mmap_mode="c") if off.exists() else None
    _WORKER.update(rows=Rows(a["sid"], a["X"], a["y"], a["ts"], names, offset=a["offset"]),
                   truth=truth,
                   base=Config(base_data), horizon=horizon)


def _evaluate_in_worker(setting: dict) -> dict:
    w = _WORKER
    return evaluate(w["rows"], w["truth"], w["base"], setting, w["horizon"]).summary()


def local_cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def evaluate_local(rows: Rows, truth, base: Config, settings: list[dict], horizon: int,
                   workers: int | None = None, progress: bool = True) -> list[dict]:
    """Summaries of every setting, in order, using ``workers`` processes (default: all cores,
    or this process alone when the grid is small: fewer than :data:`POOL_MIN_WORK` setting x
    observation steps, where starting the workers would cost more than it saves)."""
    if workers is None and len(settings) * rows.n < POOL_MIN_WORK:
        workers = 1
    workers = min(workers or local_cores(), len(settings))
    bar = Progress(len(settings), "tune", enabled=progress, unit="settings")
    out: list[dict] = []
    if workers <= 1:
        for s in settings:
            out.append(evaluate(rows, truth, base, s, horizon).summary())
            bar.update(1)
        bar.close()
        return out
    with tempfile.TemporaryDirectory(prefix="elmon-tune-") as folder:
        for k in ("sid", "X", "y", "ts", "offset"):
            if getattr(rows, k) is not None:
                np.save(Path(folder) / f"{k}.npy", np.ascontiguousarray(getattr(rows, k)))
        with ProcessPoolExecutor(workers, mp_context=get_context("spawn"), initializer=_init_worker,
                                 initargs=(folder, rows.names, truth, base.data, horizon)) as pool:
            for summary in pool.map(_evaluate_in_worker, settings):
                out.append(summary)
                bar.update(1)
    bar.close()
    return out


# --------------------------------------------------------------------------- Dask
def tune_partition(pieces: list, offsets: list[int], base_data: dict, truth, settings: list[dict],
                   horizon: int, now_ns: int) -> tuple[list[Scores], int, int]:
    """Worker task: validate one partition's pieces, evaluate every setting on its series."""
    base = Config(base_data)
    setup = validation_setup(base, now_ns)
    frames = ((p.drop(columns="_pos"), 0, off + 1 + p["_pos"].to_numpy(dtype=np.int64))
              for p, off in zip(pieces, offsets))
    rows = rows_from_frames(frames, setup)
    mine = truth[truth["series"].isin(set(rows.names))]
    return [evaluate(rows, mine, base, s, horizon, partial=True) for s in settings], rows.n, rows.rejected


def evaluate_dask(log, base: Config, truth, settings: list[dict], horizon: int,
                  scheduler: str | None = None, npartitions: int | None = None,
                  chunk_rows: int | None = None, now_ns: int | None = None,
                  progress: bool = True) -> tuple[list[dict], int]:
    """Summaries of every setting from a Dask cluster; also the number of rows evaluated."""
    import time

    from monitor.ingest.chunks import WHOLE_BYTES, WHOLE_ROWS, input_size
    from monitor.ingest.logio import check_file, log_format
    from monitor.replay.dask import dask_client, log_blocks, read_split, split_part, split_rows

    log = str(check_file(log).resolve())
    small = input_size(log) <= (WHOLE_ROWS if log_format(log) == "parquet" else WHOLE_BYTES)
    blocks = log_blocks(log, chunk_rows, chunk_rows is None and small)
    now_ns = time.time_ns() if now_ns is None else int(now_ns)
    columns = dict(column_names(base))
    with dask_client(scheduler) as client:
        nparts = int(npartitions or 2 * max(1, len(client.nthreads())))
        splits = [client.submit(read_split, log, b, columns, nparts, pure=False) for b in blocks]
        counts = client.gather([client.submit(split_rows, s) for s in splits])
        offsets = np.r_[0, np.cumsum(counts)[:-1]].astype(int).tolist()
        truth_f = client.scatter(truth, broadcast=True)
        futs = [client.submit(tune_partition, [client.submit(split_part, s, p) for s in splits], offsets,
                              base.data, truth_f, settings, horizon, now_ns, pure=False)
                for p in range(nparts)]
        del splits
        bar = Progress(nparts, "tune (dask)", enabled=progress, unit="partitions")
        parts, n_rows = [], 0
        for f in futs:
            scores, n, _ = f.result()
            parts.append(scores)
            n_rows += n
            bar.update(1)
        bar.close()
    summaries = [Scores.merge([p[i] for p in parts], truth).summary() for i in range(len(settings))]
    return summaries, n_rows
