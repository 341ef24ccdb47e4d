"""Alert policy (dedupe, auto-resolve, cooldown, gating), episode trackers, messages and
severities, and the threshold design by simulation."""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pytest

from monitor.detectors import PageHinkley
from monitor.errors import ConfigError
from monitor.detectors.arl import cusum_h_for_arl0
from monitor.detectors.kernels import F_ALARM, F_REST_DN, F_REST_UP, F_USED
from monitor.detectors.design import PRECOMPUTED, pipeline_threshold
from monitor.pipeline.messages import (EV_ACTION, EV_BETA, EV_EXTRA, EV_HI, EV_KIND, EV_LO, EV_N,
                                       EV_OLD_B, EV_OLD_HI, EV_OLD_LO, EV_ROW, EV_SIDE, EV_SIZE,
                                       EV_START_N, EV_START_TS, EV_STAT, EV_TS, NEV,
                                       effect_of_10pct, details,
                                       events_frame, message, severity)
from monitor.pipeline.rules import (E_B, E_CNT, E_START_N, E_SUM, EP_SIDE, EP_SIZE, KINDS,
                                    AlertRule, episode_restart, episode_step)


def test_impulse_rule_dedupes_auto_resolves_and_cools_down():
    rule = AlertRule("level_shift", clear_after=5, cooldown=5)
    fire = np.zeros(40, bool)
    fire[[2, 4, 6]] = True          # one episode with re-alarms: one alert
    fire[[13, 15]] = True           # inside the cooldown after the clear at 11: ignored
    fire[[25]] = True               # after the cooldown: a new alert
    acts = [rule.update(f) for f in fire]
    assert [(i, a) for i, a in enumerate(acts) if a] == [(2, "open"), (11, "clear"), (25, "open"),
                                                          (30, "clear")]
    st = json.loads(json.dumps(rule.to_state()))
    assert AlertRule.from_state(st).to_state() == rule.to_state()


def test_gated_observations_neither_open_nor_count_towards_the_clear():
    rule = AlertRule("elasticity_change", clear_after=3, cooldown=0)
    assert rule.update(True, allowed=False) is None          # warming up: no alert
    assert rule.update(True) == "open"
    assert [rule.update(False, allowed=False) for _ in range(10)] == [None] * 10
    assert [rule.update(False) for _ in range(3)] == [None, None, "clear"]


def test_level_rule_follows_its_detector_and_respects_cooldown():
    rule = AlertRule("out_of_bounds", clear_after=1, cooldown=4)
    active = [0, 1, 1, 0, 1, 1, 1, 1, 1, 1, 0]
    acts = [rule.update(bool(a), release=not a) for a in active]
    # opens with the detector, clears with it, and re-opens only after 4 observations
    assert acts == [None, "open", None, "clear", None, None, None, None, "open", None, "clear"]


def test_rule_validation():
    with pytest.raises(ValueError, match="kind = 'drift': must be one of out_of_bounds"):
        AlertRule("drift")
    with pytest.raises(ValueError, match=r"cooldown = -1: must be in \[0"):
        AlertRule("level_shift", cooldown=-1)
    assert KINDS == ("out_of_bounds", "elasticity_change", "level_shift", "sign_flip",
                     "low_variation")


def test_episode_tracker_finds_the_start_and_the_estimate_before_it():
    e = np.zeros(EP_SIZE)
    # the upper statistic rests at observations 1-3, rises from 4, alarms at 7
    for n in range(1, 8):
        rest = F_REST_UP if n <= 3 else 0
        flags = F_USED | rest | F_REST_DN | (F_ALARM if n == 7 else 0)
        episode_step(e, 0, flags, float(n), float(n * 100), -1.0 - 0.01 * n, -1.5, -0.5,
                     float(n))
    assert e[E_START_N] == 4.0 and e[E_B] == pytest.approx(-1.03)
    assert e[E_CNT] == 4.0 and e[E_SUM] == 4 + 5 + 6 + 7      # observations 4..7
    # the lower side rested until the alarm; the alarm observation belongs to both excursions
    assert e[EP_SIDE + E_CNT] == 1.0 and e[EP_SIDE + E_START_N] == 7.0
    episode_restart(e, 0, -2.0, -2.5, -1.5)
    assert e[E_B] == -2.0 and e[E_CNT] == 0.0


def _record(kind, action="open", **kw):
    r = np.full(NEV, np.nan)
    r[EV_ROW], r[EV_KIND], r[EV_ACTION] = 0, KINDS.index(kind), 1 if action == "open" else 2
    r[EV_N], r[EV_START_N], r[EV_TS], r[EV_START_TS] = 900, 850, 1.77e18, 1.7698e18
    r[EV_SIDE] = -1.0
    for k, v in kw.items():
        r[{"b": EV_BETA, "lo": EV_LO, "hi": EV_HI, "ob": EV_OLD_B, "olo": EV_OLD_LO,
           "ohi": EV_OLD_HI, "size": EV_SIZE, "extra": EV_EXTRA}[k]] = v
    return r


def test_effect_of_a_price_rise_is_exact():
    # (p2 / p1)^b - 1 at p2 / p1 = 1.1 (DESIGN.md; common practice): not 0.1 b
    for b in (-0.5, -1.5, -2.0, -3.2, 0.4):
        assert effect_of_10pct(b) == f"{100 * (1.1 ** b - 1):+.1f}%"
    assert effect_of_10pct(-2.0) == "-17.4%" and effect_of_10pct(math.nan) == "unknown"


def test_effect_of_a_price_rise_of_an_extreme_b_does_not_overflow():
    # 1.1^b overflows a float64 above b ~ 7,447 (log(1.8e308) / log(1.1)); such an estimate
    # (b not identified) once gave "+inf%" and a numpy overflow warning in the alert text
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert effect_of_10pct(np.float64(8000.0)) == "more than +100000000%"
        assert effect_of_10pct(np.float64(-8000.0)) == "-100.0%"
        assert effect_of_10pct(150.0) == "more than +100000000%"      # 1.1^150 - 1 = 1.6e6
        assert effect_of_10pct(140.0) == f"{100 * (1.1 ** 140 - 1):+.1f}%"   # 6.3e5: spelt out
        r = np.full(NEV, np.nan)
        r[EV_BETA] = 8000.0
        assert details("elasticity_change", "open", r)["effect_of_10pct_price_rise"] == 1e6


def test_messages_and_severities_per_kind():
    r = _record("elasticity_change", b=-2.1, lo=-2.5, hi=-1.7, ob=-1.2, olo=-1.4, ohi=-1.0,
                size=-0.9, extra=-3.0)
    m = message("elasticity_change", "open", "harbor/oat-bar", r)
    assert "from b = -1.20 [-1.40, -1.00] to b = -2.10 [-2.50, -1.70]" in m
    assert "-18.1%" in m and "(before: -10.8%)" in m and "2026-01-30T" in m
    assert severity("elasticity_change", "open", r) == "critical"      # intervals apart
    r2 = r.copy()
    r2[EV_LO], r2[EV_HI] = -2.5, -1.1           # now overlapping [-1.4, -1.0]
    assert severity("elasticity_change", "open", r2) == "warning"
    ls = _record("level_shift", b=-1.5, lo=-1.7, hi=-1.3, ob=-1.5, olo=-1.7, ohi=-1.3,
                 size=math.log(0.8))
    assert "about 20% below the model" in message("level_shift", "open", "s", ls)
    assert severity("level_shift", "open", ls) == "warning"
    ls[EV_SIZE] = math.log(0.4)
    assert severity("level_shift", "open", ls) == "critical"
    ob = _record("out_of_bounds", b=-0.3, lo=-0.45, hi=-0.15, ob=-0.8, olo=-1.0, ohi=-0.6,
                 size=-4.0, extra=-0.5)
    ob[EV_SIDE] = 1.0
    assert "above the allowed range [-4, -0.5]" in message("out_of_bounds", "open", "s", ob)
    assert severity("out_of_bounds", "open", ob) == "critical"
    assert severity("out_of_bounds", "open", ob, interval_mode=False) == "warning"
    lv = _record("low_variation", b=-1.5, lo=-1.9, hi=-1.1, size=0.004, extra=0.02)
    lv[EV_STAT] = 0.005                          # the raw sd: low as well
    m = message("low_variation", "open", "s", lv)
    assert "prices have barely varied" in m and "before the controls" not in m
    assert "left after the intercept and the controls 0.4% < 2.0%)" in m
    lv[EV_STAT] = 0.202                          # a price that only the controls move
    m = message("low_variation", "open", "s", lv)
    assert "the price has moved only with the controls" in m
    assert "0.4% < 2.0%; before the controls 20.2%" in m
    assert details("low_variation", "open", lv)["raw_log_price_sd"] == 0.202
    assert severity("low_variation", "open", lv) == "info"
    cl = _record("sign_flip", action="clear", b=-1.1, lo=-1.4, hi=-0.8, size=120)
    assert severity("sign_flip", "clear", cl) == "info"
    assert "resolved at 2026-" in message("sign_flip", "clear", "s", cl)
    frame = events_frame(np.vstack([r, cl]), np.array([3]), names=["a", "b", "c", "d"])
    assert frame["message"].str.startswith("d: ").all()
    assert json.loads(json.dumps(frame["details"].tolist())) == frame["details"].tolist()


def test_load_wording_speaks_of_load_and_tariffs_not_shops():
    # issue 16: feeder alerts said "Look for a competitor, assortment, channel..."
    from monitor.pipeline.messages import WORDING
    from monitor.pipeline.settings import WORDINGS, RuleSettings

    assert set(WORDING) == set(WORDINGS)
    ec = _record("elasticity_change", b=-0.25, lo=-0.3, hi=-0.2, ob=-0.1, olo=-0.13, ohi=-0.07,
                 size=-0.15, extra=-3.0)
    ls = _record("level_shift", b=-0.2, lo=-0.25, hi=-0.15, ob=-0.2, olo=-0.25, ohi=-0.15,
                 size=math.log(1.12))
    lv = _record("low_variation", b=-0.2, lo=-0.3, hi=-0.1, size=0.004, extra=0.02)
    for kind, r in (("elasticity_change", ec), ("level_shift", ls), ("low_variation", lv)):
        retail = message(kind, "open", "feeder-north-07", r)
        load = message(kind, "open", "feeder-north-07", r, wording="load")
        assert load != retail
        for shop_word in ("competitor", "assortment", "stock-out", "promotion", "price test"):
            assert shop_word not in load, (kind, shop_word, load)
    assert "tariff" in message("elasticity_change", "open", "f", ec, wording="load")
    assert "load is about 12% above the model" in message("level_shift", "open", "f", ls,
                                                           wording="load")
    assert "changes load by" in message("level_shift", "open", "f", ls, wording="load")
    assert "competitor" in message("elasticity_change", "open", "s", ec)   # retail by default
    frame = events_frame(np.vstack([ls]), np.array([0]), names=["f"], wording="load")
    assert frame["message"].str.contains("new connections").all()
    with pytest.raises(ConfigError, match=r"\[rules\] wording = 'farm'"):
        RuleSettings(wording="farm")
    # the setting reaches the alert texts of a pipeline run: a price held flat from row 60
    from monitor.estimators import ElasticityRLS
    from monitor.pipeline.run import Pipeline

    rng = np.random.default_rng(3)
    n = 200
    x = np.where(np.arange(n) < 60, rng.normal(0.0, 0.2, n), 0.0)
    X = np.column_stack([np.ones(n), x])
    y = 3.0 - 0.2 * x + rng.normal(0.0, 0.05, n)
    texts = {}
    for wording in ("retail", "load"):
        pipe = Pipeline(ElasticityRLS(forgetting=0.95), rules=RuleSettings(wording=wording))
        ev = pipe.run(np.zeros(n, np.int64), X, y, 1).events
        texts[wording] = ev.loc[ev["kind"] == "low_variation", "message"].tolist()
    assert texts["retail"] and "planned price test" in texts["retail"][0]
    assert texts["load"] and "tariff trial" in texts["load"][0]


# ----------------------------------------------------------------------------- design
def test_design_at_forgetting_one_agrees_with_normal_theory():
    # with forgetting 1 the recursive residuals are independent (Brown, Durbin & Evans 1975;
    # from memory) and nearly normal after warm-up, so the simulated design must land on the
    # exact iid-normal h of monitor.detectors.arl within the simulation's error
    d = pipeline_threshold("level", "cusum", 2000.0, forgetting=1.0, n_paths=1000, seed=3, k=0.5)
    exact = cusum_h_for_arl0(0.5, 2000.0)
    assert abs(d.threshold - exact) < 4 * d.threshold_se + 0.05, (d, exact)
    # with forgetting 0.99 the innovations are negatively autocorrelated at long lags: the same
    # ARL0 needs a clearly lower h (precomputed table, 2000 paths)
    low = pipeline_threshold("level", "cusum", 20000.0, k=0.5).threshold
    assert low < cusum_h_for_arl0(0.5, 20000.0) - 0.4


def test_page_hinkley_default_threshold_gives_its_arl0_on_iid_values():
    det = PageHinkley(delta=0.5, arl0=1000.0)           # designed by simulation (precomputed)
    assert det.threshold == PRECOMPUTED[("iid", "page_hinkley", 1.0, 0.0, 0.0,
                                         (("delta", 0.5), ("alpha", 1.0), ("min_instances", 30.0)),
                                         1000.0)][0]
    x = np.random.default_rng(77).standard_normal(1_000_000)
    alarms = int(np.count_nonzero(det.update_many(x) & F_ALARM))
    # count sd ~ sqrt(count) plus the design's 2.2% (2000 paths): 4 sd band
    assert abs(alarms / 1000.0 - 1.0) < 4 * math.sqrt(1 / 1000.0 + 0.022 ** 2), alarms


def test_design_validation_and_caching():
    with pytest.raises(ValueError, match=r"arl0 = 5: must be in \[20, 1e\+06\]"):
        pipeline_threshold("level", "cusum", 5)
    with pytest.raises(ValueError, match="signal = 'noise': must be one of iid, level, slope"):
        pipeline_threshold("noise", "cusum", 1000)
    with pytest.raises(ValueError, match="chart = 'shewhart'"):
        pipeline_threshold("level", "shewhart", 1000)
    a = pipeline_threshold("slope", "cusum", 500.0, n_paths=100, seed=5, k=1.0)
    b = pipeline_threshold("slope", "cusum", 500.0, n_paths=100, seed=5, k=1.0)
    assert a == b and a.method == "simulation" and a.threshold > cusum_h_for_arl0(1.0, 500.0)


@pytest.mark.slow
def test_precomputed_defaults_reproduce_by_an_independent_simulation():
    for signal, k in (("level", 0.5), ("slope", 1.0)):
        key = next(key for key in PRECOMPUTED if key[0] == signal and key[1] == "cusum"
                   and key[-1] == 5000.0)
        h, _, h_se, _ = PRECOMPUTED[key]
        d = pipeline_threshold(signal, "cusum", 5000.0, n_paths=400, seed=99, k=k)
        assert abs(d.threshold - h) < 4 * math.hypot(h_se, d.threshold_se), (signal, d, h)
