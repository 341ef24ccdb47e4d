"""The SQLite store on real files: schema, migrations, atomic batches, queries, concurrency.

Reference values are recomputed independently with pandas from the frames written (named in
the comments); SQLite's own behaviour (WAL, read-only URIs, busy timeout) is checked through
its PRAGMAs as documented at sqlite.org.
"""

from __future__ import annotations

import math
import sqlite3
import struct
import subprocess
import sys
import textwrap
import time

import numpy as np
import pandas as pd
import pytest

from monitor import store as ms
from monitor.errors import ConfigError, StoreError, ValidationError

T0 = pd.Timestamp("2024-03-01T00:00:00Z")


def frames(series=("a", "b", "c"), n=50, start=0, rng=None):
    """Observations and estimates of invented series, hourly from T0 + start hours."""
    rng = rng or np.random.default_rng(3)
    obs, est = [], []
    for k, s in enumerate(series):
        ts = T0 + pd.to_timedelta(np.arange(start, start + n), unit="h")
        price = rng.uniform(5, 15, n)
        qty = rng.uniform(10, 100, n)
        beta = -1.0 - 0.1 * k + rng.normal(0, 0.05, n)
        status = np.where(np.arange(start, start + n) < 5, "warming_up", "ok").astype(object)
        beta = np.where(status == "warming_up", np.nan, beta)
        obs.append(pd.DataFrame({"series": s, "ts": ts, "price": price, "quantity": qty,
                                 "source": "feed.csv", "source_row": np.arange(n) + start}))
        est.append(pd.DataFrame({"series": s, "ts": ts, "beta": beta, "beta_se": 0.1,
                                 "beta_lo": beta - 0.2, "beta_hi": beta + 0.2,
                                 "n_eff": np.arange(n) + 1.0, "status": status}))
    return pd.concat(obs, ignore_index=True), pd.concat(est, ignore_index=True)


def counts(store):
    return {t: store.scalar(f"SELECT count(*) FROM {t}") for t in ms.TABLES}


# ------------------------------------------------------------------ schema and connections

def test_schema_migrations_wal_and_busy_timeout(tmp_path):
    path = tmp_path / "s.sqlite"
    s = ms.Store.open(path)
    assert s.applied_on_open == [m[0] for m in ms.MIGRATIONS]
    schema = s.rows("SELECT type, name, sql FROM sqlite_master ORDER BY name")
    assert set(ms.TABLES) <= set(s.db.table_names())
    assert s.scalar("PRAGMA journal_mode") == "wal"        # sqlite.org/wal.html
    assert s.scalar("PRAGMA busy_timeout") == 10000        # milliseconds
    s.close()
    again = ms.open_store(path)                            # reopen: nothing to apply
    assert again.applied_on_open == []
    assert again.rows("SELECT type, name, sql FROM sqlite_master ORDER BY name") == schema
    assert ms.migrate(again) == []
    mig = ms.applied_migrations(again)
    assert mig["id"].tolist() == [m[0] for m in ms.MIGRATIONS]
    assert mig["applied_at"].str.endswith("Z").all()
    again.close()


def test_open_errors_name_the_file_and_the_fix(tmp_path):
    with pytest.raises(StoreError, match="does not exist.*elmon init"):
        ms.open_store(tmp_path / "missing.sqlite")
    with pytest.raises(StoreError, match="does not exist"):
        ms.open_store(tmp_path / "missing.sqlite", readonly=True)
    assert not (tmp_path / "missing.sqlite").exists()
    foreign = tmp_path / "other.sqlite"
    with sqlite3.connect(foreign) as c:
        c.execute("CREATE TABLE t (x)")
    with pytest.raises(StoreError, match="not an elmon store"):
        ms.open_store(foreign, readonly=True)
    text = tmp_path / "notes.txt"
    text.write_text("this is not a database, just some text " * 50)
    with pytest.raises(StoreError, match="notes.txt"):
        ms.open_store(text)
    with pytest.raises(StoreError, match="directory"):
        ms.Store.open(tmp_path / "no" / "such" / "dir.sqlite")


def test_readonly_store_refuses_writes(store):
    ro = ms.open_store(store.path, readonly=True)
    with pytest.raises(StoreError, match="read-only"):
        with ro.atomic():
            pass
    with pytest.raises(sqlite3.OperationalError, match="readonly"):
        ro.execute("INSERT INTO rejects (reason, rejected_at) VALUES ('x', 'y')")
    ro.close()


def test_timestamps_canonical_utc():
    # naive means UTC, offsets converted; fractional seconds only when present
    assert ms.format_ts("2024-03-01T12:00:00") == "2024-03-01T12:00:00Z"
    assert ms.format_ts(pd.Timestamp("2024-03-01T07:00:00-05:00")) == "2024-03-01T12:00:00Z"
    arr = ms.format_ts_array(pd.Series(pd.to_datetime(["2024-03-01 12:00:00.25",
                                                       "2024-03-01 13:00:00"], format="ISO8601")))
    assert arr.tolist() == ["2024-03-01T12:00:00.250000Z", "2024-03-01T13:00:00Z"]
    assert ms.wall_ts("2024-03-01T12:00:00Z") == "2024-03-01T12:00:00.000000Z"
    with pytest.raises(ValidationError, match="'yesterday' at position 1"):
        ms.format_ts_array(["2024-03-01", "yesterday"])


# ------------------------------------------------------------------ batches

def test_batch_writes_everything_and_keeps_counts(store):
    obs, est = frames()
    out = ms.write_batch(store, observations=obs, estimates=est,
                         series=[{"series": "a", "low": -3.0, "high": -0.2, "forgetting": 0.99,
                                  "settings": {"every_n": 1}}],
                         offsets={"feed.csv": {"kind": "csv", "position": {"offset": 4096},
                                               "rows_read": 150, "rows_rejected": 1}},
                         rejects=[{"source": "feed.csv", "row": 7, "series": "a",
                                   "ts": "not-a-time", "field": "ts", "value": "not-a-time",
                                   "raw": {"ts": "not-a-time", "price": "3"},
                                   "reason": "row 7: field 'ts' = 'not-a-time': not a time"}],
                         checkpoints={"a": {"state": {"P": [[1.0, 0.0], [0.0, 1.0]]},
                                            "last_ts": obs["ts"].iloc[49], "last_pos": 4096}})
    assert out["observations"] == 150 and out["estimates"] == 150 and out["rejects"] == 1
    # reference: pandas groupby on the frame written
    ref = obs.groupby("series")["ts"].agg(["min", "max", "size"])
    rows = {r["series"]: r for r in store.rows("SELECT * FROM series")}
    for s, (lo, hi, n) in ref.iterrows():
        assert rows[s]["first_ts"] == ms.format_ts(lo) and rows[s]["last_ts"] == ms.format_ts(hi)
        assert rows[s]["n_obs"] == n and rows[s]["n_estimates"] == n
    assert rows["a"]["low"] == -3.0 and ms.from_json(rows["a"]["settings"]) == {"every_n": 1}
    # a second batch adds to the counts and keeps settings and first_ts
    obs2, est2 = frames(n=10, start=50)
    ms.write_batch(store, observations=obs2, estimates=est2,
                   offsets={"feed.csv": {"rows_read": 30}})
    row = store.rows("SELECT * FROM series WHERE series = 'a'")[0]
    assert row["n_obs"] == 60 and row["first_ts"] == "2024-03-01T00:00:00Z"
    assert row["last_ts"] == ms.format_ts(T0 + pd.Timedelta(hours=59)) and row["high"] == -0.2
    off = ms.get_offset(store, "feed.csv")
    assert off["rows_read"] == 180 and off["rows_rejected"] == 1       # totals = sums
    assert off["position"] == {"offset": 4096} and off["kind"] == "csv"  # kept when not given
    rej = ms.list_rejects(store, source="feed.csv")
    assert rej["raw"].iloc[0] == {"ts": "not-a-time", "price": "3"} and rej["row"].iloc[0] == 7


def test_failure_mid_batch_leaves_nothing_written(store):
    obs, est = frames()
    ms.write_batch(store, observations=obs.iloc[:30], estimates=est.iloc[:30],
                   offsets={"feed.csv": {"position": {"offset": 1}, "rows_read": 30}})
    before = counts(store)
    # the last observation repeats a stored one: SQLite fails after inserting the others
    bad = pd.concat([obs.iloc[30:], obs.iloc[:1]], ignore_index=True)
    with pytest.raises(StoreError, match=r"series 'a', ts '2024-03-01T00:00:00Z'.*already"):
        ms.write_batch(store, observations=bad, estimates=est.iloc[30:],
                       offsets={"feed.csv": {"position": {"offset": 2}, "rows_read": 120}},
                       checkpoints={"a": {"state": {"x": 1}}})
    assert counts(store) == before
    assert ms.get_offset(store, "feed.csv")["position"] == {"offset": 1}
    # an invalid alert decision at the very end of the batch also rolls back everything
    with pytest.raises(ValidationError, match="severity"):
        ms.write_batch(store, observations=obs.iloc[30:], estimates=est.iloc[30:],
                       alert_changes=[{"series": "a", "kind": "stale", "ts": T0, "beta": None,
                                       "beta_lo": None, "beta_hi": None, "message": "m",
                                       "severity": "urgent"}])
    assert counts(store) == before
    assert ms.existing_observation_keys(store, obs.iloc[28:32]) == {
        ("a", ms.format_ts(t)) for t in obs["ts"].iloc[28:30]}


def test_bad_values_are_refused_with_row_field_and_value(store):
    obs, est = frames(n=6)
    bad = obs.copy()
    bad.loc[3, "price"] = np.nan
    with pytest.raises(ValidationError, match=r"observation 3 \(series 'a'.*'price' = nan"):
        ms.write_batch(store, observations=bad)
    bad = obs.copy()
    bad.loc[2, "quantity"] = -1.0
    with pytest.raises(ValidationError, match="'quantity' = -1.0"):
        ms.write_batch(store, observations=bad)
    with pytest.raises(StoreError, match="twice in the batch"):
        ms.write_batch(store, observations=pd.concat([obs.iloc[:2], obs.iloc[:1]]))
    bad = est.copy()
    bad.loc[5, "beta"] = np.nan                       # status ok with no beta: refused
    with pytest.raises(ValidationError, match="beta is NaN with status 'ok'"):
        ms.write_batch(store, estimates=bad)
    bad = est.copy()
    bad.loc[5, "beta_hi"] = np.inf
    with pytest.raises(ValidationError, match="beta_hi"):
        ms.write_batch(store, estimates=bad)
    with pytest.raises(ValidationError, match="status"):
        ms.write_batch(store, estimates=est.assign(status="fine"))
    with pytest.raises(ValidationError, match="reason"):
        ms.write_batch(store, rejects=[{"row": 1, "reason": ""}])
    assert counts(store)["observations"] == 0 and counts(store)["estimates"] == 0


def test_controls_lists_of_dicts_and_dataclasses(store):
    from monitor.types import Observation
    rows = [Observation("p1", "2024-03-01T00:00:00Z", 2.0, 10.0, {"promo": 1.0}),
            Observation("p1", "2024-03-01T01:00:00Z", 2.5, 8.0, {"promo": 0.0})]
    ms.write_batch(store, observations=rows)
    ms.write_batch(store, observations=pd.DataFrame({"series": ["p2"], "ts": [T0],
                                                     "price": [1.0], "quantity": [0.0],
                                                     "temp": [21.5]}))
    o1 = ms.series_observations(store, "p1")
    assert o1["controls"].tolist() == [{"promo": 1.0}, {"promo": 0.0}]
    assert ms.series_observations(store, "p2")["controls"].iloc[0] == {"temp": 21.5}


def test_checkpoint_state_round_trips_bit_for_bit(store):
    vals = [0.1 + 0.2, 1e-310, -0.0, math.pi, float("nan"), float("inf"), 2.0 ** 0.5]
    state = {"theta": vals, "P": [vals[:3], vals[3:6]], "n": 17, "name": "rls"}
    ms.write_batch(store, checkpoints={"a": {"state": state, "last_ts": T0, "last_pos": [3, 9]}})
    ck = ms.load_checkpoints(store)["a"]
    bits = lambda xs: [struct.pack("<d", x) for x in xs]   # compare the IEEE-754 bytes
    assert bits(ck.state["theta"]) == bits(vals)
    assert bits(ck.state["P"][1]) == bits(vals[3:6])
    assert ck.last_ts == "2024-03-01T00:00:00Z" and ck.last_pos == [3, 9]
    ms.write_batch(store, checkpoints=[{"series": "a", "state": {"n": 18}}])
    assert ms.load_checkpoints(store)["a"].state == {"n": 18}


def test_latest_estimate_never_moves_back_and_thinning_feeds_latest(store):
    obs, est = frames(series=("a",), n=40)
    kept = ms.thin_estimates(est, 10)
    ms.write_batch(store, observations=obs, estimates=kept, latest_estimates=est)
    latest = ms.latest_estimates(store).iloc[0]
    assert latest["ts"] == est["ts"].iloc[-1] and latest["beta"] == est["beta"].iloc[-1]
    assert latest["n_estimates"] == len(kept) < len(est)
    # a late estimate (older ts) enters the history but not latest_estimates
    late = est.iloc[[0]].assign(ts=T0 - pd.Timedelta(hours=5), beta=-9.0, status="ok")
    ms.write_batch(store, estimates=late)
    assert ms.latest_estimates(store).iloc[0]["beta"] == est["beta"].iloc[-1]


def test_thin_estimates_does_not_depend_on_batch_boundaries(rng):
    n = 600
    status = rng.choice(["ok", "ok", "ok", "changed", "low_variation"], n)
    frame = pd.DataFrame({"series": rng.choice(["a", "b", "c"], n), "ts": np.arange(n),
                          "status": status})
    whole = ms.thin_estimates(frame, 7)
    parts, cnt, prev = [], {}, {}
    cuts = np.sort(rng.choice(np.arange(1, n), 25, replace=False))
    for lo, hi in zip(np.r_[0, cuts], np.r_[cuts, n]):
        chunk = frame.iloc[lo:hi]
        parts.append(ms.thin_estimates(chunk, 7, previous_status=prev, start_count=cnt))
        for s, g in chunk.groupby("series"):
            cnt[s] = cnt.get(s, 0) + len(g)
            prev[s] = g["status"].iloc[-1]
    pd.testing.assert_frame_equal(pd.concat(parts), whole)
    # reference: the rule recomputed row by row in plain Python
    seen, last, keep = {}, {}, []
    for s, st in zip(frame["series"], frame["status"]):
        seen[s] = seen.get(s, 0) + 1
        keep.append(seen[s] % 7 == 0 or last.get(s) != st)
        last[s] = st
    assert whole.index.tolist() == np.flatnonzero(keep).tolist()
    assert len(ms.thin_estimates(frame, 1)) == n
    with pytest.raises(ConfigError, match="every_n"):
        ms.thin_estimates(frame, 0)


def test_100k_observations_in_one_transaction(store):
    n = 100_000
    ts = T0 + pd.to_timedelta(np.repeat(np.arange(n // 500), 500), unit="h")
    obs = pd.DataFrame({"series": np.tile([f"sku{i:04d}" for i in range(500)], n // 500),
                        "ts": ts, "price": 9.5, "quantity": 3.0, "source": "feed.csv",
                        "source_row": np.arange(n)})
    ms.write_batch(store, observations=obs)
    # all of them, in one transaction; the speed (about 130k rows/s) is measured by
    # benchmarks/ingest.py (make bench), not asserted here
    assert store.scalar("SELECT count(*) FROM observations") == n
    assert store.scalar("SELECT count(DISTINCT series) FROM observations") == 500


def test_bytes_per_row_stay_near_the_documented_size(tmp_path):
    s = ms.Store.open(tmp_path / "size.sqlite")
    obs, est = frames(series=[f"sku{i:05d}" for i in range(100)], n=200,
                      rng=np.random.default_rng(1))
    est = est.assign(intercept=5.0, resid_sd=0.2, innovation=0.01, z=0.1).fillna(-1.0)
    est["status"] = "ok"
    base = s.path.stat().st_size
    ms.write_batch(s, observations=obs)
    s.execute("VACUUM")
    mid = s.path.stat().st_size
    ms.write_batch(s, estimates=est)
    s.execute("VACUUM")
    end = s.path.stat().st_size
    n = len(obs)
    # the monitor.store docstring documents 109 and 125 bytes per row, measured at 1M rows
    assert 60 < (mid - base) / n < 140 and 80 < (end - mid) / n < 160
    s.close()


# ------------------------------------------------------------------ queries

@pytest.fixture
def seeded(store):
    obs, est = frames(n=60)
    ms.write_batch(store, observations=obs, estimates=est,
                   series={"a": {"low": -3.0, "high": -0.2, "forgetting": 0.98}})
    ms.write_batch(store, observations=[{"series": "d", "ts": T0, "price": 1.0, "quantity": 2.0}])
    ms.open_alert(store, "a", "out_of_bounds", est["ts"].iloc[40], -3.5, -3.8, -3.2, "low beta",
                  severity="critical")
    ms.open_alert(store, "a", "stale", est["ts"].iloc[59], None, None, None, "quiet")
    b = ms.open_alert(store, "b", "sign_flip", est["ts"].iloc[100], 0.3, 0.1, 0.5, "positive",
                      details={"persisted": 4})
    ms.resolve_alert(store, b, note="data fix", who="ana")
    ms.write_batch(store, offsets={"feed.csv": {"kind": "csv", "position": {"offset": 9},
                                                "rows_read": 181}},
                   now="2024-03-05T10:00:00Z")
    return store, obs, est


def test_latest_estimates_one_row_per_series(seeded):
    store, obs, est = seeded
    df = ms.latest_estimates(store)
    assert df["series"].tolist() == ["a", "b", "c", "d"]
    ref = est.groupby("series").tail(1).set_index("series")      # reference: pandas tail(1)
    for s in "abc":
        row = df.set_index("series").loc[s]
        assert row["beta"] == ref.loc[s, "beta"] and row["ts"] == ref.loc[s, "ts"]
        assert row["n_obs"] == 60 and row["last_obs_ts"] == obs["ts"].max()
    a = df.set_index("series").loc["a"]
    assert a["open_alerts"] == 2 and a["alert_severity"] == "critical"
    assert (a["low"], a["high"], a["forgetting"]) == (-3.0, -0.2, 0.98)
    d = df.set_index("series").loc["d"]                   # observed but not yet estimated
    assert d["status"] == "warming_up" and np.isnan(d["beta"]) and d["open_alerts"] == 0
    assert df["beta_se"].dtype == np.float64 and str(df["ts"].dt.tz) == "UTC"


def test_history_observations_and_sparklines(seeded):
    store, obs, est = seeded
    h = ms.series_history(store, "b", start=T0 + pd.Timedelta(hours=10),
                          end=T0 + pd.Timedelta(hours=19))
    ref = est[(est["series"] == "b")].iloc[10:20]
    assert h["ts"].tolist() == ref["ts"].tolist()
    np.testing.assert_array_equal(h["beta"].to_numpy(), ref["beta"].to_numpy())
    np.testing.assert_array_equal(h["price"].to_numpy(),
                                  obs[obs["series"] == "b"]["price"].iloc[10:20].to_numpy())
    assert len(ms.series_history(store, "nope")) == 0
    o = ms.series_observations(store, "c", end=T0 + pd.Timedelta(hours=4))
    assert len(o) == 5 and o["source"].eq("feed.csv").all()
    sp = ms.sparkline_data(store, points=7)
    ref = est.groupby("series").tail(7)                          # reference: pandas tail(7)
    assert sp["series"].tolist() == ref["series"].tolist()
    assert sp["ts"].tolist() == ref["ts"].tolist()
    one = ms.sparkline_data(store, ["c"], points=1000)      # beyond the cache: from history
    assert len(one) == 60 and set(one["series"]) == {"c"}
    cached = ms.sparkline_data(store, ["c"], points=60)      # the cache holds the same points
    pd.testing.assert_frame_equal(cached, one)
    assert sp.columns.tolist() == ["series", "ts", "beta"] and sp["beta"].dtype == np.float64
    # the per-series queries seek the primary key instead of scanning all history
    plan = [r["detail"] for r in store.rows(
        "EXPLAIN QUERY PLAN SELECT e.series FROM series s CROSS JOIN estimates e ON e.series ="
        " s.series AND e.ts >= coalesce((SELECT e2.ts FROM estimates e2 WHERE e2.series ="
        " s.series ORDER BY e2.ts DESC LIMIT 1 OFFSET 5), '')")]
    assert not any(d.startswith("SCAN e") for d in plan), plan
    assert any(d.startswith("SEARCH e USING PRIMARY KEY") for d in plan), plan


def test_alert_queries_sources_and_summary(seeded):
    store, obs, est = seeded
    every = ms.list_alerts(store)
    assert every["kind"].tolist() == ["sign_flip", "stale", "out_of_bounds"]
    assert every["details"].tolist() == [{"persisted": 4}, None, None]   # mixed JSON column
    assert ms.list_alerts(store, state="active", series="a")["id"].tolist() == [2, 1]
    assert ms.list_alerts(store, kind="sign_flip")["state"].tolist() == ["resolved"]
    assert len(ms.list_alerts(store, limit=1)) == 1
    with pytest.raises(ValidationError, match="closed"):
        ms.list_alerts(store, state="closed")
    op = ms.open_alerts(store)
    assert op["severity"].tolist() == ["critical", "warning"]     # worst first
    ev = ms.alert_events(store, 3)
    assert ev["event"].tolist() == ["opened", "resolved"] and ev["who"].tolist()[1] == "ana"
    assert ms.get_alert(store, 3)["state"] == "resolved"
    with pytest.raises(StoreError, match="no alert with id 99"):
        ms.alert_events(store, 99)
    src = ms.source_status(store, now="2024-03-05T11:00:00Z")
    assert src["lag_seconds"].tolist() == [3600.0] and src["position"].iloc[0] == {"offset": 9}
    summ = ms.store_summary(store, now="2024-03-05T12:00:00Z", stale_after=1800)
    assert (summ["series"], summ["observations"], summ["estimates"]) == (4, 181, 180)
    assert summ["alerts_by_state"] == {"open": 2, "acknowledged": 0, "resolved": 1}
    assert summ["alerts_by_kind"]["sign_flip"] == {"resolved": 1}
    assert summ["open_alerts"] == 2 and summ["stale_sources"] == 1
    # path arguments work too (opened read-only for the call)
    assert len(ms.latest_estimates(str(store.path))) == 4


def test_sparkline_cache_follows_batches_and_late_rows(store):
    obs, est = frames(series=("a", "b"), n=100)
    for lo in range(0, 100, 7):                     # many small batches, time order
        part = est[(est.index % 100 >= lo) & (est.index % 100 < lo + 7)]
        ms.write_batch(store, estimates=part)
    late = pd.DataFrame({"series": ["a"], "ts": [T0 + pd.Timedelta(minutes=5950)],
                         "beta": [-7.0], "status": ["ok"]})   # between two cached points
    ms.write_batch(store, estimates=late)
    cached = ms.sparkline_data(store, points=ms.SPARK_KEEP)
    history = ms.sparkline_data(store, points=ms.SPARK_KEEP + 1)
    # reference: the last SPARK_KEEP rows of each series read back from the history
    ref = history.groupby("series").tail(ms.SPARK_KEEP).reset_index(drop=True)
    pd.testing.assert_frame_equal(cached, ref)
    assert -7.0 in cached["beta"].tolist()
    assert cached.groupby("series").size().tolist() == [ms.SPARK_KEEP] * 2


def test_one_point_sparkline_update_keeps_the_newest_points_in_time_order():
    """spark_add (the one-row writer's cache update, text appended for the newest point) against
    a reference built from scratch: every point so far, sorted by time, the last SPARK_KEEP."""
    from monitor.store.live import spark_add

    rng = np.random.default_rng(11)
    for _ in range(40):
        n = int(rng.integers(1, 3 * ms.SPARK_KEEP))
        minutes = rng.choice(100_000, size=n, replace=False)
        late = rng.random(n) < 0.1                   # some points older than the newest
        order = np.where(late, minutes, np.sort(minutes))
        row, seen = None, []
        for m in order:
            ts = (T0 + pd.Timedelta(minutes=int(m))).strftime("%Y-%m-%dT%H:%M:%SZ")
            beta = "nan" if rng.random() < 0.1 else repr(float(rng.normal(-1.5, 0.3)))
            seen.append((ts, beta))
            row = spark_add(row, ts, beta)
            keep = sorted(seen)[-ms.SPARK_KEEP:]
            assert row == (len(keep), ",".join(t for t, _ in keep),
                           ",".join(b for _, b in keep))
            seen = keep                              # the cache forgets older points too


def test_migration_from_version_1_backfills_the_sparkline_cache(tmp_path):
    path = tmp_path / "old.sqlite"
    conn = sqlite3.connect(path, isolation_level=None)
    old = ms.Store(conn, path, readonly=False)
    assert ms.migrate(old, until=1) == [1]               # a store as version 1 left it
    obs, est = frames(series=("a", "b"), n=80)
    rows = est.assign(ts=ms.format_ts_array(est["ts"]), beta=est["beta"].astype(object)
                      .where(est["beta"].notna(), None))[["series", "ts", "beta", "status"]]
    conn.executemany("INSERT INTO estimates (series, ts, beta, status) VALUES (?, ?, ?, ?)",
                     rows.itertuples(index=False))
    conn.executemany("INSERT INTO series (series, updated_at) VALUES (?, 'x')", [("a",), ("b",)])
    with pytest.raises(StoreError, match="schema version 1, this elmon expects"):
        ms.open_store(path, readonly=True)
    conn.close()
    new = ms.Store.open(path)
    assert new.applied_on_open == list(range(2, ms.SCHEMA_VERSION + 1))
    assert new.schema_version() == ms.SCHEMA_VERSION
    cached = ms.sparkline_data(new, points=25)
    ref = est.groupby("series").tail(25)                 # reference: pandas tail(25)
    assert cached["ts"].tolist() == ref["ts"].tolist()
    np.testing.assert_array_equal(cached["beta"].to_numpy(), ref["beta"].to_numpy())
    new.close()


# ------------------------------------------------------------------ concurrency

READER = textwrap.dedent("""
    import sys, time
    from monitor import store as ms
    path, seconds = sys.argv[1], float(sys.argv[2])
    errors, reads, seen = 0, 0, set()
    ro = ms.open_store(path, readonly=True)
    ms.latest_estimates(ro)
    print("ready", flush=True)
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        try:
            seen.add(int(ms.latest_estimates(ro)["n_obs"].sum()))
            ms.open_alerts(ro); ms.sparkline_data(ro, points=10); ms.store_summary(ro)
            reads += 1
        except Exception as exc:
            errors += 1
            print("ERR", repr(exc), file=sys.stderr)
    print(errors, reads, len(seen))
""")


@pytest.mark.slow
def test_reader_process_beside_a_busy_writer_sees_no_lock_errors(store):
    seconds = 2.5
    obs, est = frames(series=[f"s{i:03d}" for i in range(20)], n=1)
    ms.write_batch(store, observations=obs, estimates=est)
    proc = subprocess.Popen([sys.executable, "-c", READER, str(store.path), str(seconds)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "ready"
    writer_errors, batches, start = 0, 0, 1
    end = time.monotonic() + seconds + 0.3
    while time.monotonic() < end:
        obs, est = frames(series=[f"s{i:03d}" for i in range(20)], n=25, start=start)
        try:
            ms.write_batch(store, observations=obs, estimates=est,
                           offsets={"feed": {"rows_read": len(obs)}})
            if batches % 5 == 0:
                ms.open_alert(store, "s001", "level_shift", obs["ts"].iloc[0], -1, -2, 0, "m")
                ms.auto_resolve(store, "s001", "level_shift", obs["ts"].iloc[-1])
        except StoreError:
            writer_errors += 1
        batches += 1
        start += 25
    out, err = proc.communicate(timeout=60)
    reader_errors, reads, distinct = map(int, out.split())
    facts = dict(reader_errors=reader_errors, writer_errors=writer_errors, reads=reads,
                 distinct=distinct, batches=batches, stderr=err[-2000:])
    assert reader_errors == 0 and writer_errors == 0 and "locked" not in err, facts
    assert batches > 5 and reads > 5, facts   # sustained on both sides (fewer under load)
    assert distinct > 2, facts            # the reader really read while the writer wrote


def test_batch_series_counts_equal_a_pandas_groupby():
    """The per-series first/last time and row count of a batch (``series_counts``, which
    the series upsert adds up) equal a pandas groupby's min / max / size of the same rows
    (the reference), with rows of many series in shuffled order, fractional-second times and
    estimates for only some series; series come in sorted order, as the groupby gives them."""
    from monitor.store.rows import observation_rows, series_counts

    rng = np.random.default_rng(12)
    names = np.array([f"store{k % 7}/item{k:03d}" for k in range(60)])
    n = 3_000
    ts = T0 + pd.to_timedelta(rng.integers(0, 10**9, n), unit="ms")
    obs = pd.DataFrame({"series": names[rng.integers(0, 60, n)], "ts": ts,
                        "price": rng.uniform(1, 9, n), "quantity": rng.uniform(1, 9, n)})
    obs = obs.drop_duplicates(["series", "ts"]).reset_index(drop=True)
    df, _ = observation_rows(obs)
    est = df[df["series"].isin(names[::3])]
    got = series_counts(df, est, "now")
    ref = df.groupby("series")["ts"].agg(["min", "max", "size"])
    n_est = est.groupby("series").size()
    want = [(s, lo, hi, int(k), int(n_est.get(s, 0)), "now")
            for s, lo, hi, k in zip(ref.index, ref["min"], ref["max"], ref["size"])]
    assert got == want
    assert any("." in r[1] for r in got)              # fractional times were compared as text


def test_write_batch_gives_the_garbage_collector_back(tmp_path):
    """write_batch pauses Python's cyclic collector while it builds tuples (issue 15): it is
    on again after a batch that fails, and left off for a caller that had turned it off."""
    import gc

    good = pd.DataFrame({"series": ["a"], "ts": ["2024-01-01T00:00:00Z"], "price": [1.0],
                         "quantity": [1.0]})
    store = ms.Store.open(tmp_path / "gc.sqlite")
    try:
        assert gc.isenabled()
        with pytest.raises(ValidationError):
            ms.write_batch(store, observations=good.assign(price=[-1.0]))
        assert gc.isenabled()
        gc.disable()
        try:
            ms.write_batch(store, observations=good)
            assert not gc.isenabled()
        finally:
            gc.enable()
        assert store.scalar("SELECT count(*) FROM observations") == 1
    finally:
        store.close()
