"""``elmon replay`` with detectors: alerts.csv for a log with a regime change, statuses in
estimates.csv, detector options on the command line and in the config (invented data)."""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest

from monitor.cli import main
from tests.pipeline_helpers import simulate


NAMES = np.array(["quarry-rd/rye-crackers", "elm-cross/rye-crackers", "westgate/cold-brew"])


@pytest.fixture(scope="module")
def regime_log(tmp_path_factory):
    """Three hourly series; in the first two the elasticity steps from -1.2 to -2.0 at hour
    2000 (a competitor opens nearby), the third stays at -1.2."""
    sid, X, y, ts = simulate(3, 3000, beta=-1.2, change_at=2000, seed=11)
    third = sid == 2
    _, X3, y3, _ = simulate(1, 3000, beta=-1.2, seed=12)
    X[third], y[third] = X3, y3
    frame = pd.DataFrame({"series": NAMES[sid],
                          "ts": pd.to_datetime(ts, utc=True).strftime("%Y-%m-%dT%H:%M:%SZ"),
                          "price": np.round(np.exp(X[:, 1]), 4),
                          "quantity": np.round(np.exp(y), 3)})
    path = tmp_path_factory.mktemp("log") / "regime.csv"
    frame.to_csv(path, index=False)
    return path, pd.Timestamp(ts[3 * 2000], tz="UTC")


def _replay(args, capsys):
    rc = main(["replay", *[str(a) for a in args], "--quiet"])
    out = capsys.readouterr()
    return rc, out.out, out.err


#: the previous charts (CUSUM on the slope statistic), which these tests are about; the default
#: change detector is the split GLR since issue 12
CHARTS = "[detectors]\nchange_detector = \"charts\"\n"


def test_replay_writes_alerts_for_the_regime_change(regime_log, tmp_path, capsys):
    log, change_ts = regime_log
    cfg = tmp_path / "charts.toml"
    cfg.write_text(CHARTS)
    rc, out, _ = _replay([log, "--out", tmp_path, "--config", cfg], capsys)
    assert rc == 0
    alerts = pd.read_csv(tmp_path / "alerts.csv")
    assert list(alerts.columns[:7]) == ["series", "ts", "rule", "beta", "beta_lo", "beta_hi",
                                        "message"]
    ch = alerts[alerts["rule"] == "elasticity_change"]
    after = ch[pd.to_datetime(ch["ts"]) >= change_ts]
    assert set(after["series"]) >= set(NAMES[:2])
    first = after.sort_values("ts").groupby("series").first()
    for name in NAMES[:2]:
        delay_h = (pd.Timestamp(first.loc[name, "ts"]) - change_ts) / pd.Timedelta(hours=1)
        assert 0 <= delay_h < 500, (name, delay_h)
        msg = first.loc[name, "message"]
        assert msg.startswith(f"{name}: the elasticity changed from b = -1.")
        b = first.loc[name, "beta"]
        assert f"{100 * (1.1 ** b - 1):+.1f}%" in msg          # exactly 1.1^b - 1
    est = pd.read_csv(tmp_path / "estimates.csv")
    assert "changed" in set(est.loc[est["series"] == NAMES[0], "status"])
    summary = json.loads((tmp_path / "summary.json").read_text())
    th = summary["settings"]["thresholds"]
    assert th["level"]["method"] == "precomputed" and th["level"]["arl0"] == 20000.0
    assert th["slope"]["chart"] == "cusum" and th["slope"]["k"] == 1.0


def test_bounds_option_marks_out_of_bounds_rows(regime_log, tmp_path, capsys):
    log, change_ts = regime_log
    # the allowed range excludes the elasticity before the change (-1.2)
    rc, _, _ = _replay([log, "--out", tmp_path, "--bounds", "-3", "-1.6", "--persistence", "4"],
                       capsys)
    assert rc == 0
    est = pd.read_csv(tmp_path / "estimates.csv")
    before = est[(est["series"] == NAMES[0]) & (pd.to_datetime(est["ts"]) < change_ts)]
    assert (before["status"] == "out_of_bounds").mean() > 0.8
    after = est[(est["series"] == NAMES[0]) &
                (pd.to_datetime(est["ts"]) > change_ts + pd.Timedelta(hours=600))]
    assert (after["status"] == "out_of_bounds").mean() < 0.1   # b = -2.0 is inside
    alerts = pd.read_csv(tmp_path / "alerts.csv")
    oob = alerts[alerts["rule"] == "out_of_bounds"]
    assert set(oob["series"]) == set(NAMES) and (oob["severity"] == "critical").all()
    s = json.loads((tmp_path / "summary.json").read_text())["settings"]
    assert s["bounds"]["low"] == -3.0 and s["bounds"]["persistence"] == 4


def test_detector_options_and_config_reach_the_pipeline(regime_log, tmp_path, capsys):
    log, _ = regime_log
    cfg = tmp_path / "elmon.toml"
    cfg.write_text(CHARTS + "level_chart = \"ewma\"\nslope_k = 1.0\narl0 = 50000\n"
                   "[rules]\ncooldown = 10\n")
    charts = tmp_path / "charts.toml"
    charts.write_text(CHARTS)
    rc, _, _ = _replay([log, "--out", tmp_path / "a", "--config", cfg, "--cusum-h", "7.0"],
                       capsys)
    assert rc == 0
    s = json.loads((tmp_path / "a" / "summary.json").read_text())["settings"]
    assert s["thresholds"]["level"]["chart"] == "ewma"
    assert s["thresholds"]["level"]["method"] == "precomputed"      # L designed, not given
    assert s["thresholds"]["level"]["arl0"] == 50000.0
    assert s["detectors"]["cusum_h"] == 7.0 and s["rules"]["cooldown"] == 10
    rc, _, _ = _replay([log, "--out", tmp_path / "b", "--slope-chart", "none", "--cusum-h",
                        "7.0", "--config", charts], capsys)
    assert rc == 0
    s = json.loads((tmp_path / "b" / "summary.json").read_text())["settings"]
    assert s["thresholds"]["slope"] is None
    assert s["thresholds"]["level"] == {"chart": "cusum", "k": 0.5, "threshold": 7.0, "arl0": None,
                                        "method": "given", "arl_se": None, "n_paths": 0}
    alerts = pd.read_csv(tmp_path / "b" / "alerts.csv")
    assert "elasticity_change" not in set(alerts["rule"])


@pytest.mark.parametrize("text, message", [
    ("[detectors]\narl0 = 3\n", "[detectors] arl0 = 3.0: must be in [20, 1e+06]"),
    ("[detectors]\ncusum_k = \"big\"\n", "[detectors] cusum_k = 'big': must be a number"),
    ("[detectors]\nthreshold = 5\n", "[detectors] threshold: unknown key"),
    ("[bounds]\nlow = -1\nhigh = -2\n", "[bounds] low = -1.0, high = -2.0: low must be below high"),
    ("[rules]\nsign_flip = 1\n", "[rules] sign_flip = 1: must be true or false"),
])
def test_bad_detector_config_exits_2_naming_the_key(regime_log, tmp_path, capsys, text, message):
    log, _ = regime_log
    cfg = tmp_path / "bad.toml"
    cfg.write_text(text)
    rc, _, err = _replay([log, "--out", tmp_path / "o", "--config", cfg], capsys)
    assert rc == 2
    assert message in err


def test_bad_bounds_on_the_command_line_exit_2(regime_log, tmp_path, capsys):
    log, _ = regime_log
    rc, _, err = _replay([log, "--out", tmp_path, "--bounds", "-0.5", "-3"], capsys)
    assert rc == 2 and "low must be below high" in err
    rc, _, err = _replay([log, "--out", tmp_path, "--arl0", "5"], capsys)
    assert rc == 2 and "[detectors] arl0" in err


def test_replay_first_form_passes_times_and_names(regime_log, tmp_path):
    from monitor.replay.driver import run_replay

    log, change_ts = regime_log
    summary = run_replay(log, tmp_path)
    alerts = pd.read_csv(tmp_path / "alerts.csv")
    assert summary["alerts"] == len(alerts) > 0
    assert all(m.split(":")[0] in set(NAMES) for m in alerts["message"])
    assert all(not math.isnan(b) for b in alerts["beta"])
