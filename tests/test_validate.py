"""Row validation: each kind of bad row gets the right reason, good rows all pass, and the typed
and text reading paths agree on empty fields versus literal NaN."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor.errors import ConfigError, SourceError
from monitor.ingest.logio import read_log
from monitor.rows.validate import SeriesGate, ValidationSettings, validate_frame


# reason text expected for each kind listed by the baddata simulator
REASON = {
    "empty_field": "empty field", "unparsable_number": "not a number",
    "non_positive_price": "price must be > 0", "negative_quantity": "quantity must be >= 0",
    "zero_quantity": "zero quantity", "nan_value": "NaN is not a value",
    "inf_value": "infinity is not a value", "bad_timestamp": "unparsable timestamp",
    "future_timestamp": "in the future", "duplicate_key": "duplicate row",
    "late_row": "late row", "unit_error": "suspected unit error",
}


def test_bad_data_corpus_every_kind_gets_its_reason(tmp_path):
    import simulators

    sim = simulators.simulate("baddata", seed=4)
    simulators.write_outputs(sim, tmp_path / "bad.csv", truth=tmp_path / "truth.csv")
    frame = read_log(tmp_path / "bad.csv")
    # arrival order matters for late rows: validate in file order in two batches, as the service
    # does, carrying the per-series state across them
    gate = SeriesGate()
    now = pd.Timestamp("2026-12-01", tz="UTC").value
    half = len(frame) // 2
    a = validate_frame(frame.iloc[:half], controls=["promo", "weekend"], gate=gate, now_ns=now,
                       order_by="arrival")
    b = validate_frame(frame.iloc[half:], controls=["promo", "weekend"], gate=gate, now_ns=now,
                       row_offset=half, order_by="arrival")
    rejects = pd.concat([a.rejects, b.rejects])
    got = dict(zip(rejects["row"], rejects["reason"]))
    bad = sim.bad
    for _, r in bad.iterrows():
        row = int(r["row"]) + 1            # the simulator numbers data rows from 0, elmon from 1
        assert row in got, f"{r['reason_kind']} at data row {row} was not rejected"
        assert REASON[r["reason_kind"]] in got[row], (r["reason_kind"], got[row])
    assert len(got) == len(bad)            # and no good row was rejected
    assert len(a.good) + len(b.good) + len(rejects) == len(frame)


def test_zero_policy_skip_counts_instead_of_rejecting():
    df = pd.DataFrame({"series": ["s"] * 3, "ts": ["2026-01-01", "2026-01-02", "2026-01-03"],
                       "price": [2.0, 2.1, 2.2], "quantity": [3.0, 0.0, 4.0]})
    v = validate_frame(df, settings=ValidationSettings(zero_policy="skip"))
    assert len(v.rejects) == 0 and list(v.zero_skipped["row"]) == [2] and len(v.good) == 2


def test_duplicate_policy_reject_all_quarantines_every_copy():
    df = pd.DataFrame({"series": ["s"] * 3, "ts": ["2026-01-01", "2026-01-02", "2026-01-02"],
                       "price": [2.0, 2.1, 2.2], "quantity": [3.0, 5.0, 4.0]})
    keep = validate_frame(df)
    assert list(keep.rejects["row"]) == [3]
    both = validate_frame(df, settings=ValidationSettings(duplicate_policy="reject_all"))
    assert sorted(both.rejects["row"]) == [2, 3]


def test_lateness_tolerance():
    df = pd.DataFrame({"series": ["s"] * 3,
                       "ts": ["2026-01-01T10:00:00Z", "2026-01-01T12:00:00Z", "2026-01-01T11:30:00Z"],
                       "price": [2.0, 2.1, 2.2], "quantity": [3.0, 5.0, 4.0]})
    gate = SeriesGate()
    strict = validate_frame(df.iloc[:2], gate=gate)
    late = validate_frame(df.iloc[2:], gate=gate, row_offset=2)
    assert len(strict.good) == 2 and "late row" in late.rejects["reason"].iat[0]
    gate = SeriesGate()
    validate_frame(df.iloc[:2], gate=gate, settings=ValidationSettings(allowed_lateness_s=3600))
    ok = validate_frame(df.iloc[2:], gate=gate, settings=ValidationSettings(allowed_lateness_s=3600))
    assert len(ok.good) == 1


def test_empty_field_and_literal_nan_are_told_apart_on_both_paths(tmp_path):
    p = tmp_path / "log.csv"
    p.write_text("series,ts,price,quantity\na,2026-01-01T00:00:00Z,,3\n"
                 "a,2026-01-02T00:00:00Z,nan,3\na,2026-01-03T00:00:00Z,2,3\n")
    for text in (False, True):
        v = validate_frame(read_log(p, text=text))
        reasons = list(v.rejects["reason"])
        assert "empty field" in reasons[0] and "NaN is not a value" in reasons[1], (text, reasons)
        assert len(v.good) == 1


def test_missing_column_is_a_source_error():
    with pytest.raises(SourceError, match=r"missing column\(s\) \['quantity'\]"):
        validate_frame(pd.DataFrame({"series": ["a"], "ts": ["2026-01-01"], "price": [1.0]}))


def test_settings_are_validated_by_name():
    with pytest.raises(ConfigError, match="zero_policy"):
        ValidationSettings(zero_policy="drop")
    with pytest.raises(ConfigError, match="unit_ratio"):
        ValidationSettings(unit_ratio=1.0)


def test_epoch_seconds_and_offsets_parse_to_utc():
    df = pd.DataFrame({"series": ["a", "a", "a"],
                       "ts": ["1767225600", "2026-01-01T02:00:00+01:00", "2026-01-01T03:00:00"],
                       "price": [1.0, 1.0, 1.0], "quantity": [1.0, 1.0, 1.0]})
    v = validate_frame(df)
    expect = pd.to_datetime(["2026-01-01T00:00:00Z", "2026-01-01T01:00:00Z", "2026-01-01T03:00:00Z"])
    assert list(v.good["ts"]) == list(expect.as_unit("ns").asi8)


def test_arrival_order_results_do_not_depend_on_batch_boundaries(tmp_path):
    import simulators

    sim = simulators.simulate("baddata", seed=9)
    simulators.write_outputs(sim, tmp_path / "bad.csv")
    frame = read_log(tmp_path / "bad.csv")
    now = pd.Timestamp("2026-12-01", tz="UTC").value
    whole = validate_frame(frame, controls=["promo", "weekend"], now_ns=now, order_by="arrival")
    gate = SeriesGate()
    parts, rej = [], []
    cuts = [0, 17, 18, 90, 151, len(frame)]
    for lo, hi in zip(cuts[:-1], cuts[1:]):
        v = validate_frame(frame.iloc[lo:hi], controls=["promo", "weekend"], gate=gate, now_ns=now,
                           row_offset=lo, order_by="arrival")
        parts.append(v.good)
        rej.append(v.rejects)
    pd.testing.assert_frame_equal(pd.concat(parts, ignore_index=True), whole.good)
    assert list(pd.concat(rej)["reason"]) == list(whole.rejects["reason"])


def test_ring_median_equals_numpy_median_to_the_bit():
    from monitor.rows.validate import WINDOW, ring_median

    rng = np.random.default_rng(11)
    tmp = np.empty(WINDOW)
    for trial in range(400):
        c = int(rng.integers(2, WINDOW + 1))
        ring = np.round(rng.normal(1.0, 0.3, (1, WINDOW)), int(rng.integers(1, 4)))  # ties too
        assert ring_median(ring, 0, c, tmp) == np.median(ring[0, :c]), (trial, c)


