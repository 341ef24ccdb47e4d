"""Issue 16: the demos' alerts against their truth files, at the production ARL0 (20,000).

Each test replays a demo scenario's whole feed (the same simulation `elmon demo` appends,
with the demo's own config at ``arl0 = 20000``) and matches every ``elasticity_change`` /
``level_shift`` alert with the scenario's truth file: an alert is true when the same series has
a true change of either kind at most ``WINDOW[scenario]`` before it (a gradual drift of b
counts for an ``elasticity_change`` from its start to ``WINDOW`` after its end), and each true
change is matched once; every other alert is false, alerts at the scenario's data faults
(outages, stock-outs, unit errors, a paused price test) included. Replays take a few seconds
each.

The false-alert bounds come from the design: each chart of each series has an in-control ARL
of ``arl0`` observations, so a scenario of ``S`` series with ``T`` rows each expects about
``2 S T / arl0`` false alerts (two charts); the bound is the Poisson 99.5% quantile of that.
"""

from __future__ import annotations

import re

import pandas as pd
import pytest

import simulators
from monitor.cli.demo import DemoSettings, demo_config_text
from monitor.replay.driver import replay
from monitor.settings import load_config

SEEDS = (1, 2, 3, 4, 5)
#: delay within which a true change must be alerted: a week of hourly feeder data (168 rows);
#: for the daily retail demo the 76 days between its headline change (06-13) and the end of
#: the first two minutes of `make demo` at 2 simulated days a second (08-28)
WINDOW = {"load": pd.Timedelta(days=7), "retail": pd.Timedelta(days=76)}
KINDS = ("elasticity_change", "level_shift")
#: expected false alerts per replay at ARL0 20,000 (2 charts x series x rows / ARL0) and the
#: Poisson 99.5% quantile used as the bound (scipy.stats.poisson.ppf(0.995, mu))
DESIGN = {"load": (2 * 6 * 4368 / 20000, 8), "retail": (2 * 12 * 365 / 20000, 3)}


_RUNS: dict = {}


def _load_run(tmp_path_factory, seed: int):
    """The load demo's replay of ``seed`` at ARL0 20,000 (once per session: the per-seed and
    the pooled tests share it)."""
    if seed not in _RUNS:
        _RUNS[seed] = _replay(tmp_path_factory.mktemp("load"), "load", seed, 20000)
    return _RUNS[seed]


def _replay(tmp_path, scenario: str, seed: int, arl0: int):
    d = tmp_path / f"{scenario}-{seed}"
    d.mkdir()
    sim = simulators.simulate(scenario, seed=seed)
    sim.log.to_csv(d / "log.csv", index=False)
    simulators.write_truth(sim, d / "truth.csv")
    text = demo_config_text(DemoSettings(scenario=scenario, workdir=d), d / "x.sqlite")
    text = re.sub(r"(?m)^arl0 = \d+$", f"arl0 = {arl0}", text.split("[service]")[0])
    assert f"arl0 = {arl0}" in text
    (d / "c.toml").write_text(text)
    replay(d / "log.csv", d / "out", load_config(d / "c.toml"), truth=d / "truth.csv",
           progress=False)
    alerts = pd.read_csv(d / "out" / "alerts.csv")
    truth = pd.read_csv(d / "truth.csv")
    return alerts[alerts.rule.isin(KINDS)], truth


def _match(alerts, truth, window):
    """``(false alerts, {series: (true kind, alert kind, delay)}, missed series)``; missed
    lists the true level shifts and elasticity changes without a matching alert."""
    used, found, false = set(), {}, []
    for a in alerts.itertuples():
        t = pd.Timestamp(a.ts)
        hit = None
        for i, c in enumerate(truth.itertuples()):
            tc = pd.Timestamp(c.ts)
            end = pd.Timestamp(c.end_ts) if isinstance(c.end_ts, str) else tc
            if i in used or c.series != a.series:
                continue
            if ((c.kind in KINDS and tc <= t <= tc + window)
                    or (c.kind == "gradual_drift" and a.rule == "elasticity_change"
                        and tc <= t <= end + window)):
                hit = i
                used.add(i)
                found[c.series] = (c.kind, a.rule, t - tc)
                break
        if hit is None:
            false.append((a.series, a.rule, a.ts))
    missed = [c.series for i, c in enumerate(truth.itertuples())
              if i not in used and c.kind in KINDS]
    return false, found, missed


@pytest.mark.slow
@pytest.mark.parametrize("seed", SEEDS)
def test_load_demo_finds_its_changes_with_the_designed_false_alerts(tmp_path_factory, seed):
    alerts, truth = _load_run(tmp_path_factory, seed)
    false, found, missed = _match(alerts, truth, WINDOW["load"])
    # every true change (mill-21 level shift, east-12 and quarry-14 elasticity changes) is
    # found within a week (168 hourly rows). The level shift's kind is not asserted: in seed 3
    # it is labelled elasticity_change 12 h after it (its first rows are the night and morning
    # hours only, whose prices cannot tell a level from a slope well; measured 23:20 UTC 4 Dec
    # 2026)
    assert missed == [], (missed, found)
    # each elasticity change gets an elasticity_change alert within the week. Its first alert
    # is a level_shift in about 1 of 20 (3 of 60 over seeds 1-30 before and after the
    # controls' sums, 05:00 UTC 5 Dec 2026; seed 3's quarry-14 with them: a level_shift 7 h
    # after a change at midnight, whose first rows are off-peak hours at one price and whose
    # nearest checkpoint is at 20:00, then elasticity_change 44 h after it), so the kind of
    # the first alert is asserted over the five seeds (test below), not per seed
    for series, (kind, rule, delay) in found.items():
        if kind == "elasticity_change" and rule != "elasticity_change":
            tc = truth[(truth.series == series) & (truth.kind == kind)].ts.map(pd.Timestamp)
            ec = alerts[(alerts.series == series) & (alerts.rule == "elasticity_change")]
            t = ec.ts.map(pd.Timestamp)
            assert any(((t >= c) & (t <= c + WINDOW["load"])).any() for c in tc), (series, found)
    # false alerts: 6 feeders x 4,368 hourly rows x 2 charts / 20,000 = 2.6 expected; bound 8,
    # the Poisson 99.5% quantile. Measured 1 / 3 / 4 / 3 / 0 for seeds 1-5 and a mean of 2.0
    # over seeds 1-10 (13:00 UTC 5 Dec 2026, with the aligned level candidates for series
    # with controls; at 05:00 1 / 3 / 5 / 3 / 0, 2.1, and 1.7 over seeds 11-30; 5 / 5 / 8 /
    # 6 / 4 and means 5.6 and 4.6 before the detector kept its controls' sums: the response
    # sums then held the control fit's c as it was when each row came; 16-20 before it
    # fitted the controls)
    mu, bound = DESIGN["load"]
    assert len(false) <= bound, (mu, false)


@pytest.mark.slow
def test_load_demo_false_alerts_over_five_seeds_are_within_the_design(tmp_path_factory):
    # pooled over seeds 1-5 the design expects 5 x 2.62 = 13.1 false alerts; bound 23, the
    # Poisson 99.5% quantile (scipy.stats.poisson.ppf(0.995, 13.104)). Measured 12 (05:00 UTC
    # 5 Dec 2026); 28 before the detector kept its controls' sums (P(>= 28) = 0.0002 under the
    # design). The first alert on each of the ten elasticity changes is elasticity_change in
    # at least 9 (measured 9: seed 3's quarry-14 opens with a level_shift, see above)
    false, first = 0, []
    for seed in SEEDS:
        alerts, truth = _load_run(tmp_path_factory, seed)
        f, found, _ = _match(alerts, truth, WINDOW["load"])
        false += len(f)
        first += [rule for kind, rule, _ in found.values() if kind == "elasticity_change"]
    mu = DESIGN["load"][0] * len(SEEDS)
    assert false <= 23, (mu, false)
    assert len(first) == 2 * len(SEEDS) and first.count("elasticity_change") >= 9, first


@pytest.mark.slow
@pytest.mark.parametrize("seed", SEEDS)
def test_retail_demo_finds_its_changes_with_the_designed_false_alerts(tmp_path, seed):
    alerts, truth = _replay(tmp_path, "retail", seed, 20000)
    false, found, missed = _match(alerts, truth, WINDOW["retail"])
    # the headline (elm-cross/rye-crackers, b -1.4 -> -2.2 on 06-13, a deep price test:
    # simulators.retail.HEADLINE_LADDER) within the first two minutes of `make demo` (76 days),
    # as an elasticity change. Measured 13 / 32 / 28 / 56 / 32 days for seeds 1-5 and at most 56
    # over seeds 1-9 (lead, 02:00 UTC 5 Dec 2026); on the common ladder it took a median of 113
    # days
    headline = "elm-cross/rye-crackers"
    assert found.get(headline, ("", "", None))[1] == "elasticity_change", (found, false)
    assert "millbrook/oat-bar" in found and found["millbrook/oat-bar"][1] == "level_shift", found
    assert missed == [], missed
    # false alerts: 12 series x 365 days x 2 charts / 20,000 = 0.44 expected; bound 3, the
    # Poisson 99.5% quantile. Measured 0 / 0 / 1 / 1 / 1 for seeds 1-5 and 0-2 over seeds 1-9
    mu, bound = DESIGN["retail"]
    assert len(false) <= bound, (mu, false)
