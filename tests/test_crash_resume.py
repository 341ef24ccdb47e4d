"""Exact resume: the service over a growing CSV, killed with SIGKILL at random moments and
restarted each time, ends with the same store as a run that was never interrupted.

The feed is written while the service runs: whole lines in random groups, some lines split
across two writes (a reader can see half a line), some bad lines mixed in (wrong field count,
negative price, a word in a number). The crashed store is compared with a reference built by
one uninterrupted run over the finished file in a single batch: observations, estimates
(every float compared by its IEEE-754 bits), latest estimates, series counts, checkpoints,
rejects, alerts with their events, outbox rows and source offsets.
"""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from monitor.live.service import Service
from monitor.settings import load_config
from simulators import simulate
from tests.crash_launcher import committed as committed_rows
from tests.service_helpers import assert_same_store, csv_bytes, dump
from tests.conftest import DESIGNED


ROOT = Path(__file__).resolve().parents[1]

CONFIG = """
[store]
path = "{db}"
estimates_every = 3

[estimator]
forgetting = 0.99
controls = ["promo"]

[validation]
zero_policy = "skip"

[detectors]     # the thresholds the pipeline designs by simulation for these settings
cusum_h = {cusum_h}  # (ARL0 20000, forgetting 0.99), given so no process pays the design time
slope_h = {slope_h}

[service]
poll_interval_s = 0.05
batch_rows = {batch_rows}
delivery_interval_s = 0.2
stale_check_s = 3600

[sources.feed]
type = "csv"
path = "feed.csv"

[sinks.log]
path = "alerts.jsonl"
"""


def feed_lines(seed: int) -> list[bytes]:
    sim = simulate("retail", seed=seed, n_series=6, length=420)
    data = csv_bytes(sim.log)
    lines = data.splitlines(keepends=True)
    rng = random.Random(seed)
    bad = [b"garbage line without commas\n", b"x,2024-01-01T00:00:00Z,1.0\n",
           b"x,2024-01-01T00:00:00Z,-3,4,0,0\n", b"y,2024-01-01T00:00:00Z,about 4,4,0,0\n"]
    body = lines[1:]
    for k in range(12):
        body.insert(rng.randrange(1, len(body)), bad[k % len(bad)])
    return [lines[0], *body]


def write_feed(path: Path, lines: list[bytes], seconds: float, seed: int,
               done: threading.Event) -> None:
    """Append ``lines`` over about ``seconds``, sometimes stopping in the middle of a line."""
    rng = random.Random(seed)
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
    try:
        os.write(fd, lines[0])
        i, n = 1, len(lines)
        pause = seconds / max(1, (n - 1) / 8)
        while i < n:
            k = min(n, i + rng.randint(1, 15))
            chunk = b"".join(lines[i:k])
            if rng.random() < 0.3 and len(chunk) > 4:           # half a line now, the rest later
                cut = rng.randrange(1, len(chunk) - 1)
                os.write(fd, chunk[:cut])
                time.sleep(rng.uniform(0.0, pause))
                chunk = chunk[cut:]
            os.write(fd, chunk)
            i = k
            time.sleep(rng.uniform(0.0, 2 * pause))
    finally:
        os.close(fd)
        done.set()


@pytest.mark.slow
def test_sigkill_at_random_moments_then_restart_ends_exactly_as_an_uninterrupted_run(tmp_path):
    seed = 20240607
    lines = feed_lines(seed)
    (tmp_path / "crash.toml").write_text(CONFIG.format(db="crash.sqlite", batch_rows=40, **DESIGNED))
    (tmp_path / "ref.toml").write_text(CONFIG.format(db="ref.sqlite", batch_rows=100000, **DESIGNED))
    feed = tmp_path / "feed.csv"
    done = threading.Event()
    writer = threading.Thread(target=write_feed, args=(feed, lines, 14.0, seed, done),
                              daemon=True)
    writer.start()
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    rng = random.Random(seed)

    # round 1: the real command, killed a random moment after it has started
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "run", "--config",
                             str(tmp_path / "crash.toml"), "--log-level", "warning"],
                            cwd=tmp_path, env=env, stderr=subprocess.PIPE, text=True)
    started = proc.stderr.readline()
    assert "elmon run: store" in started, started
    deadline = time.monotonic() + 600      # hang guard: a cold numba cache compiles first
    while committed_rows(tmp_path / "crash.sqlite") == 0 and time.monotonic() < deadline:
        time.sleep(0.02)                  # kill it once it has committed work, mid-stream
    time.sleep(rng.uniform(0.0, 0.4))
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=300)
    assert proc.returncode == -signal.SIGKILL

    # rounds 2..23: forked services, each killed after a random delay
    out = tmp_path / "rounds.json"
    subprocess.run([sys.executable, str(ROOT / "tests" / "crash_launcher.py"),
                    str(tmp_path / "crash.toml"), str(out), "22", str(seed), "0.05", "0.9"],
                   cwd=tmp_path, env=env, check=True, timeout=1200)  # hang guard
    rounds = json.loads(out.read_text())
    assert len(rounds) == 22 and all(r["killed"] for r in rounds)
    assert rounds[0]["before"] > 0        # the command's own run had committed batches
    # at least 5 kills hit a service mid-stream: the launcher kills every other round that has
    # rows to read only once that service committed a batch of its own (a state it polls for,
    # so load cannot make the kills miss the work), a random moment into its next batch
    mid = [r for r in rounds if r["after_commit"]]
    assert len(mid) >= 5, rounds
    assert all(r["after"] > r["before"] for r in mid), rounds

    writer.join(timeout=120)
    assert done.is_set()
    # last restart: drain what is left, then the reference over the whole file at once
    with Service(load_config(tmp_path / "crash.toml"), base=tmp_path) as svc:
        svc.run_once()
    with Service(load_config(tmp_path / "ref.toml"), base=tmp_path) as svc:
        totals = svc.run_once()
    assert totals["batches"] == 1 and totals["rows"] == len(lines) - 1
    ref = dump(tmp_path / "ref.sqlite")
    assert len(ref["observations"]) + len(ref["rejects"]) == len(lines) - 1
    assert len(ref["rejects"]) >= 12 and len(ref["estimates"]) > 500
    assert len(ref["alerts"]) >= 2 and len(ref["outbox"]) >= 2      # alerts are compared too
    assert_same_store(tmp_path / "crash.sqlite", tmp_path / "ref.sqlite")
