"""Replay's faster paths (issue 15) keep every output to the bit.

The replay hands validation Arrow-backed text (:func:`monitor.replay.kernel.arrow_text`) instead
of the line reader's Python strings. The reference is the code as it was: validation of the
reader's own object columns (``check_rows`` on the raw frame), and the whole-file form
:func:`monitor.replay.driver.run_replay`, which never converts. The log is small and seeded and
mixes good rows with every kind of bad field (blank, padded, NaN words, infinities, out-of-range
numbers and times, unparsable times), so the rejects path is exercised field by field.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from monitor.ingest.chunks import read_whole
from monitor.ingest.logio import column_names
from monitor.replay.driver import replay, run_replay
from monitor.replay.kernel import arrow_text
from monitor.rows.prepare import check_rows, order_of
from monitor.settings import Config, default_config, estimator_from_config, validation_from_config
from tests.test_extreme_values import HOSTILE

NOW = pd.Timestamp("2025-01-01T00:00:00Z").value

#: blanks, padding and words the hostile corpus does not hold
ODD = [
    ("", "2024-03-01T05:00:00Z", "2", "5"),
    ("   ", "2024-03-01T05:00:00Z", "2", "5"),
    ("a", "", "2", "5"),
    ("a", "  ", "2", "5"),
    ("a", "2024-03-01T06:30:00Z", "", "5"),
    ("a", "2024-03-01T06:40:00Z", "2", " "),
    ("a", "2024-03-01T06:50:00Z", " NaN ", "5"),
    ("a", "2024-03-01T06:55:00Z", "-nan", "5"),
    ("a", "2024-03-01T07:05:00Z", "two", "5"),
    ("a", " 2024-03-01T07:10:00Z ", " 1.3 ", " 160 "),
    ("a", "1709277000", "1.3", "160"),
]


def _log(path, n_series=6, length=120):
    """Seeded log-log rows of ``n_series`` series (one with a price step), the hostile corpus
    and :data:`ODD` rows spread between them."""
    rng = np.random.default_rng(15)
    ts = pd.date_range("2024-03-01", periods=length, freq="h", tz="UTC")
    lines = []
    for s in range(n_series):
        p = np.exp(rng.normal(0.3, 0.2, length))
        b = np.where(np.arange(length) < length // 2, -1.5, -0.6 if s == 0 else -1.5)
        q = np.exp(5.0 + b * np.log(p) + rng.normal(0, 0.1, length))
        lines += [f"s{s},{t.strftime('%Y-%m-%dT%H:%M:%SZ')},{a:.4f},{c:.3f}"
                  for t, a, c in zip(ts, p, q)]
    bad = [",".join(h[:4]) for h in HOSTILE] + [",".join(r) for r in ODD]
    for k, row in enumerate(bad):
        lines.insert(7 + 11 * k, row)
    path.write_text("series,ts,price,quantity\n" + "\n".join(lines) + "\n")
    return path


def test_arrow_text_gives_the_same_good_rows_and_rejects(tmp_path):
    cfg = default_config()
    est, vs = estimator_from_config(cfg), validation_from_config(cfg)
    chunk = read_whole(_log(tmp_path / "log.csv"), column_names(cfg))
    # the line reader gives Arrow text itself now (issue 15); its object columns of before
    # (None for an empty field) are rebuilt here, so the comparison below still holds
    assert not (chunk.frame.dtypes == object).any()
    frame = chunk.frame.astype(object).where(chunk.frame.notna(), None)
    assert (frame.dtypes == object).all()        # Python text, as the line reader gave it
    fast = arrow_text(frame)
    assert not (fast.dtypes == object).any()
    kw = dict(settings=vs, now_ns=NOW, rows=chunk.rows, line_rejects=chunk.rejects,
              order=order_of(vs, "time"))
    old, new = check_rows(frame, est, **kw), check_rows(fast, est, **kw)
    assert len(old.rejects) >= len(HOSTILE) + len(ODD) - 3     # nearly every bad row rejected
    pd.testing.assert_frame_equal(new.good, old.good)
    pd.testing.assert_frame_equal(new.rejects, old.rejects)
    pd.testing.assert_frame_equal(new.zero_skipped, old.zero_skipped)


def test_a_column_with_other_values_than_text_is_left_as_it_is():
    frame = pd.DataFrame({"series": ["a", None, "b"], "price": ["1.5", float("nan"), "2"]},
                         dtype=object)
    fast = arrow_text(frame)
    assert fast["series"].dtype != object and fast["series"].isna().tolist() == [False, True, False]
    assert fast["price"].dtype == object and fast["price"].iloc[1] != fast["price"].iloc[1]


@pytest.mark.parametrize("chunk_rows", [None, 250])
def test_replay_outputs_equal_the_whole_file_path_on_a_hostile_log(tmp_path, chunk_rows):
    log = _log(tmp_path / "log.csv")
    cfg = Config().with_overrides("validation", order="time")
    ref = run_replay(log, tmp_path / "ref", cfg, now_ns=NOW)
    s = replay(log, tmp_path / "new", cfg, progress=False, now_ns=NOW, chunk_rows=chunk_rows)
    if chunk_rows is None:
        assert s["timing"]["chunks"] == 1
        names = ("estimates.csv", "rejects.csv")
    else:       # chunks write estimates chunk by chunk; rejects stay in row order
        assert s["timing"]["chunks"] > 1
        names = ("rejects.csv",)
        a = pd.read_csv(tmp_path / "ref" / "estimates.csv", dtype=str, keep_default_na=False)
        b = pd.read_csv(tmp_path / "new" / "estimates.csv", dtype=str, keep_default_na=False)
        key = ["series", "ts"]
        pd.testing.assert_frame_equal(a.sort_values(key).reset_index(drop=True),
                                      b.sort_values(key).reset_index(drop=True))
    for f in names:
        assert (tmp_path / "ref" / f).read_bytes() == (tmp_path / "new" / f).read_bytes(), f
    assert ref["rejected"] >= len(HOSTILE)
    cols = ["series", "ts", "rule", "beta", "beta_lo", "beta_hi", "message"]
    a = pd.read_csv(tmp_path / "ref" / "alerts.csv")[cols]
    b = pd.read_csv(tmp_path / "new" / "alerts.csv")[cols]
    assert len(a) > 0
    key = ["series", "ts", "rule"]
    pd.testing.assert_frame_equal(a.sort_values(key).reset_index(drop=True),
                                  b.sort_values(key).reset_index(drop=True))
    written = json.loads((tmp_path / "new" / "summary.json").read_text())
    for k in ("rows", "accepted", "rejected", "zero_skipped", "series", "alerts",
              "alerts_by_rule", "final"):
        assert written[k] == ref[k], k


def _dirty_log(path, n_series=12, length=300):
    """Seeded rows of ``n_series`` series (two with an elasticity change) with duplicates,
    unit and quantity errors, rows out of time order, timestamps in several ISO spellings,
    and the hostile corpus and :data:`ODD` rows between them."""
    rng = np.random.default_rng(1515)
    ts = pd.date_range("2024-03-01", periods=length, freq="h", tz="UTC")
    spell = ["%Y-%m-%dT%H:%M:%SZ", "%Y-%m-%d %H:%M:%S", "%Y-%m-%dT%H:%M:%S+00:00",
             "%Y-%m-%dT%H:%M:%S.000Z"]
    p = np.exp(rng.normal(0.3, 0.2, (length, n_series)))
    b = np.where(np.arange(length)[:, None] < length // 2, -1.5,
                 np.where(np.arange(n_series) < 2, -0.6, -1.5))
    q = np.exp(5.0 + b * np.log(p) + rng.normal(0, 0.1, p.shape))
    p[rng.random(p.shape) < 0.01] *= 100                         # unit errors
    q[rng.random(p.shape) < 0.01] *= 1e5                         # quantity errors
    lines = []
    for i, t in enumerate(ts):                                   # time order, series interleaved
        for s in range(n_series):
            k = 0 if rng.random() < 0.9 else int(rng.integers(1, len(spell)))
            lines.append(f"s{s},{t.strftime(spell[k])},{p[i, s]:.4f},{q[i, s]:.3f}")
            if rng.random() < 0.02:
                lines.append(lines[-1])                          # duplicates
    for i in rng.choice(len(lines) - 50, 150, replace=False):    # rows out of time order
        lines[i], lines[i + 49] = lines[i + 49], lines[i]
    bad = [",".join(h[:4]) for h in HOSTILE] + [",".join(r) for r in ODD]
    for k, row in enumerate(bad):
        lines.insert(5 + 37 * k, row)
    path.write_text("series,ts,price,quantity\n" + "\n".join(lines) + "\n")
    return path


def _median_walk(sid, ts, lp, last_ts, ring, ring_ts, count, lateness_ns, log_ratio, reject_all,
                 code, batch_median, lq, qring, qcount, log_qratio):
    """validate.ordered_checks in plain Python with np.median of the windows (the walk's
    arithmetic before its sorted windows), for the reference replay below."""
    from tests.test_validate_fast import _walk_oracle

    _walk_oracle(sid, ts, lp, last_ts, ring, ring_ts, count, lateness_ns, log_ratio, code,
                 batch_median, lq, qring, qcount, log_qratio)
    if reject_all:
        raise NotImplementedError


#: unit and quantity ratios near the noise of the log: many codes turn on the medians' values
TIGHT = dict(unit_ratio=1.25, quantity_ratio=1.3)


@pytest.mark.parametrize("kw", [dict(), dict(estimates_format="parquet", sample_every=24),
                                dict(chunk_rows=700), dict(chunk_rows=700, sample_every=24,
                                                           estimates_format="parquet"),
                                dict(chunk_rows=700, config=TIGHT)])
def test_replay_files_equal_with_the_fast_paths_switched_off(tmp_path, monkeypatch, kw):
    """Every file of a replay of a dirty log (rejects of every kind, duplicates, twelve series,
    sampling, chunks) is the same with validation's compiled fast paths (plain ISO times,
    plain text, sorted windows) as with the general paths they replace."""
    kw = dict(kw)
    if "config" in kw:
        kw["config"] = Config().with_overrides("validation", **kw["config"])
    import pyarrow.parquet as pq

    import monitor.rows.validate as V
    from tests.test_validate_fast import _no_plain_iso

    log = _dirty_log(tmp_path / "log.csv")
    new = replay(log, tmp_path / "new", progress=False, now_ns=NOW, **kw)
    with monkeypatch.context() as m:
        m.setattr(V, "parse_plain_iso", _no_plain_iso)
        m.setattr(V, "plain_text", lambda arr: False)
        m.setattr(V, "ordered_checks", _median_walk)
        old = replay(log, tmp_path / "old", progress=False, now_ns=NOW, **kw)
    text = {f.name for f in (tmp_path / "new").iterdir()}
    assert text == {f.name for f in (tmp_path / "old").iterdir()}
    for f in sorted(text):
        a, b = tmp_path / "new" / f, tmp_path / "old" / f
        if f == "summary.json":
            ja, jb = json.loads(a.read_text()), json.loads(b.read_text())
            ja.pop("timing"), jb.pop("timing")
            assert ja == jb
        elif f.endswith(".parquet"):
            assert pq.read_table(a).equals(pq.read_table(b))
        else:
            assert a.read_bytes() == b.read_bytes(), f
    rej = pd.read_csv(tmp_path / "new" / "rejects.csv", keep_default_na=False)["reason"]
    for what in ("duplicate row", "unit error", "quantity error", "empty field",
                 "unparsable timestamp"):
        assert rej.str.contains(what).any(), what
    if "config" in kw:
        assert rej.str.contains("unit error").sum() > 300
        assert rej.str.contains("quantity error").sum() > 100
    if kw.get("chunk_rows"):
        assert rej.str.contains("late row").any()
    assert new["series"] >= 12 and new["alerts"] > 0 and new["accepted"] > 1500
    if kw.get("sample_every"):
        assert new["estimates_written"] < new["accepted"] // 5
    assert new == {**old, "timing": new["timing"]}
