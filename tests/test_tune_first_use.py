"""Issue 16, tuning at first use: the files agree when nothing meets the budget, and
``elmon tune LOG --truth TRUTH`` without ``--space`` uses the default grid."""

from __future__ import annotations

import json

import pandas as pd

import simulators
from monitor.cli import main
from monitor.cli.tune_cmd import DEFAULT_SPACE


def _log(tmp_path, length=150):
    sim = simulators.simulate("retail", seed=21, n_series=12, length=length)
    simulators.write_outputs(sim, tmp_path / "log.csv", tmp_path / "truth.csv")
    (tmp_path / "base.toml").write_text("[estimator]\ncontrols = ['promo', 'weekend']\n"
                                        "[detectors]\narl0 = 20\n")


def test_no_setting_within_budget_means_no_recommendation_in_any_file(tmp_path, capsys):
    _log(tmp_path)
    # in-control ARL of 20-30 observations per chart: every setting raises false alarms. The
    # CUSUM/EWMA charts keep that promise at such a tiny ARL0; the split detector floors its
    # thresholds at the label margin and then raised none on this short log, so the premise
    # (nothing meets the budget) is made with the charts
    (tmp_path / "base.toml").write_text("[estimator]\ncontrols = ['promo', 'weekend']\n"
                                        "[detectors]\narl0 = 20\nchange_detector = 'charts'\n")
    (tmp_path / "space.toml").write_text("[detectors]\narl0 = [20, 30]\n")
    rc = main(["tune", str(tmp_path / "log.csv"), "--truth", str(tmp_path / "truth.csv"),
               "--space", str(tmp_path / "space.toml"), "--config", str(tmp_path / "base.toml"),
               "--max-false-alarms", "0", "--out", str(tmp_path / "t"), "--workers", "1",
               "--quiet"])
    assert rc == 0
    assert "no recommendation" in capsys.readouterr().out
    res = pd.read_csv(tmp_path / "t" / "tuning.csv")
    assert not res["within_budget"].any()            # the premise: nothing meets 0
    assert not res["recommended"].any()              # ... so nothing is marked recommended
    s = json.loads((tmp_path / "t" / "tuning.json").read_text())
    assert s["recommended"] is None
    assert not (tmp_path / "t" / "recommended.toml").exists()
    html = (tmp_path / "t" / "report.html").read_text()
    assert "none within the budget" in html and "nothing is recommended" in html
    assert "recommended.toml beside this report" not in html


def test_tune_without_space_uses_the_default_grid(tmp_path, capsys):
    _log(tmp_path, length=120)
    rc = main(["tune", str(tmp_path / "log.csv"), "--truth", str(tmp_path / "truth.csv"),
               "--config", str(tmp_path / "base.toml"), "--out", str(tmp_path / "t"),
               "--workers", "1"])
    assert rc == 0
    out = capsys.readouterr().out
    assert "default grid" in out
    n = 1
    for keys in DEFAULT_SPACE.values():
        for values in keys.values():
            n *= len(values)
    s = json.loads((tmp_path / "t" / "tuning.json").read_text())
    assert s["settings"] == n + 1                     # the grid plus the defaults
    res = pd.read_csv(tmp_path / "t" / "tuning.csv")
    assert sorted(res["estimator.forgetting"].dropna().unique()) == \
        DEFAULT_SPACE["estimator"]["forgetting"]
