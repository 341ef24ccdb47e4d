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
