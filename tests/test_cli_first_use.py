"""Issue 16: `elmon ingest --quiet`, and a command's bad option shown with its own usage."""

from __future__ import annotations

import pytest

import simulators
from monitor.cli import main


def test_ingest_quiet_prints_nothing_and_stores_the_rows(tmp_path, capsys):
    sim = simulators.simulate("retail", seed=3, n_series=2, length=60)
    simulators.write_outputs(sim, tmp_path / "log.csv", tmp_path / "truth.csv")
    rc = main(["ingest", str(tmp_path / "log.csv"), "--db", str(tmp_path / "s.sqlite"),
               "--quiet"])
    assert rc == 0
    assert capsys.readouterr().out == ""
    from monitor.store import open_store, store_summary
    store = open_store(tmp_path / "s.sqlite", readonly=True)
    try:
        assert store_summary(store)["observations"] + store_summary(store)["rejects"] > 0
    finally:
        store.close()


def test_unknown_option_shows_the_commands_usage(tmp_path, capsys):
    with pytest.raises(SystemExit) as exc:
        main(["ingest", "x.csv", "--db", str(tmp_path / "s.sqlite"), "--bogus"])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert err.startswith("usage: elmon ingest") and "unrecognized arguments: --bogus" in err
