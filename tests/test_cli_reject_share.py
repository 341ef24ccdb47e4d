"""``--max-reject-share``: replay and ingest of a mostly rejected log exit non-zero with one
line that names the first bad row (issue 16, item 3: day-first dates gave "0 processed, 800
rejected" and exit status 0)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor.cli import main


def _log(path, n=60, day_first=False, bad_prices=0):
    rng = np.random.default_rng(8)
    ts = pd.date_range("2024-01-01", periods=n, freq="D", tz="UTC")
    p = 5 * np.exp(rng.normal(0, 0.1, n))
    q = np.exp(3 - 1.2 * np.log(p) + rng.normal(0, 0.1, n))
    df = pd.DataFrame({"series": "mill-lane/oat-bar",        # invented demo series
                       "ts": ts.strftime("%d/%m/%Y" if day_first else "%Y-%m-%dT%H:%M:%SZ"),
                       "price": p.round(3).astype(str), "quantity": q.round(3)})
    df.loc[: bad_prices - 1, "price"] = "n/a"
    df.to_csv(path, index=False)
    return path


def test_day_first_dates_fail_replay_with_the_first_bad_value(tmp_path, capsys):
    log = _log(tmp_path / "dayfirst.csv", day_first=True)
    rc = main(["replay", str(log), "--out", str(tmp_path / "out")])
    err = [e for e in capsys.readouterr().err.strip().splitlines()
           if not e.startswith("replay: ")]             # the progress line
    assert rc == 2 and len(err) == 1, err                # one line says what went wrong
    line = err[0]
    assert line.startswith("elmon replay: error: 60 of 60 rows rejected (100%)")
    assert "--max-reject-share 0.5" in line
    assert "first: row 1, field 'ts' = '01/01/2024'" in line
    assert "ISO 8601" in line and str(tmp_path / "out" / "rejects.csv") in line
    # the outputs are written all the same, every rejected row with its reason
    rejects = pd.read_csv(tmp_path / "out" / "rejects.csv")
    assert len(rejects) == 60 and (rejects["field"] == "ts").all()


def test_threshold_is_configurable_and_a_clean_log_passes(tmp_path, capsys):
    log = _log(tmp_path / "some-bad.csv", bad_prices=20)        # 20 of 60 rejected: 33%
    assert main(["replay", str(log), "--out", str(tmp_path / "a")]) == 0
    capsys.readouterr()
    rc = main(["replay", str(log), "--out", str(tmp_path / "b"), "--max-reject-share", "0.2"])
    err = capsys.readouterr().err
    assert rc == 2 and "20 of 60 rows rejected (33%)" in err
    assert "first: row 1, field 'price' = 'n/a'" in err
    day_first = _log(tmp_path / "dayfirst.csv", day_first=True)
    assert main(["replay", str(day_first), "--out", str(tmp_path / "c"),
                 "--max-reject-share", "1"]) == 0                 # 1 turns the check off
    with pytest.raises(SystemExit):
        main(["replay", str(log), "--out", str(tmp_path / "d"), "--max-reject-share", "1.5"])


def test_ingest_of_a_mostly_rejected_file_exits_non_zero(tmp_path, capsys):
    log = _log(tmp_path / "dayfirst.csv", day_first=True)
    db = tmp_path / "store.sqlite"
    rc = main(["ingest", str(log), "--db", str(db), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2 and "elmon ingest: error: 60 of 60 rows rejected" in err
    assert "field 'ts' = '01/01/2024'" in err and "Day-first" in err
    from monitor import store as mstore
    with mstore.open_store(db, readonly=True) as store:
        assert len(mstore.list_rejects(store)) == 60           # kept with their reasons
    good = _log(tmp_path / "good.csv")
    assert main(["ingest", str(good), "--db", str(tmp_path / "g.sqlite"), "--quiet"]) == 0
