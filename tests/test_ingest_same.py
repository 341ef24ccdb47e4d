"""The faster ingest path (issue 15, second round) stores what the previous one stored.

The previous batch writer and CSV chunk parser are kept verbatim in
``tests/store_write_before.py`` as the oracle. Checked here:

- ``elmon ingest`` (``ingest_file``) of a log full of bad rows writes the same store as the
  previous writer and parser: every table, every column but the wall-clock ones, with and
  without a control, with every estimate kept and with thinned estimates;
- validation reads Arrow-backed text (what the CSV reader now gives) exactly as the object
  columns holding ``None`` it gave before: the same good rows, rejects and messages;
- the insert tuples of observations, estimates, the newest estimate per series, checkpoints
  and the sparkline cache equal the previous functions' on frames with NaN, missing values,
  ties and late rows.
"""

from __future__ import annotations

import sqlite3

import numpy as np
import pandas as pd
import pytest

import monitor.ingest.csv_text as csv_text
import monitor.live.monitor as live_monitor
import tests.store_write_before as before
from monitor import store as ms
from monitor.errors import ValidationError
from monitor.ingest.csv_text import parse_lines
from monitor.live.batch import raw_rows
from monitor.live.service import ingest_file
from monitor.rows.validate import validate_frame
from monitor.sections import Config
from monitor.store import rows as R
from monitor.store.batch import _spark_updates


def _bad_log(path, steps: int = 60, n_series: int = 12, seed: int = 3) -> None:
    """An hourly log with a promo flag and about 8% bad rows of every kind validation knows
    (blank, junk, NaN, infinity, overflow, zero, negative, unit error, repeated and late
    times, impossible dates, sub-second times, odd white space), short lines, blank lines."""
    rng = np.random.default_rng(seed)
    names = [f"shop{i % 3}/ware{i:03d}" for i in range(n_series)]
    t0 = pd.Timestamp("2024-03-01", tz="UTC")
    iso = "%Y-%m-%dT%H:%M:%SZ"
    lines = ["series,ts,price,quantity,promo"]
    for step in range(steps):
        for s in range(n_series):
            p = float(4.0 * np.exp(rng.normal(0, 0.15)))
            q = float(np.exp(2.0 - 1.5 * np.log(p) + rng.normal(0, 0.3)))
            ts = (t0 + pd.Timedelta(hours=step)).strftime(iso)
            ps, qs, name = repr(round(p, 2)), repr(round(q, 3)), names[s]
            promo = str(int(rng.random() < .3))
            r = rng.random()
            if r < 0.006:
                ps = ""
            elif r < 0.012:
                ps = "abc"
            elif r < 0.016:
                ps = " nan"
            elif r < 0.020:
                qs = "inf"
            elif r < 0.026:
                qs = "0"
            elif r < 0.030:
                ts = "2024-13-01T00:00:00Z"
            elif r < 0.034:
                ts = ""
            elif r < 0.040:
                ps = repr(round(p * 100, 2))                      # unit error
            elif r < 0.046:                                       # repeated or late time
                ts = (t0 + pd.Timedelta(hours=max(step - 2, 0))).strftime(iso)
            elif r < 0.050:
                ps = "  " + ps + " "
            elif r < 0.054:
                qs = "-3"
            elif r < 0.058:
                name = "  "
            elif r < 0.060:
                ps = "1e400"
            elif r < 0.062:
                ts = (t0 + pd.Timedelta(hours=step, minutes=30)).strftime("%Y-%m-%dT%H:%M:%S.250Z")
            elif r < 0.064:
                qs = "+7.5"
            elif r < 0.066:
                ps = "-0"
            elif r < 0.068:
                ps = "\u00a0" + ps
            elif r < 0.070:
                qs = "\x1c"
            elif r < 0.072:
                name = name + "\u3000"
            elif r < 0.074:
                promo = ""
            lines.append(",".join([name, ts, ps, qs, promo]))
            if r > 0.996:
                lines.append("bad,line")
            elif r > 0.993:
                lines.append("")
    path.write_text("\n".join(lines) + "\n")


#: columns holding wall-clock time of the run (they differ between any two runs)
WALL = {"alert_events": ["at"]}


def _tables(db) -> dict[str, pd.DataFrame]:
    con = sqlite3.connect(db)
    try:
        names = [r[0] for r in con.execute(
            "SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%' "
            "AND name != 'migrations'")]
        out = {}
        for t in names:
            df = pd.read_sql_query(f'SELECT * FROM "{t}"', con)
            drop = [c for c in df.columns if c.endswith("_at") or c in WALL.get(t, [])]
            out[t] = df.drop(columns=drop)
        return out
    finally:
        con.close()


@pytest.mark.parametrize("config", [
    {},
    {"estimator": {"controls": ["promo"]}},
    {"store": {"estimates_every": 3}},
], ids=["default", "control", "thinned"])
def test_ingest_writes_the_store_the_previous_writer_wrote(tmp_path, monkeypatch, config):
    log = tmp_path / "feed.csv"
    _bad_log(log)
    cfg = Config(config)
    now = ingest_file(log, tmp_path / "now.sqlite", config=cfg, batch_rows=257, deliver=False)
    with monkeypatch.context() as m:
        m.setattr(live_monitor, "write_batch", before.write_batch_before)
        m.setattr(csv_text, "_parse_fast", before.parse_fast_before)
        was = ingest_file(log, tmp_path / "was.sqlite", config=cfg, batch_rows=257,
                          deliver=False)
    assert {k: now[k] for k in ("rows", "accepted", "rejected", "batches")} == \
        {k: was[k] for k in ("rows", "accepted", "rejected", "batches")}
    assert now["rejected"] > 40 and now["accepted"] > 500          # the log's premise
    got, want = _tables(tmp_path / "now.sqlite"), _tables(tmp_path / "was.sqlite")
    assert sorted(got) == sorted(want)
    for name in want:
        pd.testing.assert_frame_equal(got[name], want[name], check_exact=True, obj=name)
    assert len(want["rejects"]) == now["rejected"] and len(want["sparklines"]) > 0


def test_validation_reads_arrow_text_as_it_read_object_text(tmp_path):
    """The reader's Arrow-backed text columns give validation's result of the object
    columns (``None`` for an empty field) the reader gave before: rows, values, rejects and
    their messages, raw fields."""
    log = tmp_path / "feed.csv"
    _bad_log(log, steps=40, seed=5)
    body = log.read_bytes()
    header, body = body.split(b"\n", 1)
    names = header.decode().split(",")
    frame, rows, rejects, _ = parse_lines(names, names, body, 1)
    assert all(isinstance(frame[c].dtype, pd.StringDtype) for c in frame.columns)
    old = frame.astype(object).where(frame.notna(), None)
    assert old["price"].map(type).isin([str, type(None)]).all()
    for controls in ((), ("promo",)):
        a = validate_frame(frame, controls=controls, order_by="arrival")
        b = validate_frame(old, controls=controls, order_by="arrival")
        pd.testing.assert_frame_equal(a.good, b.good, check_exact=True)
        pd.testing.assert_frame_equal(a.rejects, b.rejects, check_exact=True)
        assert len(a.rejects) > 30 and len(a.good) > 300
    # the raw fields the engine quotes in its own rejects (a missing column, a repeat of a
    # stored time): an empty field is "" as before (a NaN would read "nan")
    idx = range(len(frame))
    assert raw_rows(frame, idx) == raw_rows(old, idx)
    assert any(r["price"] == "" for r in raw_rows(frame, idx))


def _estimates(n: int = 400, seed: int = 1) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    series = rng.choice(["b/2", "a/1", "c/3", "a/10"], n)
    ts = pd.Timestamp("2024-01-01", tz="UTC") + pd.to_timedelta(rng.integers(0, 90, n), unit="h")
    beta = rng.normal(-1.5, 0.3, n)
    status = rng.choice(["ok", "warming_up", "low_variation", "changed"], n)
    beta[(status == "warming_up") & (rng.random(n) < 0.5)] = np.nan
    band = rng.choice(np.array(["hc", "hac", "classic", None], dtype=object), n)
    frame = pd.DataFrame({"series": series, "ts": ts.strftime("%Y-%m-%dT%H:%M:%SZ"),
                          "beta": beta, "beta_se": np.where(rng.random(n) < .1, np.nan, .1),
                          "beta_lo": beta - .2, "beta_hi": beta + .2, "n_eff": rng.random(n),
                          "status": status, "intercept": rng.normal(size=n),
                          "resid_sd": np.nan, "innovation": -0.0, "z": rng.normal(size=n),
                          "band": band})
    return frame.drop_duplicates(["series", "ts"]).reset_index(drop=True)


@pytest.mark.parametrize("text", ["str", "object"])
def test_insert_tuples_equal_the_previous_functions(text):
    est = _estimates()
    est_obj = est.astype({c: object for c in ("series", "ts", "status", "band")})
    frame = est if text == "str" else est_obj
    a, b = R.estimate_rows(frame), before.estimate_rows(frame)
    # the same values; a column of str objects is no longer turned into Arrow text on the way
    pd.testing.assert_frame_equal(a[0], b[0], check_dtype=False)
    assert a[1] == b[1]                                # None where NaN, same floats
    assert R.newest_per_series(*a) == before.newest_per_series(*b)
    assert R.estimate_rows(frame, newest=True)[1] == before.newest_per_series(*b)
    assert R.series_counts(None, a[0], "now") == before.series_counts(None, b[0], "now")

    n = len(est)
    obs = pd.DataFrame({"series": frame["series"], "ts": frame["ts"],
                        "price": np.linspace(1, 9, n), "quantity": np.r_[0.0, np.ones(n - 1)],
                        "source": np.where(np.arange(n) % 7 == 0, None, "feed.csv"),
                        "source_row": np.arange(n) * 3 + 1})
    for extra in ({}, {"controls": [None if i % 3 else {"promo": i % 2} for i in range(n)]},
                  {"promo": np.arange(n) % 2 * 1.0}, {"exposure": np.where(np.arange(n) % 5,
                                                                          2.0, np.nan)},
                  {"source_row": np.where(np.arange(n) % 9, np.arange(n) * 1.0, np.nan)}):
        o = obs.assign(**extra)
        a, b = R.observation_rows(o), before.observation_rows(o)
        assert a[1] == b[1]
        assert R.series_counts(a[0], None, "now") == before.series_counts(b[0], None, "now")

    ckpt = {f"s{i}": {"state": [1.0, float("nan"), i], "last_ts": "2024-01-01T00:00:00Z",
                      "last_pos": {"row": i}} for i in range(5)}
    assert R.checkpoint_rows(ckpt, "now") == before.checkpoint_rows(ckpt, "now")
    stamp = pd.Timestamp("2024-01-01 05:00", tz="UTC")
    for i, t in enumerate([stamp, stamp, 1704085200, 1704085200.5, "2024-01-01T06:00:00+01:00",
                           stamp.tz_localize(None), None]):
        ckpt[f"s{i}"] = {"state": [float(i)], "last_ts": t, "last_pos": None}
    assert R.checkpoint_rows(ckpt, "now") == before.checkpoint_rows(ckpt, "now")
    ckpt["s2"] = {"state": [2.0]}                   # keys differ: the frame path
    assert R.checkpoint_rows(ckpt, "now") == before.checkpoint_rows(ckpt, "now")
    for bad in (True, "no time"):                    # refused as before, naming the value
        with pytest.raises(ValidationError):
            R.checkpoint_rows({"a": {"state": [1.0], "last_ts": bad}}, "now")


def test_sparkline_rows_equal_the_previous_function(tmp_path):
    """Against a cache holding earlier points: a later batch appends, an earlier (late)
    estimate is merged in time order, more than SPARK_KEEP points keep the last ones."""
    store = ms.Store.open(tmp_path / "s.sqlite")
    try:
        first = _estimates(600, seed=2)
        ms.write_batch(store, estimates=first)
        # overlapping times (merged), then batches strictly after the cache: a few points
        # per series (part of the cached ones kept), many (none kept), and a new series
        for seed, hours, n in ((3, 0, 300), (4, 60, 300), (5, 200, 40), (6, 400, 400),
                               (7, 600, 12)):
            est = _estimates(n, seed=seed)
            est["ts"] = (pd.to_datetime(est["ts"]) + pd.Timedelta(hours=hours)
                         ).dt.strftime("%Y-%m-%dT%H:%M:%SZ")
            if seed == 7:
                est.loc[0, "series"] = "d/4"
            df, rows = R.estimate_rows(est)
            got = _spark_updates(store, df, rows)
            assert got == before._spark_updates(store, df, rows)
            ms.write_batch(store, estimates=est if hours >= 200 else est.iloc[:0])
    finally:
        store.close()


def test_hostile_lines_read_as_before(monkeypatch):
    """NUL bytes and byte-order marks beside empty fields, a repeated header after a BOM,
    an all-empty line: the same rows, row numbers, rejects and raw JSON (an empty field
    ``null``) as the object columns of before."""
    names = ["series", "ts", "price", "quantity"]
    body = (b"a\x00b,2024-01-01T00:00:00Z,,3\nok,2024-01-01T00:00:00Z,1,2\n"
            b"\xef\xbb\xbfseries,ts,price,quantity\n,,,\nc,2024-01-01T01:00:00Z,\xef\xbb\xbf2,\n")
    now = parse_lines(names, names, body, 1)
    with monkeypatch.context() as m:
        m.setattr(csv_text, "_parse_fast", before.parse_fast_before)
        was = parse_lines(names, names, body, 1)
    assert now[0].astype(object).where(now[0].notna(), None).equals(was[0])
    assert now[1].tolist() == was[1].tolist() and now[3] == was[3]
    pd.testing.assert_frame_equal(now[2], was[2], check_exact=True)
    assert len(now[2]) == 2 and '"price": null' in now[2]["raw"].iloc[0]
