"""Sources of observations, each remembering its position: a growing CSV, a folder, a SQL table.

Every source has ``name``, ``kind`` and ``read(position, max_rows) -> Chunk | None``: the next
rows after the committed ``position`` (``None`` when nothing new has arrived). Reading never
moves the position; the engine commits the chunk's ``position`` in the same transaction as its
observations (:meth:`monitor.live.monitor.Monitor.process_chunk`), so a process killed at any moment
repeats nothing and loses nothing. The fourth source is the Python call
(:meth:`monitor.live.monitor.Monitor.observe` / ``observe_many``).

Positions (JSON in ``source_offsets.position``)
------------------------------------------------
- ``csv``: ``{"offset": bytes, "rows": data rows, "inode", "dev", "head", "head_len"}``. The
  offset is always just past a line break: a partial last line waits for its newline. Before
  reading, the file is checked against the position: another inode (replaced), a size below
  the offset (truncated) or another hash of the first ``head_len`` bytes (rewritten) is
  reported as a ``notice`` (the engine opens a ``source_reset`` alert) and, with
  ``on_reset = "restart"`` (default), the new file is read from its start (repeated rows are
  then rejected as duplicates by validation); with ``"stop"`` the source raises
  :class:`SourceError` at every poll until the position is reset
  (``elmon run --reset-source NAME``). A replaced file is first looked for under another
  name in the same folder (a rotated log, found by its inode): the lines written to it after
  the position are read before the new file. ``names`` is kept when a header line inside the
  data changed the column order (:mod:`monitor.ingest.csv_text`).
- ``folder``: ``{"done": {file: [size, mtime_ns]}, "current": {...} | null}``: each CSV or
  Parquet file is processed once, in order of modification time then name, after it has not
  changed for ``settle_s`` seconds; a large file is read in several batches (``current``
  holds the offset inside it). Rows are labelled ``NAME/FILE`` in the store. A file that
  cannot be read, disappears half-read or changes after it was read is reported (a
  ``source_error`` alert) and skipped, so it never blocks the files after it. A CSV file's
  last line without a line break waits (``last_line_wait_s``, see :class:`FolderSource`).
- ``sql``: ``{"key": last key, "rows": rows read}``: ``SELECT * FROM table WHERE key > ?
  ORDER BY key LIMIT n``. SQLite files are built in (opened read-only); other databases go
  through a SQLAlchemy URL. The key must increase in commit order (an ``INTEGER PRIMARY KEY``
  in SQLite; with other databases a sequence can commit out of order, so poll a view that
  lags behind the newest rows).
"""

from __future__ import annotations

import fnmatch
import os
import time
from pathlib import Path
from typing import Mapping

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

from monitor.errors import ConfigError, SourceError
from monitor.ingest.base import Chunk, canonical_names, empty_rejects
from monitor.ingest.csv_text import (HEAD_BYTES, file_delimiter, head_hash, read_csv_chunk,
                                     read_header)
from monitor.ingest.logio import stated_delimiter


__all__ = ["CsvTail", "FolderSource", "ParquetFile"]


class CsvTail:
    """An append-only CSV file tailed by byte offset (see the module docstring).

    Parameters
    ----------
    name : str
        Source name in the store.
    path : path
        The CSV file (header line first).
    columns : mapping, optional
        ``[columns]`` map of the file's column names.
    final : bool
        The file is complete: its end also ends the last line (``elmon ingest``).
    on_reset : ``"restart"`` or ``"stop"``
        What to do when the file was replaced or truncated.
    """

    kind = "csv"

    def __init__(self, name: str, path, columns: Mapping[str, str] | None = None,
                 final: bool = False, on_reset: str = "restart"):
        if on_reset not in ("restart", "stop"):
            raise ConfigError(f"on_reset = {on_reset!r}: must be 'restart' or 'stop'")
        self.name, self.path, self.columns = name, Path(path), dict(columns or {})
        self.delimiter = stated_delimiter(columns)      # None: sniffed from the header line
        self.final, self.on_reset = final, on_reset

    def _changed(self, pos: dict, st: os.stat_result) -> str | None:
        if (st.st_ino, st.st_dev) != (pos.get("inode"), pos.get("dev")):
            return f"{self.path} was replaced (another file now has its name)"
        if st.st_size < pos["offset"]:
            return (f"{self.path} was truncated: {st.st_size} bytes, fewer than the "
                    f"{pos['offset']} already read")
        if pos.get("head") and head_hash(self.path, pos["head_len"]) != pos["head"]:
            return (f"{self.path} was rewritten or replaced: its first {pos['head_len']} bytes "
                    f"changed")
        return None

    def _rotated(self, pos: dict) -> Path | None:
        """The file read so far, under another name in the same folder (rotated), if it is
        still there with the same first bytes: found by its inode (common practice of log
        tailers, e.g. ``tail -F``)."""
        try:
            entries = list(os.scandir(self.path.parent))
        except OSError:
            return None
        for entry in entries:
            try:
                st = entry.stat(follow_symlinks=False)
            except OSError:
                continue
            if (st.st_ino, st.st_dev) == (pos.get("inode"), pos.get("dev")) and \
                    entry.path != str(self.path) and st.st_size >= pos["offset"]:
                old = Path(entry.path)
                if pos.get("head") and head_hash(old, pos["head_len"]) != pos["head"]:
                    return None
                return old
        return None

    def read(self, position: dict | None, max_rows: int) -> Chunk | None:
        try:
            st = os.stat(self.path)
        except FileNotFoundError:
            raise SourceError(f"{self.path}: no such file") from None
        except OSError as exc:
            raise SourceError(f"{self.path}: cannot be read: {exc}") from None
        pos, notice = dict(position or {}), None
        if pos.get("offset"):
            notice = self._changed(pos, st)
            if notice and (st.st_ino, st.st_dev) != (pos.get("inode"), pos.get("dev")):
                old = self._rotated(pos)
                if old is not None and os.stat(old).st_size > pos["offset"]:
                    # lines written to the old file before it was rotated: read them first
                    # (rotation ends the old file, so its end also ends its last line)
                    chunk = self._read_from(old, os.stat(old), pos, max_rows, None, final=True)
                    if chunk is not None:
                        return chunk
                if old is not None:
                    notice += f" (the old file, now {old.name}, was read to its end)"
                else:
                    notice += (f" (the old file is no longer in {self.path.parent}: lines "
                               f"written to it after byte {pos['offset']} cannot be read)")
            if notice and self.on_reset == "stop":
                raise SourceError(f"{notice}; on_reset = 'stop': start the service with "
                                  f"--reset-source {self.name} to read it from its start")
            if notice:
                notice += "; reading the new file from its start"
                pos = {}
        return self._read_from(self.path, st, pos, max_rows, notice)

    def _read_from(self, path: Path, st: os.stat_result, pos: dict, max_rows: int,
                   notice: str | None, final: bool | None = None) -> Chunk | None:
        final = self.final if final is None else final
        try:
            delimiter = file_delimiter(path, self.delimiter)
            head = read_header(path, str(path), final, delimiter)
        except OSError as exc:
            raise SourceError(f"{path}: cannot be read: {exc}") from None
        if head is None:
            return None
        first, header_end = head
        names = pos.get("names") or first
        canon = canonical_names(names, self.columns)
        offset, rows = max(int(pos.get("offset", 0)), header_end), int(pos.get("rows", 0))
        frame, rownums, rejects, n_lines, end, after = read_csv_chunk(
            path, names, canon, offset, rows, max_rows, final, delimiter)
        if end == offset and notice is None and pos.get("offset") == offset:
            return None
        head_len = min(HEAD_BYTES, end)
        new = {"offset": int(end), "rows": rows + n_lines, "inode": st.st_ino, "dev": st.st_dev,
               "head": head_hash(path, head_len), "head_len": head_len}
        if after != first:
            new["names"] = after
        if after != names:
            notice = "; ".join(filter(None, [notice, header_notice(path, rows + n_lines, after)]))
        return Chunk(frame, rownums, rejects, new, n_lines, notice=notice)


def header_notice(path, row: int, names: list[str]) -> str:
    return (f"{path}: row {row} is a header line with another column order; the lines after "
            f"it are read as {names}")


def _read_table(path: Path, columns) -> pd.DataFrame:
    try:
        table = pq.read_table(path)
    except Exception as exc:  # pyarrow raises several types for a damaged file
        raise SourceError(f"{path}: unreadable parquet file: {exc}") from None
    frame = table.to_pandas()
    frame.columns = canonical_names(list(frame.columns), columns)
    return frame


class FolderSource:
    """A folder receiving CSV or Parquet files, each processed once (module docstring).

    ``patterns`` are shell patterns of the file names read (default ``*.csv``, ``*.parquet``);
    names starting with ``.`` or ending in ``.tmp`` / ``.part`` are skipped, so a writer can
    write under such a name and rename the finished file.

    A CSV file's last line without a line break may still be being written (a writer paused
    longer than ``settle_s``): it is read only when the file has not changed for
    ``last_line_wait_s`` seconds (default 300) or a newer file is ready in the folder; until
    then the lines before it are read and the file stays current.
    """

    kind = "folder"

    def __init__(self, name: str, path, columns: Mapping[str, str] | None = None,
                 patterns=("*.csv", "*.parquet", "*.pq"), settle_s: float = 1.0, clock=time.time,
                 last_line_wait_s: float = 300.0):
        self.name, self.path, self.columns = name, Path(path), dict(columns or {})
        self.delimiter = stated_delimiter(columns)      # None: sniffed from each header line
        self.patterns, self.settle_s, self.clock = tuple(patterns), float(settle_s), clock
        self.last_line_wait_s = float(last_line_wait_s)
        self._cache: tuple[tuple, pd.DataFrame] | None = None

    def _ready(self) -> tuple[list[tuple[int, str, int]], set[str]]:
        """Files ready to read as ``(mtime_ns, name, size)`` in order, and every name present."""
        if not self.path.is_dir():
            raise SourceError(f"{self.path}: no such folder")
        out, names, now = [], set(), self.clock()
        for entry in os.scandir(self.path):
            n = entry.name
            names.add(n)
            if n.startswith(".") or n.endswith((".tmp", ".part")) or not entry.is_file():
                continue
            if not any(fnmatch.fnmatch(n, p) for p in self.patterns):
                continue
            st = entry.stat()
            if now - st.st_mtime >= self.settle_s:
                out.append((st.st_mtime_ns, n, st.st_size))
        return sorted(out), names

    def read(self, position: dict | None, max_rows: int) -> Chunk | None:
        pos = dict(position or {})
        done = {k: list(v) for k, v in (pos.get("done") or {}).items()}
        ready, present = self._ready()
        notices = [f"{self.path / n} changed after it was processed; it is not read again"
                   for m, n, s in ready if n in done and done[n] != [s, m]]
        cur = pos.get("current")
        if cur is None:
            todo = [(m, n, s) for m, n, s in ready if n not in done]
            if not todo:
                if notices and pos.get("reported") != notices:
                    return self._empty({**pos, "reported": notices}, "; ".join(notices))
                return None
            m, n, s = todo[0]
            cur = {"name": n, "size": s, "mtime_ns": m, "offset": 0, "rows": 0}
        path = self.path / cur["name"]
        if cur["name"] not in present:
            gone = (f"{path} disappeared after {cur['rows']} of its rows were read; the rest "
                    f"is lost to elmon")
            return self._empty({**pos, "current": None}, gone)
        later = any(m > cur["mtime_ns"] for m, n, s in ready if n != cur["name"])
        try:
            chunk = self._read_file(path, cur, max_rows, later)
        except (SourceError, OSError) as exc:   # a damaged file must not block the ones after it
            done[cur["name"]] = [cur["size"], cur["mtime_ns"]]
            return self._empty({**pos, "done": done, "current": None},
                               f"{exc}; the file is skipped (fix it and give it a new name to "
                               f"have it read)")
        done_now = chunk.extra.pop("complete")
        if not done_now and chunk.consumed == 0 and chunk.extra["cur"] == pos.get("current"):
            return None                      # waiting for the rest of an unterminated last line
        nxt = chunk.extra.pop("cur")
        keep = {k: v for k, v in done.items() if k in present or k == cur["name"]}
        if done_now:
            keep[cur["name"]] = [nxt["size"], nxt["mtime_ns"]]
        chunk.position = {"done": keep, "current": None if done_now else nxt,
                          "reported": pos.get("reported")}
        chunk.label = f"{self.name}/{cur['name']}"
        if notices and pos.get("reported") != notices:
            chunk.notice, chunk.notice_kind = "; ".join(notices), "source_error"
            chunk.position["reported"] = notices
        header = chunk.extra.pop("header_notice", None)
        if header:
            chunk.notice = "; ".join(filter(None, [chunk.notice, header]))
            chunk.notice_kind = "source_error"
        return chunk

    def _empty(self, position: dict, notice: str) -> Chunk:
        return Chunk(pd.DataFrame(), np.zeros(0, dtype=np.int64), empty_rejects(), position, 0,
                     notice=notice, notice_kind="source_error")

    def _read_file(self, path: Path, cur: dict, max_rows: int, later: bool = False) -> Chunk:
        suffix = path.suffix.lower()
        if suffix in (".parquet", ".pq"):
            key = (str(path), cur["size"], cur["mtime_ns"])
            if self._cache is None or self._cache[0] != key:
                self._cache = (key, _read_table(path, self.columns))
            table = self._cache[1]
            lo, hi = cur["rows"], min(cur["rows"] + max_rows, len(table))
            frame = table.iloc[lo:hi].reset_index(drop=True)
            rows = np.arange(lo + 1, hi + 1, dtype=np.int64)
            nxt = {**cur, "rows": hi}
            return Chunk(frame, rows, empty_rejects(), {}, hi - lo,
                         extra={"complete": hi >= len(table), "cur": nxt})
        st = os.stat(path)
        quiet = self.clock() - st.st_mtime >= self.last_line_wait_s or later
        delimiter = file_delimiter(path, self.delimiter)
        head = read_header(path, str(path), final=quiet, delimiter=delimiter)
        if head is None:                      # an empty file: nothing to read, done
            return Chunk(pd.DataFrame(), np.zeros(0, dtype=np.int64), empty_rejects(), {}, 0,
                         extra={"complete": st.st_size == 0 or quiet, "cur": cur})
        first, header_end = head
        names = cur.get("names") or first
        canon = canonical_names(names, self.columns)
        offset = max(cur["offset"], header_end)
        frame, rows, rejects, n_lines, end, after = read_csv_chunk(
            path, names, canon, offset, cur["rows"], max_rows, final=quiet, delimiter=delimiter)
        # the file may have grown while current: what is recorded as done is what was read
        nxt = {**cur, "offset": end, "rows": cur["rows"] + n_lines, "size": st.st_size,
               "mtime_ns": st.st_mtime_ns}
        if after != first:
            nxt["names"] = after
        extra = {"complete": end >= st.st_size, "cur": nxt}
        if after != names:
            extra["header_notice"] = header_notice(path, cur["rows"] + n_lines, after)
        return Chunk(frame, rows, rejects, {}, n_lines, extra=extra)


class ParquetFile:
    """One Parquet file read by row offset (position ``{"rows", "size", "mtime_ns"}``)."""

    kind = "parquet"

    def __init__(self, name: str, path: Path, columns=None):
        self.name, self.path, self.columns = name, path, dict(columns or {})
        self._table: pd.DataFrame | None = None

    def read(self, position: dict | None, max_rows: int) -> Chunk | None:
        st = os.stat(self.path)
        pos, notice = dict(position or {}), None
        if pos and [pos.get("size"), pos.get("mtime_ns")] != [st.st_size, st.st_mtime_ns]:
            notice = f"{self.path} changed since it was read; reading it from its start"
            pos = {}
        if self._table is None:
            self._table = _read_table(self.path, self.columns)
        lo = int(pos.get("rows", 0))
        hi = min(lo + max_rows, len(self._table))
        if hi <= lo and notice is None:
            return None
        rows = np.arange(lo + 1, hi + 1, dtype=np.int64)
        new = {"rows": hi, "size": st.st_size, "mtime_ns": st.st_mtime_ns}
        return Chunk(self._table.iloc[lo:hi].reset_index(drop=True), rows, empty_rejects(), new,
                     hi - lo, notice=notice)
