"""The Dask engine on a LocalCluster of 2 workers gives the local engine's results.

Reference: the local engine (monitor.replay.driver.replay, monitor.tuning.tune), itself
checked against run_replay in tests/test_replay_scale.py.
"""

from __future__ import annotations

import json

import pandas as pd
import pytest

import simulators
from monitor.replay.driver import replay
from monitor.settings import load_config
from monitor.tuning.tune import tune


pytestmark = pytest.mark.slow
NOW = pd.Timestamp("2030-01-01", tz="UTC").value


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    d = tmp_path_factory.mktemp("dask")
    sim = simulators.simulate("retail", seed=8, n_series=12, length=365)
    simulators.write_outputs(sim, d / "log.csv", d / "truth.csv")
    (d / "base.toml").write_text("[estimator]\ncontrols = ['promo', 'weekend']\n"
                                 "[detectors]\narl0 = 2000\n")
    (d / "space.toml").write_text("[estimator]\nforgetting = [0.98, 0.99]\n"
                                  "[detectors]\narl0 = [500, 2000]\n")
    return d


def _summary(s: dict) -> dict:
    s = json.loads(json.dumps(s))
    s.pop("timing")
    s["settings"].pop("replay")
    return s


@pytest.mark.parametrize("chunk_rows", [None, 800])
def test_replay_on_dask_equals_local(data, tmp_path, cluster, chunk_rows):
    cfg = load_config(data / "base.toml")
    kw = dict(truth=data / "truth.csv", chunk_rows=chunk_rows, progress=False, now_ns=NOW,
              sample_every=3)
    local = replay(data / "log.csv", tmp_path / "local", cfg, **kw)
    dist = replay(data / "log.csv", tmp_path / "dask", cfg, engine="dask",
                  scheduler=cluster.scheduler_address, npartitions=3, **kw)
    assert dist["settings"]["replay"]["engine"] == "dask"
    key = ["series", "ts"]
    a = pd.read_csv(tmp_path / "local" / "estimates.csv").sort_values(key).reset_index(drop=True)
    b = pd.read_csv(tmp_path / "dask" / "estimates.csv").sort_values(key).reset_index(drop=True)
    pd.testing.assert_frame_equal(a, b, check_exact=True)
    for f in ("alerts.csv", "rejects.csv", "detection.csv"):
        assert (tmp_path / "local" / f).read_bytes() == (tmp_path / "dask" / f).read_bytes(), f
    assert _summary(local) == _summary(dist)
    assert local["rejected"] > 0 and local["alerts"] > 0


def test_replay_starts_its_own_loopback_cluster(data, tmp_path):
    s = replay(data / "log.csv", tmp_path / "own", load_config(data / "base.toml"), engine="dask",
               progress=False, now_ns=NOW)
    assert s["accepted"] > 0 and s["timing"]["chunks"] == 1


def test_tune_on_dask_equals_local(data, tmp_path, cluster):
    cfg = load_config(data / "base.toml")
    kw = dict(truth=data / "truth.csv", space=data / "space.toml", config=cfg,
              max_false_alarms=20.0, progress=False, now_ns=NOW)
    local = tune(data / "log.csv", tmp_path / "local", workers=1, **kw)
    dist = tune(data / "log.csv", tmp_path / "dask", engine="dask",
                scheduler=cluster.scheduler_address, npartitions=4, **kw)
    a = pd.read_csv(tmp_path / "local" / "tuning.csv")
    b = pd.read_csv(tmp_path / "dask" / "tuning.csv")
    pd.testing.assert_frame_equal(a, b, check_exact=True)
    assert local["recommended"] == dist["recommended"] and local["pareto"] == dist["pareto"]
    if local["recommended"] is not None:
        assert (tmp_path / "local" / "recommended.toml").read_text() == \
            (tmp_path / "dask" / "recommended.toml").read_text()


@pytest.mark.parametrize("chunk_rows", [None, 500])
def test_dask_follows_a_header_repeated_mid_file_like_the_local_reader(data, tmp_path, cluster,
                                                                       chunk_rows):
    """Two exports concatenated: the second starts with its own header line, its columns in
    another order (price and quantity swapped). The local reader rejects that line and reads
    the lines after it in its order (monitor.ingest.csv_text.read_csv_chunk); the Dask
    engine, whose blocks are cut without regard to headers, gives the same rejects and rows
    (before: the lines after it were read under the first header, prices as quantities)."""
    log = pd.read_csv(data / "log.csv", dtype=str, keep_default_na=False)
    half = len(log) // 2
    cols = list(log.columns)
    swapped = cols.copy()
    i, j = swapped.index("price"), swapped.index("quantity")
    swapped[i], swapped[j] = swapped[j], swapped[i]
    path = tmp_path / "joined.csv"
    path.write_text(log.iloc[:half].to_csv(index=False) + log.iloc[half:][swapped]
                    .to_csv(index=False) + log.iloc[:40][cols].to_csv(index=False))
    cfg = load_config(data / "base.toml")
    kw = dict(chunk_rows=chunk_rows, progress=False, now_ns=NOW)
    local = replay(path, tmp_path / "local", cfg, **kw)
    dist = replay(path, tmp_path / "dask", cfg, engine="dask",
                  scheduler=cluster.scheduler_address, npartitions=3, **kw)
    rej = pd.read_csv(tmp_path / "local" / "rejects.csv")
    headers = rej[rej["field"] == "header"]
    assert list(headers["row"]) == [half + 1, len(log) + 2]       # the two repeated headers
    assert headers["reason"].str.contains("another column order").all()   # swapped, then back
    for f in ("rejects.csv", "alerts.csv"):
        assert (tmp_path / "local" / f).read_bytes() == (tmp_path / "dask" / f).read_bytes(), f
    key = ["series", "ts"]
    a = pd.read_csv(tmp_path / "local" / "estimates.csv").sort_values(key).reset_index(drop=True)
    b = pd.read_csv(tmp_path / "dask" / "estimates.csv").sort_values(key).reset_index(drop=True)
    pd.testing.assert_frame_equal(a, b, check_exact=True)
    assert _summary(local) == _summary(dist)
    # the swapped half was read as prices and quantities, not the other way round: its rows
    # are accepted like the first half's (a swap would put the quantities into the unit check)
    assert local["accepted"] > 0.9 * len(log)
