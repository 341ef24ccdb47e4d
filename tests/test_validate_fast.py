"""Validation's compiled fast paths (issue 15) give the values, reasons and codes of before.

Three paths, each against the one it replaces:

- plain ISO timestamps (``YYYY-MM-DDTHH:MM:SS``, ``T`` or space, optional ``Z``) read from
  the Arrow buffers (:func:`monitor.rows.isotime.parse_plain_iso`): against the general reader
  (pandas' ISO 8601 parser, the path every field took before), on random near-plain texts
  (every digit position varied, impossible days, leap years, the ends of the supported range,
  padding, fractions, offsets, lowercase letters);
- columns whose every field starts and ends with a printable non-space ASCII character skip
  the blank test and the trim (:func:`monitor.rows.validate.plain_text`): against the
  general path on texts with Unicode spaces, control characters, empties and nulls;
- the ordered checks' medians from ascending copies of the windows kept in order
  (:func:`monitor.rows.validate.ordered_checks`): against a plain-Python walk with
  ``np.median`` of the recent prices and quantities (the arithmetic of the insertion sort of
  before), with series interleaved, windows wrapping, restored state and tied values.

"Old" below is the general path, forced by switching the fast one off.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

import monitor.rows.validate as V
from monitor.rows.isotime import parse_plain_iso
from monitor.rows.validate import WINDOW, ordered_checks, validate_frame

NAT = np.iinfo(np.int64).min


def _no_plain_iso(arr, lo, hi):
    return np.zeros(len(arr), np.int64), np.zeros(len(arr), bool)


def _old(monkeypatch, fn, *args, **kw):
    """``fn(*args, **kw)`` with the plain-ISO reader and the plain-text skip switched off."""
    with monkeypatch.context() as m:
        m.setattr(V, "parse_plain_iso", _no_plain_iso)
        m.setattr(V, "plain_text", lambda arr: False)
        return fn(*args, **kw)


def _ts_texts(rng, n: int) -> list[str]:
    """Plain ISO texts with every field drawn over and beyond its range, then some spoiled."""
    out = []
    for _ in range(n):
        y = int(rng.choice([rng.integers(1600, 2300), 1677, 1678, 2261, 2262, 2000, 1900, 2024,
                            2100, 400, 9999, 0]))
        mo, d = int(rng.integers(0, 14)), int(rng.integers(0, 33))
        hh, mi, ss = int(rng.integers(0, 26)), int(rng.integers(0, 62)), int(rng.integers(0, 62))
        sep = "T" if rng.random() < 0.7 else " "
        t = f"{y:04d}-{mo:02d}-{d:02d}{sep}{hh:02d}:{mi:02d}:{ss:02d}" + \
            ("Z" if rng.random() < 0.6 else "")
        k = rng.random()
        if k < 0.03:
            t = " " + t
        elif k < 0.06:
            t = t[:-1] + ".5Z"
        elif k < 0.09:
            t = t.rstrip("Z") + "+01:00"
        elif k < 0.11:
            t = t.lower()
        elif k < 0.13:
            i = int(rng.integers(0, len(t)))
            t = t[:i] + "x" + t[i + 1:]
        elif k < 0.15:
            t = t[:-2]
        out.append(t)
    return out + ["2024-02-29T00:00:00Z", "2023-02-29T00:00:00Z", "1900-02-29 12:00:00",
                  "2000-02-29 12:00:00", "1678-01-01T00:00:00Z", "1677-12-31T23:59:59Z",
                  "2261-12-31T23:59:59Z", "2262-01-01T00:00:00Z", "2024-01-01T24:00:00Z",
                  "2024-01-01T00:00:60Z", "1709277000", "", "now"]


@pytest.mark.parametrize("dtype", ["string[pyarrow]", "str"])
def test_plain_iso_timestamps_same_as_the_general_reader(monkeypatch, dtype):
    rng = np.random.default_rng(1515)
    texts = _ts_texts(rng, 4000)
    col = pd.Series(texts, dtype=dtype)
    _, plain = parse_plain_iso(V.arrow_text_array(col), V._YEAR_LO, V._YEAR_HI)
    assert 0.3 < plain.mean() < 0.9                  # both paths exercised, in one column
    ns, why = V.read_timestamps(col)
    ons, owhy = _old(monkeypatch, V.read_timestamps, col)
    np.testing.assert_array_equal(ns, ons)
    assert why.tolist() == owhy.tolist()
    assert (ns[plain] != NAT).all() and len({w for w in owhy if w}) >= 3
    # every plain field is one pandas reads to the same instant (outside reference)
    ref = pd.to_datetime(pd.Series(texts)[plain], utc=True, format="ISO8601")
    np.testing.assert_array_equal(ns[plain], ref.dt.tz_localize(None).to_numpy()
                                  .astype("datetime64[ns]").view(np.int64))


def test_plain_iso_reads_sliced_and_chunked_arrays():
    texts = ["2024-03-01T05:00:00Z", "2024-03-01 06:00:00", None, "x", "1999-12-31T23:59:59"]
    whole = pa.array(texts * 3, pa.string())
    ns, ok = parse_plain_iso(whole, 1678, 2261)
    sl = whole.slice(3, 9)
    ns2, ok2 = parse_plain_iso(sl, 1678, 2261)
    np.testing.assert_array_equal(ns2, ns[3:12])
    np.testing.assert_array_equal(ok2, ok[3:12])
    ch = pa.chunked_array([whole.slice(0, 4), whole.slice(4)], pa.string())
    ns3, ok3 = parse_plain_iso(ch, 1678, 2261)
    np.testing.assert_array_equal(ns3, ns)
    assert ok.tolist() == [True, True, False, False, True] * 3
    assert ns[0] == pd.Timestamp("2024-03-01T05:00:00Z").value


#: edges the plain-text skip must send to the general path
EDGES = ["", " ", "\t", "\x1c", "\x1f", "\x85", "\xa0", "\u2003", "\u3000", "\ufeff", "\x00",
         "\x7f", "é", "\r"]


def _frame(rng, n: int, dirty: bool) -> pd.DataFrame:
    t0 = pd.Timestamp("2024-03-01T00:00:00Z").value // 10**9
    series = [f"s{int(k)}" for k in rng.integers(0, 7, n)]
    ts = pd.to_datetime(t0 + (np.arange(n) // 3 - rng.integers(0, 2, n)) * 3600, unit="s", utc=True) \
        .strftime("%Y-%m-%dT%H:%M:%SZ").tolist()
    price = [f"{v:.3f}" for v in np.exp(rng.normal(1, 0.2, n))]
    qty = [f"{v:.2f}" for v in np.exp(rng.normal(3, 0.3, n))]
    cols = {"series": series, "ts": ts, "price": price, "quantity": qty}
    if dirty:
        for name, vals in cols.items():
            for i in rng.choice(n, 12, replace=False):
                e = EDGES[int(rng.integers(0, len(EDGES)))]
                vals[i] = e + vals[i] if rng.random() < 0.5 else vals[i] + e
            for i in rng.choice(n, 3, replace=False):
                vals[i] = None
    return pd.DataFrame({k: pd.Series(v, dtype="string[pyarrow]") for k, v in cols.items()})


@pytest.mark.parametrize("dirty", [False, True])
def test_plain_text_skip_same_good_rows_and_rejects(monkeypatch, dirty):
    rng = np.random.default_rng(77 + dirty)
    frame = _frame(rng, 3000, dirty)
    assert all(V.plain_text(V.arrow_text_array(frame[c])) != dirty for c in frame.columns)
    for c in frame.columns:
        np.testing.assert_array_equal(V._is_blank(frame[c]),
                                      _old(monkeypatch, V._is_blank, frame[c]))
    now = pd.Timestamp("2025-01-01T00:00:00Z").value
    for order in ("time", "arrival"):
        gate = V.SeriesGate()
        new = validate_frame(frame, now_ns=now, order_by=order, gate=gate)
        old = _old(monkeypatch, validate_frame, frame, now_ns=now, order_by=order)
        pd.testing.assert_frame_equal(new.good, old.good)
        pd.testing.assert_frame_equal(new.rejects, old.rejects)
        # the good rows' gate ids handed on to the replay kernel are the gate's own
        np.testing.assert_array_equal(new.sid, gate.ids(new.good["series"]))
        assert len(new.good) > 1500 and len(new.rejects) > (30 if dirty else 0)


@pytest.mark.parametrize("edge", EDGES)
def test_one_edge_character_sends_the_column_to_the_general_path(monkeypatch, edge):
    clean = ["s1", "2024-03-01T05:00:00Z", "2.5", "10"]
    assert V.plain_text(pa.array(clean))
    for where in ("head", "tail", "whole"):
        for i in range(4):
            row = list(clean)
            row[i] = {"head": edge + row[i], "tail": row[i] + edge, "whole": edge}[where]
            if row == clean:
                continue
            assert not V.plain_text(pa.array(row))
            frame = pd.DataFrame({c: pd.Series([clean[k], row[k]], dtype="string[pyarrow]")
                                  for k, c in enumerate(("series", "ts", "price", "quantity"))})
            for c in frame.columns:
                np.testing.assert_array_equal(V._is_blank(frame[c]),
                                              _old(monkeypatch, V._is_blank, frame[c]))
            new, old = validate_frame(frame), _old(monkeypatch, validate_frame, frame)
            pd.testing.assert_frame_equal(new.good, old.good)
            pd.testing.assert_frame_equal(new.rejects, old.rejects)


def _walk_oracle(sid, ts, lp, last_ts, ring, ring_ts, count, lateness_ns, log_ratio, code,
                 batch_median, lq, qring, qcount, log_qratio):
    """The ordered checks in plain Python with ``np.median`` of the windows (the values the
    insertion sort of before gave): the oracle for the compiled walk."""
    w = ring.shape[1]
    for j in range(sid.shape[0]):
        s = sid[j]
        if count[s] > 0 or last_ts[s] != NAT:
            if ts[j] == last_ts[s] or any(ring_ts[s, i] == ts[j] for i in range(min(count[s], w))):
                code[j] = 1
                continue
            if ts[j] < last_ts[s] - lateness_ns:
                code[j] = 2
                continue
        c = min(count[s], w)
        med = np.median(ring[s, :c]) if c >= 2 else batch_median[s]
        if med == med and abs(lp[j] - med) >= log_ratio:
            code[j] = 3
            continue
        fin = lq[j] > -np.inf
        if fin and log_qratio > 0 and qcount[s] >= 2:
            if abs(lq[j] - np.median(qring[s, :min(qcount[s], w)])) >= log_qratio:
                code[j] = 4
                continue
        if fin:
            qring[s, qcount[s] % w] = lq[j]
            qcount[s] += 1
        ring[s, count[s] % w] = lp[j]
        ring_ts[s, count[s] % w] = ts[j]
        count[s] += 1
        last_ts[s] = max(last_ts[s], ts[j])


@pytest.mark.parametrize("tight", [False, True])
@pytest.mark.parametrize("interleaved", [False, True])
def test_ordered_checks_sorted_windows_same_codes_and_state(interleaved, tight):
    """Duplicates, late rows, unit errors (100x prices), quantity errors (5000x) and zero
    quantities kept as data, over 30 seeded series in two calls (the second starts from the
    state the first left, windows full and wrapping): every code and the state left equal the
    oracle's; prices and quantities rounded so windows hold ties. ``tight`` ratios (log ratios
    0.1 for prices, 0.8 for quantities, near the noise) make the codes turn on the medians' exact values
    (with the default ratios a wrong median rarely changes a code)."""
    rng = np.random.default_rng(9 + interleaved)
    ratio, qratio = (0.1, 0.8) if tight else (np.log(50.0), np.log(1000.0))
    S = 30
    state = {k: [] for k in ("got", "want")}
    for k in state:
        state[k] = [np.full(S, NAT), np.zeros((S, WINDOW)), np.zeros((S, WINDOW), np.int64),
                    np.zeros(S, np.int64), np.zeros((S, WINDOW)), np.zeros(S, np.int64)]
    seen = set()
    base = np.log(rng.uniform(2, 8, S))                     # each series' price level
    for call in range(2):
        n = 5000
        sid = rng.integers(0, S, n) if interleaved else np.sort(rng.integers(0, S, n))
        ts = (call * 10_000 + np.cumsum(rng.integers(0, 3, n))) * 3_600 * 10**9
        ts[rng.random(n) < 0.05] -= 7 * 3_600 * 10**9                     # late rows
        lp = np.round(base[sid] + rng.normal(0, 0.05, n), 2)
        lp[rng.random(n) < 0.03] += np.log(100.0)
        lq = np.round(3 + rng.normal(0, 0.5, n), 1)
        lq[rng.random(n) < 0.03] += np.log(5000.0)
        lq[rng.random(n) < 0.02] = -np.inf                                 # zero kept as data
        bm = np.where(rng.random(S) < 0.5, np.nan, base)
        codes = {}
        for k, fn in (("got", ordered_checks), ("want", _walk_oracle)):
            last, ring, ring_ts, count, qring, qcount = state[k]
            codes[k] = np.zeros(n, np.int8)
            args = (sid, ts, lp, last, ring, ring_ts, count, 3_600 * 10**9, ratio)
            if fn is ordered_checks:
                fn(*args, False, codes[k], bm, lq, qring, qcount, qratio)
            else:
                fn(*args, codes[k], bm, lq, qring, qcount, qratio)
        np.testing.assert_array_equal(codes["got"], codes["want"])
        seen |= set(np.unique(codes["got"]).tolist())
        for g, w in zip(state["got"], state["want"]):
            np.testing.assert_array_equal(g, w)
    assert seen == {0, 1, 2, 3, 4}
    # windows wrapped (all of them; most with the tight ratios, which keep some series out)
    assert (state["got"][3] > WINDOW).mean() >= (0.6 if tight else 1.0)
    if tight:                                               # the medians decide many codes
        assert (codes["got"] == 3).mean() > 0.05 and (codes["got"] == 4).mean() > 0.05
