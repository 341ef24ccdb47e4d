"""The one row path (issue 11): replay and ingest of the same file give the same rejects (row
number, field, value text, reason) and the same estimates, under each ordering option.

The corpus has what made the two disagree before: a blank line (the replay's CSV reader
skipped it, so every later row number was one lower than ``elmon ingest``'s), a negative price
written ``-3.0`` (the replay read it typed and reported ``-3.0`` or ``-3`` depending on the
reader), a line with a missing field, a word in a number column, and rows that arrive out of
time order (the replay sorted them, ingest rejected them as late). Reference for the row
numbers: the file itself (1-based data rows, the header not counted, blank lines counted), as
DEVELOPERS.md states.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor import store as mstore
from monitor.live.service import ingest_file
from monitor.replay.driver import replay
from monitor.settings import validate

NOW = pd.Timestamp("2025-01-01T00:00:00Z").value


def _corpus(path):
    """Two series of 60 hourly rows from log q = 5 - 1.5 log p + noise, then the damage."""
    rng = np.random.default_rng(11)
    lines = []
    for s, name in enumerate(("shop1/tea", "shop2/tea")):
        p = np.exp(rng.normal(0.3 + 0.1 * s, 0.15, 60))
        q = np.exp(5.0 - 1.5 * np.log(p) + rng.normal(0, 0.1, 60))
        for i in range(60):
            ts = (pd.Timestamp("2024-03-01T00:00:00Z") + pd.Timedelta(hours=i))
            lines.append(f"{name},{ts.strftime('%Y-%m-%dT%H:%M:%SZ')},{p[i]:.4f},{q[i]:.2f}")
    # interleave the two series by time, as a feed would
    lines = [x for pair in zip(lines[:60], lines[60:]) for x in pair]
    lines.insert(5, "")                                        # blank line: data row 6
    lines[8] = lines[8].rsplit(",", 2)[0] + ",-3.0," + lines[8].rsplit(",", 1)[1]
    lines.insert(20, "shop1/tea,2024-03-01T11:00:00Z,1.5")     # a field missing
    lines[31] = lines[31].rsplit(",", 2)[0] + ",abc," + lines[31].rsplit(",", 1)[1]
    # out of time order: a row of shop2 moved 9 lines later (arrives after newer rows)
    moved = lines.pop(40)
    lines.insert(49, moved)
    path.write_text("series,ts,price,quantity\n" + "\n".join(lines) + "\n")
    return path


def _replay(log, out, order, chunk_rows=None):
    cfg = validate({"validation": {"order": order}})
    replay(log, out, cfg, chunk_rows=chunk_rows, progress=False, now_ns=NOW)
    rej = pd.read_csv(out / "rejects.csv", dtype={"value": str}, keep_default_na=False)
    est = pd.read_csv(out / "estimates.csv")
    return rej, est


def _ingest(log, db, order, batch_rows):
    cfg = validate({"validation": {"order": order}})
    ingest_file(log, db, cfg, batch_rows=batch_rows, deliver=False)
    rej = mstore.list_rejects(db)
    est = pd.concat([mstore.series_history(db, s) for s in ("shop1/tea", "shop2/tea")])
    return rej, est


def _reject_rows(rej: pd.DataFrame) -> list[tuple]:
    out = rej[["row", "field", "value", "reason"]].astype({"row": "int64", "value": str})
    return sorted(map(tuple, out.itertuples(index=False)))


@pytest.mark.parametrize("order, batch_rows, chunk_rows", [
    ("time", 10_000, None),       # whole file in one batch: sorting in time is batch-bound
    ("arrival", 7, 7),            # arrival order: any batch cut gives the same result
])
def test_replay_and_ingest_agree_on_rejects_and_estimates(tmp_path, order, batch_rows,
                                                          chunk_rows):
    log = _corpus(tmp_path / "log.csv")
    rej_r, est_r = _replay(log, tmp_path / "whole", order)
    rej_i, est_i = _ingest(log, tmp_path / "store.sqlite", order, batch_rows)
    assert _reject_rows(rej_r) == _reject_rows(rej_i)

    rows = {r[0]: r for r in _reject_rows(rej_r)}
    # the blank line is data row 6 of the file, so the damaged line 8 of the list is row 9
    assert rows[9][1:3] == ("price", "-3.0")
    assert rows[21][1] == "line"                    # the line with a field missing
    assert rows[32][1:3] == ("price", "abc")
    late = [r for r in rows.values() if "late" in r[3] or "older" in r[3]]
    assert (len(late) == 1) == (order == "arrival"), late

    # the same estimates, value for value
    est_r = est_r.sort_values(["series", "ts"]).reset_index(drop=True)
    est_i = est_i.assign(ts=pd.to_datetime(est_i["ts"], utc=True).dt.strftime("%Y-%m-%dT%H:%M:%SZ"))
    est_i = est_i.sort_values(["series", "ts"]).reset_index(drop=True)
    assert len(est_r) == len(est_i) > 100
    assert list(est_r["ts"]) == list(est_i["ts"].astype(str))
    np.testing.assert_allclose(est_r["beta"].to_numpy(float), est_i["beta"].to_numpy(float),
                               rtol=0, atol=1e-12, equal_nan=True)

    if chunk_rows is not None:               # chunked replay: the same rejects and estimates
        rej_c, est_c = _replay(log, tmp_path / "chunks", order, chunk_rows)
        assert _reject_rows(rej_c) == _reject_rows(rej_r)
        est_c = est_c.sort_values(["series", "ts"]).reset_index(drop=True)
        np.testing.assert_allclose(est_c["beta"].to_numpy(float), est_r["beta"].to_numpy(float),
                                   rtol=0, atol=1e-12, equal_nan=True)


def test_time_order_sorts_the_late_row_into_place_and_arrival_rejects_it(tmp_path):
    log = _corpus(tmp_path / "log.csv")
    rej_t, est_t = _replay(log, tmp_path / "t", "time")
    rej_a, est_a = _replay(log, tmp_path / "a", "arrival")
    assert len(est_t) == len(est_a) + 1
    assert len(rej_a) == len(rej_t) + 1
