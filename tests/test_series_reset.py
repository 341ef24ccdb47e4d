"""``elmon series reset NAME`` (issue 14, item 4): a series whose prices switched units is
rejected for good by the unit check; the reset forgets its estimator, detector and gate state,
keeps its stored history, records who and why, and the service resumes exactly: every other
series continues to the bit as if nothing happened, and the reset series continues as a new
series over the rows after the reset would (reference: a fresh store fed only those rows).
"""

from __future__ import annotations

import sqlite3
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from monitor import store as mstore
from monitor.cli import main
from monitor.live.monitor import Monitor
from monitor.live.service import Service, ingest_file
from monitor.settings import validate
from tests.conftest import DESIGNED
from tests.service_helpers import wait_until

N = 160          # hourly rows per series
CUT = 100        # rows of each series in the first part
SHIFT = 80       # from this row on, series "x" is logged in cents


def _frame():
    rng = np.random.default_rng(21)
    parts = []
    for s, name in enumerate(("x", "y", "z")):
        p = np.exp(rng.normal(0.4 + 0.1 * s, 0.15, N))
        q = np.exp(4.0 - 1.3 * np.log(p) + rng.normal(0, 0.1, N))
        price = np.where((name == "x") & (np.arange(N) >= SHIFT), p * 100, p)
        ts = pd.date_range("2024-05-01", periods=N, freq="h", tz="UTC")
        parts.append(pd.DataFrame({"series": name, "ts": ts.strftime("%Y-%m-%dT%H:%M:%SZ"),
                                   "price": price.round(4), "quantity": q.round(3),
                                   "k": np.arange(N)}))
    return pd.concat(parts).sort_values(["k", "series"], kind="stable")


def _write(df, path):
    df.drop(columns="k").to_csv(path, index=False)
    return path


def _config(tmp_path):
    return validate({"detectors": dict(DESIGNED), "store": {"path": "live.sqlite"},
                     "sources": {"feed": {"type": "csv", "path": "feed.csv"}}})


def _estimates(db, name):
    with sqlite3.connect(db) as con:
        return pd.read_sql_query("select ts, beta, beta_se, n_eff, status from estimates "
                                 "where series = ? order by ts", con, params=(name,))


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    d = tmp_path_factory.mktemp("reset")
    df = _frame()
    first, second = df[df["k"] < CUT], df[df["k"] >= CUT]
    cfg = _config(d)
    # the live service: part one, stop, reset x, part two appended, start again
    _write(first, d / "feed.csv")
    with Service(cfg, base=d) as svc:
        t1 = svc.run_once()
    db = d / "live.sqlite"
    before = _estimates(db, "x")
    rc = main(["series", "reset", "x", "--why", "prices logged in cents since row 80",
               "--who", "ops-tester", "--db", str(db)])
    assert rc == 0
    with open(d / "feed.csv", "a") as fh:
        fh.write(second.drop(columns="k").to_csv(index=False, header=False))
    with Service(cfg, base=d) as svc:
        t2 = svc.run_once()
    # references: the whole feed without a reset, and x's second part in a fresh store
    _write(df, d / "whole.csv")
    ingest_file(d / "whole.csv", d / "plain.sqlite", cfg, deliver=False)
    _write(second[second["series"] == "x"], d / "x2.csv")
    ingest_file(d / "x2.csv", d / "fresh.sqlite", cfg, deliver=False)
    return {"d": d, "db": db, "t1": t1, "t2": t2, "before": before}


def test_unit_shift_is_rejected_for_good_without_a_reset(runs):
    assert runs["t1"]["rejected"] == CUT - SHIFT               # x's cents rows
    rej = mstore.list_rejects(runs["d"] / "plain.sqlite")
    assert len(rej) == N - SHIFT and rej["reason"].str.contains("unit error").all()


def test_other_series_resume_exactly(runs):
    for name in ("y", "z"):
        live, plain = _estimates(runs["db"], name), _estimates(runs["d"] / "plain.sqlite", name)
        assert len(live) == N
        pd.testing.assert_frame_equal(live, plain, check_exact=True)


def test_reset_series_continues_as_a_new_series_and_keeps_its_history(runs):
    live = _estimates(runs["db"], "x")
    fresh = _estimates(runs["d"] / "fresh.sqlite", "x")
    assert runs["t2"]["rejected"] == 0 and runs["t2"]["accepted"] == 3 * (N - CUT)
    kept = live.iloc[:SHIFT].reset_index(drop=True)
    pd.testing.assert_frame_equal(kept, runs["before"], check_exact=True)   # history stays
    after = live.iloc[SHIFT:].reset_index(drop=True)
    assert len(after) == N - CUT
    pd.testing.assert_frame_equal(after, fresh, check_exact=True)
    # sanity of the new start: the elasticity in the new units is the old one (-1.3)
    assert after["beta"].iloc[-1] == pytest.approx(-1.3, abs=0.3)


def test_the_reset_is_recorded_and_listed(runs, capsys):
    from monitor.store.live import list_series_resets

    df = list_series_resets(runs["db"])
    assert list(df["series"]) == ["x"] and df["who"].iloc[0] == "ops-tester"
    assert df["why"].iloc[0] == "prices logged in cents since row 80"
    # x's newest accepted row before the reset: row 79, 79 h after the start
    assert df["last_ts"].iloc[0] == "2024-05-04T07:00:00Z"
    assert main(["series", "resets", "--db", str(runs["db"])]) == 0
    out = capsys.readouterr().out
    assert "x  by ops-tester: prices logged in cents" in out


def test_reset_of_an_unknown_series_is_refused_and_a_held_store_gets_a_request(tmp_path,
                                                                              capsys):
    db = tmp_path / "s.sqlite"
    with Monitor(db, validate({"detectors": dict(DESIGNED)})) as mon:
        mon.observe("a", "2024-05-01T00:00:00Z", 2.0, 10.0)
        mon.observe("a", "2024-05-01T01:00:00Z", 2.1, 9.0)
        held = mon.state_of("a").tobytes()
        # the writer lock is held: the reset is recorded as a request, the state untouched
        assert main(["series", "reset", "a", "--why", "test", "--db", str(db)]) == 0
        out = capsys.readouterr().out
        assert "requested" in out and "pid" in out
        assert mon.state_of("a").tobytes() == held
    from monitor.store.live import list_series_resets

    assert list_series_resets(db)["applied_at"].isna().all()
    # a monitor started later applies it before anything else
    with Monitor(db, validate({"detectors": dict(DESIGNED)})) as mon:
        assert mon.state_of("a").tobytes() == mon.pipeline.new_states(1)[0].tobytes()
    assert list_series_resets(db)["applied_at"].notna().all()
    assert main(["series", "reset", "b", "--why", "test", "--db", str(db)]) == 2
    assert "no series 'b' in the store" in capsys.readouterr().err
    with pytest.raises(SystemExit):                       # --why is required
        main(["series", "reset", "a", "--db", str(db)])


def test_a_running_service_applies_a_reset_made_by_another_process(tmp_path):
    """The service runs on its scheduler; ``elmon series reset`` runs in another process while
    it holds the store. The service applies the request while its source is quiet, and x then
    continues exactly as a new series over the rows after the reset; y and z as if nothing
    happened."""
    df = _frame()
    first, second = df[df["k"] < CUT], df[df["k"] >= CUT]
    cfg = validate({"detectors": dict(DESIGNED), "store": {"path": "live.sqlite"},
                    "service": {"poll_interval_s": 0.1, "delivery_interval_s": 60},
                    "sources": {"feed": {"type": "csv", "path": "feed.csv"}}})
    _write(first, tmp_path / "feed.csv")
    db = tmp_path / "live.sqlite"
    svc = Service(cfg, base=tmp_path)
    try:
        svc.start()
        assert wait_until(lambda: _rows_read(db) == len(first), 30)
        old = svc.monitor.state_of("x").tobytes()
        proc = subprocess.run([sys.executable, "-m", "monitor", "series", "reset", "x", "--why",
                               "prices logged in cents since row 80", "--who", "ops-tester",
                               "--db", str(db)], capture_output=True, text=True, timeout=300)
        assert proc.returncode == 0, proc.stderr
        assert "requested" in proc.stdout
        from monitor.store.live import list_series_resets

        assert wait_until(lambda: list_series_resets(db)["applied_at"].notna().all(), 30)
        fresh = svc.monitor.pipeline.new_states(1)[0].tobytes()
        assert svc.monitor.state_of("x").tobytes() == fresh != old
        assert mstore.load_checkpoints(db)["x"].state["pipeline"] is None
        with open(tmp_path / "feed.csv", "a") as fh:
            fh.write(second.drop(columns="k").to_csv(index=False, header=False))
        assert wait_until(lambda: _rows_read(db) == len(df), 30)
    finally:
        svc.stop()
        if svc.scheduler is not None:
            svc.scheduler.shutdown(wait=True)
        svc.close()
    rec = list_series_resets(db)
    assert list(rec["who"]) == ["ops-tester"] and rec["last_ts"].iloc[0] == "2024-05-04T07:00:00Z"
    _write(second[second["series"] == "x"], tmp_path / "x2.csv")
    ingest_file(tmp_path / "x2.csv", tmp_path / "fresh.sqlite", cfg, deliver=False)
    after = _estimates(db, "x").iloc[SHIFT:].reset_index(drop=True)
    pd.testing.assert_frame_equal(after, _estimates(tmp_path / "fresh.sqlite", "x"),
                                  check_exact=True)
    _write(df, tmp_path / "whole.csv")
    ingest_file(tmp_path / "whole.csv", tmp_path / "plain.sqlite", cfg, deliver=False)
    for name in ("y", "z"):
        pd.testing.assert_frame_equal(_estimates(db, name),
                                      _estimates(tmp_path / "plain.sqlite", name),
                                      check_exact=True)


def _rows_read(db) -> int:
    with sqlite3.connect(db) as con:
        return con.execute("SELECT coalesce(sum(rows_read), 0) FROM source_offsets").fetchone()[0]
