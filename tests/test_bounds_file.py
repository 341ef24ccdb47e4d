"""``[bounds] file`` (issue 16): per-series bounds from a table named in the configuration, the
same series out of bounds whether the rows go through replay (whole, chunked, the oracle
driver) or through the service; the service loads the file at start and again when it
changes, refuses to start on a bad file and keeps the bounds it had when a later version is
bad."""

from __future__ import annotations

import logging

import numpy as np
import pandas as pd
import pytest

from monitor import store as mstore
from monitor.errors import ConfigError
from monitor.ingest.bounds_file import check_bounds_table, per_series_limits
from monitor.live.service import Service, ingest_file
from monitor.replay.driver import replay, run_replay
from monitor.settings import load_config

B_TRUE = -1.5     # the elasticity of every simulated series (invented shops)


def _log(path) -> pd.DataFrame:
    """Three series, daily, q = exp(3) p^-1.5 with 5% noise (seeded); prices move 15%."""
    rng = np.random.default_rng(11)
    parts = []
    for name in ("north/tea", "east/oats", "west/rye"):
        price = 4.0 * np.exp(rng.normal(0.0, 0.15, 150))
        qty = np.exp(3.0 + B_TRUE * np.log(price) + rng.normal(0.0, 0.05, 150))
        parts.append(pd.DataFrame({"series": name, "ts": pd.date_range(
            "2024-01-01", periods=150, freq="D", tz="UTC").strftime("%Y-%m-%dT%H:%M:%SZ"),
            "price": price, "quantity": qty}))
    log = pd.concat(parts).sort_values(["ts", "series"], kind="stable")
    log.to_csv(path, index=False)
    return log


def _config(tmp_path, table: str, extra: str = ""):
    (tmp_path / "bounds.csv").write_text(table)
    cfg = tmp_path / "elmon.toml"
    cfg.write_text(f'[estimator]\nforgetting = 0.98\n\n[bounds]\nfile = "bounds.csv"\n{extra}'
                   f'\n[store]\npath = "s.sqlite"\n\n[sources.feed]\ntype = "csv"\n'
                   f'path = "log.csv"\n')
    return load_config(cfg)


# north/tea: b (about -1.5) above its own high of -3: out of bounds; east/oats: its own bounds
# contain b; west/rye: no line, so the [bounds] default applies (none here, low = -4 below)
TABLE = "series,low,high\nnorth/tea,-6,-3\neast/oats,-2.5,\n"


def _out_of_bounds(alerts: pd.DataFrame) -> set:
    return set(alerts.loc[alerts["rule"] == "out_of_bounds", "series"])


def test_the_table_rules_name_every_bad_row():
    t = pd.DataFrame({"series": ["a", "a", "", "b", "c"], "low": ["-1", "-2", "", "x", "-1"],
                      "high": ["", "", "", "", "-2"]})
    with pytest.raises(ValueError) as exc:
        check_bounds_table(t, "t.csv")
    msg = str(exc.value)
    assert "4 bad row(s), nothing changed" in msg
    assert "row 2 (line 3, series 'a'): field 'series' repeats row 1" in msg
    assert "row 3 (line 4): field 'series' is empty" in msg
    assert "row 4 (line 5, series 'b'): field 'low' value 'x' is not a finite number" in msg
    assert "row 5 (line 6, series 'c'): low = -1 must be below high = -2" in msg
    lo, hi = per_series_limits(["a", "z"], {"a": (-2.0, None)}, -np.inf, 0.5)
    assert lo.tolist() == [-2.0, -np.inf] and hi.tolist() == [0.5, 0.5]


def test_replay_applies_the_file_to_the_series_it_names(tmp_path):
    _log(tmp_path / "log.csv")
    cfg = _config(tmp_path, TABLE)
    replay(tmp_path / "log.csv", tmp_path / "whole", cfg, progress=False)
    replay(tmp_path / "log.csv", tmp_path / "chunked", cfg, chunk_rows=100, progress=False)
    run_replay(tmp_path / "log.csv", tmp_path / "oracle", cfg)
    for out in ("whole", "chunked", "oracle"):
        alerts = pd.read_csv(tmp_path / out / "alerts.csv")
        assert _out_of_bounds(alerts) == {"north/tea"}, out
    # with a [bounds] default high of -2 the series without a line is out of bounds too,
    # and east/oats' own high (none) does not lift the default for it: its own low is set,
    # its high side keeps the default
    cfg2 = _config(tmp_path, TABLE, "high = -2.0\n")
    replay(tmp_path / "log.csv", tmp_path / "default", cfg2, progress=False)
    alerts = pd.read_csv(tmp_path / "default" / "alerts.csv")
    assert _out_of_bounds(alerts) == {"north/tea", "east/oats", "west/rye"}


def test_ingest_and_replay_raise_the_same_out_of_bounds_alerts(tmp_path):
    _log(tmp_path / "log.csv")
    cfg = _config(tmp_path, TABLE)
    replay(tmp_path / "log.csv", tmp_path / "r", cfg, progress=False)
    ingest_file(tmp_path / "log.csv", tmp_path / "s.sqlite", cfg, batch_rows=64)
    stored = mstore.list_alerts(tmp_path / "s.sqlite", kind="out_of_bounds")
    assert set(stored["series"]) == _out_of_bounds(pd.read_csv(tmp_path / "r" / "alerts.csv"))
    own = mstore.list_series_bounds(tmp_path / "s.sqlite").set_index("series")
    assert own.loc["north/tea", ["low", "high"]].tolist() == [-6.0, -3.0]


def test_the_service_loads_the_file_at_start_and_when_it_changes(tmp_path, caplog):
    _log(tmp_path / "log.csv")
    cfg = _config(tmp_path, TABLE)
    db = tmp_path / "s.sqlite"
    with Service(cfg) as svc:
        own = mstore.list_series_bounds(svc.store).set_index("series")
        assert own.loc["north/tea", ["low", "high"]].tolist() == [-6.0, -3.0]
        assert svc.sync_bounds() is None                 # unchanged: not read again
        svc.run_once()
        assert set(mstore.list_alerts(db, kind="out_of_bounds")["series"]) == {"north/tea"}
        # a new version: west/rye gets a high below its b; loaded before the next poll
        (tmp_path / "bounds.csv").write_text(TABLE + "west/rye,,-2.0\n")
        assert svc.sync_bounds() == 3
        assert mstore.list_series_bounds(svc.store).set_index("series").loc[
            "west/rye", "high"] == -2.0
        # a bad version is logged with its row and the bounds in effect stay
        (tmp_path / "bounds.csv").write_text("series,low,high\nnorth/tea,abc,\n")
        with caplog.at_level(logging.ERROR, logger="elmon.service"):
            assert svc.sync_bounds() is None
        assert "row 1 (line 2, series 'north/tea'): field 'low' value 'abc'" in caplog.text
        assert mstore.list_series_bounds(svc.store).set_index("series").loc[
            "north/tea", "low"] == -6.0


def test_a_bad_file_refuses_the_start_and_frees_the_store(tmp_path):
    _log(tmp_path / "log.csv")
    cfg = _config(tmp_path, "series,low,high\nnorth/tea,-1,-2\n")
    with pytest.raises(ConfigError, match=r"row 1 \(line 2, series 'north/tea'\): low = -1 "
                                          r"must be below high = -2"):
        Service(cfg)
    (tmp_path / "bounds.csv").write_text(TABLE)
    with Service(cfg) as svc:                            # the writer lock was released
        assert len(mstore.list_series_bounds(svc.store)) == 2
    (tmp_path / "bounds.csv").unlink()
    with pytest.raises(ConfigError, match="does not exist"):
        Service(cfg)
