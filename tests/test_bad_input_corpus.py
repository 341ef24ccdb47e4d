"""A corpus of bad input mixed with good rows, through the running service: every good row is
stored, every bad row is in ``rejects`` with the right reason, and the service keeps running.
Hypothesis: random CSV content never crashes ingest and never loses a valid row.

The corpus is the project's ``baddata`` simulator (each bad row listed with its kind in its
truth table), appended to a tailed CSV in pieces while the scheduled service runs, plus
malformed lines, adjacent duplicates, and a folder file that lacks a column.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.ingest.files import CsvTail
from monitor.live.monitor import Monitor
from monitor.live.service import Service
from tests.service_helpers import wait_until
from monitor.settings import Config
from monitor.settings import validate as validate_config
from simulators import simulate
from tests.service_helpers import csv_bytes, frame
from tests.conftest import DESIGNED as DESIGNED_H


#: reason text expected for each kind of bad row of simulators.baddata (monitor.rows.validate's wording)
REASONS = {"empty_field": "empty field", "unparsable_number": "not a number",
           "non_positive_price": "price must be > 0", "negative_quantity": "quantity must be >= 0",
           "zero_quantity": "zero quantity cannot be logged", "nan_value": "NaN is not a value",
           "inf_value": "infinity is not a value", "bad_timestamp": "unparsable timestamp",
           "future_timestamp": "in the future", "duplicate_key": "duplicate row",
           "late_row": "late row", "unit_error": "suspected unit error"}
#: the thresholds the pipeline designs for the default settings, given to skip the design time
DESIGNED = Config({"detectors": dict(DESIGNED_H)})
MALFORMED = [b"only,three,fields\n", b"a,b,c,d,e,f,g,h,i\n", b"\xff\xfe\xfd,not,utf8,at,all,x\n"]


def corpus_service(tmp_path, zero_policy):
    sim = simulate("baddata", seed=8, n_series=3, length=120, per_kind=2)
    data = csv_bytes(sim.log)
    lines = data.splitlines(keepends=True)
    cfg = validate_config({
        "store": {"path": "s.sqlite"},
        "estimator": {"controls": ["promo"]},
        "detectors": dict(DESIGNED_H),    # designed values, given (no design time)
        "validation": {"zero_policy": zero_policy},
        "service": {"poll_interval_s": 0.05, "batch_rows": 64, "stale_check_s": 3600},
        "sources": {"feed": {"type": "csv", "path": "feed.csv"},
                    "drops": {"type": "folder", "path": "in", "settle_s": 0.0}}})
    (tmp_path / "in").mkdir()
    return sim, lines, cfg


@pytest.mark.parametrize("zero_policy", ["reject", "skip"])
def test_bad_input_corpus_through_the_running_service(tmp_path, zero_policy):
    sim, lines, cfg = corpus_service(tmp_path, zero_policy)
    feed = tmp_path / "feed.csv"
    feed.write_bytes(lines[0])
    svc = Service(cfg, base=tmp_path)
    svc.start()
    try:
        body = lines[1:]
        pieces = np.array_split(np.arange(len(body)), 4)
        for k, idx in enumerate(pieces):                    # appended in four pieces
            with open(feed, "ab") as fh:
                fh.write(b"".join(body[i] for i in idx))
            time.sleep(0.1)
        with open(feed, "ab") as fh:                        # malformed lines at the end
            fh.write(b"".join(MALFORMED))
        # a file in the folder source that lacks the quantity column
        (tmp_path / "in" / "no_quantity.csv").write_bytes(
            b"series,ts,price,promo\nz,2024-03-01T00:00:00Z,2.5,0\nz,2024-03-02T00:00:00Z,2.6,0\n")
        n_feed = len(body) + len(MALFORMED)
        db = tmp_path / "s.sqlite"
        assert wait_until(lambda: db.exists() and frame(
            db, "SELECT coalesce(sum(rows_read), 0) AS n FROM source_offsets")["n"][0]
            == n_feed + 2, 60)
        assert svc.scheduler.running and svc.scheduler.get_job("poll:feed") is not None
    finally:
        svc.stop()
        svc.scheduler.shutdown(wait=True)
        svc.close()

    rejects = frame(db, "SELECT source, row, field, reason FROM rejects")
    feed_rej = rejects[rejects["source"] == "feed"].set_index("row")
    bad = sim.bad.assign(row=sim.bad["row"] + 1)            # truth rows are 0-based data rows
    if zero_policy == "skip":
        zeros = bad[bad["reason_kind"] == "zero_quantity"]
        bad = bad[bad["reason_kind"] != "zero_quantity"]
    for r in bad.itertuples(index=False):
        assert r.row in feed_rej.index, f"bad row {r.row} ({r.reason_kind}) not in rejects"
        reason = feed_rej.loc[r.row, "reason"]
        assert REASONS[r.reason_kind] in reason, (r.reason_kind, reason)
        assert reason.startswith(f"row {r.row}: field '{r.field}'"), (r.field, reason)
    for j, text in enumerate(MALFORMED):                    # lines that are not rows
        row = len(lines) + j
        assert row in feed_rej.index and f"row {row}: line" in feed_rej.loc[row, "reason"]
    assert len(feed_rej) == len(bad) + len(MALFORMED)
    drops = rejects[rejects["source"] == "drops/no_quantity.csv"]
    assert len(drops) == 2 and drops["reason"].str.contains(r"missing column\(s\) \['quantity'\]")\
        .all()

    obs = frame(db, "SELECT series, ts, price, quantity, source_row FROM observations")
    good = sim.log.drop(index=sim.bad["row"]).reset_index()
    got = obs.set_index("source_row")
    assert len(obs) == len(good) + (len(zeros) if zero_policy == "skip" else 0)
    for r in good.itertuples(index=False):                  # every good row, exactly as written
        o = got.loc[r.index + 1]
        assert (o["series"], o["ts"], o["price"], o["quantity"]) == \
            (r.series, r.ts, float(r.price), float(r.quantity))
    if zero_policy == "skip":
        kept = got.loc[zeros["row"].to_numpy()]
        assert (kept["quantity"] == 0).all()
        est = frame(db, "SELECT series, ts FROM estimates")
        assert not set(zip(kept["series"], kept["ts"])) & set(zip(est["series"], est["ts"]))


def test_duplicate_policy_keep_first_or_reject_all(tmp_path):
    rows = (b"series,ts,price,quantity\n"
            b"a,2024-01-01T00:00:00Z,2.0,10\n"
            b"a,2024-01-02T00:00:00Z,2.1,11\n"
            b"a,2024-01-02T00:00:00Z,2.2,12\n"
            b"a,2024-01-03T00:00:00Z,2.0,13\n")
    (tmp_path / "f.csv").write_bytes(rows)
    for policy, kept in (("keep_first", [10.0, 11.0, 13.0]), ("reject_all", [10.0, 13.0])):
        db = tmp_path / f"{policy}.sqlite"
        with Monitor(db, Config({**DESIGNED.data, "validation": {"duplicate_policy": policy}})) as mon:
            mon.process_chunk(CsvTail("f", tmp_path / "f.csv").read(None, 100), "f", "csv")
        got = frame(db, "SELECT quantity FROM observations ORDER BY ts, quantity")
        assert got["quantity"].tolist() == kept, policy
        rej = frame(db, "SELECT row, reason FROM rejects ORDER BY row")
        assert rej["row"].tolist() == ([3] if policy == "keep_first" else [2, 3])
        assert rej["reason"].str.contains("duplicate row").all()


# ---------------------------------------------------------------- Hypothesis

NUMBER_TOKENS = ["", "nan", "inf", "-1", "0", "abc", "1e5", "2.5", "4,5", " 7 ", "-0"]
TS_TOKENS = ["", "2024-02-30T00:00:00Z", "2099-01-01T00:00:00Z", "yesterday",
             "2024-01-01T00:00:00Z", "1704067200", "2024-13-01"]
garbage_text = st.text(st.characters(blacklist_characters="\n\r", blacklist_categories=("Cs",)),
                       max_size=40).filter(lambda t: not t.startswith(("s0", "s1", "s2")))
garbage_bytes = st.binary(max_size=30).filter(lambda b: b"\n" not in b and b"\r" not in b
                                              and not b.startswith((b"s0", b"s1", b"s2")))
odd_row = st.tuples(st.sampled_from(["g", "", "h"]), st.sampled_from(TS_TOKENS),
                    st.sampled_from(NUMBER_TOKENS), st.sampled_from(NUMBER_TOKENS)).map(
    lambda t: ",".join(t).encode())
valid = st.tuples(st.sampled_from(["s0", "s1", "s2"]), st.integers(100, 999),
                  st.integers(1000, 99999))


@pytest.mark.slow
@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(items=st.lists(st.one_of(valid, garbage_text.map(str.encode), garbage_bytes, odd_row),
                      max_size=60),
       crlf=st.booleans(), max_rows=st.integers(1, 25), cut=st.floats(0, 1))
def test_random_csv_content_never_crashes_ingest_nor_loses_a_valid_row(items, crlf, max_rows,
                                                                       cut):
    end = b"\r\n" if crlf else b"\n"
    lines, expected, minute = [], [], 0
    for it in items:
        if isinstance(it, tuple):        # a valid row: increasing time, price 1.00-9.99
            series, p, q = it
            ts = f"2024-01-01T{minute // 60:02d}:{minute % 60:02d}:00Z"
            minute += 1
            lines.append(f"{series},{ts},{p / 100:.2f},{q / 100:.2f}".encode())
            expected.append((series, ts, float(f"{p / 100:.2f}"), float(f"{q / 100:.2f}")))
        else:
            lines.append(it)
    data = b"series,ts,price,quantity" + end + b"".join(x + end for x in lines)
    with tempfile.TemporaryDirectory() as tmp:
        path, db = Path(tmp) / "feed.csv", Path(tmp) / "s.sqlite"
        split = int(cut * len(data))                         # a growing file, cut anywhere
        path.write_bytes(data[:split])
        src = CsvTail("feed", path)
        with Monitor(db, DESIGNED) as mon:
            position = None
            for stage in (0, 1):
                while True:
                    chunk = src.read(position, max_rows)
                    if chunk is None:
                        break
                    mon.process_chunk(chunk, "feed", "csv")
                    position = chunk.position
                if stage == 0:
                    with open(path, "ab") as fh:
                        fh.write(data[split:])
        obs = frame(db, "SELECT series, ts, price, quantity FROM observations")
        n_rej = frame(db, "SELECT count(*) AS n FROM rejects")["n"][0]
        read = frame(db, "SELECT coalesce(sum(rows_read), 0) AS n FROM source_offsets")["n"][0]
    stored = set(map(tuple, obs.itertuples(index=False)))
    missing = [e for e in expected if e not in stored]
    assert not missing, missing
    blank = sum(1 for x in lines if x.strip(b"\r") == b"")
    assert read == len(lines) and len(obs) + n_rej + blank == len(lines)
