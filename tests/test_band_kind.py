"""The band's kind is recorded with each estimate (issue 13: ``[estimator] band``).

Every write path is checked by writing through it and reading the kind back: the live batch
write (``Monitor.observe_many``), the one-row path (``Monitor.observe``), the replay's whole,
chunked, Parquet and Dask outputs, and a store migrated from the previous schema. The expected
kind of a row is the configured ``band`` where the row has a band (``beta_lo`` and ``beta_hi``
set) and NULL elsewhere, where the status (warming_up or low_variation) says why: the rule is
the contract's, the reference is the configuration, not the code under test.
"""

from __future__ import annotations

import sqlite3
import tomllib

import numpy as np
import pandas as pd
import pytest

import monitor.store as ms
from monitor.errors import ValidationError
from monitor.live.monitor import Monitor
from monitor.replay.driver import replay
from monitor.settings import Config
from monitor.store.schema import MIGRATIONS
from simulators import simulate
from tests.conftest import DESIGNED
from tests.service_helpers import csv_bytes, frame
from dashboard.shaping import band_caption

NOW = pd.Timestamp("2030-01-01", tz="UTC").value


def config(band: str, model: str = "loglinear") -> Config:
    text = f"""
[estimator]
model = "{model}"
forgetting = 0.99
band = "{band}"
controls = ["promo"]
[detectors]
cusum_h = {DESIGNED['cusum_h']}
slope_h = {DESIGNED['slope_h']}
"""
    return Config(tomllib.loads(text))


@pytest.fixture(scope="module")
def log():
    sim = simulate("retail", seed=5, n_series=3, length=80)
    return sim.log.drop(columns=["weekend"])


def check_kinds(est: pd.DataFrame, band: str) -> None:
    """Rows with a band carry ``band``; rows without one carry NULL and a status saying why."""
    has = est["beta_lo"].notna() & est["beta_hi"].notna()
    assert has.sum() >= 0.5 * len(est) and (~has).sum() >= 1      # both kinds of row present
    assert (est.loc[has, "band"] == band).all()
    assert est.loc[~has, "band"].isna().all()
    assert est.loc[~has, "status"].isin(["warming_up", "low_variation"]).all()


@pytest.mark.parametrize("band", ["hc", "hac", "classic"])
def test_live_batch_and_one_row_writes_record_the_band_kind(tmp_path, log, band):
    db = tmp_path / "s.sqlite"
    half = len(log) // 2
    with Monitor(db, config(band)) as mon:
        mon.observe_many(log.iloc[:half])
        for r in log.iloc[half:].itertuples(index=False):
            mon.observe(r.series, r.ts, price=r.price, quantity=r.quantity, promo=r.promo)
        assert mon.plain_calls > 100                 # the one-row path wrote most of them
    est = frame(db, "SELECT * FROM estimates ORDER BY series, ts")
    check_kinds(est, band)
    latest = frame(db, "SELECT * FROM latest_estimates")
    assert latest["band"].tolist() == [band] * 3
    # the readers return it: the dashboard's history and the overview's latest row
    hist = ms.series_history(db, latest["series"].iloc[0])
    assert set(hist["band"].dropna()) == {band}
    assert ms.latest_estimates(ms.open_store(db, readonly=True))["band"].tolist() == [band] * 3


def test_poisson_estimates_record_their_band_kind(tmp_path, log):
    db = tmp_path / "p.sqlite"
    rng = np.random.default_rng(3)
    counts = log.assign(quantity=rng.poisson(log["quantity"].to_numpy() / 40.0).astype(float))
    assert (counts["quantity"] == 0).any()
    with Monitor(db, config("hc", model="poisson")) as mon:
        mon.observe_many(counts)
    check_kinds(frame(db, "SELECT * FROM estimates"), "hc")


@pytest.fixture(scope="module")
def local_cluster():
    from distributed import LocalCluster

    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                      dashboard_address=None) as c:
        yield c


def test_replay_outputs_record_the_band_kind_in_every_form(tmp_path, log, local_cluster):
    path = tmp_path / "log.csv"
    path.write_bytes(csv_bytes(log))
    cfg = config("hac")
    kw = dict(progress=False, now_ns=NOW)
    replay(path, tmp_path / "whole", cfg, **kw)
    replay(path, tmp_path / "chunks", cfg, chunk_rows=70, **kw)
    replay(path, tmp_path / "pq", cfg, estimates_format="parquet", **kw)
    replay(path, tmp_path / "dask", cfg, engine="dask", scheduler=local_cluster.scheduler_address,
           npartitions=2, **kw)
    key = ["series", "ts"]
    whole = pd.read_csv(tmp_path / "whole" / "estimates.csv").sort_values(key, ignore_index=True)
    check_kinds(whole, "hac")
    for other in (pd.read_csv(tmp_path / "chunks" / "estimates.csv"),
                  pd.read_parquet(tmp_path / "pq" / "estimates.parquet"),
                  pd.read_csv(tmp_path / "dask" / "estimates.csv")):
        other = other.sort_values(key, ignore_index=True)
        assert other["band"].fillna("").tolist() == whole["band"].fillna("").tolist()
    import pyarrow.parquet as pq

    assert str(pq.read_schema(tmp_path / "pq" / "estimates.parquet").field("band").type) \
        == "string"                                  # text, not a number


def test_a_store_at_the_previous_schema_migrates_and_old_rows_say_unknown(tmp_path, log):
    path = tmp_path / "old.sqlite"
    conn = sqlite3.connect(path, isolation_level=None)
    old = ms.Store(conn, path, readonly=False)
    band_id = next(i for i, name, _ in MIGRATIONS if name == "band kind")
    before = band_id - 1                             # the schema before the band kind
    assert ms.migrate(old, until=before) == list(range(1, before + 1))
    assert "band" not in [r[1] for r in conn.execute("PRAGMA table_info(estimates)")]
    conn.execute("INSERT INTO estimates (series, ts, beta, beta_lo, beta_hi, status) "
                 "VALUES ('x', '2024-01-01T00:00:00Z', -1.0, -1.2, -0.8, 'ok')")
    conn.execute("INSERT INTO latest_estimates (series, ts, beta, beta_lo, beta_hi, status) "
                 "VALUES ('x', '2024-01-01T00:00:00Z', -1.0, -1.2, -0.8, 'ok')")
    conn.execute("INSERT INTO series (series, updated_at) VALUES ('x', 'then')")
    conn.close()
    new = ms.Store.open(path)
    assert new.applied_on_open == list(range(band_id, ms.SCHEMA_VERSION + 1))
    new.close()
    # old rows: the kind that wrote them is not known (no estimator settings in the store)
    assert frame(path, "SELECT band FROM estimates WHERE series = 'x'")["band"].isna().all()
    assert frame(path, "SELECT band FROM latest_estimates")["band"].isna().all()
    with Monitor(path, config("classic")) as mon:
        mon.observe_many(log)
    check_kinds(frame(path, "SELECT * FROM estimates WHERE series != 'x'"), "classic")
    hist = ms.series_history(path, "x")
    assert band_caption(hist).startswith("Band kind not recorded")


def test_a_band_kind_outside_the_three_is_refused_naming_row_field_and_value(tmp_path):
    store = ms.Store.open(tmp_path / "s.sqlite", create=True)
    rows = pd.DataFrame({"series": ["a", "a"], "ts": ["2024-01-01T00:00:00Z",
                                                      "2024-01-02T00:00:00Z"],
                         "beta": [-1.0, -1.1], "beta_lo": [-1.3, -1.4], "beta_hi": [-0.7, -0.8],
                         "status": ["ok", "ok"], "band": ["hc", "robust"]})
    with pytest.raises(ValidationError, match="estimate 1 .*'band' = 'robust'.*hc, hac, classic"):
        ms.write_batch(store, estimates=rows)
    assert store.scalar("SELECT count(*) FROM estimates") == 0     # nothing half-written
    store.close()


def test_band_caption_names_the_kind_and_mixed_or_missing_kinds():
    one = pd.DataFrame({"beta_lo": [np.nan, -1.2, -1.1], "beta_hi": [np.nan, -0.8, -0.9],
                        "band": [None, "hc", "hc"]})
    assert band_caption(one) == ("Band: heteroskedasticity-robust (White 1980 sandwich), at "
                                 "the configured level.")
    mixed = pd.DataFrame({"beta_lo": [-1.2, -1.1, -1.0], "beta_hi": [-0.8, -0.9, -0.7],
                          "band": [None, "classic", "hac"]})
    text = band_caption(mixed)
    assert text.startswith("Bands: ") and "classic" in text and "Newey & West" in text
    assert "not recorded for 1 estimates" in text
    warm = pd.DataFrame({"beta_lo": [np.nan], "beta_hi": [np.nan], "band": [None]})
    assert band_caption(warm) == "No band to show yet."
