"""The replay's batch kernel: one chunk of raw rows through validation and the pipeline.

:func:`run_chunk` is what every replay engine runs, on one machine chunk by chunk
(:mod:`monitor.replay.driver`) or on the workers of a Dask cluster, one partition of whole
series each (:mod:`monitor.replay.dask`). State carried between calls (:class:`CarriedState`)
is keyed by the gate's series ids: the validation gate (last accepted times, recent prices),
the pipeline states, and the sampler's per-series counters. :func:`partial_of` turns a chunk's
result into the output pieces (:class:`Partial`) that the driver writes and adds up.

Sampled estimates (``sample_every = n > 1``): a series' observation is written when its
position in the series is a multiple of n (the first one included), when its status differs
from the series' previous one, or when an alert event happened on it.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import pyarrow as pa

from monitor.estimators import kernel as K
from monitor.ingest.bounds_file import per_series_limits
from monitor.replay.health import HEALTH_COLUMNS, HealthSums, zero_counts
from monitor.rows.frames import (ALERT_COLUMNS, BAND_KINDS, ESTIMATE_COLUMNS, REJECT_OUT_COLUMNS,
                                 alerts_frame, band_index, estimates_frame)
from monitor.rows.isotime import iso_utc
from monitor.rows.prepare import check_rows, design_rows, offset_of, order_of
from monitor.rows.validate import SeriesGate, Validated
from monitor.types import STATUS_LABELS


#: columns of alerts.csv: those of DESIGN.md, then the severity
ALERT_OUT_COLUMNS = ALERT_COLUMNS + ["severity"]
#: per-series final values kept by the driver (the last processed observation)
FINAL_FIELDS = ("beta", "beta_se", "beta_lo", "beta_hi", "n_eff")
_FINAL_SLOTS = (K.O_BETA, K.O_SE, K.O_LO, K.O_HI, K.O_NEFF)


@dataclass
class Setup:
    """What does not change during a run: estimator, pipeline, validation settings, clock."""

    est: object
    pipe: object
    vset: object
    now_ns: int | None
    sample_every: int = 1
    report_series: frozenset = frozenset()
    keep_obs: bool = False        # keep (sid, ts) of every processed row (detection metrics)
    #: per-series bounds {series: (low, high)} from ``[bounds] file`` (None: not set, the
    #: ``[bounds]`` limit applies on that side)
    own_bounds: dict = field(default_factory=dict)

    def bounds_kwargs(self, names: list[str]) -> dict:
        """``low`` / ``high`` of ``Pipeline.run`` for ``names`` when any has bounds of its own."""
        if not self.own_bounds or not any(n in self.own_bounds for n in names):
            return {}
        low, high = per_series_limits(names, self.own_bounds, *self.pipe.bounds.limits())
        return {"low": low, "high": high}


@dataclass
class CarriedState:
    """Per-series state carried from chunk to chunk, indexed by the gate's series ids."""

    gate: SeriesGate = field(default_factory=SeriesGate)
    states: object = None
    seen: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    last_status: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int8))
    health: HealthSums = field(default_factory=HealthSums)    # residual health sums (issue 12)

    def grow(self, pipe, n: int) -> None:
        """Make room for ``n`` series (fresh pipeline states for the new ones)."""
        have = self.seen.size
        if n <= have:
            return
        self.health.grow(n)
        self.seen = np.r_[self.seen, np.zeros(n - have, np.int64)]
        self.last_status = np.r_[self.last_status, np.full(n - have, -1, np.int8)]
        fresh = pipe.new_states(n - have)
        self.states = fresh if self.states is None else _concat_states(self.states, fresh)

    def names(self) -> list[str]:
        """Series ids in gate-id order."""
        out = [""] * len(self.gate.index)
        for name, i in self.gate.index.items():
            out[i] = str(name)
        return out


def _concat_states(a, b):
    if isinstance(a, np.ndarray):
        return np.concatenate([a, b], axis=0)
    if hasattr(a, "concat"):
        return a.concat(b)
    raise TypeError(f"cannot grow pipeline states of type {type(a).__name__}")


@dataclass
class ChunkResult:
    """A validated chunk (``good`` in processing order), its pipeline output and its gate ids."""

    validated: Validated
    sid: np.ndarray
    out: np.ndarray
    status: np.ndarray
    events: pd.DataFrame
    n_rows: int
    alerts: pd.DataFrame       # alerts.csv rows of the alerts opened in this chunk


def arrow_text(frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` with each column of Python text (``str`` or ``None`` only) held as Arrow text.

    The CSV line reader gives object columns of ``str``; validation's blank, number and time
    checks then loop over Python objects (cProfile of a 1M-row replay: about 70% of the run in
    those loops). Arrow-backed text takes their vectorized branch. The values are the same text
    and the same empties (``None`` becomes a missing value), so the good rows and the rejects
    are identical; a column that holds anything else (a float NaN, a number) is left as it is,
    decided in C by :func:`pyarrow.array` refusing a non-text value.
    """
    cols, changed = {}, False
    for name in frame.columns:
        col = frame[name]
        if col.dtype == object:
            try:
                arr = pa.array(col.to_numpy(), type=pa.string(), from_pandas=False)
            except (pa.ArrowTypeError, pa.ArrowInvalid):
                arr = None
            if arr is not None:
                col = pd.Series(pd.arrays.ArrowStringArray(arr), index=frame.index, name=name)
                changed = True
        cols[name] = col
    return pd.DataFrame(cols, index=frame.index) if changed else frame


def validate_chunk(frame: pd.DataFrame, setup: Setup, carried: CarriedState, row_offset: int = 0,
                   rows: np.ndarray | None = None, line_rejects: pd.DataFrame | None = None
                   ) -> tuple[Validated, np.ndarray]:
    """Validate ``frame`` (arrival order) with the carried gate through the one row path
    (:func:`monitor.rows.prepare.check_rows`); returns it and the gate ids of its good rows.

    ``rows`` (optional) gives each frame row's row number in the source (file row numbers of
    the CSV line reader, or a Dask partition's rows); else rows are ``row_offset + 1 ...``;
    ``line_rejects`` are the reader's rejects of the same lines.
    """
    v = check_rows(arrow_text(frame), setup.est, settings=setup.vset, gate=carried.gate, now_ns=setup.now_ns,
                   rows=rows, row_offset=row_offset, line_rejects=line_rejects,
                   order=order_of(setup.vset, "time"))
    if len(v.good):
        # the ids the ordered checks gave the good rows; else from the gate (arrow-backed text:
        # no Python strings)
        sid = v.sid if v.sid is not None else carried.gate.ids(v.good["series"])
    else:
        sid = np.zeros(0, np.int64)
    return v, sid


def run_chunk(frame: pd.DataFrame, setup: Setup, carried: CarriedState, row_offset: int = 0,
              rows: np.ndarray | None = None, line_rejects: pd.DataFrame | None = None
              ) -> ChunkResult:
    """Validate ``frame`` and run the pipeline over its good rows, carrying state (see
    :func:`validate_chunk` for ``rows`` and ``line_rejects``)."""
    v, sid = validate_chunk(frame, setup, carried, row_offset, rows, line_rejects)
    good = v.good
    n_series = len(carried.gate.index)
    carried.grow(setup.pipe, n_series)
    events = None
    if len(good):
        X, y = design_rows(good, setup.est)
        names = carried.names()
        res = setup.pipe.run(sid, X, y, n_series=n_series, states=carried.states,
                             offset=offset_of(good, setup.est),
                             ts=good["ts"].to_numpy(dtype=np.int64), names=names,
                             **setup.bounds_kwargs(names))
        carried.states = res.states
        out, status, events = res.out, np.asarray(res.status, dtype=np.int8), res.events
        if getattr(setup.est, "model", "loglinear") == "loglinear":
            # residual health of each series (monitor.replay.health): innovations past warm-up
            carried.health.add(sid, out[:, K.O_E], X[:, 1], out[:, K.O_STATUS] != K.ST_WARMING_UP)
        alerts = alerts_frame(res, good, names)
    else:
        out, status = np.empty((0, K.NOUT)), np.zeros(0, np.int8)
        events, alerts = None, None
    if events is None:
        events = pd.DataFrame(columns=["row", "sid", "kind", "action", "severity", "beta",
                                       "beta_lo", "beta_hi", "message", "details"])
    if alerts is None or not len(alerts):
        alerts = pd.DataFrame({c: pd.Series(dtype=object) for c in ALERT_OUT_COLUMNS})
    n_lines = len(frame) + (0 if line_rejects is None else len(line_rejects))
    return ChunkResult(v, sid, out, status, events, n_lines, alerts)


@dataclass
class Partial:
    """Output pieces of one chunk or partition, ready for the driver to write and add up."""

    estimates: pa.Table           # estimates.csv rows (sampled)
    alerts: pd.DataFrame
    opened: pd.DataFrame          # series, ts (int64 ns), rule, change_ts: alerts opened (detection)
    rejects: pd.DataFrame
    final: pd.DataFrame           # index series: ts (ns), FINAL_FIELDS, status, n
    rows: int
    accepted: int
    rejected: int
    zero_skipped: int
    report: pd.DataFrame          # full estimates of the report's series
    obs_sid: np.ndarray | None = None
    obs_ts: np.ndarray | None = None
    scores: object = None         # detection Scores of whole series (Dask partitions)


_LABELS = pa.array(STATUS_LABELS, pa.string())
_BANDS = pa.array(BAND_KINDS, pa.string())
_EST_FLOATS = (("beta", K.O_BETA), ("beta_se", K.O_SE), ("beta_lo", K.O_LO), ("beta_hi", K.O_HI),
               ("n_eff", K.O_NEFF))
_EST_TAIL = (("intercept", K.O_INTERCEPT), ("resid_sd", K.O_RESID_SD), ("innovation", K.O_E),
             ("z", K.O_Z))


def estimates_table(good: pd.DataFrame, out: np.ndarray, status: np.ndarray,
                    idx: np.ndarray | None = None) -> pa.Table:
    """estimates.csv rows (:data:`ESTIMATE_COLUMNS`) as an Arrow table, built without pandas;
    the same values and text as :func:`monitor.rows.frames.estimates_frame` (NaN as empty)."""
    sel = slice(None) if idx is None else idx
    series = pa.array(good["series"].to_numpy(dtype=object) if good["series"].dtype == object
                      else good["series"].array, pa.string())
    if idx is not None:
        series = series.take(pa.array(idx))
    cols = {"series": series, "ts": iso_utc(good["ts"].to_numpy(dtype=np.int64)[sel])}
    # the kernel's rows are observations (row-major); one transposed copy of the written slots
    # makes each column contiguous instead of a strided copy per column
    slots = [j for _, j in _EST_FLOATS + _EST_TAIL] + ([K.NOUT] if out.shape[1] > K.NOUT else [])
    o = np.ascontiguousarray(out[sel].T[slots])
    for k, (name, _) in enumerate(_EST_FLOATS):
        cols[name] = pa.array(o[k], pa.float64(), from_pandas=True)
    cols["status"] = _LABELS.take(pa.array(np.asarray(status[sel], dtype=np.int64)))
    for k, (name, _) in enumerate(_EST_TAIL, start=len(_EST_FLOATS)):
        cols[name] = pa.array(o[k], pa.float64(), from_pandas=True)
    # the band's kind (issue 13): band_kinds' text, taken from the codes without Python objects
    bi = band_index(out[sel])
    cols["band"] = _BANDS.take(pa.array(bi, mask=bi == len(BAND_KINDS)))
    if out.shape[1] > K.NOUT:      # instruments: the effective first-stage F (issue 17)
        cols["first_stage_f"] = pa.array(o[-1], pa.float64(), from_pandas=True)
    return pa.table(cols)


def sample_mask(sid: np.ndarray, status: np.ndarray, event_rows: np.ndarray, every: int,
                carried: CarriedState) -> np.ndarray:
    """Rows to write under ``sample_every = every``; updates the carried counters."""
    n = sid.size
    if n == 0:
        return np.zeros(0, bool)
    first = np.r_[True, sid[1:] != sid[:-1]]
    starts = np.flatnonzero(first)
    lengths = np.diff(np.r_[starts, n])
    pos = np.arange(n) - np.repeat(starts, lengths) + np.repeat(carried.seen[sid[starts]], lengths)
    prev = np.r_[np.int8(-1), status[:-1]]
    prev[starts] = carried.last_status[sid[starts]]
    last = np.r_[starts[1:] - 1, n - 1]
    carried.seen[sid[starts]] += lengths
    carried.last_status[sid[last]] = status[last]
    if every <= 1:
        return np.ones(n, bool)
    keep = (pos % every == 0) | (status != prev)
    keep[event_rows] = True
    return keep


def partial_of(res: ChunkResult, setup: Setup, carried: CarriedState) -> Partial:
    """The output pieces of a chunk (estimates sampled with the carried counters)."""
    v, good = res.validated, res.validated.good
    ev_rows = res.events["row"].to_numpy(dtype=np.int64) if len(res.events) else np.zeros(0, np.int64)
    keep = sample_mask(res.sid, res.status, ev_rows, setup.sample_every, carried)
    estimates = estimates_table(good, res.out, res.status, None if keep.all() else np.flatnonzero(keep))
    alerts = res.alerts
    # the estimated change time each alert carries (ISO text, None where it has none: the
    # previous charts' alerts) goes with it, so detection.csv scores the change-time error
    opened = pd.DataFrame({"series": alerts["series"].to_numpy(dtype=object),
                           "ts": _ts_of_events(good, res.events),
                           "rule": alerts["rule"].to_numpy(dtype=object),
                           "change_ts": (alerts["change_ts"].to_numpy(dtype=object)
                                         if "change_ts" in alerts.columns
                                         else np.full(len(alerts), None, dtype=object))})
    rejects = v.rejects[REJECT_OUT_COLUMNS] if len(v.rejects) else \
        pd.DataFrame({c: pd.Series(dtype=object) for c in REJECT_OUT_COLUMNS})
    final = _final(good, res, None if carried.states is None else
                   setup.pipe.delay50_obs(carried.states),
                   carried.health if getattr(setup.est, "model", "loglinear") == "loglinear"
                   else None, zero_counts(v))
    report = pd.DataFrame(columns=ESTIMATE_COLUMNS)
    if setup.report_series and len(good):
        m = good["series"].isin(setup.report_series).to_numpy()
        if m.any():
            report = estimates_frame(good[m], res.out[m], res.status[m]).assign(
                ts_ns=good["ts"].to_numpy(dtype=np.int64)[m])
    p = Partial(estimates, alerts, opened, rejects, final, res.n_rows, len(good), len(v.rejects),
                len(v.zero_skipped), report)
    if setup.keep_obs:
        p.obs_sid = res.sid.astype(np.int32 if len(carried.gate.index) < 2**31 else np.int64)
        p.obs_ts = good["ts"].to_numpy(dtype=np.int64)
    return p


def _ts_of_events(good, events) -> np.ndarray:
    if events is None or not len(events):
        return np.zeros(0, np.int64)
    ev = events[events["action"] == "open"] if "action" in events.columns else events
    return good["ts"].to_numpy(dtype=np.int64)[ev["row"].to_numpy(dtype=np.int64)]


def _final(good: pd.DataFrame, res: ChunkResult, delay50=None, health=None,
           zeros: pd.Series | None = None) -> pd.DataFrame:
    """Last processed observation of each series in the chunk, its row count and, from the
    pipeline states after the chunk, ``delay50_obs`` (issue 12); with ``health`` (the carried
    :class:`~monitor.replay.health.HealthSums`, cumulative) the series' residual health so far
    (:data:`~monitor.replay.health.HEALTH_COLUMNS`, empty for models other than log-log)."""
    sid = res.sid
    if sid.size == 0:
        return pd.DataFrame(columns=["ts", *FINAL_FIELDS, "status", "n", "zeros", "delay50_obs",
                                     *HEALTH_COLUMNS],
                            index=pd.Index([], name="series", dtype=object))
    # each series' last row in processing order (rows need not be grouped by series: with
    # [validation] order = "arrival" they stay in arrival order), and its row count
    last_of = np.full(int(sid.max()) + 1, -1, dtype=np.int64)
    np.maximum.at(last_of, sid, np.arange(sid.size, dtype=np.int64))
    last = np.sort(last_of[last_of >= 0])
    counts = np.bincount(sid)[sid[last]]
    f = pd.DataFrame({name: res.out[last, slot] for name, slot in zip(FINAL_FIELDS, _FINAL_SLOTS)},
                     index=pd.Index(good["series"].iloc[last].to_numpy(dtype=object), name="series"))
    f.insert(0, "ts", good["ts"].to_numpy(dtype=np.int64)[last])
    f["status"] = np.array(STATUS_LABELS, dtype=object)[res.status[last]]
    f["n"] = counts.astype(np.int64)
    # zero quantities skipped or rejected in the chunk (issue 13: the Poisson note); a series
    # whose chunk holds zeros but no processed row is not counted
    f["zeros"] = (np.zeros(len(f), np.int64) if zeros is None or not len(zeros)
                  else zeros.reindex(f.index).fillna(0).to_numpy(dtype=np.int64))
    f["delay50_obs"] = np.nan if delay50 is None else np.asarray(delay50)[sid[last]]
    if health is not None:
        h = health.frame(f.index, sid[last])
        for c in HEALTH_COLUMNS:
            f[c] = h[c].to_numpy()
    else:
        for c in HEALTH_COLUMNS:
            f[c] = None if c == "health" else np.nan
    return f


def combine(parts: list[Partial]) -> Partial:
    """One :class:`Partial` from consecutive ones (chunks of the same series set, in order)."""
    def cat(name):
        frames = [getattr(p, name) for p in parts if len(getattr(p, name))]
        if not frames:
            return getattr(parts[0], name)
        if isinstance(frames[0], pa.Table):
            return pa.concat_tables(frames)
        return pd.concat(frames, ignore_index=True)

    final = parts[0].final
    for p in parts[1:]:
        final = merge_final(final, p.final)
    out = Partial(cat("estimates"), cat("alerts"), cat("opened"), cat("rejects"),
                  final,
                  sum(p.rows for p in parts), sum(p.accepted for p in parts),
                  sum(p.rejected for p in parts), sum(p.zero_skipped for p in parts), cat("report"))
    if parts[0].obs_sid is not None:
        out.obs_sid = np.concatenate([p.obs_sid for p in parts])
        out.obs_ts = np.concatenate([p.obs_ts for p in parts])
    return out


def merge_final(old: pd.DataFrame | None, new: pd.DataFrame) -> pd.DataFrame:
    """Per-series finals: the later chunk's last observation wins, row counts add up."""
    if old is None or not len(old):
        return new
    if not len(new):
        return old
    common = old.index.intersection(new.index)
    new = new.copy()
    if len(common):
        new.loc[common, "n"] += old.loc[common, "n"].to_numpy()
        if "zeros" in new and "zeros" in old:
            new.loc[common, "zeros"] += old.loc[common, "zeros"].to_numpy()
    return pd.concat([old.drop(common), new])
