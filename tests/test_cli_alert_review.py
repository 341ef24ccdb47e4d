"""``elmon alerts list --format csv|json``, ``elmon alerts mark`` and ``elmon alerts truth``
(issue 16, item 9), and the same marks from the dashboard's Alerts page."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import pandas as pd
import pytest

from monitor import store as mstore
from monitor.cli import main
from monitor.replay.detection import read_truth
from tests import dashboard_fixtures as fx

APP = Path(__file__).resolve().parents[1] / "dashboard" / "app.py"


@pytest.fixture()
def seeded(tmp_path):
    # alerts: [out_of_bounds, elasticity_change, level_shift, sign_flip, low_variation, stale]
    facts = fx.seed_store(tmp_path / "store.sqlite", n_series=8, n_obs=120)
    return facts


def test_list_formats_csv_and_json_agree_with_the_store(seeded, capsys):
    db = seeded["path"]
    assert main(["alerts", "list", "--db", db, "--format", "csv"]) == 0
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    assert main(["alerts", "list", "--db", db, "--format", "json"]) == 0
    items = json.loads(capsys.readouterr().out)       # strict JSON: no NaN anywhere
    want = mstore.list_alerts(db)
    assert len(rows) == len(items) == len(want) == 6
    assert [int(r["id"]) for r in rows] == [i["id"] for i in items] == want["id"].tolist()
    first = want.iloc[0]
    assert items[0]["series"] == first["series"] and items[0]["kind"] == first["kind"]
    assert items[0]["beta"] == pytest.approx(float(first["beta"]), rel=1e-12)
    assert all(i["verdict"] is None for i in items)
    # the filters of the text listing apply as well
    assert main(["alerts", "list", "--db", db, "--format", "json", "--state", "resolved"]) == 0
    assert [i["state"] for i in json.loads(capsys.readouterr().out)] == ["resolved"]
    assert main(["alerts", "list", "--db", db]) == 0                  # text stays the default
    assert "series" in capsys.readouterr().out.splitlines()[0]


def test_marks_become_a_truth_file_that_replay_reads(seeded, tmp_path, capsys):
    db = seeded["path"]
    change, level, oob = seeded["alert_ids"][1], seeded["alert_ids"][2], seeded["alert_ids"][0]
    assert main(["alerts", "mark", str(change), "--confirmed", "--note", "price test",
                 "--who", "analyst", "--db", db]) == 0
    assert main(["alerts", "mark", str(level), "--false-alarm", "--who", "analyst",
                 "--db", db]) == 0
    assert main(["alerts", "mark", str(oob), "--confirmed", "--db", db]) == 0
    assert "marked as a false alarm by analyst" in capsys.readouterr().out
    # the mark is in the alert's history too
    ev = mstore.alert_events(db, level)
    assert ev["note"].iloc[-1] == "marked as false alarm" and ev["who"].iloc[-1] == "analyst"
    # a second mark replaces the first
    assert main(["alerts", "mark", str(level), "--false-alarm", "--note", "holiday",
                 "--db", db]) == 0
    out = tmp_path / "truth.csv"
    assert main(["alerts", "truth", "--db", db, "--out", str(out)]) == 0
    err = capsys.readouterr().err
    assert "1 confirmed change(s) written" in err and "1 marked false alarm" in err
    assert "1 confirmed alert(s) of other kinds left out" in err      # the out_of_bounds one
    truth = pd.read_csv(out)
    a = mstore.get_alert(db, change)
    assert truth.to_dict("records") == [{"series": a["series"], "ts": mstore.format_ts(
        a["change_ts"] if a.get("change_ts") is not None and not pd.isna(a["change_ts"])
        else a["opened_ts"]), "kind": "elasticity_change"}]
    back = read_truth(out)                                  # the replay's own truth reader
    assert len(back) == 1 and back["series"].iloc[0] == a["series"]
    assert main(["alerts", "list", "--db", db, "--format", "json"]) == 0
    marks = {i["id"]: i["verdict"] for i in json.loads(capsys.readouterr().out)}
    assert marks[change] == "confirmed" and marks[level] == "false_alarm"
    assert main(["alerts", "mark", "999", "--confirmed", "--db", db]) == 2


def test_dashboard_marks_and_offers_the_truth_file(seeded, monkeypatch):
    from streamlit.testing.v1 import AppTest

    monkeypatch.setenv("ELMON_DB", seeded["path"])
    monkeypatch.delenv("ELMON_TRUTH", raising=False)
    monkeypatch.setenv("ELMON_DASHBOARD_ACTIONS", "1")
    at = AppTest.from_file(str(APP), default_timeout=60).run()
    at.switch_page("views/alerts.py").run()
    target = seeded["alert_ids"][1]
    at.selectbox(key="al_pick").set_value(target).run()
    at.text_input(key="al_who").input("analyst")
    at.button(key="al_false").click().run()
    assert not at.exception, [e.value for e in at.exception]
    assert f"Alert {target}: marked as a false alarm." in [s.value for s in at.success]
    from monitor.store.verdicts import list_verdicts
    v = list_verdicts(seeded["path"])
    assert v[["alert_id", "verdict", "who"]].values.tolist() == [[target, "false_alarm",
                                                                  "analyst"]]
    table = at.dataframe[0].value
    assert table.set_index("id").loc[target, "verdict"] == "false alarm"
    at.button(key="al_confirm").click().run()
    assert list_verdicts(seeded["path"])["verdict"].tolist() == ["confirmed"]
    assert any("truth.csv: the 1 alert(s) marked as confirmed" in c.value for c in at.caption)
