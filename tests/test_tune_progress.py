"""``elmon tune`` says what it is doing while it works (issue 16, item 5: a 38-79 s run printed
only "0.2 s elapsed (done)" at its end), and its two median delays are named."""

from __future__ import annotations

import sys

import simulators
from monitor.cli import main


class _Recorder:
    """A stderr stand-in that notes, for each line, whether the run's output existed yet."""

    def __init__(self, marker):
        self.marker = marker
        self.lines: list[tuple[str, bool]] = []
        self._buf = ""

    def write(self, text):
        self._buf += text
        while "\n" in self._buf:
            line, self._buf = self._buf.split("\n", 1)
            self.lines.append((line, self.marker.exists()))
        return len(text)

    def flush(self):
        pass

    def isatty(self):
        return False


def test_tune_prints_its_phases_while_it_runs(tmp_path, monkeypatch, capsys):
    sim = simulators.simulate("retail", seed=21, n_series=6, length=120)
    simulators.write_outputs(sim, tmp_path / "log.csv", tmp_path / "truth.csv")
    (tmp_path / "space.toml").write_text("[detectors]\narl0 = [500, 2000]\n")
    out = tmp_path / "t"
    rec = _Recorder(out / "tuning.csv")
    monkeypatch.setattr(sys, "stderr", rec)
    rc = main(["tune", str(tmp_path / "log.csv"), "--truth", str(tmp_path / "truth.csv"),
               "--space", str(tmp_path / "space.toml"), "--max-false-alarms", "50",
               "--control", "promo", "--out", str(out), "--workers", "1"])
    monkeypatch.undo()
    assert rc == 0
    lines = [t for t, _ in rec.lines]
    phases = [i for i, t in enumerate(lines) if t.startswith("tune: ")]
    text = "\n".join(lines)
    for words in ("3 settings (2 from the search space plus the defaults)",
                  "chart thresholds designed for 3 of 3 settings",
                  "reading and validating", "observations of 6 series; replaying every setting"):
        assert words in text, text
    # every phase line was written before the results existed, i.e. during the run
    assert phases and all(not existed for _, existed in rec.lines[:phases[-1] + 1]), rec.lines
    # and in order: thresholds, then reading, then replaying
    first = lambda s: next(i for i, t in enumerate(lines) if s in t)  # noqa: E731
    assert first("designing") < first("designed for 3 of 3") < first("reading") \
        < first("replaying every setting")
    printed = capsys.readouterr().out
    # the two medians are told apart (issue 16: "two different median delays for one setting")
    assert "obs over the detected changes" in printed
    if "recommended:" in printed and "misses at least half" not in printed:
        assert "counting a missed change as never detected" in printed


def test_quiet_tune_prints_no_phase(tmp_path, capsys):
    sim = simulators.simulate("retail", seed=22, n_series=4, length=80)
    simulators.write_outputs(sim, tmp_path / "log.csv", tmp_path / "truth.csv")
    (tmp_path / "space.toml").write_text("[detectors]\narl0 = [2000]\n")
    assert main(["tune", str(tmp_path / "log.csv"), "--truth", str(tmp_path / "truth.csv"),
                 "--space", str(tmp_path / "space.toml"), "--out", str(tmp_path / "q"),
                 "--workers", "1", "--quiet"]) == 0
    assert "tune: " not in capsys.readouterr().err
