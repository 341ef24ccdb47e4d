"""``elmon init``, ``elmon status`` and ``elmon alerts ...`` through monitor.cli.main."""

from __future__ import annotations

import pandas as pd
import pytest

from monitor import store as ms
from monitor.cli import main


@pytest.fixture
def db(tmp_path):
    path = tmp_path / "cli.sqlite"
    assert main(["init", "--db", str(path)]) == 0
    with ms.open_store(path) as s:
        obs = pd.DataFrame({"series": ["depot01/item00042"] * 3,
                            "ts": pd.date_range("2024-06-01", periods=3, freq="h", tz="UTC"),
                            "price": [9.0, 9.5, 10.0], "quantity": [40.0, 37.0, 35.0]})
        ms.write_batch(s, observations=obs,
                       offsets={"feed.csv": {"kind": "csv", "position": {"offset": 123},
                                             "rows_read": 3}})
        ms.open_alert(s, "depot01/item00042", "out_of_bounds", "2024-06-01T02:00:00Z", -0.2,
                      -0.4, 0.0, "elasticity above the upper bound -0.3", severity="critical")
        ms.open_alert(s, "depot02/item00007", "stale", "2024-06-01T02:00:00Z", None, None,
                      None, "no data for 3 h")
    return str(path)


def test_init_creates_then_reports_up_to_date(tmp_path, capsys):
    path = tmp_path / "new.sqlite"
    assert main(["init", "--db", str(path)]) == 0
    assert "created store" in capsys.readouterr().out and path.exists()
    assert main(["init", "--db", str(path)]) == 0
    assert f"up to date (schema version {ms.SCHEMA_VERSION})" in capsys.readouterr().out


def test_status_shows_sources_counts_alerts_and_outbox(db, capsys):
    capsys.readouterr()
    assert main(["status", "--db", db]) == 0
    out = capsys.readouterr().out
    assert "series: 1   observations: 3   estimates: 0   rejects: 0" in out
    assert "alerts: 2 open, 0 acknowledged, 0 resolved" in out
    assert "feed.csv" in out and '{"offset":123}' in out
    assert "outbox: 0 pending" in out
    lines = [x for x in out.splitlines() if "out_of_bounds" in x]
    assert lines and "critical" in lines[0]


def test_alert_commands_walk_the_lifecycle(db, capsys):
    capsys.readouterr()
    assert main(["alerts", "list", "--state", "open", "--db", db]) == 0
    out = capsys.readouterr().out
    assert "out_of_bounds" in out and "stale" in out
    assert main(["alerts", "ack", "1", "--note", "checking the promo calendar", "--who", "ana",
                 "--db", db]) == 0
    assert "alert 1 (depot01/item00042, out_of_bounds) acknowledged" in capsys.readouterr().out
    assert main(["alerts", "note", "1", "--note", "supplier price list changed",
                 "--db", db]) == 0
    assert main(["alerts", "resolve", "1", "--note", "test cell closed", "--db", db]) == 0
    capsys.readouterr()
    assert main(["alerts", "show", "1", "--db", db]) == 0
    out = capsys.readouterr().out
    assert "state:            resolved" in out
    events = [x.split()[1] for x in out.split("events:")[1].splitlines()[2:]]
    assert events == ["opened", "acknowledged", "note", "resolved"]
    assert "ana" in out and "test cell closed" in out
    assert main(["alerts", "list", "--state", "resolved", "--db", db]) == 0
    out = capsys.readouterr().out
    assert "out_of_bounds" in out and "stale" not in out
    assert main(["alerts", "silence", "--series", "depot02/item00007", "--kind", "*",
                 "--for", "12h", "--note", "planned test", "--db", db]) == 0
    assert "silence 1 for series 'depot02/item00007'" in capsys.readouterr().out
    assert len(ms.list_silences(db)) == 1


def test_user_errors_exit_2_with_a_clear_message(db, tmp_path, capsys):
    capsys.readouterr()
    assert main(["alerts", "ack", "99", "--note", "x", "--db", db]) == 2
    assert "no alert with id 99" in capsys.readouterr().err
    main(["alerts", "resolve", "2", "--db", db])
    assert main(["alerts", "resolve", "2", "--db", db]) == 2
    assert "alert 2 is already resolved" in capsys.readouterr().err
    missing = str(tmp_path / "absent.sqlite")
    for argv in (["status"], ["alerts", "list"], ["alerts", "show", "1"],
                 ["alerts", "ack", "1", "--note", "x"]):
        assert main(argv + ["--db", missing]) == 2
        err = capsys.readouterr().err
        assert "absent.sqlite" in err and "does not exist" in err and "elmon init" in err
    assert not (tmp_path / "absent.sqlite").exists()
    assert main(["alerts", "silence", "--series", "x", "--kind", "*", "--until",
                 "2001-01-01T00:00:00Z", "--db", db]) == 2
    assert "not in the future" in capsys.readouterr().err


@pytest.mark.parametrize("argv", [["init"], ["status"], ["alerts"], ["alerts", "list"],
                                  ["alerts", "show"], ["alerts", "ack"], ["alerts", "resolve"],
                                  ["alerts", "note"], ["alerts", "silence"]])
def test_every_store_command_has_help_with_an_example(argv, capsys):
    with pytest.raises(SystemExit) as info:
        main(argv + ["--help"])
    assert info.value.code == 0
    text = capsys.readouterr().out
    assert "example" in text and "elmon " + " ".join(argv) in text


def test_status_says_which_series_cannot_be_watched(tmp_path, capsys):
    # issue 12 item 5: `elmon status` names the series whose prices do not move enough to
    # show a change of 0.5 in b within the watch horizon (delay50_obs beyond it)
    from monitor.detectability import WATCH_HORIZON_OBS
    from monitor.store.detection import write_delay50
    from tests import dashboard_fixtures as fx

    path = tmp_path / "watch.sqlite"
    facts = fx.seed_store(path, n_series=4, n_obs=60)
    quick, slow = facts["series"][0], facts["series"][1]
    with ms.open_store(path) as s:
        write_delay50(s, {quick: 40.0, slow: 3.0 * WATCH_HORIZON_OBS})
    capsys.readouterr()
    assert main(["status", "--db", str(path)]) == 0
    out = capsys.readouterr().out
    assert (f"detectability: 1 series show a change of 0.5 in b within "
            f"{WATCH_HORIZON_OBS:,} observations") in out
    assert "1 do not (their prices do not move enough to watch b); 2 not yet known" in out
    assert f"  {slow}: about 3,000 observations" in out and f"  {quick}:" not in out
