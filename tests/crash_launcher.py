"""Start the service again and again and kill it with SIGKILL at random moments.

Run as ``python tests/crash_launcher.py CONFIG OUT.json ROUNDS SEED LO HI`` by
tests/test_crash_resume.py. The launcher imports elmon once and warms the compiled kernels,
then for each round forks a child process that builds a fresh :class:`monitor.live.service.Service`
from the store (nothing but imported modules is inherited: no connection, no thread, no
state) and runs it; after a random delay in [LO, HI] seconds the child is killed with SIGKILL
(every other round with rows to read: once it has committed a batch, then within LO seconds).
Forking saves the interpreter start-up (seconds on this machine) that an exec would pay in each
of the rounds; the rounds that start the ``elmon`` command itself are done by the test.

So that the kills land on services at work on any machine, however loaded, each round waits
for state, never for a clock: it forks only once the feed holds bytes the store has not
committed (or the feed has stopped growing), and the random delay starts when the child says
its service is built (a byte on a pipe), not when it was forked.
"""

from __future__ import annotations

import json
import os
import random
import signal
import sqlite3
import sys
import time
from pathlib import Path


def committed(db: Path) -> int:
    if not db.exists():
        return 0
    try:
        conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)
        try:
            row = conn.execute("SELECT coalesce(sum(rows_read), 0) FROM source_offsets").fetchone()
        finally:
            conn.close()
        return int(row[0])
    except sqlite3.Error:
        return -1


def committed_offset(db: Path, source: str) -> int:
    """Byte offset of the feed the store has committed (0 before the first commit)."""
    if not db.exists():
        return 0
    try:
        conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)
        try:
            row = conn.execute("SELECT position FROM source_offsets WHERE source = ?",
                               (source,)).fetchone()
        finally:
            conn.close()
    except sqlite3.Error:
        return 0
    if not row or not row[0]:
        return 0
    return int(json.loads(row[0]).get("offset", 0))


def wait_for_pending(db: Path, source: str, feed: Path, quiet_s: float = 3.0,
                     guard_s: float = 600.0) -> bool:
    """Return True once the feed holds bytes beyond the committed offset, False once it has not
    grown for ``quiet_s`` (the writer is done); ``guard_s`` is a hang guard only."""
    t0 = time.monotonic()
    last_size, last_change = -1, time.monotonic()
    while time.monotonic() - t0 < guard_s:
        size = feed.stat().st_size if feed.exists() else 0
        if size > committed_offset(db, source) + 64:
            return True
        if size != last_size:
            last_size, last_change = size, time.monotonic()
        elif time.monotonic() - last_change > quiet_s:
            return False
        time.sleep(0.02)
    return False


def warm_up() -> None:
    """Load the numba kernels in the parent so each child starts processing at once."""
    import numpy as np
    import pandas as pd

    from monitor.pipeline.run import Pipeline
    from monitor.rows.prepare import prepare_rows
    from monitor.rows.validate import validate_frame
    from monitor.settings import estimator_from_config, load_config, validation_from_config
    cfg = load_config(sys.argv[1])
    est = estimator_from_config(cfg)
    frame = pd.DataFrame({"series": ["w"] * 3, "ts": ["2024-01-01", "2024-01-02", "2024-01-03"],
                          "price": ["1.0", "1.1", "1.2"], "quantity": ["5", "6", "7"],
                          **{c: ["0", "1", "0"] for c in est.controls}})
    v = validate_frame(frame, controls=est.controls, log_controls=est.log_controls,
                       settings=validation_from_config(cfg), now_ns=None, order_by="arrival")
    assert len(v.good) == 3, v.rejects      # the warm-up compiles on rows it really runs
    sid, X, y, names = prepare_rows(v.good, est)
    Pipeline.from_config(cfg, est).run(sid, X, y, n_series=len(names))
    del np


def main() -> int:
    config_path, out, rounds, seed, lo, hi = sys.argv[1:7]
    rounds, lo, hi = int(rounds), float(lo), float(hi)
    from monitor.live.service import Service
    from monitor.settings import load_config

    warm_up()
    cfg = load_config(config_path)
    base = Path(config_path).resolve().parent
    db = base / cfg.section("store")["path"]
    source, spec = next(iter(cfg.section("sources").items()))
    feed = base / spec["path"]
    rng = random.Random(int(seed))
    log = []
    for i in range(rounds):
        pending = wait_for_pending(db, source, feed)
        # every other round with rows to read is killed mid-stream: once the child has
        # committed a batch of its own (a state, not a clock: on a loaded machine a service can
        # take longer than the whole delay range to build its first batch), a short random
        # moment into the next one; the other rounds are killed a random moment after the
        # service is built (often before its first commit, during start-up)
        after_commit = pending and i % 2 == 0
        before = committed(db)
        ready_r, ready_w = os.pipe()
        pid = os.fork()
        if pid == 0:                                   # the child: a service, killed below
            code = 1
            try:
                os.close(ready_r)
                svc = Service(cfg, base=base)
                os.write(ready_w, b"r")                # built: the parent's clock starts now
                os.close(ready_w)
                svc.run(install_signals=False)
                code = 0
            finally:
                os._exit(code)
        os.close(ready_w)
        os.read(ready_r, 1)                            # b"" if the child died before: go on
        os.close(ready_r)
        delay = rng.uniform(lo, hi)
        if after_commit:
            guard = time.monotonic() + 600.0           # hang guard only
            while committed(db) <= before and time.monotonic() < guard:
                time.sleep(0.005)
            delay = rng.uniform(0.0, lo)
        time.sleep(delay)
        os.kill(pid, signal.SIGKILL)
        _, status = os.waitpid(pid, 0)
        log.append({"round": i, "delay": delay, "before": before, "after": committed(db),
                    "after_commit": after_commit,
                    "killed": os.WIFSIGNALED(status) and os.WTERMSIG(status) == signal.SIGKILL})
    Path(out).write_text(json.dumps(log))
    return 0


if __name__ == "__main__":
    sys.exit(main())
