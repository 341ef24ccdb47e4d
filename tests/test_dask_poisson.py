"""The Poisson model through the Dask engine gives the local engine's results (issue 13).

A replay of Poisson counts with zeros and an exposure column (``--model poisson
--exposure-col hours``), whole and in chunks, on a LocalCluster of 2 worker processes (as
tests/test_dask_engine.py) against the local engine: estimates equal to the bit, and
``alerts.csv`` and ``rejects.csv`` byte-equal, as the log-log Dask tests hold them.

Reference: the local engine (:func:`monitor.replay.driver.replay`), itself held to the live
engine's Poisson estimates to the bit in tests/test_engine_poisson.py. Data: invented series
of counts, log E[q] = a - 1.5 log p + 0.3 promo + log(hours / 8), mean counts 0.4-3 (zeros
common), one level shift (x 2.5, at the middle row of 400 a series) so alerts are raised, and
rows with a bad exposure (zero, negative, text) and a bad price to be rejected.

400 rows a series, not 150 (5 December 2026): at 150 the shift at row 75 was alerted in 1 of 5
seeds (21-25) by the detector of the time, and in seed 21, the one used here, through the
detector's control fit being wrong when the controls were first identified (promotion
coefficient 5.1 after 15 rows, truth 0.3: every later row's level was compared with a
reference 0.75 too low). Since the detector re-expresses all its sums with the fit's current
coefficients (split_glr, "The controls' sums") that help is gone and the seed raised no alert.
At 400 rows the shift at row 200 is alerted in 8 of 10 seeds (21-30) since the control fit
is weighted by the predicted mean (7 unweighted; 8 with each row's own coefficients), with no
false level alert over the ten replays without the shift (1 unweighted, 4 with each row's own
coefficients): see split_controls.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from monitor.cli import build_parser
from monitor.cli.replay_cmd import config_from_args
from monitor.replay.driver import replay
from tests.conftest import DESIGNED

pytestmark = pytest.mark.slow
NOW = pd.Timestamp("2030-01-01", tz="UTC").value


def count_log(seed: int = 21, n_series: int = 6, length: int = 400) -> pd.DataFrame:
    """Hourly counts of ``n_series`` invented kiosk items, rows in time order, as text."""
    rng = np.random.default_rng(seed)
    t0 = pd.Timestamp("2024-06-01T00:00:00Z")
    parts = []
    for s in range(n_series):
        p = np.round(2.5 * np.exp(rng.normal(0, 0.3, length)), 2)
        hours = rng.choice([4.0, 6.0, 8.0, 12.0], length)
        promo = (rng.random(length) < 0.25).astype(float)
        mu = np.exp(0.25 * s - 1.2 - 1.5 * np.log(p / 2.5) + 0.3 * promo + np.log(hours / 8))
        q = rng.poisson(mu).astype(float)
        if s == 1:
            q[length // 2:] = rng.poisson(mu[length // 2:] * 2.5)     # a level shift
        parts.append(pd.DataFrame({
            "series": f"quay-{s}/fig-roll", "price": p, "quantity": q, "promo": promo,
            "hours": hours,
            "ts": [(t0 + pd.Timedelta(hours=i)).strftime("%Y-%m-%dT%H:%M:%SZ")
                   for i in range(length)]}))
    log = pd.concat(parts, ignore_index=True)
    log = log.iloc[np.lexsort((log["series"], log["ts"]))].reset_index(drop=True)
    log = log.astype({"hours": object, "price": object})
    log.loc[40, "hours"] = 0.0                        # exposure must be > 0
    log.loc[300, "hours"] = -4.0
    log.loc[520, "hours"] = "eight"                   # not a number
    log.loc[700, "price"] = -1.0
    return log


def _args(log, out, *extra):
    args = build_parser().parse_args(
        ["replay", str(log), "--out", str(out), "--model", "poisson", "--exposure-col", "hours",
         "--control", "promo", "--cusum-h", str(DESIGNED["cusum_h"]),
         "--slope-h", str(DESIGNED["slope_h"]), "--quiet", *extra])
    return config_from_args(args)


def _summary(s: dict) -> dict:
    s = json.loads(json.dumps(s))
    s.pop("timing")
    s["settings"].pop("replay")
    return s


@pytest.mark.parametrize("chunk_rows", [None, 250])
def test_poisson_replay_on_dask_equals_local(tmp_path, cluster, chunk_rows):
    log = count_log()
    assert 0.15 < (log["quantity"] == 0).mean() < 0.6            # zeros are data here
    path = tmp_path / "counts.csv"
    log.to_csv(path, index=False, lineterminator="\n")
    cfg = _args(path, tmp_path / "local")
    assert cfg.section("estimator")["model"] == "poisson"
    assert cfg.section("estimator")["exposure"] == "hours"
    kw = dict(chunk_rows=chunk_rows, progress=False, now_ns=NOW)
    local = replay(path, tmp_path / "local", cfg, **kw)
    dist = replay(path, tmp_path / "dask", cfg, engine="dask",
                  scheduler=cluster.scheduler_address, npartitions=3, **kw)
    assert dist["settings"]["replay"]["engine"] == "dask"
    if chunk_rows:
        assert local["timing"]["chunks"] > 1
    for f in ("alerts.csv", "rejects.csv"):
        assert (tmp_path / "local" / f).read_bytes() == (tmp_path / "dask" / f).read_bytes(), f
    key = ["series", "ts"]
    a = pd.read_csv(tmp_path / "local" / "estimates.csv").sort_values(key).reset_index(drop=True)
    b = pd.read_csv(tmp_path / "dask" / "estimates.csv").sort_values(key).reset_index(drop=True)
    pd.testing.assert_frame_equal(a, b, check_exact=True)
    assert _summary(local) == _summary(dist)
    # the premises: zeros reached the estimator, the bad rows were rejected naming the
    # field, value and rule, and the level shift raised an alert
    assert len(a) == len(log) - 4 and (a["status"] != "warming_up").any()
    rej = pd.read_csv(tmp_path / "local" / "rejects.csv", keep_default_na=False)
    assert rej["row"].tolist() == [41, 301, 521, 701]              # file rows (header not counted)
    assert rej["field"].tolist() == ["hours", "hours", "hours", "price"]
    assert rej["value"].tolist() == ["0.0", "-4.0", "eight", "-1.0"]
    assert rej["reason"].str.contains("an exposure must be > 0").sum() == 2
    alerts = pd.read_csv(tmp_path / "local" / "alerts.csv")
    assert ("quay-1/fig-roll", "level_shift") in set(zip(alerts["series"], alerts["rule"]))
