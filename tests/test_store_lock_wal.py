"""The writer lock and the write-ahead log (issue 14, item 10).

- A symbolic link to the store names the same writer lock, so it cannot start a second
  writer; a symbolic link planted at the lock's path is refused and the file it points to is
  left untouched (the lock is opened with O_NOFOLLOW); a refusal names the holding process.
- The write-ahead log is truncated once it passes ``[store] wal_max_mb`` and no reader holds
  an old snapshot (before, it grew to about 6x the store beside open readers and kept its size).
"""

from __future__ import annotations

import os
import sqlite3
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from monitor.errors import StoreError
from monitor.live.monitor import Monitor
from monitor.settings import validate
from monitor.store.live import take_writer_lock, writer_lock_path
from tests.conftest import DESIGNED

HOLDER = """
import sys
from monitor.live.monitor import Monitor
with Monitor(sys.argv[1]):
    print("ready", flush=True)
    sys.stdin.readline()
"""


def _cfg(**store):
    return validate({"detectors": dict(DESIGNED), "store": store})


def test_a_symlink_to_the_store_cannot_start_a_second_writer(tmp_path):
    db = tmp_path / "real.sqlite"
    link = tmp_path / "link.sqlite"
    with Monitor(db, _cfg()):
        link.symlink_to(db)
        assert writer_lock_path(link) == writer_lock_path(db)
        with pytest.raises(StoreError, match=rf"being processed by another elmon process "
                                             rf"\(pid {os.getpid()},"):
            Monitor(link, _cfg())


def test_a_symlink_planted_at_the_lock_path_is_not_followed(tmp_path):
    db = tmp_path / "s.sqlite"
    victim = tmp_path / "precious.txt"
    victim.write_text("keep me\n")
    os.symlink(victim, writer_lock_path(db))
    with pytest.raises(StoreError, match="is a symbolic link .*does not follow it"):
        take_writer_lock(db)
    assert victim.read_text() == "keep me\n"
    os.unlink(writer_lock_path(db))
    os.mkfifo(writer_lock_path(db))                  # not a regular file either
    with pytest.raises(StoreError, match="not a regular file"):
        take_writer_lock(db)


def test_the_refusal_names_the_process_that_holds_the_lock(tmp_path):
    db = tmp_path / "s.sqlite"
    Monitor(db, _cfg()).close()                      # the store exists (no migration race)
    proc = subprocess.Popen([sys.executable, "-c", HOLDER, str(db)], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, text=True,
                            cwd=os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    try:
        assert proc.stdout.readline().strip() == "ready"
        with pytest.raises(StoreError) as err:
            Monitor(db, _cfg())
        text = str(err.value)
        assert f"pid {proc.pid}," in text and "-c" in text and "since " in text
    finally:
        proc.stdin.write("\n")
        proc.stdin.flush()
        proc.wait(timeout=600)                       # hang guard only
    Monitor(db, _cfg()).close()                      # free again once it ended


def _rows(k, n=300):
    rng = np.random.default_rng(k)
    ts = pd.date_range("2024-01-01", periods=n, freq="min", tz="UTC") + pd.Timedelta(minutes=k * n)
    return pd.DataFrame({"series": [f"s{i % 20:02d}" for i in range(n)],
                         "ts": ts.strftime("%Y-%m-%dT%H:%M:%SZ"),
                         "price": np.exp(rng.normal(0, 0.1, n)),
                         "quantity": np.exp(rng.normal(3, 0.1, n))})


def test_the_wal_is_truncated_past_its_limit_once_readers_let_go(tmp_path):
    db = tmp_path / "s.sqlite"
    wal = str(db) + "-wal"
    limit = 50_000
    with Monitor(db, _cfg(wal_max_mb=limit / 1e6)) as mon:
        reader = sqlite3.connect(db)
        reader.execute("BEGIN")
        reader.execute("SELECT count(*) FROM observations").fetchone()   # an old snapshot
        for k in range(3):
            mon.observe_many(_rows(k))
        held = os.path.getsize(wal)
        assert held > 4 * limit                      # the reader's snapshot pins the log
        reader.execute("COMMIT")
        reader.close()
        mon.observe_many(_rows(3))
        assert os.path.getsize(wal) <= limit         # truncated after the next batch
        one_batch = held / 3
        for k in range(4, 8):                        # and kept near the limit from then on:
            mon.observe_many(_rows(k))               # at most the limit plus one batch
            assert os.path.getsize(wal) <= limit + 1.5 * one_batch
    with sqlite3.connect(db) as con:
        assert con.execute("SELECT count(*) FROM observations").fetchone()[0] == 8 * 300
