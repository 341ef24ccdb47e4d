"""Instruments through the replay and the CLI: ``--instrument`` and ``[estimator] instruments``
give estimates with ``first_stage_f``, summary.json gets the price-feedback block, and a row
whose instrument is missing is a reject naming the field. Data: the observational scenario."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from monitor.cli import main
from simulators import observational


@pytest.fixture(scope="module")
def rows():
    return (observational(seed=4, n_series=6),)


def test_replay_cli_with_an_instrument_writes_first_stage_f_and_the_diagnostic(tmp_path, rows):
    sim = rows[0]
    log = tmp_path / "obs.csv"
    sim.log.to_csv(log, index=False)
    out = tmp_path / "out"
    rc = main(["replay", str(log), "--out", str(out), "--control", "weekend",
               "--instrument", "unit_cost", "--quiet"])
    assert rc == 0
    est = pd.read_csv(out / "estimates.csv")
    assert "first_stage_f" in est.columns
    assert set(est["status"]) <= {"warming_up", "ok", "weak_instrument", "low_variation",
                                  "out_of_bounds", "changed"}
    assert (est.loc[est["status"] == "ok", "first_stage_f"] >= 10).all()
    summary = json.loads((out / "summary.json").read_text())
    assert summary["settings"]["estimator"]["instruments"] == ["unit_cost"]
    assert summary["price_feedback"]["series_flagged"] == sim.log["series"].nunique()
    cfg = tmp_path / "iv.toml"
    cfg.write_text('[estimator]\ninstruments = ["unit_cost"]\ncontrols = ["weekend"]\n')
    out2 = tmp_path / "out2"
    assert main(["replay", str(log), "--out", str(out2), "--config", str(cfg), "--quiet"]) == 0
    pd.testing.assert_frame_equal(pd.read_csv(out2 / "estimates.csv"), est)
    # a row without the instrument is a reject naming the field, never dropped silently
    bad = sim.log.copy()
    bad.loc[5, "unit_cost"] = np.nan
    bad.to_csv(log, index=False)
    assert main(["replay", str(log), "--out", str(tmp_path / "o3"), "--control", "weekend",
                 "--instrument", "unit_cost", "--quiet"]) == 0
    rej = pd.read_csv(tmp_path / "o3" / "rejects.csv")
    assert len(rej) == 1 and rej["field"].iloc[0] == "unit_cost"
