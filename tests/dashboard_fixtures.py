"""Seeded stores for the dashboard tests, written through the store API (``monitor.store``).

The data are invented (demo series of made-up depots and products): prices wander around a base
level, quantities follow a log-log demand with a known elasticity that moves at a known time,
and the estimates are a noisy track of that elasticity with a shrinking band. They only have to
look like what the service writes; the estimator itself is tested elsewhere.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from monitor import store as mstore


START = pd.Timestamp("2024-03-01T00:00:00Z")
KINDS = ("out_of_bounds", "elasticity_change", "level_shift", "sign_flip", "low_variation",
         "stale")


def _series_frames(name: str, n: int, rng: np.random.Generator, beta0: float, beta1: float,
                   change_at: int, freq: str = "h", warm: int = 15, status_tail: str = "ok"):
    ts = START + pd.to_timedelta(np.arange(n), unit=freq)
    price = 8.0 * np.exp(np.cumsum(rng.normal(0, 0.02, n)) + rng.normal(0, 0.05, n))
    b_true = np.where(np.arange(n) < change_at, beta0, beta1)
    qty = np.exp(4.0 + b_true * np.log(price) + rng.normal(0, 0.1, n))
    k = np.arange(1, n + 1)
    se = 0.8 / np.sqrt(np.minimum(k, 200))
    beta = b_true + rng.normal(0, 1, n) * se * 0.5
    beta = pd.Series(beta).ewm(alpha=0.1).mean().to_numpy().copy()
    status = np.full(n, "ok", dtype=object)
    status[:warm] = "warming_up"
    if status_tail != "ok":
        status[-max(3, n // 20):] = status_tail
    beta[:warm] = np.nan
    lo, hi = beta - 1.96 * se, beta + 1.96 * se
    resid = rng.normal(0, 0.1, n)
    resid[:warm] = np.nan
    obs = pd.DataFrame({"series": name, "ts": ts, "price": price, "quantity": qty})
    est = pd.DataFrame({"series": name, "ts": ts, "beta": beta, "beta_se": se, "beta_lo": lo,
                        "beta_hi": hi, "n_eff": np.minimum(k, 199.0), "status": status,
                        "intercept": 4.0, "resid_sd": 0.1, "innovation": resid,
                        "z": resid / 0.1})
    return obs, est


def seed_store(path: Path, n_series: int = 12, n_obs: int = 300, seed: int = 7,
               alerts: bool = True, long_obs: int = 0) -> dict:
    """Create a store at ``path`` with ``n_series`` invented series; return facts for tests."""
    rng = np.random.default_rng(seed)
    store = mstore.open_store(path, create=True)
    tails = ["ok", "changed", "out_of_bounds", "low_variation", "ok", "ok"]
    names = [f"depot{i % 7:02d}/item{i:05d}" for i in range(n_series)]
    obs_parts, est_parts, settings = [], [], []
    for i, name in enumerate(names):
        b0 = -1.2 - 0.5 * rng.random()
        b1 = b0 + (0.9 if i % 3 == 1 else 0.0)
        o, e = _series_frames(name, n_obs, rng, b0, b1, change_at=n_obs * 2 // 3,
                              status_tail=tails[i % len(tails)])
        if i == n_series - 1 and n_series > 3:       # one series still warming up entirely
            e = e.iloc[:10]
            o = o.iloc[:10]
        obs_parts.append(o)
        est_parts.append(e)
        settings.append({"series": name, "low": -3.0, "high": -0.2, "forgetting": 0.99})
    if long_obs:
        # one long history, so the series page has to thin it for drawing
        name = "depot99/long-history"
        o, e = _series_frames(name, long_obs, rng, -1.1, -1.9, change_at=long_obs // 2,
                              freq="min")
        obs_parts.append(o)
        est_parts.append(e)
        settings.append({"series": name, "low": -3.0, "high": -0.2, "forgetting": 0.995})
        names.append(name)
    mstore.write_batch(store, observations=pd.concat(obs_parts, ignore_index=True),
                       estimates=pd.concat(est_parts, ignore_index=True),
                       series=pd.DataFrame(settings))
    ids = []
    if alerts:
        for j, kind in enumerate(KINDS[:min(len(KINDS), n_series)]):
            e = est_parts[j]
            row = e.iloc[len(e) * 3 // 4]
            aid = mstore.open_alert(store, names[j], kind, row["ts"], row["beta"],
                                    row["beta_lo"], row["beta_hi"],
                                    f"{kind.replace('_', ' ')} on {names[j]}",
                                    severity="warning",
                                    # the last one like a rule that records no details
                                    details=None if kind == "stale" else {"seeded": True})
            ids.append(aid)
        if len(ids) >= 3:
            mstore.acknowledge_alert(store, ids[1], note="looking into it", who="tester")
            mstore.resolve_alert(store, ids[2], note="price test ended", who="tester")
    store.close()
    return {"path": str(path), "series": names, "alert_ids": ids,
            "change_ts": [START + pd.Timedelta(hours=n_obs * 2 // 3)] * n_series
            + [START + pd.Timedelta(minutes=long_obs // 2)] * (1 if long_obs else 0)}


def write_truth(path: Path, facts: dict) -> Path:
    """A truth file naming the known change of every third series (the ones that moved)."""
    rows = [{"series": s, "ts": t.strftime("%Y-%m-%dT%H:%M:%SZ"), "kind": "elasticity_change"}
            for i, (s, t) in enumerate(zip(facts["series"], facts["change_ts"])) if i % 3 == 1]
    pd.DataFrame(rows).to_csv(path, index=False)
    return path


def write_replay_folder(folder: Path, facts: dict, n_obs: int = 200) -> Path:
    """A replay output folder in the DESIGN.md layout, with a detection table."""
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(5)
    parts, alerts = [], []
    for i, s in enumerate(facts["series"][:4]):
        _, e = _series_frames(s, n_obs, rng, -1.5, -0.7 if i % 2 else -1.5, n_obs // 2)
        e = e.assign(ts=e["ts"].dt.strftime("%Y-%m-%dT%H:%M:%SZ"))
        parts.append(e[["series", "ts", "beta", "beta_se", "beta_lo", "beta_hi", "n_eff",
                        "status"]])
        if i % 2:
            r = e.iloc[n_obs // 2 + 12]
            alerts.append({"series": s, "ts": r["ts"], "rule": "elasticity_change",
                           "beta": r["beta"], "beta_lo": r["beta_lo"], "beta_hi": r["beta_hi"],
                           "message": "elasticity moved"})
    pd.concat(parts).to_csv(folder / "estimates.csv", index=False)
    pd.DataFrame(alerts).to_csv(folder / "alerts.csv", index=False)
    pd.DataFrame({"row": [17], "series": [facts["series"][0]], "ts": ["not-a-time"],
                  "reason": ["row 17: field 'ts' = 'not-a-time': not a timestamp"]}
                 ).to_csv(folder / "rejects.csv", index=False)
    detection = {"changes": 2, "detected": 2, "missed": 0, "detection_rate": 1.0,
                 "median_delay_obs": 13.5, "p90_delay_obs": 14.7, "false_alarms": 0,
                 "false_alarms_per_10k": 0.0, "quiet_obs": 500}
    (folder / "summary.json").write_text(json.dumps(
        {"rows": 801, "accepted": 800, "rejected": 1, "alerts": 2, "detection": detection,
         "settings": {"estimator": {"forgetting": 0.99}}}))
    # the columns of monitor.replay.detection.DETECTION_COLUMNS (one row per known change point)
    pd.DataFrame({"series": [facts["series"][i] for i in (1, 3, 0)],
                  "kind": ["elasticity_change", "elasticity_change", "unit_error"],
                  "ts": ["2024-03-05T04:00:00Z"] * 3, "end_ts": [None] * 3,
                  "status": ["detected", "detected", "not_scored"],
                  "rules": ["elasticity_change", "elasticity_change", ""],
                  "alert_ts": ["2024-03-05T16:00:00Z", "2024-03-05T19:00:00Z", None],
                  "alert_rule": ["elasticity_change", "elasticity_change", None],
                  "delay_obs": [12, 15, None], "delay_s": [43200.0, 54000.0, None],
                  "window_obs": [48, 48, None], "beta_before": [-1.5] * 3,
                  "beta_after": [-0.7, -0.7, -1.5], "note": ["", "", "prices in cents"]}
                 ).to_csv(folder / "detection.csv", index=False)
    return folder


def seed_many(path: Path, n_series: int = 10_000, n_obs: int = 30, seed: int = 9) -> dict:
    """A wide store for the responsiveness check: ``n_series`` series of ``n_obs`` hourly
    observations and estimates each, built in one vectorized pass and one ``write_batch``."""
    rng = np.random.default_rng(seed)
    names = np.array([f"zone{i % 50:02d}/sku{i:06d}" for i in range(n_series)])
    s = np.repeat(names, n_obs)
    k = np.tile(np.arange(n_obs), n_series)
    ts = START + pd.to_timedelta(k, unit="h")
    price = 5.0 * np.exp(rng.normal(0, 0.08, s.size))
    b_true = np.repeat(-0.5 - 2.0 * rng.random(n_series), n_obs)
    qty = np.exp(3.0 + b_true * np.log(price) + rng.normal(0, 0.1, s.size))
    se = 0.6 / np.sqrt(k + 1.0)
    beta = b_true + rng.normal(0, 1, s.size) * se * 0.3
    status = np.where(k < 5, "warming_up", "ok").astype(object)
    status[(np.repeat(np.arange(n_series), n_obs) % 11 == 3) & (k == n_obs - 1)] = "changed"
    beta[k < 5] = np.nan
    obs = pd.DataFrame({"series": s, "ts": ts, "price": price, "quantity": qty})
    est = pd.DataFrame({"series": s, "ts": ts, "beta": beta, "beta_se": se,
                        "beta_lo": beta - 1.96 * se, "beta_hi": beta + 1.96 * se,
                        "n_eff": k + 1.0, "status": status, "intercept": 3.0, "resid_sd": 0.1,
                        "innovation": rng.normal(0, 0.1, s.size), "z": 0.0})
    settings = pd.DataFrame({"series": names, "low": -3.0, "high": -0.2, "forgetting": 0.995})
    store = mstore.open_store(path, create=True)
    mstore.write_batch(store, observations=obs, estimates=est, series=settings)
    for j in range(0, min(n_series, 200), 7):
        mstore.open_alert(store, str(names[j]), KINDS[j % len(KINDS)], ts[j * n_obs + n_obs - 1],
                          None, None, None, "seeded alert")
    store.close()
    return {"path": str(path), "series": list(names)}
