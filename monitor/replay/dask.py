"""Scale-out on a Dask cluster: the series of a log partitioned over workers, same kernel.

How a replay runs (``elmon replay LOG --engine dask [--scheduler ADDRESS]``):

1. The driver cuts the log into the same blocks as the local engine (CSV byte ranges of whole
   lines, or Parquet row groups); each worker reads its blocks itself, so on a real cluster the
   log must sit on storage every worker sees under the same path (a shared file system or a
   mounted bucket).
2. Each block is split by a stable hash of the series id (:func:`partition_of`) into
   ``npartitions`` pieces; the driver learns each block's row count to number the rows.
3. Partition p gets piece p of every block, in block order, and runs the local engine's kernel
   (:func:`monitor.replay.kernel.run_chunk`) over them with its own carried state: every
   series lies wholly in one partition, in time order, so each series sees exactly the rows,
   checks and pipeline steps it sees locally. With a truth file the partition also scores its
   own series (:func:`monitor.replay.detection.score` with ``partial=True``).
4. The driver gathers the partitions in order and writes the same files as the local engine.

Estimates, alerts, rejects, summaries and detection scores equal those of the local engine
with the same ``chunk_rows``; only the order of ``estimates.csv`` rows differs (partitions in
turn instead of chunks in turn).

Without ``scheduler`` a ``LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1",
dashboard_address=None)`` is started for the run (about 2 s) and listens on loopback only.
"""

from __future__ import annotations

import contextlib
import time

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

from monitor.errors import ConfigError
from monitor.ingest.chunks import (DEFAULT_BLOCK_BYTES, Block, canonical_frame, csv_blocks,
                                   csv_header, mean_line_bytes)
from monitor.ingest.csv_text import (file_delimiter, header_line, header_split,
                                     parse_lines_with_headers, read_header)
from monitor.ingest.logio import (check_file, column_names, log_format, stated_delimiter,
                                  table_to_frame)
from monitor.progress import Progress


LOCAL_WORKERS = 2


@contextlib.contextmanager
def dask_client(scheduler: str | None = None, n_workers: int = LOCAL_WORKERS):
    """A ``distributed.Client``: to ``scheduler`` if given, else to a loopback LocalCluster."""
    try:
        from distributed import Client, LocalCluster
    except ImportError:  # pragma: no cover - dask is a declared dependency
        raise ConfigError("the Dask engine needs dask[dataframe,distributed]: "
                          "pip install 'elmon[dask]'") from None
    if scheduler:
        try:
            client = Client(scheduler, timeout="10s")
        except (OSError, TimeoutError) as exc:
            raise ConfigError(f"--scheduler {scheduler}: cannot connect ({exc})") from None
        try:
            yield client
        finally:
            client.close()
        return
    cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1, host="127.0.0.1",
                           dashboard_address=None, processes=True)
    client = Client(cluster)
    try:
        yield client
    finally:
        client.close()
        cluster.close()


def partition_of(series: pd.Series, npartitions: int) -> np.ndarray:
    """Partition number of each row: a stable 64-bit hash of the series id mod ``npartitions``
    (``pandas.util.hash_pandas_object``: the same on every machine and run)."""
    h = pd.util.hash_pandas_object(series.astype(object).where(series.notna(), ""), index=False)
    return (h.to_numpy(dtype=np.uint64) % np.uint64(npartitions)).astype(np.int64)


def log_blocks(log, chunk_rows: int | None, whole: bool) -> list:
    """The blocks the local engine would read: one block when read whole."""
    p = check_file(log)
    if log_format(p) == "parquet":
        n = pq.ParquetFile(p).metadata.num_row_groups
        return [("parquet", i) for i in range(n)] if not whole else [("parquet", None)]
    if whole:
        return [("csv", Block(0, len(csv_header(p)), p.stat().st_size))]
    size = mean_line_bytes(p, csv_header(p)) * int(chunk_rows) if chunk_rows else DEFAULT_BLOCK_BYTES
    return [("csv", b) for b in csv_blocks(p, size)]


def block_body(log: str, block) -> bytes:
    with open(log, "rb") as fh:
        fh.seek(block.start)
        return fh.read(block.stop - block.start)


def last_header(log: str, block, columns: dict):
    """Worker task: the column order of the last line in a CSV block that repeats the header
    (the names in any order, :func:`monitor.ingest.csv_text.header_line`), or ``None``. The
    driver carries it to the blocks after (:func:`names_at_blocks`), so every block is read
    in the column order in force where it starts, as the local reader does."""
    kind, b = block
    if kind != "csv":
        return None
    delimiter = file_delimiter(log, stated_delimiter(columns))
    names, _ = read_header(log, str(log), final=True, delimiter=delimiter)
    body, found = block_body(log, b), None
    while True:
        k = header_line(body, names, delimiter)
        if k is None:
            return found
        _, cut, _, after = header_split(body, k, names, 0, delimiter)
        found, names, body = after, after, body[cut:]


def names_at_blocks(first: list[str] | None, found: list) -> list:
    """The column order in force at the start of each block: the file's header, then the
    last header line repeated in the blocks before (``found[i]`` of block i, or ``None``)."""
    out, names = [], first
    for f in found:
        out.append(names)
        names = f if f is not None else names
    return out


def read_split(log: str, block, columns: dict, npartitions: int, names: list | None = None):
    """Worker task: read one block and split it by series partition.

    Returns ``(n_rows, pieces, line_rejects)``; piece p holds the block's rows of partition p,
    in file order, with their row number within the block - 1 in column ``_pos``. A CSV block
    is split by the one line reader (:func:`monitor.ingest.csv_text.parse_lines_with_headers`)
    in the column order ``names`` in force at its start (default: the file's header): a line
    repeating the header is a reject and the lines after it follow its order; ``n_rows``
    counts its lines (blank ones and header lines too, as row numbers do) and
    ``line_rejects`` are the lines it could not split, numbered within the block.
    """
    kind, b = block
    line_rejects = None
    if kind == "parquet":
        pf = pq.ParquetFile(log)
        table = pf.read() if b is None else pf.read_row_group(b)
        frame = canonical_frame(table_to_frame(table), columns)
        n = len(frame)
        pos = np.arange(n, dtype=np.int64)
    else:
        delimiter = file_delimiter(log, stated_delimiter(columns))   # stated, else sniffed
        if names is None:
            names, _ = read_header(log, str(log), final=True, delimiter=delimiter)
        frame, rows, line_rejects, n, _ = parse_lines_with_headers(
            names, dict(columns or {}), block_body(log, b), 1, delimiter)
        pos = rows - 1
    if "series" in frame.columns:
        part = partition_of(frame["series"], npartitions)
    else:                      # the kernel reports the missing column; keep the rows together
        part = np.zeros(n, np.int64)
    frame = frame.assign(_pos=pos)
    order = np.argsort(part, kind="stable")
    bounds = np.searchsorted(part[order], np.arange(npartitions + 1))
    pieces = [frame.iloc[order[bounds[p]:bounds[p + 1]]].reset_index(drop=True)
              for p in range(npartitions)]
    return n, pieces, line_rejects


def split_line_rejects(split):
    return split[2]


def shift_rejects(rejects, offset: int):
    """Line rejects numbered within a block, renumbered by the rows before the block."""
    if rejects is None or not len(rejects) or not offset:
        return rejects
    old = rejects["row"].to_numpy(dtype=np.int64)
    reasons = [f"row {a + offset}:" + text[len(f"row {a}:"):] for a, text in
               zip(old.tolist(), rejects["reason"].tolist())]
    return rejects.assign(row=old + offset, reason=reasons)


def split_part(split, p):
    return split[1][p]


def split_rows(split):
    return split[0]


def run_partition(pieces: list, offsets: list[int], setup, truth, horizon: int,
                  line_rejects: list | None = None):
    """Worker task: the kernel over one partition's pieces (block order), with carried state;
    ``line_rejects`` (one entry per block, partition 0 only) are the reader's rejects."""
    from monitor.replay.detection import score
    from monitor.replay.kernel import CarriedState, combine, partial_of, run_chunk

    carried = CarriedState()
    parts = []
    for i, (piece, off) in enumerate(zip(pieces, offsets)):
        rows = off + 1 + piece["_pos"].to_numpy(dtype=np.int64)
        lines = shift_rejects(line_rejects[i], off) if line_rejects else None
        res = run_chunk(piece.drop(columns="_pos"), setup, carried, rows=rows, line_rejects=lines)
        parts.append(partial_of(res, setup, carried))
    out = combine(parts)
    if truth is not None:
        names = carried.names()
        mine = truth[truth["series"].isin(set(names))]
        out.scores = score(out.obs_sid, out.obs_ts, names, out.opened, mine, horizon, partial=True)
        out.obs_sid = out.obs_ts = None
    return out


def replay_partitions(log, config, setup, acc, truth, horizon, scheduler, progress, npartitions,
                      chunk_rows=None, whole=None):
    """Run a replay on a Dask cluster into the driver's accumulator; returns (names, info)."""
    from monitor.ingest.chunks import WHOLE_BYTES, WHOLE_ROWS, input_size

    log = str(check_file(log).resolve())
    if whole is None:
        small = input_size(log) <= (WHOLE_ROWS if log_format(log) == "parquet" else WHOLE_BYTES)
        whole = chunk_rows is None and small
    blocks = log_blocks(log, chunk_rows, whole)
    columns = column_names(config)          # a LogLayout: names and the stated delimiter
    t0 = time.perf_counter()
    with dask_client(scheduler) as client:
        nparts = int(npartitions or 2 * max(1, len(client.nthreads())))
        found = client.gather([client.submit(last_header, log, b, columns, pure=False)
                               for b in blocks])
        starts = names_at_blocks(None, found)
        splits = [client.submit(read_split, log, b, columns, nparts, names, pure=False)
                  for b, names in zip(blocks, starts)]
        counts = client.gather([client.submit(split_rows, s) for s in splits])
        offsets = np.r_[0, np.cumsum(counts)[:-1]].astype(int).tolist()
        bar = progress if isinstance(progress, Progress) else \
            Progress(int(sum(counts)), "replay (dask)", enabled=bool(progress))
        setup_f = client.scatter(setup, broadcast=True)
        truth_f = client.scatter(truth, broadcast=True) if truth is not None else None
        parts = []
        lines = [client.submit(split_line_rejects, s) for s in splits]
        for p in range(nparts):
            pieces = [client.submit(split_part, s, p) for s in splits]
            parts.append(client.submit(run_partition, pieces, offsets, setup_f, truth_f, horizon,
                                       lines if p == 0 else None, pure=False))
        del splits
        rejects = []
        for fut in parts:        # in partition order: the output files do not depend on timing
            partial = fut.result()
            fut.release()
            acc.add(partial, write_rejects=False)
            if len(partial.rejects):
                rejects.append(partial.rejects)
            bar.update(rows=partial.rows)
        if rejects:
            acc.rej_w.write(pd.concat(rejects, ignore_index=True).sort_values("row", kind="stable"))
    bar.close()
    names = list(acc.final.index) if acc.final is not None else []
    return names, {"chunks": len(blocks), "partitions": nparts, "read_s": None,
                   "cluster_s": time.perf_counter() - t0}
