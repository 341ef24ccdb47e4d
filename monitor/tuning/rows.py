"""The validated design rows that every setting of a tuning grid shares (read and validated
once per log)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from monitor.ingest.logio import column_names
from monitor.replay.kernel import CarriedState, Setup, validate_chunk
from monitor.rows.prepare import design_rows, offset_of
from monitor.settings import Config, estimator_from_config


@dataclass
class Rows:
    """Validated rows of a log, series by series in time order (gate ids in ``sid``)."""

    sid: np.ndarray
    X: np.ndarray
    y: np.ndarray
    ts: np.ndarray
    names: list[str]
    rejected: int = 0
    #: log exposure per row (the Poisson model's ``[estimator] exposure``), else None
    offset: np.ndarray | None = None

    def usable_spans(self, usable: np.ndarray, min_rows: int):
        """``(s, a, b, m)`` for each series ``s`` with at least ``min_rows`` usable rows: its
        rows are ``a:b`` (``sid`` is sorted), ``m`` marks the usable ones among them."""
        n_series = len(self.names)
        edges = np.searchsorted(self.sid, np.arange(n_series + 1))
        for s in range(n_series):
            a, b = edges[s], edges[s + 1]
            m = usable[a:b]
            if m.sum() >= min_rows:
                yield s, a, b, m

    @property
    def n(self) -> int:
        return int(self.sid.size)


def validation_setup(config: Config, now_ns: int | None) -> Setup:
    import time

    from monitor.settings import validation_from_config

    return Setup(est=estimator_from_config(config), pipe=None, vset=validation_from_config(config),
                 now_ns=time.time_ns() if now_ns is None else int(now_ns))


def rows_from_frames(frames, setup: Setup) -> Rows:
    """Validate ``(frame, row_offset, rows[, line_rejects])`` in order with one carried gate."""
    carried = CarriedState()
    parts, rejected = [], 0
    for frame, offset, rows, *more in frames:
        v, sid = validate_chunk(frame, setup, carried, offset, rows, more[0] if more else None)
        rejected += len(v.rejects)
        if len(v.good):
            X, y = design_rows(v.good, setup.est)
            off = offset_of(v.good, setup.est)
            parts.append((sid, X, y, v.good["ts"].to_numpy(dtype=np.int64),
                          np.zeros(len(y)) if off is None else off))
    k = len(setup.est.parameter_names)
    if parts:
        sid, X, y, ts, off = (np.concatenate([p[i] for p in parts]) for i in range(5))
        order = np.argsort(sid, kind="stable")     # chunks in order: each series stays in time order
        sid, X, y, ts, off = (sid[order], np.ascontiguousarray(X[order]), y[order], ts[order],
                              off[order])
    else:
        sid, X, y, ts = np.zeros(0, np.int64), np.zeros((0, k)), np.zeros(0), np.zeros(0, np.int64)
        off = np.zeros(0)
    exposure = bool(getattr(setup.est, "exposure", ""))
    return Rows(sid, X, y, ts, carried.names(), rejected, off if exposure else None)


def load_rows(log, config: Config, chunk_rows: int | None = None, now_ns: int | None = None) -> Rows:
    """Read and validate a log once for tuning (chunked like the replay when large)."""
    from monitor.ingest.chunks import log_chunks

    setup = validation_setup(config, now_ns)
    _, chunks = log_chunks(log, column_names(config), chunk_rows)
    return rows_from_frames(((c.frame, c.row_offset, c.rows, c.rejects) for c in chunks), setup)
