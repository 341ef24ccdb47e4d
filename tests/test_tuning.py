"""Threshold tuning: search space, Pareto front, recommendation within a false-alarm budget
that holds on a held-out seed, the TOML it writes, and the no-truth bootstrap check."""

from __future__ import annotations

import json
import tomllib

import numpy as np
import pandas as pd
import pytest

import simulators
from monitor.cli import main
from monitor.errors import ConfigError
from monitor.replay.driver import replay
from monitor.settings import Config, estimator_from_config, load_config, validate
from monitor.tuning.calibrate import block_length, calibrate
from monitor.tuning.space import grid, setting_config, space_from_dict, to_toml
from monitor.tuning.tune import pareto_front, recommend, tune


NOW = pd.Timestamp("2030-01-01", tz="UTC").value
CONTROLS = Config().with_overrides("estimator", controls=["promo", "weekend"])


def _dominated(f, d, i) -> bool:
    return bool(np.any((f <= f[i]) & (d <= d[i]) & ((f < f[i]) | (d < d[i]))))


def test_pareto_front_is_exactly_the_non_dominated_set(rng):
    f = rng.integers(0, 12, 300).astype(float)
    d = rng.integers(0, 12, 300).astype(float)
    d[::17] = np.inf                                   # settings that miss half the changes
    front = pareto_front(f, d)
    for i in range(f.size):                            # brute force over every pair
        assert front[i] == (not _dominated(f, d, i))
    assert front.any() and not front.all()


def test_recommendation_is_the_fastest_within_budget():
    res = pd.DataFrame({
        "false_alarms_per_10k": [0.5, 1.8, 2.5, 0.9, 1.8],
        "median_delay_all_obs": [60.0, 30.0, 10.0, np.inf, 30.0],
        "detection_rate": [0.8, 0.7, 1.0, 0.4, 0.9],
        "p90_delay_obs": [90.0, 80.0, 20.0, 70.0, 85.0]})
    best, why = recommend(res, budget=2.0)
    assert best == 4 and "within 2 false alarms" in why     # tie on delay: higher detection rate
    best, why = recommend(res, budget=0.1)
    assert best == 0 and why.startswith("no setting meets the budget")


def test_space_checks_keys_like_a_config_file():
    space = space_from_dict({"estimator": {"forgetting": [0.97, 0.99]},
                             "detectors": {"arl0": [500, 2000, 20000], "slope_k": 1.0}})
    settings = grid(space)
    assert len(settings) == 6 and settings[0][("detectors", "slope_k")] == 1.0
    cfg = setting_config(Config(), settings[-1])
    assert cfg.section("estimator")["forgetting"] == 0.99 and cfg.section("detectors")["arl0"] == 20000
    with pytest.raises(ConfigError, match=r"\[detectors\] arl: unknown key"):
        setting_config(Config(), {("detectors", "arl"): 5})
    with pytest.raises(ConfigError, match="give at least one value"):
        space_from_dict({"rules": {"cooldown": []}})


def test_toml_written_reads_back_as_the_same_config(tmp_path):
    data = {"estimator": {"forgetting": 0.98, "controls": ["promo", "weekend"],
                          "excitation_guard": True},
            "detectors": {"arl0": 3000.0, "slope_k": 1.0}, "bounds": {"low": -4.0, "high": -0.2}}
    text = to_toml(data, "made by a test\nsecond line")
    assert tomllib.loads(text) == data
    (tmp_path / "r.toml").write_text(text)
    assert load_config(tmp_path / "r.toml").data == validate(data).data


@pytest.mark.slow
def test_recommendation_meets_the_budget_on_a_held_out_seed_and_beats_the_defaults(tmp_path):
    # 96 product-store series x 365 days: 8 step changes of b by -0.8, 8 drifts, 8 level shifts
    for seed in (11, 12):
        sim = simulators.simulate("retail", seed=seed, n_series=96, length=365)
        simulators.write_outputs(sim, tmp_path / f"s{seed}.csv", tmp_path / f"s{seed}_truth.csv")
    (tmp_path / "space.toml").write_text("[detectors]\narl0 = [1000, 3000, 8000]\n")
    budget = 10.0
    s = tune(tmp_path / "s11.csv", tmp_path / "tune", truth=tmp_path / "s11_truth.csv",
             space=tmp_path / "space.toml", config=CONTROLS, max_false_alarms=budget, workers=1,
             progress=False, now_ns=NOW)
    res = pd.read_csv(tmp_path / "tune" / "tuning.csv")
    f, d = res["false_alarms_per_10k"].to_numpy(), res["median_delay_all_obs"].fillna(np.inf).to_numpy()
    for i in range(len(res)):                          # the reported front is non-dominated
        assert res["pareto"].iat[i] == (not _dominated(f, d, i))
    rec = s["recommended"]
    assert rec is not None and rec["label"] != "defaults" and rec["false_alarms_per_10k"] <= budget
    assert (tmp_path / "tune" / "report.html").read_text().count("<svg") == 1
    # held-out seed: replay the recommended config and the defaults
    rec_cfg = load_config(tmp_path / "tune" / "recommended.toml")
    kw = dict(truth=tmp_path / "s12_truth.csv", progress=False, now_ns=NOW)
    held = replay(tmp_path / "s12.csv", tmp_path / "held", rec_cfg, **kw)["detection"]
    dflt = replay(tmp_path / "s12.csv", tmp_path / "dflt", CONTROLS, **kw)["detection"]
    assert held["false_alarms_per_10k"] <= budget
    assert held["median_delay_all_obs"] < dflt["median_delay_all_obs"]


def _loglog_log(path, rho: float, n_series=6, n=3000, seed=1):
    """Invented test data: iid log prices, log q = 5 - 1.5 log p + e, e AR(1) with sd 0.2."""
    rng = np.random.default_rng(seed)
    ts = pd.date_range("2020-01-01", periods=n, freq="D", tz="UTC").strftime("%Y-%m-%dT%H:%M:%SZ")
    frames = []
    for s in range(n_series):
        lp = np.log(10.0) + rng.normal(0, 0.1, n)
        shocks = rng.normal(0, 0.2 * np.sqrt(1 - rho ** 2), n)
        e = np.empty(n)
        e[0] = rng.normal(0, 0.2)
        for t in range(1, n):
            e[t] = rho * e[t - 1] + shocks[t]
        frames.append(pd.DataFrame({"series": f"feeder-{s}", "ts": ts, "price": np.exp(lp),
                                    "quantity": np.exp(5 - 1.5 * lp + e)}))
    pd.concat(frames).to_csv(path, index=False)


def _real_level_arl(path, arl0: float) -> float:
    """Observations per level-chart alarm when the pipeline runs over the log itself."""
    from monitor.detectors.kernels import F_ALARM
    from monitor.pipeline.kernel import S_LEVEL_FLAGS
    from monitor.pipeline.run import Pipeline
    from monitor.tuning.rows import load_rows

    cfg = validate({"detectors": {"arl0": arl0, "change_detector": "charts"}})
    rows = load_rows(path, cfg, now_ns=NOW)
    res = Pipeline.from_config(cfg, estimator_from_config(cfg)).run(
        rows.sid, rows.X, rows.y, n_series=len(rows.names), keep_signals=True)
    alarms = res.signals[:, S_LEVEL_FLAGS].astype(np.int64) & F_ALARM
    after = (np.arange(rows.n) - np.searchsorted(rows.sid, rows.sid)) >= 1000   # past warm-up
    return after.sum() / max(1, np.count_nonzero(alarms[after]))


@pytest.mark.slow
def test_bootstrap_check_flags_autocorrelated_errors(tmp_path):
    arl0 = 500.0
    _loglog_log(tmp_path / "ar.csv", rho=0.5)
    _loglog_log(tmp_path / "iid.csv", rho=0.0)
    # the charts' check (the previous CUSUM/EWMA/Page-Hinkley charts, selectable): the
    # bootstrap of the CUSUM level chart's statistic and the cusum_h that meets the target;
    # the default split detector's check is tests/test_tune_split_check.py and the test below
    charts = validate({"detectors": {"change_detector": "charts"}})
    ar = calibrate(tmp_path / "ar.csv", tmp_path / "ar", config=charts, arl0=arl0,
                   progress=False, now_ns=NOW)
    iid = calibrate(tmp_path / "iid.csv", tmp_path / "iid", config=charts, arl0=arl0,
                    progress=False, now_ns=NOW)
    real_ar, real_iid = _real_level_arl(tmp_path / "ar.csv", arl0), _real_level_arl(tmp_path / "iid.csv", arl0)
    lev = ar["checks"]["level"]
    # the real rate on the autocorrelated log is several times the design's, and the check says so
    assert arl0 / real_ar > 3 and lev["flagged"] and lev["rate_ratio"] > 3
    assert 0.5 < lev["data_arl"] / real_ar < 2           # bootstrap estimate near the real ARL
    assert lev["data_threshold"] > lev["design_threshold"]
    assert tomllib.loads((tmp_path / "ar" / "recommended.toml").read_text())["detectors"]["cusum_h"] \
        == pytest.approx(lev["data_threshold"], abs=1e-4)
    # independent errors: the design holds (real ARL near 500) and nothing is flagged
    assert 0.7 < real_iid / arl0 < 1.4 and not iid["checks"]["level"]["flagged"]
    assert "cusum_h" not in tomllib.loads((tmp_path / "iid" / "recommended.toml").read_text())["detectors"]
    assert block_length(np.random.default_rng(0).standard_normal(3000)) >= 15   # n^(1/3) ~ 14.4


@pytest.mark.slow
def test_cli_tune_both_modes(tmp_path, capsys):
    sim = simulators.simulate("retail", seed=21, n_series=12, length=200)
    simulators.write_outputs(sim, tmp_path / "log.csv", tmp_path / "truth.csv")
    (tmp_path / "base.toml").write_text("[estimator]\ncontrols = ['promo', 'weekend']\n"
                                        "[detectors]\narl0 = 2000\n")
    (tmp_path / "space.toml").write_text("[detectors]\narl0 = [500, 2000]\n")
    rc = main(["tune", str(tmp_path / "log.csv"), "--truth", str(tmp_path / "truth.csv"),
               "--space", str(tmp_path / "space.toml"), "--config", str(tmp_path / "base.toml"),
               "--max-false-alarms", "50", "--out", str(tmp_path / "t"), "--workers", "2", "--quiet"])
    assert rc == 0
    out = capsys.readouterr().out
    assert "evaluated 3 settings" in out and "Pareto front" in out
    s = json.loads((tmp_path / "t" / "tuning.json").read_text())
    assert s["settings"] == 3 and len(pd.read_csv(tmp_path / "t" / "tuning.csv")) == 3
    rc = main(["tune", str(tmp_path / "log.csv"), "--arl0", "300", "--config",
               str(tmp_path / "base.toml"), "--out", str(tmp_path / "c"), "--quiet",
               "--bootstrap-obs", "100000"])
    out = capsys.readouterr().out
    assert rc == 0 and "design for ARL0 = 300" in out
    assert "elasticity_change:" in out and "level_shift:" in out and "NOT CHECKED" not in out
    assert (tmp_path / "c" / "report.html").exists() and (tmp_path / "c" / "recommended.toml").exists()
    rc = main(["tune", str(tmp_path / "log.csv"), "--out", str(tmp_path / "x")])
    assert rc == 2 and "--arl0" in capsys.readouterr().err


def test_bootstrap_check_covers_the_default_detector_and_names_what_it_cannot(tmp_path):
    """The default split likelihood-ratio detector is checked (alert rates per kind on
    resampled in-control logs, tests/test_tune_split_check.py), under the Poisson model too
    (count paths, tests/test_tune_count_check.py); the previous charts under the Poisson model,
    whose residuals this check does not resample, are named as not checked in the summary,
    recommended.toml and the command's output instead of an empty check."""
    _loglog_log(tmp_path / "iid.csv", rho=0.0)
    s = calibrate(tmp_path / "iid.csv", tmp_path / "o", arl0=500.0, progress=False, now_ns=NOW,
                  n_steps=100_000)
    a = s["alert_rates"]
    assert s["checks"] == {} and s["unchecked"] == {} and a["checked"]
    assert set(a["kinds"]) == {"elasticity_change", "level_shift"}
    assert a["observations"] >= 100_000 and a["series_used"] == 6
    assert all(k["verdict"] in ("holds", "breaks", "unsettled") for k in a["kinds"].values())
    poisson = validate({"estimator": {"model": "poisson"}})
    p = calibrate(tmp_path / "iid.csv", tmp_path / "q", config=poisson, arl0=500.0,
                  progress=False, now_ns=NOW, n_steps=20_000)
    assert p["alert_rates"]["checked"] and p["alert_rates"]["model"] == "poisson"
    assert p["unchecked"] == {}
    poisson = validate({"estimator": {"model": "poisson"},
                        "detectors": {"change_detector": "charts"}})
    p = calibrate(tmp_path / "iid.csv", tmp_path / "p", config=poisson, arl0=500.0,
                  progress=False, now_ns=NOW, n_steps=100_000)
    assert p["alert_rates"] is None and set(p["unchecked"]) == {"level", "slope"}
    assert all("poisson" in t and "--truth" in t for t in p["unchecked"].values())
    assert "not checked by this bootstrap" in (tmp_path / "p" / "recommended.toml").read_text()
