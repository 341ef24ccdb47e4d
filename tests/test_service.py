"""The service: scheduled jobs, clean shutdown on SIGTERM, staleness, delivery, source errors,
and a reader process querying the store while the service writes.

Everything runs against real parts: SQLite files on disk, real CSV files and folders, a real
local HTTP server (pytest-httpserver) for the webhook, the ``elmon`` command in a subprocess.
"""

from __future__ import annotations

import json
import logging
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pandas as pd
import pytest
from werkzeug import Response

from monitor.live.service import Service
from tests.service_helpers import wait_until
from monitor.settings import validate as validate_config
from monitor.store import open_store, wall_ts
from simulators import LiveAppender, simulate
from tests.service_helpers import assert_same_store, csv_bytes, dump, frame
from tests.conftest import DESIGNED as DESIGNED_H


ROOT = Path(__file__).resolve().parents[1]
#: the thresholds the pipeline designs by simulation for the default ARL0 20000 and forgetting
#: 0.99 (monitor.detectors.design), given so that each process skips the design time
DESIGNED = dict(DESIGNED_H)


def config(**sections):
    base = {"store": {"path": "s.sqlite"},
            "service": {"poll_interval_s": 0.05, "batch_rows": 100, "delivery_interval_s": 0.1,
                        "stale_check_s": 0.2},
            "estimator": {"controls": ["promo"]}, "detectors": DESIGNED}
    for k, v in sections.items():
        base[k] = {**base.get(k, {}), **v} if isinstance(v, dict) else v
    return validate_config(base)


@pytest.fixture(scope="module")
def log():
    return simulate("retail", seed=4, n_series=3, length=120).log


def test_run_once_reads_csv_folder_and_sql_sources(tmp_path, log):
    (tmp_path / "feed.csv").write_bytes(csv_bytes(log.iloc[:150]))
    inbox = tmp_path / "in"
    inbox.mkdir()
    part = log.iloc[150:250].assign(series=lambda d: "drop/" + d["series"])
    (inbox / "a.csv").write_bytes(csv_bytes(part))
    old = time.time() - 10
    os.utime(inbox / "a.csv", (old, old))
    db = tmp_path / "meters.db"
    with sqlite3.connect(db) as conn:
        sql = log.iloc[250:].assign(series=lambda d: "sql/" + d["series"])
        sql.to_sql("obs", conn, index=True, index_label="id")
    conn.close()
    cfg = config(sources={"feed": {"type": "csv", "path": "feed.csv"},
                          "drops": {"type": "folder", "path": "in", "settle_s": 1.0},
                          "meters": {"type": "sql", "path": "meters.db", "table": "obs"}})
    with Service(cfg, base=tmp_path) as svc:
        totals = svc.run_once()
    assert totals["rows"] == len(log)
    offsets = {r[0]: r for r in dump(tmp_path / "s.sqlite")["source_offsets"]}
    assert offsets["feed"][3] == 150 and offsets["drops"][3] == 100
    assert offsets["meters"][3] == len(log) - 250
    obs = frame(tmp_path / "s.sqlite", "SELECT source, count(*) AS n FROM observations "
                                       "GROUP BY source ORDER BY source")
    assert dict(zip(obs["source"], obs["n"])).keys() == {"feed", "drops/a.csv", "meters"}
    with Service(cfg, base=tmp_path) as svc:                 # a restart reads nothing again
        assert svc.run_once()["rows"] == 0


def test_scheduled_service_follows_a_growing_csv_and_stops_cleanly(tmp_path, log):
    feed = tmp_path / "feed.csv"
    appender = LiveAppender(log, feed, rate=600, min_interval=0.02).start()
    cfg = config(sources={"feed": {"type": "csv", "path": "feed.csv"}})
    svc = Service(cfg, base=tmp_path)
    svc.start()
    jobs = {j.id: j for j in svc.scheduler.get_jobs()}
    assert set(jobs) == {"poll:feed", "stale", "deliver"}
    assert all(j.coalesce and j.max_instances == 1 and j.misfire_grace_time == 30
               for j in jobs.values())
    appender.join(timeout=30)
    assert wait_until(lambda: frame(tmp_path / "s.sqlite", "SELECT coalesce(sum(rows_read), 0)"
                                    " AS n FROM source_offsets")["n"][0] == len(log), 30)
    svc.stop()
    svc.scheduler.shutdown(wait=True)
    svc.close()
    assert not svc.scheduler.running
    with Service(config(sources={"feed": {"type": "csv", "path": "feed.csv"}},
                        store={"path": "ref.sqlite"}, service={"batch_rows": 10**6}),
                 base=tmp_path) as ref:
        ref.run_once()
    assert_same_store(tmp_path / "s.sqlite", tmp_path / "ref.sqlite")


@pytest.mark.slow
def test_sigterm_finishes_the_batch_commits_and_exits_zero(tmp_path, log):
    big = pd.concat([log] * 6, ignore_index=True)
    big["ts"] = pd.date_range("2020-01-01", periods=len(big), freq="h", tz="UTC") \
        .strftime("%Y-%m-%dT%H:%M:%SZ")
    (tmp_path / "feed.csv").write_bytes(csv_bytes(big))
    (tmp_path / "elmon.toml").write_text(textwrap.dedent("""
        [store]
        path = "s.sqlite"
        [service]
        poll_interval_s = 0.05
        batch_rows = 50
        [estimator]
        controls = ["promo"]
        [detectors]
        cusum_h = {cusum_h}
        slope_h = {slope_h}
        [sources.feed]
        type = "csv"
        path = "feed.csv"
    """).format(**DESIGNED))
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "run", "--config", "elmon.toml"],
                            cwd=tmp_path, stderr=subprocess.PIPE, text=True,
                            env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert "elmon run: store" in proc.stderr.readline()
    db = tmp_path / "s.sqlite"
    assert wait_until(lambda: db.exists() and frame(db, "SELECT coalesce(sum(rows_read), 0) AS n"
                                                    " FROM source_offsets")["n"][0] > 0, 60)
    proc.send_signal(signal.SIGTERM)
    err = proc.communicate(timeout=60)[1]
    assert proc.returncode == 0, err
    assert "stopped cleanly" in err and "Traceback" not in err
    got = dump(db)
    rows_read = got["source_offsets"][0][3]
    assert 0 < rows_read and len(got["observations"]) + len(got["rejects"]) == rows_read
    # finishing the file afterwards gives the same store as one uninterrupted run
    cfg = validate_config({"store": {"path": "s.sqlite"}, "estimator": {"controls": ["promo"]},
                           "detectors": DESIGNED,
                           "sources": {"feed": {"type": "csv", "path": "feed.csv"}}})
    with Service(cfg, base=tmp_path) as svc:
        svc.run_once()
    ref = validate_config({**cfg.data, "store": {"path": "ref.sqlite"}})
    with Service(ref, base=tmp_path) as svc:
        svc.run_once()
    assert_same_store(db, tmp_path / "ref.sqlite")


def test_stale_source_and_series_raise_and_resolve_alerts(tmp_path, log):
    (tmp_path / "feed.csv").write_bytes(csv_bytes(log.iloc[:30]))
    cfg = config(sources={"feed": {"type": "csv", "path": "feed.csv", "stale_after_s": 60}},
                 service={"series_stale_after_s": 120})
    with Service(cfg, base=tmp_path) as svc:
        svc.run_once()
        t0 = pd.Timestamp(wall_ts())
        assert svc.check_stale(now=t0 + pd.Timedelta(seconds=30)) == []
        opened = svc.check_stale(now=t0 + pd.Timedelta(seconds=90))
        assert [c["series"] for c in opened] == ["source:feed"]
        opened = svc.check_stale(now=t0 + pd.Timedelta(seconds=200))
        assert sorted(c["series"] for c in opened) == sorted(log.iloc[:30]["series"].unique())
        active = frame(tmp_path / "s.sqlite", "SELECT series, message FROM alerts WHERE "
                                              "kind = 'stale' AND state = 'open'")
        msg = active.set_index("series")["message"]
        assert len(active) == 4 and "has sent nothing for 90 s" in msg["source:feed"]
        assert "has sent nothing for 200 s (expected within 120 s)" in msg[log["series"][0]]
        assert svc.check_stale(now=t0 + pd.Timedelta(seconds=210)) == []   # no duplicates
        with open(tmp_path / "feed.csv", "ab") as fh:       # rows arrive again
            fh.write(csv_bytes(log.iloc[30:60]).split(b"\n", 1)[1])
        assert svc.run_once()["stale_changes"] == 4          # run_once checks staleness
        assert svc.check_stale() == []
    assert frame(tmp_path / "s.sqlite", "SELECT count(*) AS n FROM alerts WHERE state != "
                                        "'resolved'")["n"][0] == 0


def test_a_replaced_feed_raises_an_alert_delivered_to_a_webhook_that_recovers(tmp_path, log,
                                                                              httpserver):
    calls = []

    def answer(request):
        calls.append(json.loads(request.data))
        return Response("down", status=503) if len(calls) < 3 else Response("ok", status=200)

    httpserver.expect_request("/hook", method="POST").respond_with_handler(answer)
    feed = tmp_path / "feed.csv"
    feed.write_bytes(csv_bytes(log.iloc[:40]))
    cfg = config(sources={"feed": {"type": "csv", "path": "feed.csv"}},
                 sinks={"ops": {"type": "webhook", "url": httpserver.url_for("/hook")}},
                 service={"delivery_backoff_s": 0.05, "delivery_max_backoff_s": 0.1})
    with Service(cfg, base=tmp_path) as svc:
        svc.run_once()
        new = tmp_path / "new.csv"
        new.write_bytes(csv_bytes(log.iloc[40:60]))
        os.replace(new, feed)
        svc.poll("feed")
        for _ in range(40):
            if svc.deliver()["delivered"]:
                break
            time.sleep(0.05)
    assert len(calls) == 3 and all(c["kind"] == "source_reset" for c in calls)
    assert calls[-1]["series"] == "source:feed" and "was replaced" in calls[-1]["message"]
    out = frame(tmp_path / "s.sqlite", "SELECT status, attempts FROM outbox")
    assert out.to_dict("records") == [{"status": "delivered", "attempts": 3}]
    got = frame(tmp_path / "s.sqlite", "SELECT count(*) AS n FROM observations")["n"][0]
    assert got == 60                          # the new file was read from its start


def test_an_unreadable_source_is_recorded_and_the_service_goes_on(tmp_path, log, caplog):
    cfg = config(sources={"feed": {"type": "csv", "path": "feed.csv"},
                          "other": {"type": "csv", "path": "other.csv"}})
    (tmp_path / "other.csv").write_bytes(csv_bytes(log.iloc[:20]))
    with caplog.at_level(logging.ERROR, logger="elmon.service"), \
            Service(cfg, base=tmp_path) as svc:
        assert svc.run_once()["rows"] == 20                  # the missing file hurts no one
        err = frame(tmp_path / "s.sqlite", "SELECT source, last_error FROM source_offsets "
                                           "ORDER BY source")
        assert "feed.csv: no such file" in err["last_error"][0] and pd.isna(err["last_error"][1])
        (tmp_path / "feed.csv").write_bytes(csv_bytes(log.iloc[20:40]))
        assert svc.run_once()["rows"] == 20
    err = frame(tmp_path / "s.sqlite", "SELECT last_error FROM source_offsets")
    assert err["last_error"].isna().all()
    assert sum("no such file" in r.getMessage() for r in caplog.records) == 1  # logged once


READER = textwrap.dedent("""
    import json, sqlite3, sys, time
    from monitor import store as ms
    db, seconds = sys.argv[1], float(sys.argv[2])
    errors, queries, end = [], 0, time.monotonic() + seconds
    st = ms.open_store(db, readonly=True)
    while time.monotonic() < end:
        try:
            latest = ms.latest_estimates(st)
            if len(latest):
                ms.series_history(st, latest["series"].iloc[queries % len(latest)])
            ms.open_alerts(st)
            ms.store_summary(st)
            conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10)
            conn.execute("SELECT count(*) FROM observations").fetchone()
            conn.close()
            queries += 1
        except Exception as exc:
            errors.append(f"{type(exc).__name__}: {exc}")
    print(json.dumps({"queries": queries, "errors": errors}))
""")


@pytest.mark.slow
def test_a_reader_process_beside_the_writing_service_sees_no_lock_errors(tmp_path, caplog):
    log = simulate("retail", seed=9, n_series=12, length=400).log
    feed = tmp_path / "feed.csv"
    cfg = config(sources={"feed": {"type": "csv", "path": "feed.csv"}},
                 service={"batch_rows": 60, "poll_interval_s": 0.02})
    appender = LiveAppender(log, feed, rate=800, min_interval=0.01).start()
    with caplog.at_level(logging.WARNING):
        svc = Service(cfg, base=tmp_path)
        svc.start()
        assert wait_until(lambda: (tmp_path / "s.sqlite").exists(), 10)
        reader = subprocess.run([sys.executable, "-c", READER, str(tmp_path / "s.sqlite"), "5"],
                                capture_output=True, text=True, timeout=120,
                                env={**os.environ, "PYTHONPATH": str(ROOT)})
        appender.join(timeout=60)
        wait_until(lambda: frame(tmp_path / "s.sqlite", "SELECT coalesce(sum(rows_read), 0) AS n"
                                 " FROM source_offsets")["n"][0] == len(log), 60)  # the asserts below say what is missing
        svc.stop()
        svc.scheduler.shutdown(wait=True)
        svc.close()
    result = json.loads(reader.stdout)
    assert result["errors"] == [] and result["queries"] > 20, reader.stderr
    assert not [r for r in caplog.records if "locked" in r.getMessage().lower()]
    offsets = dump(tmp_path / "s.sqlite")["source_offsets"]
    assert offsets[0][3] == len(log)
    assert frame(tmp_path / "s.sqlite", "SELECT last_error FROM source_offsets")["last_error"] \
        .isna().all()
    with open_store(tmp_path / "s.sqlite", readonly=True) as st:   # commits landed in batches
        assert st.scalar("SELECT count(*) FROM observations") > 0


def test_a_log_sink_path_is_taken_from_the_config_folder(tmp_path, log, monkeypatch):
    elsewhere = tmp_path / "cwd"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    feed = tmp_path / "feed.csv"
    feed.write_bytes(csv_bytes(log.iloc[:10]))
    cfg = config(sources={"feed": {"type": "csv", "path": "feed.csv"}},
                 sinks={"log": {"path": "alerts.jsonl"}})
    with Service(cfg, base=tmp_path) as svc:
        svc.run_once()
        feed.write_bytes(csv_bytes(log.iloc[:3]))          # truncated: a source_reset alert
        svc.run_once()
    lines = (tmp_path / "alerts.jsonl").read_text().splitlines()
    assert [json.loads(x)["kind"] for x in lines] == ["source_reset"]
    assert not (elsewhere / "alerts.jsonl").exists()


def test_on_reset_stop_waits_until_the_source_is_reset(tmp_path, log, capsys):
    from monitor.cli import main

    feed = tmp_path / "feed.csv"
    feed.write_bytes(csv_bytes(log.iloc[:20]))
    (tmp_path / "elmon.toml").write_text(textwrap.dedent("""
        [store]
        path = "s.sqlite"
        [estimator]
        controls = ["promo"]
        [detectors]
        cusum_h = {cusum_h}
        slope_h = {slope_h}
        [sources.feed]
        type = "csv"
        path = "feed.csv"
        on_reset = "stop"
    """).format(**DESIGNED))
    args = ["run", "--config", str(tmp_path / "elmon.toml"), "--once", "--log-level", "error"]
    assert main(args) == 0
    other = tmp_path / "other.csv"
    other.write_bytes(csv_bytes(log.iloc[20:30]))
    os.replace(other, feed)
    assert main(args) == 2          # stopped: nothing read, and --once says so (issue 14)
    assert "error: source feed: SourceError:" in capsys.readouterr().err
    err = frame(tmp_path / "s.sqlite", "SELECT last_error FROM source_offsets")["last_error"][0]
    assert "was replaced" in err and "--reset-source feed" in err
    assert frame(tmp_path / "s.sqlite", "SELECT count(*) AS n FROM observations")["n"][0] == 20
    assert main(args + ["--reset-source", "feed"]) == 0
    assert "position forgotten" in capsys.readouterr().err
    assert frame(tmp_path / "s.sqlite", "SELECT count(*) AS n FROM observations")["n"][0] == 30
