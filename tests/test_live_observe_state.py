"""The one-row live path's state handling (issue 15: Monitor.observe latency).

- Checkpoints hold the pipeline state in a binary form ("f8:" + base64 of float64 bytes); a
  store whose checkpoints hold the older JSON list resumes too, and both resume exactly: the
  states and the estimates equal an uninterrupted run's to the bit.
- Per-series bounds are cached, and the cache is dropped when bounds are written through the
  Monitor's own store connection (Store.bounds_version) or by another connection
  (PRAGMA data_version).
- WAL checkpoints run in a thread of their own: SQLite's automatic checkpoint is off on the
  writer connection while a Monitor runs, passive checkpoints keep the log small, and the
  automatic checkpoint is given back to a shared store when the Monitor closes.
No speed is asserted here (benchmarks/live.py measures it).
"""

from __future__ import annotations

import json
import re
import sqlite3
import time

import numpy as np
import pytest

from monitor.detectors.base import floats_to_json
from monitor.live.checkpoints import vector_from_json, vector_to_json
from monitor.live.monitor import Monitor
from monitor.settings import validate
from monitor.store import Store, wall_ts, write_batch
from monitor.store.wal import WalCheckpointer
from tests.conftest import DESIGNED

NAMES = ["shop1/tea", "shop2/oats", "shop3/rice"]


def _cfg():
    return validate({"detectors": dict(DESIGNED), "bounds": {"low": -4.0, "high": -0.2}})


def _calls(n: int, seed: int = 3):
    """n one-row calls over three series, hourly, log-log demand with b = -1.5 (seeded)."""
    rng = np.random.default_rng(seed)
    t0 = np.datetime64("2024-01-01T00:00:00", "s")
    out = []
    for i in range(n):
        p = float(np.round(4.0 * np.exp(rng.normal(0, 0.15)), 2))
        q = float(np.round(np.exp(3.0 - 1.5 * np.log(p) + rng.normal(0, 0.2)), 3))
        out.append((NAMES[i % 3], str(t0 + np.timedelta64(i // 3, "h")) + "Z", p, q))
    return out


def _feed(mon, calls):
    return [mon.observe(s, ts, price=p, quantity=q) for s, ts, p, q in calls]


def _estimates(path):
    with sqlite3.connect(path) as con:
        return con.execute("SELECT * FROM estimates ORDER BY series, ts").fetchall()


def _to_old_json_form(path):
    """Rewrite every checkpoint's pipeline state as the JSON list of earlier versions."""
    con = sqlite3.connect(path)
    with con:
        for series, text in con.execute("SELECT series, state FROM checkpoints").fetchall():
            st = json.loads(text)
            vec = vector_from_json(None, st["pipeline"])
            st["pipeline"] = floats_to_json(vec)
            con.execute("UPDATE checkpoints SET state = ? WHERE series = ?",
                        (json.dumps(st, sort_keys=True, separators=(",", ":")), series))
    con.close()


def test_binary_form_round_trips_every_bit():
    vec = np.array([1.5, -0.0, np.nan, np.inf, -np.inf, 5e-324, 1 / 3, -2.0 ** 60])
    vec[2] = np.frombuffer(np.uint64(0x7FF8000000000123).tobytes(), dtype=np.float64)[0]
    text = vector_to_json(None, vec)
    assert text.startswith("f8:")
    back = vector_from_json(None, text)
    assert back.tobytes() == vec.tobytes()          # NaN payload and -0.0 included


@pytest.mark.parametrize("old_form", [False, True], ids=["binary", "old-json"])
def test_resume_from_either_checkpoint_form_equals_an_uninterrupted_run(tmp_path, old_form):
    calls = _calls(150)
    whole, split = tmp_path / "whole.sqlite", tmp_path / "split.sqlite"
    cfg = _cfg()
    with Monitor(whole, cfg) as mon:
        _feed(mon, calls)
        ref = {s: mon.state_of(s) for s in NAMES}
    with Monitor(split, cfg) as mon:
        _feed(mon, calls[:90])
        assert mon.plain_calls >= 80                 # the one-row path wrote the checkpoints
    with sqlite3.connect(split) as con:
        state = json.loads(con.execute("SELECT state FROM checkpoints LIMIT 1").fetchone()[0])
    assert state["pipeline"].startswith("f8:")
    if old_form:
        _to_old_json_form(split)
    with Monitor(split, cfg) as mon:
        _feed(mon, calls[90:])
        for s in NAMES:
            assert mon.state_of(s).tobytes() == ref[s].tobytes()
    assert _estimates(split) == _estimates(whole)


def test_a_checkpoint_of_another_length_is_refused(tmp_path):
    with Monitor(tmp_path / "a.sqlite", _cfg()) as mon:
        _feed(mon, _calls(6))
        width = mon.state_of(NAMES[0]).size
        with pytest.raises(Exception, match=f"length {width + 1}; this pipeline needs {width}"):
            vector_from_json(mon.pipeline, vector_to_json(None, np.zeros(width + 1)))


def test_bounds_cache_follows_writes_through_this_and_other_connections(tmp_path):
    db = tmp_path / "b.sqlite"
    store = Store.open(db)
    ns = np.array([0], dtype=np.int64)
    with Monitor(store, _cfg()) as mon:
        _feed(mon, _calls(6))
        assert "low" not in mon.run_extras(ns, ["shop1/tea"])     # no own bounds: [bounds]
        # written through the Monitor's own connection: Store.bounds_version drops the cache
        write_batch(store, series=[{"series": "shop1/tea", "low": -3.0, "high": -1.0}])
        kw = mon.run_extras(ns, ["shop1/tea", "shop2/oats"])
        assert kw["low"].tolist() == [-3.0, -4.0] and kw["high"].tolist() == [-1.0, -0.2]
        # written by another connection (as another process would): PRAGMA data_version
        other = sqlite3.connect(db)
        with other:
            other.execute("UPDATE series SET low = -2.5, high = NULL WHERE series = 'shop1/tea'")
        other.close()
        kw = mon.run_extras(ns, ["shop1/tea"])
        assert kw["low"].tolist() == [-2.5] and kw["high"].tolist() == [-0.2]
        # the in-effect record the batch path writes reads the same cache
        assert mon.own_bounds(["shop1/tea", "shop3/rice"]) == {"shop1/tea": (-2.5, None)}
    store.close()


def test_wal_checkpoints_run_beside_the_writer_and_keep_the_log_small(tmp_path):
    db = tmp_path / "w.sqlite"
    store = Store.open(db)
    assert store.scalar("PRAGMA wal_autocheckpoint") == 1000       # SQLite's default
    calls = _calls(600)
    with Monitor(store, _cfg()) as mon:
        assert store.scalar("PRAGMA wal_autocheckpoint") == 0      # not inside our commits
        _feed(mon, calls[:3 * mon.wal.every_commits])
        guard = time.monotonic() + 60.0                            # hang guard only
        while mon.wal.checkpoints < 2 and time.monotonic() < guard:
            time.sleep(0.01)                                       # poll for the state
        assert mon.wal.checkpoints >= 2
        busy, log_pages, done = mon.wal.last
        assert busy == 0 and done == log_pages                     # the whole log copied
        _feed(mon, calls[3 * mon.wal.every_commits:])
        # every call writes at least 7 pages (a row in each of series, observations,
        # estimates, latest_estimates, sparklines, checkpoints, source_offsets), so a log
        # that never starts again holds >= 4,200 frames after 600 calls (6,584 measured);
        # started again after each copy it holds about one budget's frames (821 measured)
        frames = (db.parent / (db.name + "-wal")).stat().st_size / (4096 + 24)
        assert frames < 600 * 7 / 2
    assert store.scalar("PRAGMA wal_autocheckpoint") == 1000       # given back on close
    with sqlite3.connect(db) as con:
        assert con.execute("SELECT count(*) FROM observations").fetchone()[0] == 600
    store.close()


def test_a_closed_checkpointer_runs_no_more(tmp_path):
    store = Store.open(tmp_path / "c.sqlite")
    wal = WalCheckpointer(store, every_commits=1)
    wal.close()
    assert not wal._thread.is_alive()
    assert store.scalar("PRAGMA wal_autocheckpoint") == 1000
    wal.close()                                                    # twice is harmless
    store.close()


def test_wall_ts_now_keeps_its_fixed_width_form():
    text = wall_ts()
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{6}Z", text)
    assert abs(np.datetime64(text[:-1]).astype("datetime64[us]").astype(np.int64) / 1e6
               - time.time()) < 60.0
