"""Fault injection: a commit that fails WITHOUT a crash loses nothing and invents nothing.

A SIGKILL test (tests/test_crash_resume.py) cannot see this class of fault: the process lives
on with whatever its memory holds after the failed transaction. Each fault below hits one
batch on its first attempt; the same batch is then given again (what the service does at its
next poll, since the source position is only committed with the batch) and the store must end
equal, to the bit, to a run that never failed; the monitor's in-memory state after the failed
attempt must equal its state before it (validation gate with its recent-timestamp ring, series
index and state vectors, counters).

Faults, each a real failure of SQLite rather than a mocked method of elmon:

- the store locked past the busy timeout by a real second process (``BEGIN IMMEDIATE``);
- disk full: where the machine lets an unprivileged user namespace mount a tmpfs
  (``unshare -rm``), a store on a 16 MiB tmpfs that really fills (run in a child process inside
  that namespace; skipped with the reason where it cannot);
- an I/O error at ``COMMIT`` (the connection's ``COMMIT`` raises SQLite's "disk I/O error",
  after every insert of the batch succeeded).

Batches are small (about 5 rows per series, fewer than the gate's 15-entry ring) and one fault
hits the batch in which a new series first appears: the two cases where a partly restored gate
rejected the retried rows as "duplicate row" (issue 14, item 1).
"""

from __future__ import annotations

import shutil
import sqlite3
import subprocess
import sys
import textwrap
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from monitor.errors import StoreError
from monitor.live.monitor import Monitor
from monitor.settings import Config
from monitor.store import Store
from simulators import simulate
from tests.conftest import DESIGNED
from tests.service_helpers import assert_same_store, dump

ROOT = Path(__file__).resolve().parents[1]

CFG = Config({**tomllib.loads("""
[estimator]
forgetting = 0.99
controls = ["promo"]
[validation]
zero_policy = "skip"
[detectors]
cusum_h = {cusum_h}
slope_h = {slope_h}
""".format(**DESIGNED)), "store": {"estimates_every": 3}})

BATCH = 20          # rows per batch: about 5 per series, fewer than the gate's ring (15)
FAULTY = (3, 10)    # batch 3: known series only; batch 10: a new series first appears


def make_log() -> pd.DataFrame:
    """Four series from the start, a fifth that first appears at row 200."""
    main = simulate("retail", seed=11, n_series=4, length=90).log.drop(columns=["weekend"])
    late = simulate("retail", seed=12, n_series=1, length=60).log.drop(columns=["weekend"])
    late = late.assign(series="new-lane/late-oat-bar")
    # demand of one series triples from mid-February (a level shift of log 3 = 1.1, several
    # noise sd): the run opens alerts, so a lost alert would show
    shift = (main["series"] == "millbrook/oat-bar") & (main["ts"] >= "2024-02-15")
    main.loc[shift, "quantity"] = main.loc[shift, "quantity"] * 3.0
    return pd.concat([main.iloc[:200], late, main.iloc[200:]], ignore_index=True)


def batches(log: pd.DataFrame) -> list[pd.DataFrame]:
    return [log.iloc[lo:lo + BATCH] for lo in range(0, len(log), BATCH)]


def memory(mon: Monitor) -> dict:
    """Every piece of a Monitor's in-memory state a batch can change."""
    gate = {k: (v.copy() if hasattr(v, "copy") else v) for k, v in vars(mon.gate).items()}
    book = mon.book
    return {"gate": gate, "index": dict(book.index), "names": list(book.names),
            "states": book.states.copy(), "updates": dict(book.updates),
            "last_status": dict(book.last_status), "last_obs": dict(book.last_obs),
            "zero": dict(book.zero), "rows_read": dict(book.rows_read)}


def assert_same_memory(a: dict, b: dict) -> None:
    assert a["gate"].keys() == b["gate"].keys()
    for k in a["gate"]:
        x, y = a["gate"][k], b["gate"][k]
        if isinstance(x, np.ndarray):
            assert x.shape == y.shape, f"gate.{k}: shape {x.shape} against {y.shape}"
            assert np.array_equal(x, y, equal_nan=x.dtype.kind == "f"), f"gate.{k} differs"
        else:
            assert x == y, f"gate.{k} differs"
    for k in ("index", "names", "updates", "last_status", "last_obs", "zero", "rows_read"):
        assert a[k] == b[k], f"{k} differs"
    assert a["states"].shape == b["states"].shape
    assert np.array_equal(a["states"], b["states"], equal_nan=True)


NOTICE_AT = FAULTY[1]   # this batch also reports a source problem: it opens an alert


def feed(mon: Monitor, k: int, b: pd.DataFrame):
    """Batch ``k``; batch NOTICE_AT carries a source notice, so an alert opens in the same
    transaction (an alert lost or doubled by a failed commit would show in the store)."""
    if k == NOTICE_AT:
        return mon.process_batch(b, "api", None, kind="api",
                                 notice="feed was rotated (test notice)")
    return mon.observe_many(b)


def clean_run(path: Path, log: pd.DataFrame) -> None:
    with Monitor(path, CFG) as mon:
        for k, b in enumerate(batches(log)):
            feed(mon, k, b)


def faulty_run(path: Path, log: pd.DataFrame, fault, busy_timeout: float = 0.2) -> int:
    """Feed the batches; ``fault(store)`` is a context manager around the first attempt of each
    batch in FAULTY. Returns how many attempts failed (each is asserted to leave memory as
    it was)."""
    failed = 0
    store = Store.open(path, create=True, busy_timeout=busy_timeout)
    mon = Monitor(store, CFG)
    try:
        for k, b in enumerate(batches(log)):
            if k in FAULTY:
                before = memory(mon)
                with fault(store):
                    with pytest.raises(StoreError):
                        feed(mon, k, b)
                failed += 1
                assert_same_memory(before, memory(mon))
            rep = feed(mon, k, b)                     # the retry (or the only attempt)
            assert rep.rejected == 0, rep.rejects[["row", "series", "reason"]].to_string()
    finally:
        mon.close()
        store.close()
    return failed


def assert_equal_to_clean(tmp_path: Path, db: Path, log: pd.DataFrame) -> None:
    ref = tmp_path / "clean.sqlite"
    clean_run(ref, log)
    d = dump(ref)
    assert len(d["observations"]) == len(log) and not d["rejects"]   # every row is good
    assert d["alerts"], "the run should open at least one alert (checked for loss)"
    wall = ("alerts", "alert_events", "outbox")   # hold the notice alert's wall-clock open time
    assert_same_store(ref, db, skip=wall)
    drop = {"alerts": {4}, "alert_events": {2, 4}, "outbox": {4}}    # those time columns
    got = dump(db)
    for name in wall:
        strip = lambda rows: [tuple(v for i, v in enumerate(r) if i not in drop[name])
                              for r in rows]  # noqa: E731
        assert strip(got[name]) == strip(d[name]), name
    assert len(got["alerts"]) == len(d["alerts"])


@pytest.fixture(scope="module")
def log():
    return make_log()


# -- the faults ---------------------------------------------------------------------------

class LockedByAnotherProcess:
    """A real second process holds the write lock (BEGIN IMMEDIATE) while the attempt runs."""

    SCRIPT = textwrap.dedent("""
        import sqlite3, sys
        c = sqlite3.connect(sys.argv[1], isolation_level=None, timeout=60)
        c.execute("BEGIN IMMEDIATE")
        print("locked", flush=True)
        sys.stdin.readline()
        c.execute("ROLLBACK")
        c.close()
    """)

    def __init__(self, store: Store):
        self.path = str(store.path)

    def __enter__(self):
        self.proc = subprocess.Popen([sys.executable, "-c", self.SCRIPT, self.path],
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
        assert self.proc.stdout.readline().strip() == "locked"   # waits for the state
        return self

    def __exit__(self, *exc):
        self.proc.stdin.write("\n")
        self.proc.stdin.flush()
        assert self.proc.wait(timeout=120) == 0                  # hang guard only
        return False


class _FailingCommit:
    """A connection whose ``COMMIT`` fails like a disk I/O error; all else passes through."""

    def __init__(self, conn):
        self._conn = conn

    def execute(self, sql, *args):
        if sql.strip().upper() == "COMMIT":
            raise sqlite3.OperationalError("disk I/O error")
        return self._conn.execute(sql, *args)

    def __getattr__(self, name):
        return getattr(self._conn, name)


class IOErrorAtCommit:
    def __init__(self, store: Store):
        self.store = store

    def __enter__(self):
        self.real = self.store.conn
        self.store.conn = _FailingCommit(self.real)
        return self

    def __exit__(self, *exc):
        self.store.conn = self.real
        return False


@pytest.mark.parametrize("fault", [LockedByAnotherProcess, IOErrorAtCommit],
                         ids=["locked-by-second-process", "io-error-at-commit"])
def test_a_failed_commit_loses_no_row_and_invents_no_duplicate(tmp_path, log, fault):
    db = tmp_path / "faulty.sqlite"
    assert faulty_run(db, log, fault) == len(FAULTY)
    assert_equal_to_clean(tmp_path, db, log)


# -- a store on a small tmpfs that really fills --------------------------------------------

TMPFS_CHILD = textwrap.dedent("""
    import os, shutil, sqlite3, subprocess, sys
    sys.path.insert(0, sys.argv[3])
    import pandas as pd
    import pytest
    from tests import test_faults as tf
    from monitor.store import Store
    from monitor.live.monitor import Monitor
    mnt, out = sys.argv[1], sys.argv[2]
    subprocess.run(["mount", "-t", "tmpfs", "-o", "size=16m", "tmpfs", mnt], check=True)
    log = tf.make_log()
    db = os.path.join(mnt, "s.sqlite")
    store = Store.open(db, create=True, busy_timeout=0.2)
    mon = Monitor(store, tf.CFG)
    filler, failed = os.path.join(mnt, "filler"), 0
    for k, b in enumerate(tf.batches(log)):
        if k == tf.FAULTY[1]:
            before = tf.memory(mon)
            fd = os.open(filler, os.O_WRONLY | os.O_CREAT)   # fill the file system to the end
            try:
                while True:
                    os.write(fd, b"\\0" * 4096)
            except OSError:
                pass
            os.close(fd)
            try:
                tf.feed(mon, k, b)
            except Exception as exc:
                failed += 1
                print("failed:", exc, flush=True)
            os.remove(filler)
            tf.assert_same_memory(before, tf.memory(mon))
            if not failed:
                continue
        rep = tf.feed(mon, k, b)
        assert rep.rejected == 0, rep.rejects.to_string()
    mon.close()
    store.close()
    src = sqlite3.connect(db)
    dst = sqlite3.connect(out)
    src.backup(dst)
    dst.close(); src.close()
    print("failed attempts", failed, flush=True)
""")


def test_a_store_on_a_full_tmpfs_loses_nothing(tmp_path, log):
    unshare = shutil.which("unshare")
    if unshare is None:
        pytest.skip("no unshare(1): cannot mount a tmpfs without privileges on this machine; "
                    "the disk-full case is not run")
    probe = subprocess.run([unshare, "-rm", "true"], capture_output=True)
    if probe.returncode != 0:
        pytest.skip("user namespaces are disabled (unshare -rm failed: "
                    f"{probe.stderr.decode(errors='replace').strip()}); the disk-full case is "
                    "not run")
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    out = tmp_path / "tmpfs-copy.sqlite"
    done = subprocess.run([unshare, "-rm", sys.executable, "-c", TMPFS_CHILD, str(mnt),
                           str(out), str(ROOT)], capture_output=True, text=True, timeout=600,
                          cwd=ROOT)
    assert done.returncode == 0, done.stdout + done.stderr
    assert "failed attempts 1" in done.stdout, done.stdout      # the disk really filled
    assert_equal_to_clean(tmp_path, out, log)


# -- through the service: the failed poll is recorded, the next poll reads the same rows -----

def service_config(db: Path, batch_rows: int = BATCH):
    from monitor.settings import validate
    return validate({"store": {"path": str(db), "estimates_every": 3},
                     "service": {"poll_interval_s": 0.05, "batch_rows": batch_rows,
                                 "delivery_interval_s": 0.1, "stale_check_s": 3600},
                     "estimator": {"forgetting": 0.99, "controls": ["promo"]},
                     "validation": {"zero_policy": "skip"}, "detectors": dict(DESIGNED),
                     "sources": {"feed": {"type": "csv", "path": "feed.csv"}}})


def test_the_service_retries_a_locked_commit_at_the_next_poll(tmp_path, log):
    from monitor.live.service import Service
    from tests.service_helpers import csv_bytes
    data = csv_bytes(log)
    lines = data.splitlines(keepends=True)
    feed = tmp_path / "feed.csv"
    feed.write_bytes(data)
    ref = tmp_path / "ref.sqlite"
    with Service(service_config(ref), base=tmp_path) as svc:
        while svc.poll("feed"):
            pass
    feed.write_bytes(b"".join(lines[:201]))                  # header and the first 200 rows
    db = tmp_path / "svc.sqlite"
    store = Store.open(db, create=True, busy_timeout=0.2)
    try:
        with Service(service_config(db), store=store, base=tmp_path) as svc:
            svc.poll("feed")
            with open(feed, "ab") as f:
                f.write(b"".join(lines[201:]))
            with LockedByAnotherProcess(store):
                assert svc.poll("feed") == []                # the commit failed, not the job
            reports = svc.poll("feed")                       # the next poll: the same rows
            assert sum(r.rows for r in reports) == len(lines) - 201
            assert all(r.rejected == 0 for r in reports)
            assert store.scalar("SELECT last_error FROM source_offsets WHERE source = 'feed'") \
                is None
    finally:
        store.close()
    assert_same_store(ref, db)
