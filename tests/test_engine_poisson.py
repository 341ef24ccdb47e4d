"""The Poisson model in the live engine: ``Monitor.observe`` one row at a time gives exactly the
store the batch path gives, zero quantities and an exposure column included (issue 13).

References: the batch path (``Monitor.observe_many`` over the whole log, the path
tests/test_engine.py holds equal to the replay) and the replay's ``estimates.csv``
(:func:`monitor.replay.driver.run_replay`). Data: invented series of Poisson counts
(log E[q] = a - 1.5 log p + log hours), mean counts 0.5-3, so zeros are common.
"""

from __future__ import annotations

import tomllib

import numpy as np
import pandas as pd

from monitor.errors import ValidationError
from monitor.live.monitor import Monitor
from monitor.replay.driver import run_replay
from monitor.settings import Config
from tests.conftest import DESIGNED
from tests.service_helpers import assert_same_store, csv_bytes, frame

CFG = Config(tomllib.loads(f"""
[estimator]
model = "poisson"
exposure = "hours"
forgetting = 0.99
controls = ["promo"]
[detectors]
cusum_h = {DESIGNED['cusum_h']}
slope_h = {DESIGNED['slope_h']}
"""))


def count_log(seed: int = 4, n_series: int = 3, length: int = 240) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    t0 = pd.Timestamp("2024-03-01T00:00:00Z")
    parts = []
    for s in range(n_series):
        p = np.round(3 * np.exp(rng.normal(0, 0.25, length)), 2)
        hours = rng.choice([4.0, 8.0, 12.0], length)
        promo = (rng.random(length) < 0.2).astype(float)
        mu = np.exp(0.2 * s - 1.0 - 1.5 * np.log(p / 3) + 0.3 * promo + np.log(hours / 8))
        q = rng.poisson(mu).astype(float)
        if s == 0:
            # a level shift: alerts (x5 and 240 rows: the split detector weighs rows by their
            # Poisson information, and x2.5 on a mean of about 0.45 after 30-90 rows is not
            # enough evidence at ARL0 20,000 within the rows that follow; measured 4 December)
            q[length // 2:] = rng.poisson(mu[length // 2:] * 5.0)
        parts.append(pd.DataFrame({
            "series": f"harbor-{s}/oat-bar", "price": p, "quantity": q, "promo": promo,
            "hours": hours,
            "ts": [(t0 + pd.Timedelta(hours=i)).strftime("%Y-%m-%dT%H:%M:%SZ")
                   for i in range(length)]}))
    log = pd.concat(parts, ignore_index=True)
    return log.iloc[np.lexsort((log["series"], log["ts"]))].reset_index(drop=True)


def test_observe_one_row_at_a_time_writes_the_batch_paths_store(tmp_path):
    log = count_log()
    assert 0.15 < (log["quantity"] == 0).mean() < 0.6            # zeros are data here
    bad = log.index[[30, 95]]
    log.loc[bad[0], "hours"] = 0.0                   # an exposure <= 0: rejected by both
    log.loc[bad[1], "price"] = -1.0
    one, whole = tmp_path / "one.sqlite", tmp_path / "whole.sqlite"
    with Monitor(one, CFG) as mon:
        for r in log.itertuples(index=False):
            try:
                mon.observe(r.series, r.ts, price=r.price, quantity=r.quantity, promo=r.promo,
                            hours=r.hours)
            except ValidationError:
                pass
        one_row_path = mon.plain_calls            # rows that took the one-row path
    with Monitor(whole, CFG) as mon:
        mon.observe_many(log)
    # the one-row path took the Poisson rows: at most a tenth went the general way (a count of
    # rows, no clock is read)
    assert len(log) - one_row_path <= 0.1 * len(log)
    assert_same_store(one, whole)                   # every result table, floats to the bit
    rejects = frame(one, "SELECT row, field FROM rejects ORDER BY row")
    assert rejects["field"].tolist() == ["hours", "price"]
    assert len(frame(one, "SELECT * FROM alerts")) >= 1


def test_observe_gives_the_replays_poisson_estimates_to_the_bit(tmp_path):
    log = count_log(seed=9, n_series=2, length=90)
    path = tmp_path / "log.csv"
    path.write_bytes(csv_bytes(log))
    run_replay(path, tmp_path / "replay", CFG)
    db = tmp_path / "s.sqlite"
    with Monitor(db, CFG) as mon:
        for r in log.itertuples(index=False):
            mon.observe(r.series, r.ts, price=r.price, quantity=r.quantity, promo=r.promo,
                        hours=r.hours)
        assert mon.plain_calls > 0.9 * len(log)
    key = ["series", "ts"]
    rep = pd.read_csv(tmp_path / "replay" / "estimates.csv").sort_values(key, ignore_index=True)
    live = frame(db, "SELECT * FROM estimates").sort_values(key, ignore_index=True)
    assert len(live) == len(rep) == len(log)
    # reference: the replay; pyarrow writes the shortest round-trip repr, so equal to the bit
    for c in ("beta", "beta_se", "beta_lo", "beta_hi", "n_eff", "intercept", "resid_sd",
              "innovation", "z"):
        assert rep[c].to_numpy().tobytes() == live[c].to_numpy().tobytes(), c
    assert rep["status"].tolist() == live["status"].tolist()
