"""Replay at scale: chunked reading equals the whole-file path, sampled estimates, progress,
rejects across chunk boundaries, the HTML report and the CLI (--truth, --report).

The reference for every equality is monitor.replay.driver.run_replay, the whole-file path that the
live engine's tests compare with (tests/test_engine.py).
"""

from __future__ import annotations

import io
import json
import re

import numpy as np
import pandas as pd
import pytest

import simulators
from monitor.cli import main
from monitor.ingest.chunks import iter_chunks
from monitor.ingest.logio import read_log
from monitor.progress import Progress
from monitor.replay.driver import replay, run_replay
from monitor.settings import Config


CFG = Config().with_overrides("estimator", controls=["promo", "weekend"])
NOW = pd.Timestamp("2030-01-01", tz="UTC").value


@pytest.fixture(scope="module")
def retail(tmp_path_factory):
    """The retail scenario (12 series x 365 days: step, drift, level shift, flat prices,
    stock-out, prices in cents) with its truth files."""
    d = tmp_path_factory.mktemp("retail")
    sim = simulators.simulate("retail", seed=4, n_series=12, length=365)
    simulators.write_outputs(sim, d / "log.csv", d / "truth.csv")
    return d


def _sorted(path):
    return pd.read_csv(path).sort_values(["series", "ts"], kind="stable").reset_index(drop=True)


def test_whole_file_equals_run_replay(retail, tmp_path):
    run_replay(retail / "log.csv", tmp_path / "ref", CFG, now_ns=NOW)
    s = replay(retail / "log.csv", tmp_path / "new", CFG, progress=False, now_ns=NOW)
    for f in ("estimates.csv", "rejects.csv"):
        assert (tmp_path / "ref" / f).read_bytes() == (tmp_path / "new" / f).read_bytes(), f
    ref, new = pd.read_csv(tmp_path / "ref" / "alerts.csv"), pd.read_csv(tmp_path / "new" / "alerts.csv")
    cols = ["series", "ts", "rule", "beta", "beta_lo", "beta_hi", "message"]
    key = ["series", "ts", "rule"]
    assert len(ref) > 0
    pd.testing.assert_frame_equal(ref[cols].sort_values(key).reset_index(drop=True),
                                  new[cols].sort_values(key).reset_index(drop=True))
    ref_s = json.loads((tmp_path / "ref" / "summary.json").read_text())
    for k in ("rows", "accepted", "rejected", "series", "alerts", "alerts_by_rule", "final"):
        assert s[k] == ref_s[k], k


def test_chunked_equals_whole_on_a_time_ordered_log(retail, tmp_path):
    kw = dict(config=CFG, truth=retail / "truth.csv", progress=False, now_ns=NOW)
    whole = replay(retail / "log.csv", tmp_path / "whole", **kw)
    chunked = replay(retail / "log.csv", tmp_path / "chunks", chunk_rows=700, **kw)
    assert chunked["timing"]["chunks"] > 5 and whole["timing"]["chunks"] == 1
    pd.testing.assert_frame_equal(_sorted(tmp_path / "whole" / "estimates.csv"),
                                  _sorted(tmp_path / "chunks" / "estimates.csv"))
    for f in ("alerts.csv", "rejects.csv", "detection.csv"):
        assert (tmp_path / "whole" / f).read_bytes() == (tmp_path / "chunks" / f).read_bytes(), f
    for k in ("rows", "accepted", "rejected", "final", "alerts_by_rule", "detection"):
        assert whole[k] == chunked[k], k
    assert whole["rejected"] > 0          # prices in cents and the stock-out are in this log


def test_unsorted_log_in_chunks_rejects_late_rows_with_reason(tmp_path, rng):
    sim = simulators.simulate("retail", seed=5, n_series=3, length=120, anomalies=False)
    log = sim.log.sample(frac=1.0, random_state=3)          # arrival order is not time order
    log.to_csv(tmp_path / "log.csv", index=False)
    s = replay(tmp_path / "log.csv", tmp_path / "o", CFG, chunk_rows=60, progress=False, now_ns=NOW)
    rej = pd.read_csv(tmp_path / "o" / "rejects.csv")
    assert s["accepted"] + s["rejected"] == len(log) and s["rejected"] > 0
    assert rej["reason"].str.contains("late row").all()
    # the row numbers name the rows of the shuffled file (1-based data rows)
    first = rej.iloc[0]
    src = log.iloc[int(first["row"]) - 1]
    assert src["series"] == first["series"]


def _event_rows(log) -> set[tuple[str, str]]:
    """(series, ts text) of every row on which the pipeline recorded an alert event."""
    from monitor.ingest.chunks import log_chunks
    from monitor.ingest.logio import column_names
    from monitor.replay.driver import make_setup
    from monitor.replay.kernel import CarriedState, run_chunk
    from monitor.rows.isotime import format_ts

    setup, carried, rows = make_setup(CFG, 1, NOW), CarriedState(), set()
    for ch in log_chunks(log, column_names(CFG), None)[1]:
        res = run_chunk(ch.frame, setup, carried, row_offset=ch.row_offset, rows=ch.rows,
                        line_rejects=ch.rejects)
        if len(res.events):
            good = res.validated.good.iloc[res.events["row"].to_numpy(dtype=np.int64)]
            ts = format_ts(pd.to_datetime(good["ts"], utc=True).astype("int64").to_numpy())
            rows |= set(zip(good["series"].astype(str), map(str, ts)))
    return rows


def test_sampled_estimates_keep_every_nth_status_changes_and_alerts(retail, tmp_path):
    full = replay(retail / "log.csv", tmp_path / "full", CFG, progress=False, now_ns=NOW)
    sampled = replay(retail / "log.csv", tmp_path / "s", CFG, sample_every=10, chunk_rows=900,
                     progress=False, now_ns=NOW)
    f = _sorted(tmp_path / "full" / "estimates.csv")
    pos = f.groupby("series").cumcount()
    changed = f["status"] != f.groupby("series")["status"].shift()
    # rows with an alert event: openings (alerts.csv) and clears (only in the pipeline's
    # events), as the sampling rule says (monitor.replay.kernel: "an alert event happened on it")
    event_rows = _event_rows(retail / "log.csv")
    alerts = pd.read_csv(tmp_path / "full" / "alerts.csv")
    assert set(zip(alerts["series"], alerts["ts"])) <= event_rows
    alert_rows = np.array([(s, t) in event_rows for s, t in zip(f["series"], f["ts"])])
    expected = f[(pos % 10 == 0) | changed | alert_rows].reset_index(drop=True)
    pd.testing.assert_frame_equal(_sorted(tmp_path / "s" / "estimates.csv"), expected)
    assert sampled["estimates_written"] == len(expected) < len(f) / 3
    assert sampled["final"] == full["final"]


def test_progress_writes_plain_lines_when_not_on_a_terminal(retail, tmp_path):
    buf = io.StringIO()
    bar = Progress(total=(retail / "log.csv").stat().st_size, stream=buf, every_s=0.0, tty=False)
    replay(retail / "log.csv", tmp_path / "o", CFG, chunk_rows=1000, progress=bar, now_ns=NOW)
    lines = buf.getvalue().splitlines()
    assert len(lines) >= 4 and lines[-1].endswith("(done)")
    assert re.match(r"replay: [\d,]+ rows \(\d+% of input\), [\d,]+ rows/s", lines[0])


def test_chunks_are_bounded_and_rows_numbered_across_them(tmp_path, rng):
    n = 20_000
    df = pd.DataFrame({"series": rng.choice(["a", "b", "c"], n),
                       "ts": pd.date_range("2025-01-01", periods=n, freq="h", tz="UTC")
                       .strftime("%Y-%m-%dT%H:%M:%SZ"),
                       "price": np.round(rng.uniform(2, 3, n), 2), "quantity": rng.poisson(20, n)})
    df = df.astype({"price": object})
    df.loc[13_457, "price"] = "n/a"                          # one text value deep in the file
    df.to_csv(tmp_path / "log.csv", index=False)
    chunks = list(iter_chunks(tmp_path / "log.csv", chunk_rows=2_000))
    sizes = [len(c.frame) for c in chunks]
    assert len(chunks) >= 8 and max(sizes) <= 1.3 * 2_000        # memory: a chunk at a time
    assert [c.row_offset for c in chunks] == list(np.cumsum([0] + sizes[:-1]))
    whole = read_log(tmp_path / "log.csv")
    got = pd.concat([c.frame for c in chunks], ignore_index=True)
    assert got["series"].tolist() == whole["series"].tolist()
    s = replay(tmp_path / "log.csv", tmp_path / "o", chunk_rows=2_000, progress=False, now_ns=NOW)
    rej = pd.read_csv(tmp_path / "o" / "rejects.csv")
    assert rej["row"].tolist() == [13_458] and "not a number" in rej["reason"].iat[0]
    assert s["accepted"] == n - 1


def test_report_is_one_self_contained_file(retail, tmp_path):
    s = replay(retail / "log.csv", tmp_path / "o", CFG, truth=retail / "truth.csv",
               report=tmp_path / "o" / "report.html", progress=False, now_ns=NOW)
    html = (tmp_path / "o" / "report.html").read_text()
    assert html.count("<svg") >= 1 + 3               # timeline + the series with known changes
    assert "<script" not in html and "src=" not in html and "<link" not in html
    assert not re.search(r"https?://(?!www\.w3\.org/2000/svg)", html)   # nothing to fetch
    truth = pd.read_csv(retail / "truth.csv")
    for name in truth.loc[truth["kind"] == "elasticity_change", "series"]:
        assert f"Elasticity of {name}" in html
    assert "false alarms per 10,000 observations" in html and s["report"].endswith("report.html")


def test_cli_replay_with_truth_and_report(retail, tmp_path, capsys):
    out = tmp_path / "cli"
    rc = main(["replay", str(retail / "log.csv"), "--out", str(out), "--control", "promo",
               "--control", "weekend", "--truth", str(retail / "truth.csv"),
               "--report", str(out / "report.html"), "--sample-every", "5", "--quiet"])
    assert rc == 0
    text = capsys.readouterr().out
    assert "known changes:" in text and "per 10,000 quiet observations" in text
    det = pd.read_csv(out / "detection.csv")
    assert set(det["kind"]) == set(pd.read_csv(retail / "truth.csv")["kind"])
    assert {"detected", "missed", "not_scored"} >= set(det["status"])
    assert (out / "report.html").exists()
    summary = json.loads((out / "summary.json").read_text())
    assert summary["detection"]["observations"] == summary["accepted"]


def test_report_without_truth_plots_the_first_series(retail, tmp_path):
    replay(retail / "log.csv", tmp_path / "o", CFG, report=tmp_path / "r.html", progress=False,
           now_ns=NOW)
    html = (tmp_path / "r.html").read_text()
    first = pd.read_csv(retail / "log.csv", nrows=200)["series"].drop_duplicates().head(4)
    assert all(f"Elasticity of {name}" in html for name in first)
