"""The engine: one committed transaction per batch, exact resume, the same numbers as replay.

References: the replay (:func:`monitor.replay.driver.run_replay`, the full-speed path over the same
compiled core) for the estimates; :func:`monitor.store.thin_estimates` applied to the whole
estimate history for the retention rule; hand-built logs for the duplicate, zero and
missing-column cases. Data come from the project's retail simulator (invented series).
"""

from __future__ import annotations

import re
import sqlite3
import struct
import tomllib

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.cli import main
from monitor.errors import StoreError, ValidationError
from monitor.live.monitor import Monitor
from monitor.replay.driver import run_replay
from monitor.settings import Config
from monitor.store import Store, thin_estimates
from simulators import simulate
from tests.service_helpers import assert_same_store, csv_bytes, dump, frame, states
from tests.conftest import DESIGNED


CFG_TOML = """
[estimator]
forgetting = 0.99
controls = ["promo"]
[validation]
zero_policy = "skip"
[detectors]     # the thresholds the pipeline designs by simulation for ARL0 20000 and
cusum_h = {cusum_h}  # forgetting 0.99 (monitor.detectors.design), given to skip the design time
slope_h = {slope_h}
""".format(**DESIGNED)
CFG = Config({**tomllib.loads(CFG_TOML), "store": {"estimates_every": 3}})


@pytest.fixture(scope="module")
def log():
    sim = simulate("retail", seed=11, n_series=4, length=90)
    return sim.log.drop(columns=["weekend"])


def run_in_batches(path, log, cuts, config=CFG, reopen=False):
    """Feed ``log`` to a Monitor in pieces cut at ``cuts``; reopen it between pieces if asked."""
    bounds = [0, *sorted(cuts), len(log)]
    mon = Monitor(path, config)
    try:
        for lo, hi in zip(bounds[:-1], bounds[1:]):
            mon.observe_many(log.iloc[lo:hi])
            if reopen:
                mon.close()
                mon = Monitor(path, config)
    finally:
        mon.close()


def test_observe_gives_an_estimate_and_a_bad_row_raises_and_is_kept(tmp_path):
    with Monitor(tmp_path / "m.sqlite", CFG) as mon:
        est = mon.observe("depot/tea", "2024-05-01T00:00:00Z", price=4.0, quantity=120.0, promo=0)
        assert est.series == "depot/tea" and est.status == "warming_up"
        with pytest.raises(ValidationError, match=r"row 2: field 'price' = '-4.0': price must be > 0"):
            mon.observe("depot/tea", "2024-05-01T01:00:00Z", price=-4.0, quantity=10.0, promo=0)
        assert mon.observe("depot/tea", "2024-05-01T02:00:00Z", 4.1, 0.0, promo=0) is None
    rej = frame(tmp_path / "m.sqlite", "SELECT source, row, field, reason FROM rejects")
    assert rej.to_dict("records") == [{"source": "api", "row": 2, "field": "price",
                                       "reason": "row 2: field 'price' = '-4.0': price must be > 0"}]
    obs = frame(tmp_path / "m.sqlite", "SELECT ts, quantity FROM observations ORDER BY ts")
    assert obs["quantity"].tolist() == [120.0, 0.0]     # the zero row is kept, not estimated


def test_any_batch_split_gives_the_same_store_to_the_bit(tmp_path, log):
    run_in_batches(tmp_path / "one.sqlite", log, [])
    rng = np.random.default_rng(5)
    cuts = rng.choice(np.arange(1, len(log)), size=25, replace=False)
    run_in_batches(tmp_path / "many.sqlite", log, cuts)
    # the API source numbers rows by its own count, so they agree too
    assert_same_store(tmp_path / "one.sqlite", tmp_path / "many.sqlite")


def test_restart_between_batches_resumes_exactly(tmp_path, log):
    run_in_batches(tmp_path / "one.sqlite", log, [])
    run_in_batches(tmp_path / "restarts.sqlite", log, [7, 50, 51, 200, 333], reopen=True)
    assert_same_store(tmp_path / "one.sqlite", tmp_path / "restarts.sqlite")


def test_thinning_keeps_every_third_update_and_each_status_change(tmp_path, log):
    run_in_batches(tmp_path / "thin.sqlite", log, [13, 101, 102, 250])
    run_in_batches(tmp_path / "all.sqlite", log, [], config=Config(
        {**CFG.data, "store": {"estimates_every": 1}}))
    every = frame(tmp_path / "all.sqlite", "SELECT * FROM estimates")
    kept = frame(tmp_path / "thin.sqlite", "SELECT * FROM estimates")
    # reference: the store's own rule applied once to the whole, unthinned history in order
    every = every.sort_values(["series", "ts"]).reset_index(drop=True)
    expect = thin_estimates(every, 3).sort_values(["series", "ts"]).reset_index(drop=True)
    got = kept.sort_values(["series", "ts"]).reset_index(drop=True)
    pd.testing.assert_frame_equal(got, expect.reset_index(drop=True), check_exact=True)
    assert len(kept) < len(every)
    # the latest estimate is never thinned away
    assert dump(tmp_path / "thin.sqlite")["latest_estimates"] == \
        dump(tmp_path / "all.sqlite")["latest_estimates"]


def test_live_ingest_in_batches_equals_replay_to_the_bit(tmp_path, log):
    path = tmp_path / "log.csv"
    path.write_bytes(csv_bytes(log))
    run_replay(path, tmp_path / "replay", CFG)
    (tmp_path / "elmon.toml").write_text(CFG_TOML)
    rc = main(["ingest", str(path), "--db", str(tmp_path / "s.sqlite"), "--batch-rows", "37",
               "--config", str(tmp_path / "elmon.toml")])
    assert rc == 0
    replay = pd.read_csv(tmp_path / "replay" / "estimates.csv")
    live = frame(tmp_path / "s.sqlite", "SELECT * FROM estimates")
    replay = replay.sort_values(["series", "ts"]).reset_index(drop=True)
    live = live.sort_values(["series", "ts"]).reset_index(drop=True)
    assert len(live) == len(replay) > 300
    cols = ["beta", "beta_se", "beta_lo", "beta_hi", "n_eff", "intercept", "resid_sd",
            "innovation", "z"]
    # reference: the replay; pyarrow writes the shortest round-trip repr, so equal to the bit
    for c in cols:
        assert replay[c].to_numpy().tobytes() == live[c].to_numpy().tobytes(), c
    assert replay["status"].tolist() == live["status"].tolist()
    rej_r = pd.read_csv(tmp_path / "replay" / "rejects.csv")
    rej_l = frame(tmp_path / "s.sqlite", "SELECT row, reason FROM rejects ORDER BY row")
    assert rej_l["row"].tolist() == rej_r["row"].tolist()
    assert rej_l["reason"].tolist() == rej_r["reason"].tolist()


def test_rerun_of_a_finished_ingest_adds_nothing_and_says_so(tmp_path, log, capsys):
    path = tmp_path / "log.csv"
    path.write_bytes(csv_bytes(log.iloc[:100]))
    db = tmp_path / "s.sqlite"
    (tmp_path / "elmon.toml").write_text(CFG_TOML)
    args = ["ingest", str(path), "--db", str(db), "--config", str(tmp_path / "elmon.toml")]
    assert main(args) == 0
    first = dump(db)
    capsys.readouterr()
    assert main(args) == 0
    out = capsys.readouterr().out
    assert "nothing new" in out and "row 100" in out and "nothing added" in out
    assert dump(db) == first
    with open(path, "ab") as fh:                            # the file grows: only the new rows
        fh.write(csv_bytes(log.iloc[100:130]).split(b"\n", 1)[1])
    assert main(args) == 0
    assert "continuing after row 100" in capsys.readouterr().out
    assert len(dump(db)["observations"]) == len(first["observations"]) + 30


def test_zero_skip_keeps_the_row_out_of_the_estimator_and_counts_it(tmp_path, log):
    part = log.iloc[:60].reset_index(drop=True)
    zero = part.copy()
    zero.loc[30, "quantity"] = 0.0
    with Monitor(tmp_path / "z.sqlite", CFG) as mon:
        rep = mon.observe_many(zero)
    assert rep.zero_skipped == 1 and rep.accepted == 59 and rep.rejected == 0
    with Monitor(tmp_path / "ref.sqlite", CFG) as mon:
        mon.observe_many(part.drop(index=30))
    s = part.loc[30, "series"]
    st_z, st_ref = states(tmp_path / "z.sqlite")[s], states(tmp_path / "ref.sqlite")[s]
    assert st_z["pipeline"] == st_ref["pipeline"]         # the estimator never saw the row
    assert st_z["zero_skipped"] == 1 and st_ref["zero_skipped"] == 0
    obs = frame(tmp_path / "z.sqlite", f"SELECT quantity FROM observations WHERE series = '{s}'")
    assert (obs["quantity"] == 0).sum() == 1


def test_a_failed_commit_leaves_no_trace(tmp_path, log):
    db = tmp_path / "f.sqlite"
    run_in_batches(tmp_path / "ref.sqlite", log, [150])
    store = Store.open(db, busy_timeout=0.2)
    mon = Monitor(store, CFG)
    mon.observe_many(log.iloc[:150])
    blocker = sqlite3.connect(db, timeout=0.1, isolation_level=None)
    blocker.execute("BEGIN IMMEDIATE")                      # another writer holds the lock
    with pytest.raises(StoreError, match="locked"):
        mon.observe_many(log.iloc[150:])
    blocker.execute("ROLLBACK")
    blocker.close()
    mon.observe_many(log.iloc[150:])                        # the same batch again
    mon.close()
    store.close()
    assert_same_store(tmp_path / "ref.sqlite", db)


def test_a_second_writer_process_is_refused(tmp_path):
    with Monitor(tmp_path / "w.sqlite", CFG):
        with pytest.raises(StoreError, match="another elmon process"):
            Monitor(tmp_path / "w.sqlite", CFG)
    Monitor(tmp_path / "w.sqlite", CFG).close()                # free again once closed


def test_a_changed_model_is_refused_on_restore(tmp_path, log):
    run_in_batches(tmp_path / "c.sqlite", log.iloc[:20], [])
    with pytest.raises(StoreError, match="checkpoint of series .* another model configuration"):
        Monitor(tmp_path / "c.sqlite", Config({"estimator": {"controls": []},
                                                "detectors": CFG.data["detectors"]}))


def test_repeats_the_gate_cannot_see_are_rejected_not_fatal(tmp_path):
    cfg = Config({"validation": {"allowed_lateness_s": 30 * 86400.0, "zero_policy": "skip"},
                  "detectors": CFG.data["detectors"]})
    ts = [f"2024-01-{d:02d}T00:00:00Z" for d in range(1, 21)]
    base = pd.DataFrame({"series": "s", "ts": ts, "price": 5.0 + np.arange(20) % 3 * 0.1,
                         "quantity": 50.0})
    with Monitor(tmp_path / "d.sqlite", cfg) as mon:
        mon.observe_many(base)
        late = pd.DataFrame({"series": ["s", "s", "s"], "ts": [ts[2], ts[19], "2024-01-25"],
                             "price": [5.0, 5.0, 5.0], "quantity": [10.0, 0.0, 0.0]})
        rep = mon.observe_many(late)          # an old stored time (beyond the gate's memory),
        assert rep.rejected == 2              # a zero row repeating the newest, one new zero
        assert all("duplicate row" in r for r in rep.rejects["reason"])
        assert rep.zero_skipped == 1
        again = mon.observe_many(pd.DataFrame({"series": ["s"], "ts": ["2024-01-25"],
                                               "price": [5.0], "quantity": [3.0]}))
        assert again.rejected == 1            # repeats the zero row just stored
    assert len(dump(tmp_path / "d.sqlite")["observations"]) == 21


def test_a_source_without_a_required_column_has_every_row_rejected(tmp_path):
    bad = pd.DataFrame({"series": ["a", "b"], "ts": ["2024-01-01", "2024-01-02"],
                        "price": [1.0, 2.0]})
    with Monitor(tmp_path / "m.sqlite", Config({"detectors": CFG.data["detectors"]})) as mon:
        rep = mon.observe_many(bad)
    assert rep.rejected == 2 and rep.accepted == 0
    assert all("missing column(s) ['quantity']" in r for r in rep.rejects["reason"])


def every_table(path) -> dict:
    """Every table of a store (wall-clock columns left out), rows in a fixed order."""
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        names = [r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = "
                                            "'table' AND name NOT LIKE 'sqlite_%' AND name != "
                                            "'migrations' ORDER BY name")]
        out = {}
        for t in names:
            cols = [r[1] for r in conn.execute(f"PRAGMA table_info({t})")
                    if not r[1].endswith("_at") and r[1] not in ("at", "until")]
            q = ", ".join(f'"{c}"' for c in cols)
            out[t] = [tuple(struct.pack("<d", v) if isinstance(v, float) else v for v in row)
                      for row in conn.execute(f"SELECT {q} FROM {t} ORDER BY {q}")]
        return out
    finally:
        conn.close()


@pytest.mark.slow
def test_the_one_row_path_of_observe_writes_what_the_batch_path_writes(tmp_path):
    rng = np.random.default_rng(21)
    t0 = pd.Timestamp("2024-02-01T00:00:00Z")
    hours = {"a": 0, "b": 0, "c": 0}
    calls = []
    for i in range(260):
        s = ["a", "b", "c"][i % 3] if rng.random() > 0.03 else f"new{i}"
        h = hours.setdefault(s, 0)
        hours[s] = h + 1
        ts = t0 + pd.Timedelta(hours=h)
        form = i % 4   # the timestamp forms validation accepts
        tsv = [ts.strftime("%Y-%m-%dT%H:%M:%SZ"),
               (ts + pd.Timedelta(hours=2)).strftime("%Y-%m-%dT%H:%M:%S+02:00"),
               ts.value / 1e9, ts][form]
        p = float(np.round(5 * np.exp(rng.normal(0, 0.15)), 2))
        shift = 1.2 if s == "a" and h > 60 else 0.0          # a level shift: alerts
        q = float(np.round(np.exp(3 - 1.5 * np.log(p) + shift + rng.normal(0, 0.1)), 3))
        u = rng.random()
        if u < 0.04:
            p = -p                                            # rejected
        elif u < 0.08:
            q = 0.0                                           # zero_policy skip: kept, not fed
        elif u < 0.11 and h:
            tsv = (ts - pd.Timedelta(hours=1)).strftime("%Y-%m-%dT%H:%M:%SZ")   # repeat
        calls.append((s, tsv, p, q, int(rng.random() < 0.3)))
    stores = {}
    for fast in (True, False):
        db = tmp_path / f"{fast}.sqlite"
        with Monitor(db, CFG) as mon:
            mon._fast = fast
            for s, tsv, p, q, promo in calls:
                try:
                    mon.observe(s, tsv, price=p, quantity=q, promo=promo)
                except ValidationError:
                    pass
            stores[fast] = (db, mon.plain_calls)
    assert stores[True][1] > 150 and stores[False][1] == 0     # the one-row path was taken
    fast, general = every_table(stores[True][0]), every_table(stores[False][0])
    assert fast.keys() == general.keys()
    for t in general:
        assert fast[t] == general[t], t
    assert len(general["alerts"]) >= 1 and len(general["rejects"]) >= 10


@settings(max_examples=300, deadline=None)
@given(ns=st.integers(-8_000_000_000_000_000_000, 7_000_000_000_000_000_000),
       digits=st.integers(0, 9), zone=st.sampled_from(["Z", "", "+02:00", "-05:30", "+00:00"]))
def test_one_row_timestamps_read_and_print_as_validation_does(ns, digits, zone):
    # reference: monitor.rows.validate (pandas to_datetime with format="ISO8601", strftime)
    from monitor.live.one_row import iso_z, plain_ns
    from monitor.rows.isotime import format_ts
    from monitor.rows.validate import parse_timestamps

    assert iso_z(ns) == format_ts(np.array([ns]))[0]
    stamp = pd.Timestamp(ns, tz="UTC")
    local = stamp.tz_convert("Etc/GMT-2") if zone == "+02:00" else stamp
    if zone == "-05:30":
        local = stamp - pd.Timedelta(hours=5, minutes=30)
    elif zone == "+00:00" or zone in ("Z", ""):
        local = stamp
    text = local.strftime("%Y-%m-%dT%H:%M:%S")
    if digits:
        text += "." + f"{local.nanosecond + 1000 * local.microsecond:09d}"[:digits]
    text += zone
    expect = parse_timestamps(pd.Series([text], dtype=object))[0]
    assert plain_ns(text) == expect, text
    assert plain_ns(float(ns // 10**9)) == parse_timestamps(pd.Series([float(ns // 10**9)]))[0] \
        or abs(ns // 10**9) >= 1e11


def test_live_ingest_raises_the_alerts_the_replay_raises(tmp_path):
    # reference: the replay's alerts.csv over the same log and configuration
    log = simulate("retail", seed=3, n_series=6, length=420).log
    path = tmp_path / "log.csv"
    path.write_bytes(csv_bytes(log))
    cfg = Config(tomllib.loads(CFG_TOML))
    run_replay(path, tmp_path / "replay", cfg)
    from monitor.live.service import ingest_file
    ingest_file(path, tmp_path / "s.sqlite", cfg, batch_rows=400)
    replay = pd.read_csv(tmp_path / "replay" / "alerts.csv")
    live = frame(tmp_path / "s.sqlite", "SELECT series, opened_ts AS ts, kind AS rule, beta, "
                                        "beta_lo, beta_hi, message FROM alerts")
    key = ["series", "ts", "rule"]
    replay = replay.sort_values(key).reset_index(drop=True)[live.columns]
    live = live.sort_values(key).reset_index(drop=True)
    assert len(live) >= 2
    # the live path passes each row's time to the pipeline, so its messages name times where
    # a replay run without them names observation numbers; the rest of the text must agree
    when = re.compile(r"observation \d+|\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ")
    for df in (live, replay):
        df["message"] = [when.sub("<when>", m) for m in df["message"]]
    pd.testing.assert_frame_equal(live, replay, check_exact=True)
