"""Live mode: append a scenario's rows to a CSV file or a SQLite table at a set pace.

The appender plays the part of a live feed for the demo and for service tests. Pace:

- ``rate``: rows per second of wall time; row i is due at ``i / rate`` seconds after start.
- ``speed``: simulated seconds per wall second; row i is due at ``(ts_i - ts_0) / speed``
  (``speed=3600`` plays one simulated hour per second; ``speed=1`` is real time).

Rows due are written in batches at most every ``min_interval`` seconds. Each batch is whole
lines in one ``os.write`` followed by ``fsync`` (CSV; the header is written once, when the
file is new), or one committed transaction (SQLite, with an increasing ``id INTEGER PRIMARY
KEY AUTOINCREMENT`` for readers that keep an offset). Timestamps are the scenario's simulated
ones; ``realtime=True`` shifts them so the first row carries the wall-clock start time.

A reader should still read a growing CSV only up to its last line break: a concurrent reader
can catch a write half-copied.
"""

from __future__ import annotations

import os
import re
import sqlite3
import threading
import time
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from monitor.errors import ConfigError
from simulators.base import iso_z, table_bytes

SQLITE_SUFFIXES = (".db", ".sqlite", ".sqlite3")


_NAT = np.iinfo(np.int64).min


def _ts_ns(ts: pd.Series) -> np.ndarray:
    """ISO 8601 texts -> int64 ns since the epoch (unparsable: the NaT value ``_NAT``)."""
    parsed = pd.to_datetime(ts, utc=True, errors="coerce", format="ISO8601")
    return parsed.dt.as_unit("ns").astype("int64").to_numpy()


def _sql_type(dtype) -> str:
    if pd.api.types.is_integer_dtype(dtype) or pd.api.types.is_bool_dtype(dtype):
        return "INTEGER"
    return "REAL" if pd.api.types.is_float_dtype(dtype) else "TEXT"


class LiveAppender:
    """Append the rows of ``log`` to ``target`` at a given pace, until done or stopped.

    Parameters
    ----------
    log : pandas.DataFrame or Simulation
        Rows in arrival order (a Simulation's log is taken).
    target : str or Path
        ``.csv`` file, or SQLite database (``.db``, ``.sqlite``, ``.sqlite3``).
    rate : float, optional
        Rows per second of wall time (default 100 when ``speed`` is not given).
    speed : float, optional
        Simulated seconds per wall-clock second (instead of ``rate``).
    table : str
        SQLite table name (default ``observations``).
    append : bool
        Keep what the target holds (the CSV header must match) instead of starting afresh.
    max_rows, max_seconds : optional
        Stop after this many rows, or this many wall seconds.
    stop_event : threading.Event, optional
        Set it to stop (``stop()`` does the same).
    realtime : bool
        Shift timestamps so that the first row carries the wall-clock start time.
    min_interval : float
        Shortest wall time between two writes, seconds (default 0.05).
    on_write : callable, optional
        Called after each durable write with the number of rows written so far.
    clock, sleep : callable, optional
        The pacing's clock (seconds, default ``time.monotonic``) and its wait (default: wait
        on the stop event); tests pass a simulated pair to check the pacing exactly.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from simulators import simulate
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "live.csv"
    >>> LiveAppender(simulate("retail", n_series=2, length=30), out, rate=1000).run()
    60
    """

    def __init__(self, log, target: str | Path, *, rate: float | None = None,
                 speed: float | None = None, table: str = "observations", append: bool = False,
                 max_rows: int | None = None, max_seconds: float | None = None,
                 stop_event: threading.Event | None = None, realtime: bool = False,
                 min_interval: float = 0.05, on_write: Callable[[int], None] | None = None,
                 clock: Callable[[], float] = time.monotonic,
                 sleep: Callable[[float], object] | None = None):
        log = log[0] if isinstance(log, tuple) else log
        if not isinstance(log, pd.DataFrame) or not {"series", "ts"} <= set(log.columns):
            raise ConfigError("log: must be a DataFrame with columns series, ts, ...")
        if rate is not None and speed is not None:
            raise ConfigError("rate and speed: give one of them, not both")
        if rate is None and speed is None:
            rate = 100.0
        for name, v in (("rate", rate), ("speed", speed), ("max_seconds", max_seconds)):
            if v is not None and not (float(v) > 0 and np.isfinite(float(v))):
                raise ConfigError(f"{name} = {v!r}: must be a finite number > 0")
        if max_rows is not None and int(max_rows) < 0:
            raise ConfigError(f"max_rows = {max_rows!r}: must be >= 0")
        if not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", table):
            raise ConfigError(f"table = {table!r}: must be a plain SQL name (letters, digits, _)")
        self.target = Path(target)
        suffix = self.target.suffix.lower()
        if suffix != ".csv" and suffix not in SQLITE_SUFFIXES:
            raise ConfigError(f"target {str(target)!r}: suffix must be .csv or one of "
                              f"{', '.join(SQLITE_SUFFIXES)} for live mode")
        self.kind = "csv" if suffix == ".csv" else "sqlite"
        self.rate, self.speed, self.table, self.append = rate, speed, table, append
        self.max_rows, self.max_seconds = max_rows, max_seconds
        self.realtime, self.min_interval, self.on_write = realtime, float(min_interval), on_write
        self._stop = stop_event or threading.Event()
        # the pacing's clock and wait (seconds); tests give a simulated pair, so that the pacing
        # is checked without reading the wall clock
        self._clock = clock
        self._sleep = sleep or self._stop.wait
        self._log = log.reset_index(drop=True)
        self._written = 0
        self._elapsed = 0.0
        self._thread: threading.Thread | None = None
        self.error: BaseException | None = None

    # ------------------------------------------------------------------ public
    @property
    def rows_written(self) -> int:
        """Rows appended so far by this appender."""
        return self._written

    @property
    def elapsed(self) -> float:
        """Wall seconds from the start to the last write."""
        return self._elapsed

    def stop(self) -> None:
        """Ask a running appender to stop after its current write."""
        self._stop.set()

    def start(self) -> "LiveAppender":
        """Run in a background (daemon) thread; ``join()`` or ``stop()`` it later."""
        def target():
            try:
                self.run()
            except BaseException as exc:  # kept for the caller to inspect after join()
                self.error = exc
        self._thread = threading.Thread(target=target, name="elmon-live", daemon=True)
        self._thread.start()
        return self

    def join(self, timeout: float | None = None) -> None:
        if self._thread is not None:
            self._thread.join(timeout)

    def run(self) -> int:
        """Append rows until all are written, ``max_rows``/``max_seconds`` or a stop; return
        the number written."""
        log = self._log
        if self.realtime and len(log):
            log = self._rebased(log)
        n = len(log) if self.max_rows is None else min(len(log), int(self.max_rows))
        due = self._due(log)
        sink = _CsvSink(self.target, log, self.append) if self.kind == "csv" else \
            _SqliteSink(self.target, log, self.table, self.append)
        clock = self._clock
        t0 = clock()
        i, last = 0, -np.inf
        try:
            while i < n and not self._stop.is_set():
                now = clock() - t0
                if self.max_seconds is not None and now >= self.max_seconds:
                    break
                j = min(int(np.searchsorted(due, now, side="right")), n)
                if j > i:
                    sink.write(i, j)
                    i, last = j, now
                    self._written, self._elapsed = i, clock() - t0
                    if self.on_write is not None:
                        self.on_write(i)
                if i >= n:
                    break
                wake = max(due[i], last + self.min_interval)
                if self.max_seconds is not None:
                    wake = min(wake, self.max_seconds)
                self._sleep(max(0.0, wake - (clock() - t0)))
        finally:
            sink.close()
        return self._written

    # ------------------------------------------------------------------ helpers
    def _due(self, log: pd.DataFrame) -> np.ndarray:
        """Wall seconds after start at which each row is due (non-decreasing)."""
        if self.rate is not None:
            return np.arange(len(log)) / float(self.rate)
        ns = _ts_ns(log["ts"])
        ok = ns != _NAT
        if not ok.any():
            return np.zeros(len(log))
        rel = np.where(ok, (ns - ns[ok][0]) / 1e9, np.nan)
        rel = pd.Series(rel).ffill().fillna(0.0).to_numpy()  # unparsable ts: as the row before
        return np.maximum.accumulate(np.maximum(rel, 0.0)) / float(self.speed)

    @staticmethod
    def _rebased(log: pd.DataFrame) -> pd.DataFrame:
        ns = _ts_ns(log["ts"])
        ok = ns != _NAT
        if not ok.any():
            return log
        shift = (time.time_ns() // 10**9) * 10**9 - ns[ok][0]
        out = log.copy()
        out.loc[ok, "ts"] = iso_z(ns[ok] + shift)
        return out


class _CsvSink:
    """Whole CSV lines appended with one write + fsync per batch."""

    def __init__(self, path: Path, log: pd.DataFrame, append: bool):
        header = table_bytes(log.iloc[:0])
        body = table_bytes(log, header=False)
        ends = np.flatnonzero(np.frombuffer(body, dtype=np.uint8) == 10) + 1
        if len(ends) != len(log):
            raise ConfigError("log: a value holds a line break; live CSV writes one row a line")
        self._body, self._starts = body, np.concatenate([[0], ends])
        path.parent.mkdir(parents=True, exist_ok=True)
        if append and path.exists() and path.stat().st_size > 0:
            with open(path, "rb") as f:
                first = f.readline()
                f.seek(-1, os.SEEK_END)
                last = f.read(1)
            if first != header:
                raise ConfigError(f"{path}: existing header {first!r} differs from {header!r}")
            if last != b"\n":
                raise ConfigError(f"{path}: last line is incomplete; fix the file or start afresh")
            self._fd = os.open(path, os.O_WRONLY | os.O_APPEND)
        else:
            self._fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
            self._put(header)

    def _put(self, data: bytes) -> None:
        view = memoryview(data)
        while view:
            view = view[os.write(self._fd, view):]
        os.fsync(self._fd)

    def write(self, i: int, j: int) -> None:
        self._put(self._body[self._starts[i]:self._starts[j]])

    def close(self) -> None:
        os.close(self._fd)


class _SqliteSink:
    """Rows inserted into a SQLite table, one committed transaction per batch."""

    def __init__(self, path: Path, log: pd.DataFrame, table: str, append: bool):
        path.parent.mkdir(parents=True, exist_ok=True)
        self._conn = sqlite3.connect(path, timeout=30.0)
        self._conn.execute("PRAGMA journal_mode=WAL")
        self._log, self._table = log, table
        cols = list(log.columns)
        with self._conn:
            if not append:
                self._conn.execute(f'DROP TABLE IF EXISTS "{table}"')
            decl = ", ".join(f'"{c}" {_sql_type(log[c].dtype)}' for c in cols)
            self._conn.execute(f'CREATE TABLE IF NOT EXISTS "{table}" '
                               f"(id INTEGER PRIMARY KEY AUTOINCREMENT, {decl})")
        have = {r[1] for r in self._conn.execute(f'PRAGMA table_info("{table}")')}
        missing = [c for c in cols if c not in have]
        if missing:
            raise ConfigError(f"{path}: table {table!r} lacks columns {missing}")
        names = ", ".join(f'"{c}"' for c in cols)
        self._sql = f'INSERT INTO "{table}" ({names}) VALUES ({", ".join("?" * len(cols))})'

    def write(self, i: int, j: int) -> None:
        part = self._log.iloc[i:j]
        rows = list(zip(*(part[c].tolist() for c in part.columns)))
        with self._conn:
            self._conn.executemany(self._sql, rows)

    def close(self) -> None:
        self._conn.close()
