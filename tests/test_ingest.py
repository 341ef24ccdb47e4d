"""Sources with positions: a tailed CSV (partial lines, truncation, replacement), a folder of
CSV/Parquet files, a SQL table (sqlite3 and a SQLAlchemy URL), and the line parser.

Real files and real SQLite databases on disk throughout; expected values are written out by
hand from the bytes each test writes (row numbers are 1-based data rows, header excluded, as
in the replay's rejects: common practice for CSV line reports).
"""

from __future__ import annotations

import os
import sqlite3
import time

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from monitor.errors import ConfigError, SourceError
from monitor.ingest.csv_text import parse_lines
from monitor.ingest.factory import file_source, sources_from_config
from monitor.ingest.files import CsvTail, FolderSource
from monitor.ingest.sql import SqlSource
from monitor.settings import validate as validate_config


HEADER = b"series,ts,price,quantity\n"
NAMES = ["series", "ts", "price", "quantity"]


def line(i: int, series: str = "a") -> bytes:
    return f"{series},2024-01-01T{i // 60:02d}:{i % 60:02d}:00Z,{5 + i % 3}.5,{10 + i}\n".encode()


def drain(src, position=None, max_rows=1000):
    """Read until the source has nothing new; returns (chunks, final position)."""
    chunks = []
    while True:
        chunk = src.read(position, max_rows)
        if chunk is None:
            return chunks, position
        chunks.append(chunk)
        position = chunk.position


# ---------------------------------------------------------------- line parsing

def test_parse_lines_keeps_row_numbers_through_bad_and_blank_lines():
    body = (b"a,2024-01-01T00:00:00Z,1,2\n"      # row 10
            b"\n"                                # row 11: blank, not a row
            b"b,2024-01-01T00:00:00Z,3\n"        # row 12: 3 fields
            b"\xff\xfe,1,2,3\n"                  # row 13: not UTF-8
            b"c,x,1,2,9\r\n"                     # row 14: 5 fields
            b'"q,1",2,3,4\n'                     # row 15: quoted comma, 4 fields
            b"d,1\r2,3,4\n")                     # row 16: a lone CR inside a line
    frame, rows, rejects, n = parse_lines(NAMES, NAMES, body, 10)
    assert n == 7
    assert rows.tolist() == [10, 15]
    assert frame["series"].tolist() == ["a", "q,1"]
    assert rejects["row"].tolist() == [12, 13, 14, 16]
    reasons = rejects["reason"].tolist()
    assert "the line has 3 fields, the header has 4" in reasons[0]
    assert "not valid UTF-8 text" in reasons[1]
    assert "the line has 5 fields" in reasons[2]
    assert reasons[3].startswith("row 16:")


def test_parse_lines_fast_path_reports_field_counts():
    body = b"a,t,1,2\nb,t,1\n\nc,t,1,2,3\nd,t,1,2\n"
    frame, rows, rejects, n = parse_lines(NAMES, NAMES, body, 1)
    assert (n, rows.tolist(), rejects["row"].tolist()) == (5, [1, 5], [2, 4])
    assert frame["series"].tolist() == ["a", "d"]


# ---------------------------------------------------------------- CSV tail

def test_csv_tail_waits_for_the_newline_of_a_partial_last_line(tmp_path):
    path = tmp_path / "feed.csv"
    path.write_bytes(HEADER + line(0) + line(1) + line(2)[:9])
    src = CsvTail("feed", path)
    chunk = src.read(None, 100)
    assert chunk.frame["quantity"].tolist() == ["10", "11"]
    assert chunk.rows.tolist() == [1, 2] and chunk.position["rows"] == 2
    assert chunk.position["offset"] == len(HEADER + line(0) + line(1))
    assert src.read(chunk.position, 100) is None          # the partial line waits
    with open(path, "ab") as fh:
        fh.write(line(2)[9:] + line(3))
    nxt = src.read(chunk.position, 100)
    assert nxt.frame["quantity"].tolist() == ["12", "13"] and nxt.rows.tolist() == [3, 4]
    assert nxt.notice is None


def test_csv_tail_header_not_complete_yet(tmp_path):
    path = tmp_path / "feed.csv"
    path.write_bytes(b"series,ts,pri")
    assert CsvTail("feed", path).read(None, 10) is None
    path.write_bytes(HEADER)
    chunk = CsvTail("feed", path).read(None, 10)
    assert len(chunk.frame) == 0 and chunk.position["offset"] == len(HEADER)
    assert CsvTail("feed", path).read(chunk.position, 10) is None


def test_csv_tail_batches_of_max_rows(tmp_path):
    path = tmp_path / "feed.csv"
    path.write_bytes(HEADER + b"".join(line(i) for i in range(25)))
    chunks, pos = drain(CsvTail("feed", path), max_rows=10)
    assert [len(c.frame) for c in chunks] == [10, 10, 5]
    assert np.concatenate([c.rows for c in chunks]).tolist() == list(range(1, 26))
    assert pos["offset"] == path.stat().st_size


def test_csv_tail_detects_truncation_and_restarts(tmp_path):
    path = tmp_path / "feed.csv"
    path.write_bytes(HEADER + line(0) + line(1) + line(2))
    src = CsvTail("feed", path)
    pos = src.read(None, 100).position
    with open(path, "r+b") as fh:                           # same inode, cut short
        fh.truncate(len(HEADER + line(0)))
    chunk = src.read(pos, 100)
    assert "truncated" in chunk.notice and "reading the new file from its start" in chunk.notice
    assert chunk.rows.tolist() == [1]


def test_csv_tail_detects_a_replaced_file(tmp_path):
    path = tmp_path / "feed.csv"
    path.write_bytes(HEADER + line(0) + line(1))
    src = CsvTail("feed", path)
    pos = src.read(None, 100).position
    other = tmp_path / "new.csv"
    other.write_bytes(HEADER + line(5, "b") + line(6, "b") + line(7, "b"))
    os.replace(other, path)                                 # log rotation: a new inode
    chunk = src.read(pos, 100)
    assert "was replaced" in chunk.notice
    assert chunk.frame["series"].tolist() == ["b", "b", "b"] and chunk.rows.tolist() == [1, 2, 3]


def test_csv_tail_detects_a_rewritten_start_of_the_same_size(tmp_path):
    path = tmp_path / "feed.csv"
    path.write_bytes(HEADER + line(0) + line(1))
    src = CsvTail("feed", path)
    pos = src.read(None, 100).position
    data = bytearray(path.read_bytes())
    data[len(HEADER)] = ord("z")                            # same size, same inode
    with open(path, "r+b") as fh:
        fh.write(bytes(data))
    chunk = src.read(pos, 100)
    assert "rewritten" in chunk.notice


def test_csv_tail_on_reset_stop_raises_every_poll(tmp_path):
    path = tmp_path / "feed.csv"
    path.write_bytes(HEADER + line(0) + line(1))
    src = CsvTail("feed", path, on_reset="stop")
    pos = src.read(None, 100).position
    path.write_bytes(HEADER)
    for _ in range(2):
        with pytest.raises(SourceError, match="truncated.*on_reset = 'stop'"):
            src.read(pos, 100)


def test_csv_tail_missing_file_is_a_source_error(tmp_path):
    with pytest.raises(SourceError, match="no such file"):
        CsvTail("feed", tmp_path / "absent.csv").read(None, 10)


def test_csv_tail_column_map(tmp_path):
    path = tmp_path / "feed.csv"
    path.write_bytes(b"sku,time,p,q\nx,2024-01-01T00:00:00Z,1.5,3\n")
    chunk = CsvTail("feed", path, {"series": "sku", "ts": "time", "price": "p",
                                   "quantity": "q"}).read(None, 10)
    assert list(chunk.frame.columns) == NAMES


def test_file_source_takes_an_unterminated_last_line_of_a_finished_file(tmp_path):
    path = tmp_path / "done.csv"
    path.write_bytes(HEADER + line(0) + line(1).rstrip(b"\n"))
    name, src = file_source(path)
    assert name == str(path.resolve())
    chunks, pos = drain(src)
    assert sum(len(c.frame) for c in chunks) == 2 and pos["offset"] == path.stat().st_size


# ---------------------------------------------------------------- folder

def _parquet(path, n, series="p"):
    frame = pd.DataFrame({"series": series, "ts": pd.date_range("2024-02-01", periods=n,
                                                                freq="h", tz="UTC"),
                          "price": np.linspace(4, 6, n), "quantity": np.linspace(10, 20, n)})
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), path)
    return frame


def test_folder_reads_each_file_once_in_mtime_order(tmp_path):
    inbox = tmp_path / "in"
    inbox.mkdir()
    (inbox / "b.csv").write_bytes(HEADER + line(0, "b") + line(1, "b"))
    _parquet(inbox / "a.parquet", 3)
    (inbox / "skip.tmp").write_bytes(HEADER + line(0, "t"))
    (inbox / ".hidden.csv").write_bytes(HEADER + line(0, "h"))
    old = time.time() - 100
    os.utime(inbox / "b.csv", (old, old))                    # b is older: first
    os.utime(inbox / "a.parquet", (old + 1, old + 1))
    src = FolderSource("drops", inbox, settle_s=0.0)
    chunks, pos = drain(src, max_rows=2)
    assert [c.label for c in chunks] == ["drops/b.csv", "drops/a.parquet", "drops/a.parquet"]
    assert [c.rows.tolist() for c in chunks] == [[1, 2], [1, 2], [3]]
    assert sorted(pos["done"]) == ["a.parquet", "b.csv"] and pos["current"] is None
    assert src.read(pos, 10) is None                        # nothing is read twice
    (inbox / "c.csv").write_bytes(HEADER + line(3, "c"))
    chunk = src.read(pos, 10)
    assert chunk.label == "drops/c.csv" and chunk.frame["series"].tolist() == ["c"]


def test_folder_waits_for_a_file_to_settle(tmp_path):
    (tmp_path / "new.csv").write_bytes(HEADER + line(0))
    assert FolderSource("d", tmp_path, settle_s=60.0).read(None, 10) is None
    assert FolderSource("d", tmp_path, settle_s=0.0).read(None, 10) is not None


def test_folder_reports_a_processed_file_that_changed(tmp_path):
    (tmp_path / "a.csv").write_bytes(HEADER + line(0))
    src = FolderSource("d", tmp_path, settle_s=0.0)
    chunks, pos = drain(src)
    (tmp_path / "a.csv").write_bytes(HEADER + line(0) + line(1))
    chunk = src.read(pos, 10)
    assert "changed after it was processed" in chunk.notice and len(chunk.frame) == 0
    assert src.read(chunk.position, 10) is None             # reported once, not re-read


def test_folder_resumes_inside_a_file(tmp_path):
    (tmp_path / "big.csv").write_bytes(HEADER + b"".join(line(i) for i in range(7)))
    src = FolderSource("d", tmp_path, settle_s=0.0)
    first = src.read(None, 3)
    assert first.position["current"]["rows"] == 3
    # a new source object (a restarted process) continues from the committed position
    chunks, pos = drain(FolderSource("d", tmp_path, settle_s=0.0), first.position, 3)
    assert np.concatenate([c.rows for c in chunks]).tolist() == [4, 5, 6, 7]


def test_folder_missing_is_a_source_error(tmp_path):
    with pytest.raises(SourceError, match="no such folder"):
        FolderSource("d", tmp_path / "absent").read(None, 10)


# ---------------------------------------------------------------- SQL table

def _table(db, rows, start=0):
    with sqlite3.connect(db) as conn:
        conn.execute("CREATE TABLE IF NOT EXISTS obs (id INTEGER PRIMARY KEY AUTOINCREMENT, "
                     "series TEXT, ts TEXT, price REAL, quantity REAL)")
        conn.executemany("INSERT INTO obs (series, ts, price, quantity) VALUES (?, ?, ?, ?)",
                         [("s", f"2024-01-01T00:{i:02d}:00Z", 5.0 + i % 3, 10.0 + i)
                          for i in range(start, start + rows)])
    conn.close()


def test_sql_source_polls_by_increasing_key(tmp_path):
    db = tmp_path / "feed.db"
    _table(db, 5)
    src = SqlSource("meters", "obs", "id", path=db)
    chunks, pos = drain(src, max_rows=2)
    assert [len(c.frame) for c in chunks] == [2, 2, 1]
    assert (pos["key"], pos["rows"]) == (5, 5) and len(pos["last_hash"]) == 64
    _table(db, 2, start=5)
    chunk = src.read(pos, 10)
    assert chunk.frame["id"].tolist() == [6, 7] and chunk.rows.tolist() == [6, 7]
    assert chunk.frame["price"].dtype == np.float64


def test_sql_source_through_a_sqlalchemy_url(tmp_path):
    pytest.importorskip("sqlalchemy")
    db = tmp_path / "feed.db"
    _table(db, 3)
    src = SqlSource("meters", "obs", "id", url=f"sqlite:///{db}")
    chunks, pos = drain(src, max_rows=2)
    assert (pos["key"], pos["rows"]) == (3, 3)
    assert pos["last_hash"] == SqlSource("m", "obs", "id", path=db).read(None, 3).position[
        "last_hash"]                          # the same fingerprint through either driver
    assert pd.concat([c.frame for c in chunks])["quantity"].tolist() == [10.0, 11.0, 12.0]


def test_sql_source_errors_name_the_table(tmp_path):
    db = tmp_path / "feed.db"
    sqlite3.connect(db).close()
    with pytest.raises(SourceError, match="no such table"):
        SqlSource("m", "obs", path=db).read(None, 10)
    with pytest.raises(ConfigError, match="plain SQL name"):
        SqlSource("m", "obs; DROP TABLE x", path=db)


# ---------------------------------------------------------------- config

def test_sources_from_config_resolve_paths_against_the_config_folder(tmp_path):
    cfg = validate_config({"sources": {"feed": {"type": "csv", "path": "feed.csv",
                                                "poll_interval_s": 1.0},
                                       "drops": {"type": "folder", "path": "in"},
                                       "meters": {"type": "sql", "path": "m.db", "table": "obs"}}})
    srcs = sources_from_config(cfg, tmp_path)
    assert srcs["feed"].path == tmp_path / "feed.csv" and srcs["drops"].path == tmp_path / "in"
    assert srcs["meters"].path == tmp_path / "m.db"


@pytest.mark.parametrize("spec, message", [
    ({"type": "ftp", "path": "x"}, "type = 'ftp'"),
    ({"type": "csv"}, "path: required"),
    ({"type": "csv", "path": "x", "pth": 1}, "pth: unknown key"),
    ({"type": "csv", "path": "x", "poll_interval_s": 0}, "must be > 0"),
    ({"type": "sql", "table": "t"}, "either path"),
    ({"type": "csv", "path": "x", "on_reset": "ignore"}, "on_reset"),
])
def test_source_config_errors_name_the_key(spec, message):
    with pytest.raises(ConfigError, match=message):
        validate_config({"sources": {"feed": spec}})


def test_folder_skips_an_unreadable_file_and_reports_it(tmp_path):
    (tmp_path / "a.parquet").write_bytes(b"this is not parquet")
    (tmp_path / "b.csv").write_bytes(HEADER + line(0))
    old = time.time() - 100
    os.utime(tmp_path / "a.parquet", (old, old))
    src = FolderSource("d", tmp_path, settle_s=0.0)
    first = src.read(None, 10)
    assert first.notice_kind == "source_error" and "unreadable parquet file" in first.notice
    assert "skipped" in first.notice and len(first.frame) == 0
    nxt = src.read(first.position, 10)                      # the next file is not blocked
    assert nxt.label == "d/b.csv" and len(nxt.frame) == 1
    assert src.read(nxt.position, 10) is None
