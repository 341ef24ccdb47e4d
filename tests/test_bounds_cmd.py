"""``elmon bounds set`` / ``elmon bounds list`` (issue 16 item 9): a series' own elasticity
bounds from the command line, refused with a clear message when wrong, and applied by a running
service from its next batch."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor import store as mstore
from monitor.cli import main
from monitor.live.monitor import Monitor
from monitor.settings import validate


def _store(path, names=("shop1/tea", "shop2/oats")):
    with mstore.Store.open(path) as st:
        mstore.write_batch(st, observations=[{"series": s, "ts": "2024-01-01T00:00:00Z",
                                              "price": 2.0, "quantity": 10.0} for s in names])
    return path


def _own(path) -> dict:
    df = mstore.list_series_bounds(path)
    return {r.series: (None if pd.isna(r.low) else r.low, None if pd.isna(r.high) else r.high)
            for r in df.itertuples()}


def _updated_at(db) -> dict:
    with mstore.Store.open(db, create=False) as st:
        return {r["series"]: r["updated_at"] for r in
                st.rows("SELECT series, updated_at FROM series")}


def test_set_changes_only_the_sides_given_and_list_shows_them(tmp_path, capsys):
    db = str(_store(tmp_path / "s.sqlite"))
    written = _updated_at(db)
    assert main(["bounds", "set", "shop1/tea", "--low", "-4", "--high", "-0.5", "--db", db]) == 0
    assert _own(db) == {"shop1/tea": (-4.0, -0.5)}
    assert main(["bounds", "set", "shop1/tea", "--high", "-0.8", "--db", db]) == 0   # low kept
    assert _own(db) == {"shop1/tea": (-4.0, -0.8)}
    assert main(["bounds", "set", "shop1/tea", "--low", "none", "--db", db]) == 0    # one side off
    assert _own(db) == {"shop1/tea": (None, -0.8)}
    assert main(["bounds", "set", "shop2/oats", "--low", "-3.5", "--db", db]) == 0
    capsys.readouterr()
    assert main(["bounds", "list", "--db", db]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].startswith("[bounds] default:") and "--config" in lines[0]
    rows = {ln.split()[0]: ln.split()[1:3] for ln in lines[2:]}
    assert rows == {"shop1/tea": ["none", "-0.8"], "shop2/oats": ["-3.5", "none"]}
    assert main(["bounds", "set", "shop1/tea", "--clear", "--db", db]) == 0
    assert _own(db) == {"shop2/oats": (-3.5, None)}
    # the wall time of each series' last rows (the stale check's clock) is not moved
    assert _updated_at(db) == written


def test_list_shows_the_config_default(tmp_path, capsys):
    db = str(_store(tmp_path / "s.sqlite"))
    cfg = tmp_path / "elmon.toml"
    cfg.write_text("[bounds]\nlow = -6.0\nhigh = 0.0\n")
    assert main(["bounds", "list", "--db", db, "--config", str(cfg)]) == 0
    out = capsys.readouterr().out
    assert "low = -6, high = 0, mode = interval" in out
    assert "no series has bounds of its own" in out


@pytest.mark.parametrize("argv, words", [
    (["shop1/tea", "--low", "-1", "--high", "-2"], ["low = -1 must be below high = -2"]),
    (["shop1/tea", "--low", "-1", "--high", "-1"], ["low = -1 must be below high = -1"]),
    (["shop1/tea", "--low", "abc"], ["--low 'abc'", "not a number"]),
    (["shop1/tea", "--high", "inf"], ["--high 'inf'", "finite"]),
    (["shop1/tea", "--low", "nan"], ["--low 'nan'", "finite"]),
    (["shop1/tae", "--low", "-3"], ["no series 'shop1/tae'", "close names: 'shop1/tea'",
                                    "--create"]),
    (["shop1/tea"], ["give --low, --high or both"]),
    (["shop1/tea", "--clear", "--low", "-3"], ["--clear removes both sides"]),
])
def test_bad_input_is_refused_with_the_rule_and_the_store_unchanged(tmp_path, capsys, argv,
                                                                    words):
    db = str(_store(tmp_path / "s.sqlite"))
    assert main(["bounds", "set", "shop1/tea", "--high", "-0.5", "--db", db]) == 0
    capsys.readouterr()
    assert main(["bounds", "set", *argv, "--db", db]) == 2
    err = capsys.readouterr().err
    assert err.startswith("elmon bounds: error:")
    for w in words:
        assert w in err, err
    assert _own(db) == {"shop1/tea": (None, -0.5)}
    names = set(mstore.latest_estimates(db)["series"])
    assert names == {"shop1/tea", "shop2/oats"}        # nothing created by a refusal


def test_a_new_low_is_checked_against_the_stored_high(tmp_path, capsys):
    db = str(_store(tmp_path / "s.sqlite"))
    assert main(["bounds", "set", "shop1/tea", "--high", "-2", "--db", db]) == 0
    assert main(["bounds", "set", "shop1/tea", "--low", "-1", "--db", db]) == 2
    assert "low = -1 must be below high = -2" in capsys.readouterr().err
    assert _own(db) == {"shop1/tea": (None, -2.0)}


def test_create_adds_an_unknown_series_ahead_of_its_first_row(tmp_path, capsys):
    db = str(_store(tmp_path / "s.sqlite"))
    assert main(["bounds", "set", "shop9/new", "--low", "-3", "--create", "--db", db]) == 0
    assert "added with bounds" in capsys.readouterr().out
    lat = mstore.latest_estimates(db).set_index("series")
    assert lat.loc["shop9/new", "n_obs"] == 0 and lat.loc["shop9/new", "status"] == "warming_up"
    assert _own(db) == {"shop9/new": (-3.0, None)}


def _feed(start: int, n: int) -> pd.DataFrame:
    """Daily rows with b = -1.5 (log-log, q = exp(3) p^-1.5 with 5% noise), seeded."""
    rng = np.random.default_rng(7)
    k = start + n
    price = 4.0 * np.exp(rng.normal(0.0, 0.15, k))
    qty = np.exp(3.0 - 1.5 * np.log(price) + rng.normal(0.0, 0.05, k))
    ts = pd.date_range("2024-01-01", periods=k, freq="D", tz="UTC")
    return pd.DataFrame({"series": "shop1/tea", "ts": ts, "price": price,
                         "quantity": qty}).iloc[start:].reset_index(drop=True)


def test_a_running_service_applies_new_bounds_at_its_next_batch(tmp_path, capsys):
    """The service holds the writer lock while it runs; ``bounds set`` still succeeds and the
    service's next batch applies the bounds: it records them as in effect and, with the
    estimate (about -1.5) above the new high bound of -3, opens an out-of-bounds alert."""
    db = tmp_path / "s.sqlite"
    with Monitor(db, validate({"estimator": {"forgetting": 0.98}})) as mon:
        mon.observe_many(_feed(0, 120))
        lat = mstore.latest_estimates(db).set_index("series")
        assert lat.loc["shop1/tea", "status"] == "ok"
        assert pd.isna(lat.loc["shop1/tea", "bound_high"])      # no bound in effect yet
        assert len(mstore.list_alerts(db, kind="out_of_bounds")) == 0
        assert main(["bounds", "set", "shop1/tea", "--low", "-6", "--high", "-3",
                     "--db", str(db)]) == 0
        assert "next batch" in capsys.readouterr().out
        mon.observe_many(_feed(120, 20))
        lat = mstore.latest_estimates(db).set_index("series")
        assert lat.loc["shop1/tea", ["bound_low", "bound_high"]].tolist() == [-6.0, -3.0]
        alerts = mstore.list_alerts(db, kind="out_of_bounds")
        assert len(alerts) == 1 and alerts["series"].iloc[0] == "shop1/tea"
        # cleared: the [bounds] default (none) applies again from the batch after
        assert main(["bounds", "set", "shop1/tea", "--clear", "--db", str(db)]) == 0
        mon.observe_many(_feed(140, 5))
        lat = mstore.latest_estimates(db).set_index("series")
        assert lat.loc["shop1/tea", ["bound_low", "bound_high"]].isna().all()


def test_every_bounds_command_has_help_with_an_example(capsys):
    for argv in (["bounds", "--help"], ["bounds", "set", "--help"], ["bounds", "load", "--help"],
                 ["bounds", "list", "--help"]):
        with pytest.raises(SystemExit) as exc:
            main(argv)
        assert exc.value.code == 0
        assert "elmon bounds " in capsys.readouterr().out.split("example")[-1]


def test_load_sets_many_series_or_none_of_them(tmp_path, capsys):
    db = str(_store(tmp_path / "s.sqlite"))
    good = tmp_path / "bounds.csv"
    good.write_text("series,low,high\nshop1/tea,-4,-0.5\nshop2/oats,,-1\n")
    assert main(["bounds", "load", str(good), "--db", db]) == 0
    assert _own(db) == {"shop1/tea": (-4.0, -0.5), "shop2/oats": (None, -1.0)}
    bad = tmp_path / "bad.csv"
    # one good row among bad ones: nothing changes, every bad row is named with its rule
    bad.write_text("series,low,high\nshop1/tea,-9,-8\nshop2/oats,abc,\n,1,2\n"
                   "shop1/tea,-3,-2\nshop1/tae,-3,\nshop2/oats,-1,-1\n")
    assert main(["bounds", "load", str(bad), "--db", db]) == 2
    err = capsys.readouterr().err
    for words in ("5 bad row(s), nothing changed",
                  "row 2 (line 3, series 'shop2/oats'): field 'low' value 'abc' is not a finite",
                  "row 3 (line 4): field 'series' is empty",
                  "row 4 (line 5, series 'shop1/tea'): field 'series' repeats row 1",
                  "row 5 (line 6, series 'shop1/tae'): no such series",
                  "row 6 (line 7, series 'shop2/oats'): field 'series' repeats row 2"):
        assert words in err, err
    assert "row 1 " not in err                                   # the good row is not blamed
    assert _own(db) == {"shop1/tea": (-4.0, -0.5), "shop2/oats": (None, -1.0)}
    order = tmp_path / "order.csv"
    order.write_text("series,low,high\nshop1/tea,-1,-2\n")
    assert main(["bounds", "load", str(order), "--db", db]) == 2
    assert "row 1 (line 2, series 'shop1/tea'): low = -1 must be below high = -2" in \
        capsys.readouterr().err
    header = tmp_path / "header.csv"
    header.write_text("name,low\nshop1/tea,-3\n")
    assert main(["bounds", "load", str(header), "--db", db]) == 2
    assert "missing column(s) series, high" in capsys.readouterr().err


def test_bounds_set_through_the_services_own_connection_apply_at_its_next_batch(tmp_path):
    """The library call on the Monitor's own Store (an embedding program): no other
    connection commits, so a cache of bounds must learn of the change from the store."""
    store = mstore.Store.open(tmp_path / "s.sqlite")
    with Monitor(store, validate({"estimator": {"forgetting": 0.98}})) as mon:
        mon.observe_many(_feed(0, 120))
        mstore.set_series_bounds(store, "shop1/tea", low=-6, high=-3)
        mon.observe_many(_feed(120, 20))
        lat = mstore.latest_estimates(store).set_index("series")
        assert lat.loc["shop1/tea", ["bound_low", "bound_high"]].tolist() == [-6.0, -3.0]
        assert len(mstore.list_alerts(store, kind="out_of_bounds")) == 1
    store.close()
