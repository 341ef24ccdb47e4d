"""``elmon experiment status|report`` on a real SQLite store, the dashboard page, replay's
experiments.json and the simulator scenario."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from monitor import store as mstore
from monitor.cli import main
from monitor.experiments import evaluate, plan_from_config
from simulators import SCENARIOS
from simulators.experiment import experiment, experiment_offladder

ROOT = Path(__file__).resolve().parents[1]
CONFIG = """[estimator]
controls = ["weekend"]

[experiments.spring]
series = ["*"]
start = "2024-02-29"
ladder = [0.85, 0.92, 1.0, 1.08, 1.15]
target_halfwidth = {target}
"""


def _store(path: Path, sim) -> str:
    with mstore.Store.open(path, create=True) as store:
        mstore.write_batch(store, observations=sim.log)
    return str(path)


@pytest.fixture(scope="module")
def clean(tmp_path_factory):
    d = tmp_path_factory.mktemp("exp")
    sim = experiment(seed=3)
    cfg = d / "elmon.toml"
    cfg.write_text(CONFIG.format(target=0.1))
    return {"db": _store(d / "clean.sqlite", sim), "config": str(cfg), "sim": sim, "dir": d}


def _json(capsys, *argv) -> dict:
    assert main(list(argv)) == 0
    return json.loads(capsys.readouterr().out)


def test_status_json_has_the_contract_fields_and_equals_the_library(clean, capsys):
    doc = _json(capsys, "experiment", "status", "spring", "--db", clean["db"], "--config",
                clean["config"], "--json")
    assert list(doc) == ["name", "b", "b_lo", "b_hi", "cs_lo", "cs_hi", "n_obs", "halfwidth",
                         "target_halfwidth", "eta_obs", "eta_ts", "verdict", "reasons"]
    plan = plan_from_config("spring", {"series": ["*"], "start": "2024-02-29",
                                       "ladder": [0.85, 0.92, 1.0, 1.08, 1.15],
                                       "target_halfwidth": 0.1})
    direct = evaluate(clean["sim"].log, plan, controls=["weekend"]).summary
    # the store round trip keeps every float (stored as REAL, read back as float64)
    for key in ("b", "b_lo", "b_hi", "cs_lo", "cs_hi", "halfwidth", "eta_obs"):
        assert doc[key] == pytest.approx(direct[key], rel=1e-12, abs=1e-12), key
    assert doc["verdict"] == "collecting" and doc["n_obs"] == 900
    assert doc["eta_ts"] > "2024-07-27"


def test_status_text_lists_every_experiment(clean, capsys):
    assert main(["experiment", "status", "--db", clean["db"], "--config", clean["config"]]) == 0
    out = capsys.readouterr().out
    assert out.startswith("spring: collecting")
    assert "confidence sequence [" in out and "target 0.1" in out


def test_status_of_an_adhoc_experiment_from_the_command_line(clean, capsys):
    doc = _json(capsys, "experiment", "status", "trial", "--db", clean["db"], "--series",
                "harbor-st/*", "--start", "2024-02-29", "--control", "weekend", "--json")
    assert doc["name"] == "trial" and doc["n_obs"] == 2 * 150


def test_report_is_one_html_file_with_charts_and_cautions(clean, capsys):
    out = clean["dir"] / "spring.html"
    assert main(["experiment", "report", "spring", "--db", clean["db"], "--config",
                 clean["config"], "--out", str(out)]) == 0
    text = out.read_text()
    assert text.count("<svg") >= 2 and "<script" not in text
    assert "Verdict: collecting" in text
    assert "Randomize" in text and "price discrimination" in text and "Pre-register" in text


def test_offladder_store_is_compromised(tmp_path, capsys):
    db = _store(tmp_path / "off.sqlite", experiment_offladder(seed=3))
    cfg = tmp_path / "elmon.toml"
    cfg.write_text(CONFIG.format(target=0.2))
    doc = _json(capsys, "experiment", "status", "spring", "--db", db, "--config", str(cfg),
                "--json")
    assert doc["verdict"] == "compromised"
    assert "off the planned ladder" in doc["reasons"][0]


def test_errors_name_what_is_wrong(clean, capsys):
    assert main(["experiment", "status", "autumn", "--db", clean["db"], "--config",
                 clean["config"]]) == 2
    assert "experiment 'autumn': not configured (known: spring)" in capsys.readouterr().err
    assert main(["experiment", "status", "--db", clean["db"]]) == 2
    assert "no experiment" in capsys.readouterr().err


def test_simulate_lists_both_experiment_scenarios():
    assert "experiment" in SCENARIOS and "experiment_offladder" in SCENARIOS


@pytest.mark.slow
def test_replay_writes_experiments_json(clean, tmp_path):
    log = tmp_path / "ladder.csv"
    clean["sim"].log.to_csv(log, index=False)
    out = tmp_path / "replay-out"
    assert main(["replay", str(log), "--out", str(out), "--config", clean["config"]]) == 0
    doc = json.loads((out / "experiments.json").read_text())
    assert [d["name"] for d in doc] == ["spring"]
    assert doc[0]["n_obs"] == 900 and doc[0]["verdict"] == "collecting"
    direct = evaluate(clean["sim"].log, plan_from_config("spring", {
        "series": ["*"], "start": "2024-02-29", "ladder": [0.85, 0.92, 1.0, 1.08, 1.15],
        "target_halfwidth": 0.1}), controls=["weekend"]).summary
    assert doc[0]["b"] == pytest.approx(direct["b"], rel=1e-10)


def test_replay_without_experiments_writes_no_experiments_json(tmp_path):
    sim = experiment(seed=1, n_series=2, length=30)
    log = tmp_path / "ladder.csv"
    sim.log.to_csv(log, index=False)
    assert main(["replay", str(log), "--out", str(tmp_path / "o")]) == 0
    assert not (tmp_path / "o" / "experiments.json").exists()


def test_dashboard_page_shows_verdict_bands_and_health(clean, monkeypatch):
    from streamlit.testing.v1 import AppTest

    monkeypatch.setenv("ELMON_DB", clean["db"])
    monkeypatch.setenv("ELMON_CONFIG", clean["config"])
    at = AppTest.from_file(str(ROOT / "dashboard" / "views" / "experiments.py"),
                           default_timeout=60).run()
    assert not at.exception, [e.value for e in at.exception]
    assert not at.error, [e.value for e in at.error]
    assert "collecting" in at.subheader[0].value
    metrics = {m.label: m.value for m in at.metric}
    assert metrics["Observations"] == "900"
    assert metrics["Half-width / target"].endswith("/ 0.1")
    assert len(at.get("vega_lite_chart")) == 2
    assert "Randomize" in at.warning[0].value


def test_experiments_page_is_in_the_dashboard_navigation(clean, monkeypatch):
    from streamlit.testing.v1 import AppTest

    monkeypatch.setenv("ELMON_DB", clean["db"])
    monkeypatch.setenv("ELMON_CONFIG", clean["config"])
    at = AppTest.from_file(str(ROOT / "dashboard" / "app.py"), default_timeout=60).run()
    at.switch_page("views/experiments.py").run()
    assert not at.exception, [e.value for e in at.exception]
    assert at.title[0].value == "Price experiments"
    # the dashboard's own caution line sits above the page's experiment cautions
    assert any("not decisions" in i.value for i in at.info)
