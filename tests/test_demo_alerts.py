"""Issue 16: the demos' alerts against their truth files, at the production ARL0 (20,000).

Each test replays a demo scenario's whole feed (the same simulation `elmon demo` appends,
with the demo's own config but ``arl0 = 20000``) for seeds 1-3 and matches every
``elasticity_change`` / ``level_shift`` alert with the scenario's truth file: an alert is true
when the same series has a true change of either kind at most ``WINDOW`` before it, and each
true change is matched once; every other alert is false. Replays take a few seconds each.
"""

from __future__ import annotations

import re

import pandas as pd
import pytest

import simulators
from monitor.cli.demo import DemoSettings, demo_config_text
from monitor.replay.driver import replay
from monitor.settings import load_config

SEEDS = (1, 2, 3)
WINDOW = pd.Timedelta(days=7)
KINDS = ("elasticity_change", "level_shift")


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
    return alerts[alerts.rule.isin(KINDS)], truth[truth.kind.isin(KINDS)]


def _match(alerts, truth):
    """``(false alerts, {series: (true kind, alert kind, delay)}, missed series)``."""
    used, found, false = set(), {}, []
    for a in alerts.itertuples():
        t = pd.Timestamp(a.ts)
        hit = None
        for i, c in enumerate(truth.itertuples()):
            tc = pd.Timestamp(c.ts)
            if i not in used and c.series == a.series and tc <= t <= tc + WINDOW:
                hit = i
                used.add(i)
                found[c.series] = (c.kind, a.rule, t - tc)
                break
        if hit is None:
            false.append((a.series, a.rule, a.ts))
    missed = [c.series for i, c in enumerate(truth.itertuples()) if i not in used]
    return false, found, missed


@pytest.mark.slow
@pytest.mark.parametrize("seed", SEEDS)
def test_load_demo_finds_its_changes_with_few_false_alerts_at_production_arl0(tmp_path, seed):
    alerts, truth = _replay(tmp_path, "load", seed, 20000)
    false, found, missed = _match(alerts, truth)
    # every true change (mill-21 level shift, east-12 and quarry-14 elasticity changes) is
    # found within a week, with its own kind
    assert missed == [], (missed, found)
    assert all(kind == rule for kind, rule, _ in found.values()), found
    # false alerts over 6 feeders x half a year: measured 2 / 3 / 3 for seeds 1-3 with the
    # detector's own control fit (16-20 with slow means of the estimator's coefficients,
    # 26-34 with its current ones); the true coefficients give 0-2 (see the xfail below)
    assert len(false) <= 3, false


@pytest.mark.slow
@pytest.mark.xfail(strict=True, reason="issue 16 open: at ARL0 20,000 the load demo still "
                   "raises 2 / 3 / 3 false change alerts (seeds 1-3, 6 feeders, half a year; "
                   "measured 20:25 UTC 4 Dec 2026) and the retail demo 1 / 1 / 2, and the retail "
                   "headline (rye-crackers) is not alerted within a week of its change in any "
                   "of the three seeds")
def test_demo_alerts_are_only_the_true_changes_at_production_arl0(tmp_path):
    for scenario in ("load", "retail"):
        for seed in SEEDS:
            alerts, truth = _replay(tmp_path, scenario, seed, 20000)
            false, found, missed = _match(alerts, truth)
            assert false == [] and missed == [], (scenario, seed, false, missed)
