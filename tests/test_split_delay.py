"""delay50_obs (issue 12): the expected observations to detect a change of 0.5 in b, per series,
in the store's latest estimate (written by the live engine) and in ``elmon status --json``.

Reference: Lorden (1971) with the normal Kullback-Leibler information, I = db^2 Var(log p) /
(2 sigma^2); the split detector quotes ``DELAY_FACTOR * h_slope / I`` (monitor.detectors.
split_design.expected_delay), so with a known price sd and noise sd the stored value must be
that number up to the sampling error of the series' own variance estimates.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd

from monitor.cli import main
from monitor.detectors.split_design import expected_delay, information, split_thresholds
from monitor.live.monitor import Monitor
from monitor.settings import Config
from monitor.store import latest_estimates, open_store


def _log(n: int, price_sd: float, noise_sd: float, seed: int, per: int = 1) -> pd.DataFrame:
    """``per`` series at price sd ``price_sd`` (shop-a-i) and ``per`` at twice it (shop-b-i)."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(per):
        for s, sd in ((f"kiosk-a{i}/oat-bar", price_sd), (f"kiosk-b{i}/oat-bar", 2 * price_sd)):
            lp = math.log(4.0) + sd * rng.standard_normal(n)
            lq = 5.0 - 1.3 * (lp - math.log(4.0)) + noise_sd * rng.standard_normal(n)
            ts = pd.date_range("2025-01-01", periods=n, freq="h", tz="UTC")
            rows.append(pd.DataFrame({"series": s, "ts": ts.strftime("%Y-%m-%dT%H:%M:%SZ"),
                                      "price": np.exp(lp), "quantity": np.exp(lq)}))
    return pd.concat(rows, ignore_index=True).sort_values("ts", kind="stable")


def test_delay50_is_stored_per_series_and_shown_by_status_json(tmp_path, capsys):
    """12 series at each of two price sds (0.1, 0.2), noise sd 0.2, 1,500 hourly rows.

    Each series' value rests on its own exponentially weighted (0.995: about 400 effective
    rows) variances of log price and of the innovations, each to about 7% (sqrt(2 / 400)),
    and on the slope scale's sandwich and autocorrelation factors (clipped at >= 1, so biased
    up by a few percent where there is neither): one series' ratio to the formula has an sd of
    about 12% (measured: 1.53 in one series of seed 3, 2.3 se of the price variance). The
    median of 12 is to about 12% x 1.25 / sqrt(12) = 4%: within 15% of the formula (the bias
    of about +7% plus 2 se).
    """
    db = tmp_path / "d.sqlite"
    log = _log(1500, 0.1, 0.2, seed=3, per=12)
    with Monitor(db, Config({})) as mon:        # the default detector (split GLR, ARL0 20,000)
        mon.observe_many(log.iloc[:20000])
        mon.observe_many(log.iloc[20000:])
    h = split_thresholds(20000.0).slope
    with open_store(db, readonly=True) as store:
        lat = latest_estimates(store).set_index("series")
    med = {}
    for side, sd in (("a", 0.1), ("b", 0.2)):
        want = expected_delay(h, information(0.5, sd, 0.2))
        got = lat.loc[[f"kiosk-{side}{i}/oat-bar" for i in range(12)], "delay50_obs"]
        med[side] = float(np.median(got))
        assert abs(med[side] / want - 1.0) < 0.15, (side, med[side], want)
    # four times the price variance: about a quarter of the delay
    assert 0.2 < med["b"] / med["a"] < 0.3
    assert main(["status", "--db", str(db), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    by = {r["series"]: r for r in doc["series"]}
    assert by["kiosk-a0/oat-bar"]["delay50_obs"] == lat.loc["kiosk-a0/oat-bar", "delay50_obs"]
    assert doc["summary"]["series"] == 24 and by["kiosk-b3/oat-bar"]["status"] == "ok"


def test_delay50_is_null_before_b_is_identified(tmp_path, capsys):
    db = tmp_path / "e.sqlite"
    with Monitor(db, Config({})) as mon:
        mon.observe_many(_log(5, 0.1, 0.2, seed=4))      # still warming up: no noise scale
    assert main(["status", "--db", str(db), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert [r["delay50_obs"] for r in doc["series"]] == [None, None]   # two series
    assert all(r["status"] == "warming_up" for r in doc["series"])
