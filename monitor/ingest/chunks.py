"""Reading a large log in chunks with bounded memory (CSV byte blocks, Parquet row batches).

A CSV file is cut into blocks of whole lines (about ``block_bytes`` each; a cut is moved to
the next line break), and each block is parsed with the header in front of it, exactly as
:func:`monitor.ingest.logio.read_log` parses a whole file: pyarrow types the columns, and a block
holding a value that does not fit is parsed again with every column as text, so
:mod:`monitor.rows.validate` reports each bad field. Blank lines are skipped and not counted, as in
the whole-file reader, so row numbers (1-based data rows) agree. The block list is computed
from the file alone, which lets workers of a cluster read their own blocks
(:mod:`monitor.replay.dask`).

A Parquet file is read a row batch at a time.

Memory: one block's bytes, its arrow table and its pandas frame (a few times the block size).
"""

from __future__ import annotations

import io
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator, Mapping

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from monitor.errors import ConfigError, SourceError
from monitor.ingest.base import canonical_names
from monitor.ingest.csv_text import file_delimiter, read_csv_chunk, read_header
from monitor.ingest.logio import (DEFAULT_COLUMNS, check_file, column_renames, keep_leading_zeros,
                                  log_format, read_log, stated_delimiter, table_to_frame)


#: default CSV block size: about a million rows of a typical log
DEFAULT_BLOCK_BYTES = 64 << 20


@dataclass(frozen=True)
class Block:
    """Bytes ``[start, stop)`` of a CSV file (whole lines), or row group range of a Parquet file."""

    index: int
    start: int
    stop: int


def csv_header(path) -> bytes:
    """The header line (with its line break) of a CSV file."""
    with open(path, "rb") as fh:
        first = fh.readline()
    if not first.strip():
        raise SourceError(f"{path}: empty file (no header line)")
    return first if first.endswith(b"\n") else first + b"\n"


def csv_blocks(path, block_bytes: int = DEFAULT_BLOCK_BYTES) -> list[Block]:
    """Cut a CSV file's data lines into blocks of about ``block_bytes`` at line breaks."""
    p = check_file(path)
    size = p.stat().st_size
    header = csv_header(p)
    block_bytes = max(int(block_bytes), 1 << 12)
    blocks, start = [], len(header)
    with open(p, "rb") as fh:
        while start < size:
            stop = min(start + block_bytes, size)
            if stop < size:
                fh.seek(stop)
                fh.readline()           # move the cut to just after the next line break
                stop = min(fh.tell(), size)
            blocks.append(Block(len(blocks), start, stop))
            start = stop
    return blocks


def _types(header: bytes, text: bool) -> dict:
    names = [c.strip().strip('"') for c in header.decode("utf-8", errors="replace").strip().split(",")]
    return {c: pa.string() for c in names} if text else {"series": pa.string()}


def parse_csv_bytes(data: bytes, header: bytes, source: str = "log") -> pa.Table:
    """Parse ``header + data`` typed, or as text where a value does not fit the inferred type."""
    buf = header + data
    for text in (False, True):
        conv = pacsv.ConvertOptions(null_values=[""], strings_can_be_null=True,
                                    column_types=_types(header, text))
        try:
            table = pacsv.read_csv(io.BytesIO(buf), convert_options=conv)
            return table if text else keep_leading_zeros(table, lambda cols: pacsv.read_csv(
                io.BytesIO(buf), convert_options=pacsv.ConvertOptions(
                    null_values=[""], strings_can_be_null=True, include_columns=cols,
                    column_types={c: pa.string() for c in cols})))
        except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
            if text:
                raise SourceError(f"{source}: unreadable csv file: {exc}") from None
    raise AssertionError("unreachable")  # pragma: no cover


def read_csv_block(path, block: Block, header: bytes | None = None,
                   columns: Mapping[str, str] | None = None) -> pd.DataFrame:
    """One block as a frame with canonical column names."""
    header = header if header is not None else csv_header(path)
    with open(path, "rb") as fh:
        fh.seek(block.start)
        data = fh.read(block.stop - block.start)
    table = parse_csv_bytes(data, header, str(path))
    return canonical_frame(table_to_frame(table), columns)


def canonical_frame(frame: pd.DataFrame, columns) -> pd.DataFrame:
    mapping = {**DEFAULT_COLUMNS, **(columns or {})}
    return frame.rename(columns=column_renames(list(frame.columns), mapping))


@dataclass
class LogChunk:
    """A chunk of raw rows: the frame, its first row number - 1, the input position reached,
    and for CSV text each row's file row number (blank lines counted) and the lines that could
    not be split into fields (rejects with row, field, value, reason)."""

    frame: pd.DataFrame
    row_offset: int
    position: int      # bytes (CSV) or rows (Parquet) of the input consumed after this chunk
    rows: np.ndarray | None = None
    rejects: pd.DataFrame | None = None


def csv_text_chunks(path, columns: Mapping[str, str] | None = None,
                    chunk_rows: int = 1_000_000) -> Iterator[LogChunk]:
    """A CSV log in chunks of at most ``chunk_rows`` lines, read by the same line reader as
    ``elmon ingest`` and the live sources (:func:`monitor.ingest.csv_text.read_csv_chunk`):
    every field is text (a value keeps the file's spelling in a reject), every line is a row,
    a reject or blank, and row numbers are those of the file."""
    p = check_file(path)
    delimiter = file_delimiter(p, stated_delimiter(columns))
    head = read_header(p, str(p), final=True, delimiter=delimiter)
    if head is None:
        return
    names, offset = head
    canon = canonical_names(names, dict(columns or {}))
    size = p.stat().st_size
    before = 0
    while offset < size:
        frame, rows, rejects, n_lines, end, after = read_csv_chunk(
            p, names, canon, offset, before, max(int(chunk_rows), 1), final=True,
            delimiter=delimiter)
        if end <= offset:
            break
        yield LogChunk(frame, before, end, rows=rows, rejects=rejects)
        before += n_lines
        offset = end
        if after != names:          # a header line with another column order (a reject)
            names, canon = after, canonical_names(after, dict(columns or {}))


def input_size(path) -> int:
    """Bytes of a CSV file or rows of a Parquet file (the unit of :attr:`LogChunk.position`)."""
    p = check_file(path)
    if log_format(p) == "parquet":
        try:
            return pq.ParquetFile(p).metadata.num_rows
        except (pa.ArrowInvalid, OSError) as exc:
            raise SourceError(f"{p}: unreadable parquet file: {exc}") from None
    return p.stat().st_size


def iter_chunks(path, columns: Mapping[str, str] | None = None, chunk_rows: int = 1_000_000
                ) -> Iterator[LogChunk]:
    """Yield the log in chunks of about ``chunk_rows`` rows (row numbers continue across chunks)."""
    p = check_file(path)
    offset = 0
    if log_format(p) == "parquet":
        try:
            pf = pq.ParquetFile(p)
            for batch in pf.iter_batches(batch_size=max(int(chunk_rows), 1)):
                frame = canonical_frame(table_to_frame(pa.Table.from_batches([batch])), columns)
                yield LogChunk(frame, offset, offset + len(frame))
                offset += len(frame)
        except (pa.ArrowInvalid, OSError) as exc:
            raise SourceError(f"{p}: unreadable parquet file: {exc}") from None
        return
    yield from csv_text_chunks(p, columns, chunk_rows)


def mean_line_bytes(path: Path, header: bytes, sample: int = 1 << 16) -> int:
    """Mean bytes per data line over the first ``sample`` bytes (at least 8)."""
    with open(path, "rb") as fh:
        fh.seek(len(header))
        data = fh.read(sample)
    lines = data.count(b"\n")
    return max(8, len(data) // lines) if lines else max(8, len(data))


def file_bytes(path) -> int:
    return os.path.getsize(path)


#: logs up to this size are read whole (any row order); larger ones in chunks
WHOLE_BYTES = 64 << 20


WHOLE_ROWS = 2_000_000
#: a CSV log read whole is one chunk of at most this many lines (64 MB holds far fewer)
WHOLE_ROWS_CSV = 1 << 40


def read_whole(log, columns) -> LogChunk:
    """The whole log as one :class:`LogChunk` (CSV through the line reader, Parquet typed)."""
    if log_format(log) == "parquet":
        frame = read_log(log, columns)
        return LogChunk(frame, 0, len(frame))
    parts = list(csv_text_chunks(log, columns, WHOLE_ROWS_CSV))
    if not parts:
        return LogChunk(read_log(log, columns, text=True), 0, 0,
                        rows=np.zeros(0, np.int64), rejects=None)
    if len(parts) == 1:
        return parts[0]
    # a header line inside the file ends a chunk: put the pieces together again
    rejects = [c.rejects for c in parts if c.rejects is not None and len(c.rejects)]
    return LogChunk(pd.concat([c.frame for c in parts], ignore_index=True), 0, parts[-1].position,
                    rows=np.concatenate([c.rows for c in parts]),
                    rejects=pd.concat(rejects, ignore_index=True) if rejects else parts[0].rejects)


def log_chunks(log, columns, chunk_rows: int | None):
    """The log as :class:`LogChunk` s: whole when small and ``chunk_rows`` is None, else chunked."""
    size = input_size(log)
    if chunk_rows is None:
        small = size <= (WHOLE_ROWS if log_format(log) == "parquet" else WHOLE_BYTES)
        if small:
            return size, iter([read_whole(log, columns)])
        chunk_rows = DEFAULT_CHUNK_ROWS
    if int(chunk_rows) < 1:
        raise ConfigError(f"chunk_rows = {chunk_rows!r}: must be >= 1")
    return size, iter_chunks(log, columns, int(chunk_rows))


DEFAULT_CHUNK_ROWS = 1_000_000
