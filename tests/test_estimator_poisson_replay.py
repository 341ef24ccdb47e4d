"""The Poisson model end to end: a replay of a count log with zeros and an exposure column
(``--model poisson --exposure-col hours``) keeps the zeros as data and equals the streaming
estimator row for row."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from monitor.cli import main
from monitor.estimators import ElasticityPoisson


def _log(rng, n_series=3, n=900):
    rows = []
    t0 = pd.Timestamp("2022-01-01", tz="UTC")   # all rows in the past
    for s in range(n_series):
        lp = np.log(4.0) + rng.normal(0, 0.15, n)
        hours = rng.choice([6.0, 8.0, 12.0], n)
        q = rng.poisson(hours / 8.0 * 1.5 * np.exp(-1.5 * (lp - np.log(4.0))))
        for i in range(n):
            rows.append({"series": f"oat-bar@store-{s}", "ts": (t0 + pd.Timedelta(days=i)).isoformat(),
                         "price": round(float(np.exp(lp[i])), 4), "quantity": int(q[i]),
                         "hours": hours[i]})
    return pd.DataFrame(rows)


@pytest.mark.slow
def test_replay_poisson_keeps_zeros_and_equals_streaming(tmp_path, rng):
    df = _log(rng)
    assert (df["quantity"] == 0).mean() > 0.15
    df.to_csv(tmp_path / "log.csv", index=False)
    # the counts are in control, but an elasticity alert (a false one: at ARL0 20,000 about a
    # 1 in 4 chance over 2,700 rows and two charts) discounts the estimator's past by design,
    # after which it differs from the plain streaming estimator: ARL0 100,000 keeps this
    # test about the estimates (with 20,000 this seed raised one at row 823 of a series)
    rc = main(["replay", str(tmp_path / "log.csv"), "--out", str(tmp_path / "o"), "--quiet",
               "--model", "poisson", "--exposure-col", "hours", "--forgetting", "0.99",
               "--arl0", "100000"])
    assert rc == 0
    summary = json.loads((tmp_path / "o" / "summary.json").read_text())
    assert summary["rejected"] == 0 and summary["accepted"] == len(df)   # zeros are data
    est = pd.read_csv(tmp_path / "o" / "estimates.csv")
    for name, g in est.groupby("series", sort=False):
        ref = ElasticityPoisson(forgetting=0.99)
        src = df[df.series == name]
        betas = []
        for _, r in src.iterrows():
            ref.learn_one({"price": r.price}, r.quantity, exposure=r.hours)
            betas.append(ref.elasticity)
        np.testing.assert_allclose(g["beta"].to_numpy(), betas, rtol=1e-10, atol=1e-12)
        assert g["status"].iloc[-1] == "ok"
        assert g["beta_lo"].iloc[-1] < -1.5 < g["beta_hi"].iloc[-1]
