"""Replay driver: a log of any size through the batch kernel, with progress, truth and report.

``replay(log, out_dir, config, ...)`` is what ``elmon replay`` runs. It writes the files of
:mod:`monitor.replay.driver` (``estimates.csv``, ``alerts.csv``, ``rejects.csv``, ``summary.json``)
and, with a truth file, ``detection.csv`` (:mod:`monitor.replay.detection`); with ``report``, a
self-contained HTML report (:mod:`monitor.report.html`).

Reading
-------
A log up to :data:`WHOLE_BYTES` (CSV) or :data:`WHOLE_ROWS` (Parquet) is read whole, so its
rows may come in any order (each series is processed in timestamp order). A larger log, or any
log when ``chunk_rows`` is given, is read in chunks of about that many rows (CSV byte blocks,
Parquet row batches) and memory stays at a few times one chunk plus the per-series state and
the outputs kept for the summary. The validation gate and the pipeline states are carried from
chunk to chunk, so on a log in time order (as an appended log is) the results equal those of
the whole-file path. A row older than its series' last processed time (an unsorted log) is
then judged by the validation lateness rule (``allowed_lateness_s``, default 0: rejected as a
late row, with its reason): nothing is silently reordered. One more difference is possible:
the unit check of a series' first two rows uses the median of that series' prices in the chunk
it first appears in, rather than over the whole file.

Output order: ``estimates.csv`` holds chunks (or Dask partitions) in turn, each in series then
time order; ``alerts.csv`` is in time order (then series, rule); ``rejects.csv`` in row order.
"""

from __future__ import annotations

import json
import math
import resource
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from monitor.errors import ConfigError, SourceError
from monitor.estimators import kernel as K
from monitor.estimators.feedback import feedback_summary
from monitor.ingest.bounds_file import config_bounds, per_series_limits
from monitor.ingest.chunks import iter_chunks, log_chunks, read_whole
from monitor.ingest.logio import column_names, write_table
from monitor.pipeline.run import Pipeline
from monitor.progress import Progress
from monitor.replay.detection import DEFAULT_HORIZON, Scores, read_truth, score
from monitor.replay.groups import apply_groups
from monitor.replay.health import zero_counts, zero_fields
from monitor.live.groups import settings_from_config as group_settings_of
from monitor.replay.kernel import (ALERT_OUT_COLUMNS, FINAL_FIELDS, CarriedState, Partial, Setup,
                                   merge_final, partial_of, run_chunk)
from monitor.rows.frames import (ALERT_COLUMNS, ESTIMATE_COLUMNS, REJECT_OUT_COLUMNS, alerts_frame,
                                 estimates_frame)
from monitor.rows.prepare import check_rows, offset_of, order_of, prepare_rows
from monitor.settings import Config, default_config, estimator_from_config, validation_from_config
from monitor.types import STATUS_LABELS


MAX_REPORT_SERIES = 8

_F = pa.float64()
SCHEMAS = {
    "estimates": pa.schema([("series", pa.string()), ("ts", pa.string())]
                           + [(c, _F) for c in ESTIMATE_COLUMNS[2:7]] + [("status", pa.string())]
                           + [(c, _F) for c in ESTIMATE_COLUMNS[8:12]]
                           + [("band", pa.string())]),
    "alerts": pa.schema([("series", pa.string()), ("ts", pa.string()), ("rule", pa.string()),
                         ("beta", _F), ("beta_lo", _F), ("beta_hi", _F), ("message", pa.string()),
                         ("change_ts", pa.string())] + [(c, _F) for c in ALERT_COLUMNS[8:]]
                        + [("severity", pa.string())]),
    "rejects": pa.schema([("row", pa.int64())] + [(c, pa.string()) for c in REJECT_OUT_COLUMNS[1:]]),
}


#: formats of the estimates file (``estimates_format``): CSV for small logs and for reading by
#: eye; Parquet (the same columns and types) when every estimate of a large log is kept: about
#: a third of the CPU time of the CSV text (measured in benchmarks/replay_output.py)
ESTIMATES_FORMATS = ("csv", "parquet")


class TableWriter:
    """A CSV or Parquet file written a frame at a time with a fixed schema (the header or the
    Parquet schema is there even if no row is written)."""

    def __init__(self, path, schema: pa.Schema, fmt: str = "csv"):
        self.path, self.schema = Path(path), schema
        if fmt == "parquet":
            # dictionary pages for the text columns only (series, times and status repeat);
            # the estimates are floats that rarely repeat, where dictionary attempts cost
            # about half the write's CPU time and save nothing. Values are unchanged.
            text = [f.name for f in schema if pa.types.is_string(f.type)]
            self._w = pq.ParquetWriter(str(self.path), schema, use_dictionary=text)
        else:
            self._w = pacsv.CSVWriter(str(self.path), schema)
        self.rows = 0

    def write(self, frame: pd.DataFrame | pa.Table) -> None:
        if not len(frame):
            return
        if isinstance(frame, pa.Table):
            table = frame.select(self.schema.names).cast(self.schema)
        else:
            table = pa.Table.from_pandas(frame[self.schema.names], schema=self.schema,
                                         preserve_index=False)
        self._w.write_table(table)
        self.rows += len(frame)

    def close(self) -> None:
        self._w.close()


class Accumulator:
    """Adds up :class:`Partial` results on the driver and writes the output files."""

    def __init__(self, out_dir: Path, keep_report: bool, estimates_format: str = "csv",
                 estimates_schema: pa.Schema = SCHEMAS["estimates"]):
        self.out_dir = out_dir
        self.est_w = TableWriter(out_dir / f"estimates.{estimates_format}", estimates_schema,
                                 estimates_format)
        self.rej_w = TableWriter(out_dir / "rejects.csv", SCHEMAS["rejects"])
        self.alerts, self.opened, self.report, self.scores = [], [], [], []
        self.obs_sid, self.obs_ts = [], []
        self.final = None
        self.counts = dict(rows=0, accepted=0, rejected=0, zero_skipped=0)
        self.keep_report = keep_report

    def add(self, p: Partial, write_rejects: bool = True) -> None:
        self.est_w.write(p.estimates)
        if write_rejects:
            self.rej_w.write(p.rejects)
        for k, v in (("rows", p.rows), ("accepted", p.accepted), ("rejected", p.rejected),
                     ("zero_skipped", p.zero_skipped)):
            self.counts[k] += int(v)
        if len(p.alerts):
            self.alerts.append(p.alerts)
            self.opened.append(p.opened)
        if self.keep_report and len(p.report):
            self.report.append(p.report)
        if p.obs_sid is not None:
            self.obs_sid.append(p.obs_sid)
            self.obs_ts.append(p.obs_ts)
        if p.scores is not None:
            self.scores.append(p.scores)
        self._merge_final(p.final)

    def _merge_final(self, new: pd.DataFrame) -> None:
        self.final = merge_final(self.final, new)

    def close(self) -> tuple[pd.DataFrame, pd.DataFrame]:
        """Finish the streamed files; write alerts.csv (time order). Returns (alerts, opened)."""
        self.est_w.close()
        self.rej_w.close()
        if self.alerts:
            alerts = pd.concat(self.alerts, ignore_index=True)
            opened = pd.concat(self.opened, ignore_index=True)
            order = np.lexsort((alerts["rule"].to_numpy(dtype=str), alerts["series"].to_numpy(dtype=str),
                                opened["ts"].to_numpy()))
            alerts, opened = alerts.iloc[order].reset_index(drop=True), opened.iloc[order].reset_index(drop=True)
        else:
            alerts = pd.DataFrame({c: pd.Series(dtype=object) for c in ALERT_OUT_COLUMNS})
            opened = pd.DataFrame({"series": [], "ts": np.zeros(0, np.int64), "rule": [],
                                   "change_ts": []})
        w = TableWriter(self.out_dir / "alerts.csv", SCHEMAS["alerts"])
        w.write(alerts)
        w.close()
        return alerts, opened


def make_setup(config: Config, sample_every: int = 1, now_ns: int | None = None,
               report_series=(), keep_obs: bool = False) -> Setup:
    """The run's fixed parts from a config (estimator, pipeline, validation settings)."""
    if int(sample_every) < 1:
        raise ConfigError(f"sample_every = {sample_every!r}: must be >= 1 (1 writes every estimate)")
    est = estimator_from_config(config)
    return Setup(est=est, pipe=Pipeline.from_config(config, est), vset=validation_from_config(config),
                 now_ns=time.time_ns() if now_ns is None else int(now_ns),
                 sample_every=int(sample_every), report_series=frozenset(report_series),
                 keep_obs=keep_obs, own_bounds=config_bounds(config))


def choose_report_series(truth: pd.DataFrame | None, requested=None) -> list[str]:
    """The series plotted in the report: as requested, else those with response changes."""
    if requested:
        return [str(s) for s in requested]
    if truth is None or not len(truth):
        return []
    rank = truth.assign(r=~truth["kind"].isin(("elasticity_change", "gradual_drift", "level_shift")))
    return list(dict.fromkeys(rank.sort_values(["r", "ts"], kind="stable")["series"]))[:MAX_REPORT_SERIES]


def first_series(log, columns, n: int = 4) -> list[str]:
    """The first ``n`` series ids of the log (the report's default without truth)."""
    for chunk in iter_chunks(log, columns, chunk_rows=2000):
        if "series" not in chunk.frame.columns:
            return []
        ids = chunk.frame["series"].dropna().astype(str)
        return list(dict.fromkeys(ids[ids.str.strip() != ""]))[:n]
    return []


def replay(log, out_dir, config: Config | None = None, *, truth=None, report=None,
           report_series=None, chunk_rows: int | None = None, sample_every: int = 1,
           engine: str = "local", scheduler: str | None = None, progress: bool | Progress = True,
           horizon: int = DEFAULT_HORIZON, now_ns: int | None = None, npartitions: int | None = None,
           estimates_format: str = "csv") -> dict:
    """Replay ``log`` into ``out_dir``; returns the summary (also written as summary.json).

    Parameters
    ----------
    log : path
        CSV or Parquet observation log.
    truth : path, optional
        Known change points (:func:`monitor.replay.detection.read_truth`); adds ``detection.csv`` and
        the ``detection`` block of the summary.
    report : path, optional
        HTML report to write (:func:`monitor.report.html.write_replay_report`).
    report_series : list of str, optional
        Series to plot (default: those with known changes in the truth, else the log's first 4).
    chunk_rows : int, optional
        Read in chunks of about this many rows (default: whole if small, else 1,000,000).
    sample_every : int
        Write every n-th estimate of a series plus status changes and alert rows (1: all).
    engine : "local" or "dask"
        ``dask`` partitions the series over a Dask cluster (:mod:`monitor.replay.dask`).
    scheduler : str, optional
        Address of a running Dask scheduler; default a LocalCluster on 127.0.0.1.
    horizon : int
        Detection window after a change, observations (:mod:`monitor.replay.detection`).
    now_ns : int, optional
        Reference time for the future-timestamp check (default: the wall clock at the start).
    estimates_format : "csv" or "parquet"
        Format of the estimates file, ``estimates.csv`` or ``estimates.parquet`` (same columns
        and values; Parquet is the one to choose when every estimate of a large log is kept).
    """
    t0 = time.perf_counter()
    config = config or default_config()
    if engine not in ("local", "dask"):
        raise ConfigError(f"engine = {engine!r}: must be 'local' or 'dask'")
    if estimates_format not in ESTIMATES_FORMATS:
        raise ConfigError(f"estimates_format = {estimates_format!r}: must be one of "
                          f"{', '.join(ESTIMATES_FORMATS)}")
    if estimates_format != "csv" and group_settings_of(config).active:
        raise ConfigError(f"estimates_format = {estimates_format!r}: [series] groups add their "
                          "pooled columns to estimates.csv; use the csv format with groups")
    truth_df = read_truth(truth) if truth is not None else None
    chosen = choose_report_series(truth_df, report_series) if report else []
    if report and not chosen:
        chosen = first_series(log, column_names(config))
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    setup = make_setup(config, sample_every, now_ns, chosen, keep_obs=truth_df is not None)
    schema = SCHEMAS["estimates"]
    if getattr(setup.est, "nout", 0) > K.NOUT:      # instruments: estimates gain first_stage_f
        schema = schema.append(pa.field("first_stage_f", _F))
    acc = Accumulator(out_dir, keep_report=bool(report), estimates_format=estimates_format,
                      estimates_schema=schema)
    if engine == "dask":
        from monitor.replay.dask import replay_partitions

        names, info = replay_partitions(log, config, setup, acc, truth_df, horizon, scheduler,
                                        progress, npartitions, chunk_rows)
    else:
        names, info = _replay_local(log, config, setup, acc, chunk_rows, progress)
    t_core = time.perf_counter()
    alerts, opened = acc.close()
    groups = apply_groups(out_dir, group_settings_of(config), names)   # [series] groups
    scores = None
    if truth_df is not None:
        if acc.scores:
            scores = Scores.merge(acc.scores, truth_df)
        else:
            sid = np.concatenate(acc.obs_sid) if acc.obs_sid else np.zeros(0, np.int64)
            ts = np.concatenate(acc.obs_ts) if acc.obs_ts else np.zeros(0, np.int64)
            scores = score(sid, ts, names, opened, truth_df, horizon)
        scores.changes.to_csv(out_dir / "detection.csv", index=False)
    summary = build_summary(log, acc, alerts, setup, config, t0, t_core, info, engine, scores)
    if groups:
        summary["groups"] = groups
    if report:
        from monitor.report.html import write_replay_report

        frames = pd.concat(acc.report, ignore_index=True) if acc.report else None
        write_replay_report(report, summary, frames, alerts, opened, truth_df, scores, truth)
        summary["report"] = str(report)
    # issue 18: experiments.json when [experiments] is configured (nothing done otherwise)
    from monitor.experiments.sources import write_experiments_for_log

    write_experiments_for_log(log, config, out_dir, setup.now_ns)
    summary["timing"]["wall_s"] = time.perf_counter() - t0
    summary["timing"]["rows_per_s"] = summary["rows"] / summary["timing"]["wall_s"]
    (out_dir / "summary.json").write_text(summary_json(summary))
    return summary


#: stands for the per-series block while the rest of the summary is indented
_FINAL_MARK = "\x00final\x00"


def summary_json(summary: dict) -> str:
    """summary.json text: ``json.dumps(summary, indent=2, sort_keys=True)`` except that each
    series of the ``final`` block is one line.

    The same JSON value (``json.loads`` gives an equal dict). With ``indent`` the standard
    library encodes in Python, not in its C encoder; at 100,000 series the indented per-series
    block took most of a replay's time. Here each series' object goes through the C encoder.
    """
    final = summary.get("final")
    if not isinstance(final, dict) or not final:
        return json.dumps(summary, indent=2, sort_keys=True)
    text = json.dumps({**summary, "final": _FINAL_MARK}, indent=2, sort_keys=True)
    mark = '"final": ' + json.dumps(_FINAL_MARK)
    enc = json.JSONEncoder(sort_keys=True, separators=(", ", ": "))
    lines = ",\n".join(f"    {enc.encode(str(k))}: {enc.encode(final[k])}"
                        for k in sorted(final))
    return text.replace(mark, '"final": {\n' + lines + "\n  }", 1)


def prefetch(chunks):
    """Iterate ``chunks`` with the next one read in a background thread (pyarrow parses
    without the GIL), so reading overlaps processing; at most two chunks are held."""
    from concurrent.futures import ThreadPoolExecutor

    it = iter(chunks)
    with ThreadPoolExecutor(1, thread_name_prefix="elmon-read") as pool:
        nxt = pool.submit(next, it, None)
        while True:
            chunk = nxt.result()
            if chunk is None:
                return
            nxt = pool.submit(next, it, None)
            yield chunk


def _replay_local(log, config, setup, acc, chunk_rows, progress):
    carried = CarriedState()
    total, chunks = log_chunks(log, column_names(config), chunk_rows)
    chunks = prefetch(chunks)
    bar = progress if isinstance(progress, Progress) else Progress(total, "replay", enabled=bool(progress))
    n_chunks, t_read = 0, 0.0
    t = time.perf_counter()
    for chunk in chunks:
        t_read += time.perf_counter() - t
        res = run_chunk(chunk.frame, setup, carried, row_offset=chunk.row_offset, rows=chunk.rows,
                        line_rejects=chunk.rejects)
        acc.add(partial_of(res, setup, carried))
        n_chunks += 1
        bar.update(rows=len(chunk.frame), done=chunk.position)
        del chunk, res
        t = time.perf_counter()
    bar.close()
    return carried.names(), {"chunks": n_chunks, "read_s": t_read}


def _json_float(v):
    return None if v is None or not math.isfinite(float(v)) else float(v)


def _health_counts(final: dict) -> dict:
    """Series per residual-health flag (monitor.replay.health), over the finals."""
    out = {"autocorrelated": 0, "price_linked_variance": 0, "too_few_rows": 0}
    for v in final.values():
        for flag in (v.get("health") or "").split():
            out[flag] = out.get(flag, 0) + 1
    return out


def _model(est) -> str:
    return str(getattr(est, "model", "loglinear"))


def _health_fields(d: dict) -> dict:
    """A series' residual health for summary.json (monitor.replay.health): ``resid_ac1``,
    ``var_price_slope``, ``sd_ratio_per_price_sd`` (4 significant digits; null when not
    computed) and ``health``
    (space-separated flags, "" when the data keep the design's assumptions, "too_few_rows",
    or null for models other than log-log)."""
    h = d.get("health")

    def four(key):        # 4 significant digits: a diagnostic, and the same value whether the
        v = _json_float(d.get(key, float("nan")))     # sums were added chunk by chunk or whole
        return None if v is None else float(f"{v:.4g}")

    return {"resid_ac1": four("resid_ac1"), "var_price_slope": four("var_price_slope"),
            "sd_ratio_per_price_sd": four("sd_ratio_per_price_sd"),
            "health": None if h is None or (isinstance(h, float) and math.isnan(h)) else str(h)}


def build_summary(log, acc: Accumulator, alerts, setup, config, t0, t_core, info, engine, scores) -> dict:
    """summary.json: the keys of :func:`monitor.replay.driver.run_replay` plus detection and timing."""
    final = {}
    f = acc.final
    if f is not None:
        from monitor.rows.isotime import format_ts

        ts_text = format_ts(f["ts"].to_numpy(dtype=np.int64))
        for name, t_txt, row in zip(f.index, ts_text, f.itertuples(index=False)):
            d = row._asdict()
            final[str(name)] = {"ts": str(t_txt), **{k: _json_float(d[k]) for k in FINAL_FIELDS},
                                "status": d["status"], "n_obs": int(d["n"]),
                                "delay50_obs": _json_float(d.get("delay50_obs", float("nan"))),
                                **_health_fields(d),
                                **zero_fields(_model(setup.est), d.get("zeros", 0), d["n"])}
    by_rule = {str(k): int(c) for k, c in alerts["rule"].value_counts().items()} if len(alerts) else {}
    statuses = [v["status"] for v in final.values()]
    wall = time.perf_counter() - t0
    summary = {
        "log": str(log), **acc.counts, "series": len(final), "alerts": int(len(alerts)),
        "alerts_by_rule": by_rule,
        "status_counts": {s: statuses.count(s) for s in dict.fromkeys(statuses)},
        "health_counts": _health_counts(final),
        "zero_notes": sum(1 for v in final.values() if "note" in v),
        "final": final,
        "settings": {"estimator": setup.est.hyperparameters(), "validation": setup.vset.__dict__,
                     "columns": column_names(config), **setup.pipe.settings(),
                     "replay": {"engine": engine, "sample_every": setup.sample_every,
                                "estimates_format": acc.est_w.path.suffix[1:]}},
        "estimates_written": acc.est_w.rows,
        "timing": {"wall_s": wall, "read_s": info.get("read_s"), "core_s": t_core - t0,
                   "rows_per_s": acc.counts["rows"] / wall if wall > 0 else None,
                   "chunks": info.get("chunks"),
                   "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0},
    }
    if scores is not None:
        summary["detection"] = scores.summary()
    summary["price_feedback"] = feedback_summary(alerts)
    return summary


def run_replay(log_path, out_dir, config: Config | None = None, quiet: bool = True,
               now_ns: int | None = None) -> dict:
    """Replay ``log_path`` and write the result files into ``out_dir``; returns the summary.

    Rows are processed in timestamp order within each series, so a row that arrived late in the
    file is not "late" here (lateness is an arrival-order rule of the live service). Timestamps
    more than ``max_future_s`` after ``now_ns`` (default: the wall clock at the start) are rejected.
    """
    t0 = time.perf_counter()
    config = config or default_config()
    est = estimator_from_config(config)
    vset = validation_from_config(config)
    pipe = Pipeline.from_config(config, est)
    chunk = read_whole(log_path, column_names(config))
    frame = chunk.frame
    t_read = time.perf_counter()
    # future timestamps are judged against the wall clock when the replay starts
    v = check_rows(frame, est, settings=vset, now_ns=time.time_ns() if now_ns is None else now_ns,
                   rows=chunk.rows, line_rejects=chunk.rejects, order=order_of(vset, "time"))
    good = v.good
    sid, X, y, names = prepare_rows(good, est)
    own = config_bounds(config)
    limits = {}
    if own:
        low, high = per_series_limits(names, own, *pipe.bounds.limits())
        limits = {"low": low, "high": high}
    result = pipe.run(sid, X, y, n_series=len(names), ts=good["ts"].to_numpy(dtype=np.int64),
                      offset=offset_of(good, est), names=names, **limits)
    t_core = time.perf_counter()

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    estimates = estimates_frame(good, result.out, result.status)
    write_table(estimates, out_dir / "estimates.csv")
    alerts = alerts_frame(result, good, names)
    write_table(alerts[ALERT_COLUMNS] if len(alerts) else pd.DataFrame(columns=ALERT_COLUMNS),
                out_dir / "alerts.csv")
    rejects = v.rejects[REJECT_OUT_COLUMNS]
    write_table(rejects.astype({"row": "int64"}) if len(rejects) else pd.DataFrame(columns=REJECT_OUT_COLUMNS),
                out_dir / "rejects.csv")

    final = {}
    zeros = zero_counts(v)
    if len(good):
        last = np.flatnonzero(np.r_[sid[1:] != sid[:-1], True])
        d50 = pipe.delay50_obs(result.states)
        health = None
        if getattr(est, "model", "loglinear") == "loglinear":
            from monitor.replay.health import HealthSums

            sums = HealthSums(len(names))
            sums.add(sid, result.out[:, K.O_E], X[:, 1],
                     result.out[:, K.O_STATUS] != K.ST_WARMING_UP)
            health = sums.frame(names)
        for j in last:
            o = result.out[j]
            final[names[sid[j]]] = {
                "ts": estimates["ts"].iat[j], "beta": _json_float(o[K.O_BETA]),
                "beta_se": _json_float(o[K.O_SE]), "beta_lo": _json_float(o[K.O_LO]),
                "beta_hi": _json_float(o[K.O_HI]), "n_eff": _json_float(o[K.O_NEFF]),
                "status": STATUS_LABELS[int(result.status[j])],
                "n_obs": int(np.count_nonzero(sid == sid[j])),
                "delay50_obs": _json_float(d50[sid[j]]),
                **_health_fields({} if health is None else health.iloc[int(sid[j])].to_dict()),
                **zero_fields(_model(est), zeros.get(names[sid[j]], 0),
                              np.count_nonzero(sid == sid[j]))}
    wall = time.perf_counter() - t0
    summary = {
        "log": str(log_path),
        "rows": int(len(frame)) + (0 if chunk.rejects is None else len(chunk.rejects)),
        "accepted": int(len(good)), "rejected": int(len(v.rejects)),
        "zero_skipped": int(len(v.zero_skipped)), "series": len(names),
        "zero_notes": sum(1 for f in final.values() if "note" in f),
        "alerts": int(len(alerts)),
        "alerts_by_rule": {str(k): int(c) for k, c in alerts["rule"].value_counts().items()} if len(alerts) else {},
        "status_counts": {s["status"]: sum(1 for f in final.values() if f["status"] == s["status"]) for s in final.values()},
        "final": final,
        "settings": {"estimator": est.hyperparameters(), "validation": vset.__dict__,
                     "columns": column_names(config), **pipe.settings()},
        "timing": {"wall_s": wall, "read_s": t_read - t0, "core_s": t_core - t_read,
                   "rows_per_s": len(frame) / wall if wall > 0 else None},
    }
    (out_dir / "summary.json").write_text(json.dumps(summary, indent=2, sort_keys=True))
    return summary


def check_log(path) -> None:
    if not Path(path).exists():
        raise SourceError(f"{path}: no such file")
