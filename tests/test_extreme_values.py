"""Extreme values and timestamps (issue 14, item 4 and the hostile corpus): every row is either
processed correctly or rejected with a message naming its row, field, value and rule, the
same through ``elmon ingest`` (the live service's path), the running service's CSV source and
``elmon replay``; nothing non-finite reaches the store.

References: the int64 nanosecond range of numpy/pandas datetimes (1677-09-21 .. 2262-04-11,
numpy's datetime64 documentation); float64 limits from numpy.finfo (IEEE 754); time zone
offsets converted by pandas' ISO 8601 parser, which these tests compare against.
"""

from __future__ import annotations

import math
import sqlite3

import numpy as np
import pandas as pd
import pytest

from monitor import store as mstore
from monitor.cli import main
from monitor.errors import ConfigError, ValidationError
from monitor.live.monitor import Monitor
from monitor.live.service import Service
from monitor.replay.driver import replay
from monitor.rows.validate import (TS_FIELD_RULE, TS_MAX_NS, TS_MIN_NS, TS_RANGE_RULE,
                                   TS_WORD_RULE, ValidationSettings, read_timestamps)
from monitor.settings import validate
from tests.conftest import DESIGNED

NOW = pd.Timestamp("2025-01-01T00:00:00Z").value
RANGE = "outside the accepted range [1e-09, 1e+12]"

#: (series, ts, price, quantity) of each hostile row, and the field and rule it must be
#: rejected for (None: it is processed)
HOSTILE = [
    # in range, but 1e8 and 1e-8 times series a's recent quantities (about 150): its history
    ("a", "2024-03-01T02:20:00Z", "1.4", "1.5e10", "quantity", "suspected quantity error"),
    ("a", "2024-03-01T02:40:00Z", "1.4", "1.5e-6", "quantity", "suspected quantity error"),
    ("b", "2024-03-02T00:00:00Z", "1e308", "5", "price", RANGE),
    ("b", "2024-03-02T01:00:00Z", "2", "1e308", "quantity", RANGE),
    ("b", "2024-03-02T02:00:00Z", "1e300", "5", "price", RANGE),
    ("b", "2024-03-02T03:00:00Z", "2", "5e-324", "quantity", RANGE),      # subnormal
    ("b", "2024-03-02T04:00:00Z", "2", "1e-300", "quantity", RANGE),
    ("b", "2024-03-02T05:00:00Z", "2.2250738585072014e-308", "5", "price", RANGE),
    ("b", "2024-03-02T06:00:00Z", "-0.0", "5", "price", "price must be > 0"),
    ("b", "2024-03-02T07:00:00Z", "2", "-0.0", "quantity", "zero quantity"),  # -0 is 0
    ("b", "2024-03-02T08:00:00Z", "inf", "5", "price", "infinity is not a value"),
    ("b", "2024-03-02T09:00:00Z", "2", "-Infinity", "quantity", "infinity is not a value"),
    ("b", "2024-03-02T10:00:00Z", "1e309", "5", "price", "beyond the float64 range"),
    ("b", "2024-03-02T11:00:00Z", "2", "1.8e308", "quantity", "beyond the float64 range"),
    ("b", "2024-03-02T12:00:00Z", "nan", "5", "price", "NaN is not a value"),
    ("c", "9999-12-31T00:00:00Z", "2", "5", "ts", TS_RANGE_RULE),
    ("c", "0001-01-01T00:00:00Z", "2", "5", "ts", TS_RANGE_RULE),
    ("c", "2300-01-01T00:00:00Z", "2", "5", "ts", TS_RANGE_RULE),
    ("c", "1677-09-21T00:12:43Z", "2", "5", "ts", TS_RANGE_RULE),   # inside int64 ns, outside range
    ("c", "2262-04-11T23:47:17Z", "2", "5", "ts", TS_RANGE_RULE),   # just past int64 ns
    ("c", "12024-01-01T00:00:00Z", "2", "5", "ts", TS_RANGE_RULE),
    ("c", "1e12", "2", "5", "ts", TS_RANGE_RULE),                   # epoch seconds, year 33658
    ("c", "-9.3e9", "2", "5", "ts", TS_RANGE_RULE),                 # epoch seconds, year 1675
    ("c", "2024-13-01T00:00:00Z", "2", "5", "ts", TS_FIELD_RULE),
    ("c", "2024-02-30T00:00:00Z", "2", "5", "ts", TS_FIELD_RULE),
    ("c", "2023-02-29", "2", "5", "ts", TS_FIELD_RULE),             # not a leap year
    ("c", "2024-02-01T24:30:00Z", "2", "5", "ts", TS_FIELD_RULE),
    ("c", "2024-02-01T10:61:00Z", "2", "5", "ts", TS_FIELD_RULE),
    ("c", "now", "2", "5", "ts", TS_WORD_RULE),
    ("c", "Today", "2", "5", "ts", TS_WORD_RULE),
    ("c", "yesterday", "2", "5", "ts", TS_WORD_RULE),
    ("c", "2024-02-01T10:00:00 Europe/Paris", "2", "5", "ts", "unparsable timestamp"),
]


def _good_rows(name, start, n, rng, freq="h", fmt="%Y-%m-%dT%H:%M:%SZ"):
    p = np.exp(rng.normal(0.3, 0.15, n))
    q = np.exp(5.0 - 1.5 * np.log(p) + rng.normal(0, 0.1, n))
    ts = pd.date_range(start, periods=n, freq=freq, tz="UTC")
    return [f"{name},{t.strftime(fmt)},{a:.4f},{b:.3f}" for t, a, b in zip(ts, p, q)]


def _corpus(path):
    """40 good rows of series a, hostile rows of b and c between them, then 30 good rows of
    b (which the extreme values before must not have spoiled), 40 daily rows of 1950-51
    (before 1970) and 25 rows written with a +05:30 offset."""
    rng = np.random.default_rng(7)
    lines = _good_rows("a", "2024-03-01", 40, rng)
    for k, h in enumerate(HOSTILE):
        lines.insert(3 + k, ",".join(h[:4]))
    lines += _good_rows("b", "2024-03-03", 30, rng)
    lines += _good_rows("old", "1950-01-01", 40, rng, freq="D")
    ist = pd.date_range("2024-03-01T10:00:00", periods=25, freq="h")
    ist_rows = _good_rows("ist", "2024-03-01", 25, rng)
    lines += [f"ist,{t.strftime('%Y-%m-%dT%H:%M:%S')}+05:30,{r.split(',', 2)[2]}"
              for t, r in zip(ist, ist_rows)]
    path.write_text("series,ts,price,quantity\n" + "\n".join(lines) + "\n")
    return path, {3 + k + 1: h for k, h in enumerate(HOSTILE)}


def _config(order="arrival"):
    return {"validation": {"order": order}, "detectors": dict(DESIGNED)}


def _reject_rows(rej):
    out = rej[["row", "field", "value", "reason"]].astype({"row": "int64", "value": str})
    return sorted(map(tuple, out.itertuples(index=False)))


def _check_rejects(rows, hostile):
    by_row = {r[0]: r for r in rows}
    assert set(by_row) == set(hostile), sorted(set(by_row) ^ set(hostile))
    for row, (_s, ts, price, qty, fld, rule) in hostile.items():
        value = {"ts": ts, "price": price, "quantity": qty}[fld]
        got = by_row[row]
        assert got[1:3] == (fld, value), got
        assert got[3].startswith(f"row {row}: field '{fld}' = {value!r}: "), got
        assert rule in got[3], got


def _check_store_finite(db):
    with sqlite3.connect(db) as con:
        obs = np.array(con.execute("select price, quantity from observations").fetchall(), float)
        est = np.array(con.execute("select beta, beta_se, beta_lo, beta_hi, n_eff from estimates"
                                   ).fetchall(), float)      # NULL reads as NaN here
    assert obs.size and np.isfinite(obs).all() and (obs >= 1e-9).all() and (obs <= 1e12).all()
    assert not np.isinf(est).any()
    assert np.isfinite(est[:, 0]).sum() > 100


@pytest.fixture(scope="module")
def ingested(tmp_path_factory):
    """The corpus through ``elmon ingest`` (CLI) and ``elmon replay`` (the function the CLI
    runs), both with the same configuration."""
    d = tmp_path_factory.mktemp("extreme")
    log, hostile = _corpus(d / "log.csv")
    detectors = "\n".join(f"{k} = {v!r}" for k, v in DESIGNED.items())
    (d / "elmon.toml").write_text(f'[validation]\norder = "arrival"\n[detectors]\n{detectors}\n')
    db = d / "store.sqlite"
    rc = main(["ingest", str(log), "--db", str(db), "--config", str(d / "elmon.toml"),
               "--batch-rows", "17", "--quiet", "--max-reject-share", "1"])
    assert rc == 0
    replay(log, d / "out", validate(_config()), progress=False, now_ns=NOW)
    return d, log, hostile, db


def test_hostile_values_and_times_rejected_with_row_field_value_and_rule(ingested):
    d, _log, hostile, db = ingested
    rej_i = _reject_rows(mstore.list_rejects(db))
    rej_r = _reject_rows(pd.read_csv(d / "out" / "rejects.csv", dtype={"value": str},
                                     keep_default_na=False))
    _check_rejects(rej_i, hostile)
    assert rej_r == rej_i                            # replay gives the same answer
    _check_store_finite(db)


def test_processed_rows_are_the_same_in_ingest_and_replay(ingested):
    d, _log, _hostile, db = ingested
    est_r = pd.read_csv(d / "out" / "estimates.csv")
    for name, n in (("a", 40), ("b", 30), ("old", 40), ("ist", 25)):
        est_i = mstore.series_history(db, name)
        r = est_r[est_r["series"] == name].sort_values("ts").reset_index(drop=True)
        i = est_i.assign(ts=pd.to_datetime(est_i["ts"], utc=True)
                         .dt.strftime("%Y-%m-%dT%H:%M:%SZ")).sort_values("ts")
        assert len(r) == len(i) == n, name
        assert list(r["ts"]) == list(i["ts"])
        np.testing.assert_allclose(r["beta"].to_numpy(float), i["beta"].to_numpy(float),
                                   rtol=0, atol=1e-12, equal_nan=True)
    # series b recovers: its 30 good rows after the extreme ones give a sane elasticity, and
    # series a keeps its own (the quantity spikes never reached the estimator)
    b = mstore.series_history(db, "b")
    assert b["beta"].iloc[-1] == pytest.approx(-1.5, abs=0.6)
    a = mstore.series_history(db, "a")
    assert a["beta"].iloc[-1] == pytest.approx(-1.5, abs=0.3)


def test_times_before_1970_and_offsets_are_stored_as_utc(ingested):
    _d, _log, _hostile, db = ingested
    with sqlite3.connect(db) as con:
        old = [r[0] for r in con.execute("select ts from observations where series = 'old' "
                                         "order by ts")]
        ist = [r[0] for r in con.execute("select ts from observations where series = 'ist' "
                                         "order by ts")]
    assert old[0] == "1950-01-01T00:00:00Z" and len(old) == 40
    assert old[-1] == "1950-02-09T00:00:00Z"                       # 1950-01-01 + 39 days
    # 10:00 at +05:30 is 04:30 UTC (reference: pandas' ISO 8601 parser)
    assert pd.Timestamp(ist[0]) == pd.Timestamp("2024-03-01T10:00:00+05:30")
    assert ist[0] == "2024-03-01T04:30:00Z" and len(ist) == 25


def test_the_running_service_rejects_the_same_rows_and_keeps_running(ingested, tmp_path):
    d, log, hostile, db = ingested
    (tmp_path / "feed.csv").write_bytes(log.read_bytes())
    cfg = validate({**_config(), "store": {"path": "s.sqlite"},
                    "service": {"batch_rows": 23},
                    "sources": {"feed": {"type": "csv", "path": "feed.csv"}}})
    with Service(cfg, base=tmp_path) as svc:
        t = svc.run_once()
        assert t["rejected"] == len(hostile)
        with open(tmp_path / "feed.csv", "a") as fh:          # it reads on after them
            fh.write("a,2024-03-05T00:00:00Z,1.4,60\n")
        t = svc.run_once()
        assert t["accepted"] == 1 and t["rejected"] == 0
    rej = _reject_rows(mstore.list_rejects(tmp_path / "s.sqlite"))
    assert rej == _reject_rows(mstore.list_rejects(db))
    _check_store_finite(tmp_path / "s.sqlite")


@pytest.mark.parametrize("price, quantity, ts, field, rule", [
    (1e300, 5.0, "2024-03-02T00:00:00Z", "price", RANGE),
    (2.0, 5e-324, "2024-03-02T00:00:00Z", "quantity", RANGE),
    (2.0, 1e13, "2024-03-02T00:00:00Z", "quantity", RANGE),
    (float("inf"), 5.0, "2024-03-02T00:00:00Z", "price", "infinity"),
    (2.0, 5.0, "9999-12-31T00:00:00Z", "ts", TS_RANGE_RULE),
    (2.0, 5.0, "now", "ts", TS_WORD_RULE),
    (2.0, 5.0, 5e10, "ts", TS_RANGE_RULE),            # epoch seconds in year 3554
])
def test_observe_one_row_rejects_extremes_and_carries_on(tmp_path, price, quantity, ts, field,
                                                         rule):
    with Monitor(tmp_path / "m.sqlite", validate(_config())) as mon:
        rng = np.random.default_rng(3)
        for row in _good_rows("s", "2024-03-01", 5, rng):
            _n, t, p, q = row.split(",")
            mon.observe("s", t, float(p), float(q))
        with pytest.raises(ValidationError) as err:
            mon.observe("s", ts, price, quantity)
        assert err.value.field == field and rule in str(err.value)
        est = mon.observe("s", "2024-03-03T00:00:00Z", 1.3, 90.0)   # the series goes on
        assert est is not None and est.ts == "2024-03-03T00:00:00Z"
    with sqlite3.connect(tmp_path / "m.sqlite") as con:
        assert con.execute("select count(*) from observations").fetchone()[0] == 6
        assert con.execute("select count(*) from rejects").fetchone()[0] == 1


def test_read_timestamps_checks_the_range_in_the_values_own_unit():
    # a Parquet column of microseconds holds year 9999; converting it to ns would wrap to 1816
    us = pd.Series(np.array(["9999-12-31", "1950-06-01", "1600-01-01"], "datetime64[us]"))
    ns, why = read_timestamps(us)
    assert ns[1] == pd.Timestamp("1950-06-01").value
    assert list(why) == [TS_RANGE_RULE, None, TS_RANGE_RULE]
    assert ns[0] == ns[2] == np.iinfo(np.int64).min
    ns, why = read_timestamps(pd.Series([1e11, -1e3, math.inf, TS_MAX_NS / 1e9 + 1]))
    assert ns[1] == -1_000_000_000_000 and list(why) == [TS_RANGE_RULE, None, TS_RANGE_RULE,
                                                         TS_RANGE_RULE]
    ns, why = read_timestamps(pd.Series(["1678-01-01T00:00:00Z", "2261-12-31T23:59:59Z"]))
    assert ns[0] == TS_MIN_NS and ns[1] == TS_MAX_NS - 999_999_999 and list(why) == [None, None]


def test_value_limits_are_settings_checked_by_name():
    with pytest.raises(ConfigError, match="min_value"):
        ValidationSettings(min_value=10.0, max_value=1.0)
    with pytest.raises(ConfigError, match="subnormal"):
        ValidationSettings(min_value=5e-324)
    with pytest.raises(ConfigError, match="max_value"):
        ValidationSettings(max_value=math.inf)
    cfg = validate({"validation": {"min_value": 1e-3, "max_value": 1e6}})
    from monitor.rows.validate import validation_from_config
    assert validation_from_config(cfg).max_value == 1e6


def test_gate_of_an_older_checkpoint_starts_its_quantity_history_afresh():
    from monitor.rows.validate import WINDOW, SeriesGate

    gate = SeriesGate()
    gate.restore("s", {"last_ts": 5, "ring": [0.5] * WINDOW, "ring_ts": list(range(WINDOW)),
                       "count": 40})                 # written before the quantity check
    assert gate.qcount[0] == 0 and gate.count[0] == 40
    state = gate.state_of("s")
    assert state["qcount"] == 0 and len(state["qring"]) == WINDOW
