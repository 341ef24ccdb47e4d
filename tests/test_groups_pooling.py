"""Partial pooling of elasticities in groups (monitor.groups.pooling, monitor.groups.stream).

Outside references: statsmodels' ``combine_effects`` (statsmodels.stats.meta_analysis, method
"dl": DerSimonian & Laird 1986) for the between-series variance and the random-effects mean;
statsmodels' ``multipletests(method="fdr_bh")`` for the Benjamini & Hochberg (1995) rule.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.meta_analysis import combine_effects
from statsmodels.stats.multitest import multipletests

from monitor.estimators import ElasticityRLS
from monitor.estimators.batch import run_batch
from monitor.groups.pooling import bh_reject, dl_tau2, pool_group, pool_snapshot
from monitor.groups.stream import pooled_columns

GROUP_MEANS = (-0.8, -1.4, -2.0, -2.6)
TAU = 0.3          # true between-series sd of b inside a group
PRICE_SD = 0.1     # sd of log price (a randomized price test around a list price)
NOISE_SD = 0.3     # sd of the log-quantity error


def simulate_fleet(seed: int, per_group: int = 50):
    """200 series in 4 groups, 30-60 observations each, known b; b and se from the project's
    estimator (forgetting 1, i.e. least squares, which a reference test holds equal to OLS)."""
    rng = np.random.default_rng(seed)
    true_b, groups, sid, lp, y = [], [], [], [], []
    s = 0
    for g, mu in enumerate(GROUP_MEANS):
        for _ in range(per_group):
            b = mu + TAU * rng.standard_normal()
            n = int(rng.integers(30, 61))
            x = PRICE_SD * rng.standard_normal(n)
            true_b.append(b)
            groups.append(f"cat{g}")
            sid.append(np.full(n, s))
            lp.append(x)
            y.append(3.0 + b * x + NOISE_SD * rng.standard_normal(n))
            s += 1
    sid, lp, y = np.concatenate(sid), np.concatenate(lp), np.concatenate(y)
    X = np.column_stack([np.ones_like(lp), lp])
    res = run_batch(ElasticityRLS(forgetting=1.0), sid, X, y)
    last = np.r_[np.flatnonzero(np.diff(sid)), len(sid) - 1]
    frame = pd.DataFrame({"series": [f"s{i:03d}" for i in range(s)], "group": groups,
                          "beta": res.beta[last], "beta_se": res.beta_se[last]})
    return frame, np.array(true_b)


def test_between_series_variance_equals_statsmodels_dl():
    frame, _ = simulate_fleet(seed=5)
    positive = 0
    for g, part in frame.groupby("group"):
        b, se = part["beta"].to_numpy(), part["beta_se"].to_numpy()
        ref = combine_effects(b, se ** 2, method_re="dl")   # statsmodels, DerSimonian-Laird
        tau2, q, mu_fe = dl_tau2(b, se ** 2)
        # statsmodels reports the raw moment value; DerSimonian & Laird (1986) truncate at 0
        assert tau2 == pytest.approx(max(ref.tau2, 0.0), abs=1e-8)
        assert q == pytest.approx(ref.q, rel=1e-10)
        assert mu_fe == pytest.approx(ref.mean_effect_fe, abs=1e-10)
        if ref.tau2 <= 0:
            continue
        positive += 1
        pg = pool_group(b, se)
        assert pg.mean == pytest.approx(ref.mean_effect_re, abs=1e-10)
        # Hartung-Knapp variance of the mean (statsmodels' var_hksj_re), floored at 1/sum w*
        assert pg.mean_se ** 2 == pytest.approx(max(ref.var_hksj_re, ref.sd_eff_w_re ** 2),
                                                rel=1e-9)
    assert positive >= 3      # the random-effects mean and its variance were compared too


def test_tau2_truncated_at_zero_when_q_below_its_df():
    b = np.array([-1.2, -1.5, -1.9, -1.4])
    se = np.array([0.3, 0.2, 0.4, 0.25])
    ref = combine_effects(b, se ** 2, method_re="dl")
    assert ref.tau2 < 0          # statsmodels reports the raw moment estimate here
    tau2, _, mu_fe = dl_tau2(b, se ** 2)
    assert tau2 == 0.0           # DerSimonian & Laird (1986): max(0, .)
    pg = pool_group(b, se)
    assert pg.mean == pytest.approx(mu_fe, abs=1e-12)
    assert np.allclose(pg.pooled, pg.mean)    # no spread between series: all pooled to the mean


def test_pooled_rmse_at_most_0_7_of_per_series():
    ratios = []
    for seed in (11, 12, 13):
        frame, true_b = simulate_fleet(seed)
        per_series, per_group = pool_snapshot(frame)
        assert per_series["beta_pooled"].notna().all()
        rmse_own = np.sqrt(np.mean((frame["beta"] - true_b) ** 2))
        rmse_pooled = np.sqrt(np.mean((per_series["beta_pooled"] - true_b) ** 2))
        ratios.append(rmse_pooled / rmse_own)
        assert rmse_pooled <= 0.7 * rmse_own, (seed, rmse_pooled, rmse_own)
        assert per_group["n_pooled"].tolist() == [50, 50, 50, 50]
    print("pooled / own RMSE:", np.round(ratios, 3))


@pytest.mark.slow
def test_group_mean_band_covers_true_mean_95_percent():
    """1,000 replications x 4 groups = 4,000 bands: the binomial sd of the coverage is 0.34%,
    so the +-2% tolerance is about 6 sd wide. Measured while writing this test (1,600 bands
    each, seeds 1-3): 0.941-0.948 with the modified Hartung-Knapp band, 0.935-0.943 with the
    plain Wald band, which is why the former is the default. Per-series b and se are least squares fits done in
    closed form here (the estimator at forgetting 1 equals OLS, tests/test_estimator_reference.py)
    so the replications stay fast."""
    rng = np.random.default_rng(2026)
    hits = total = 0
    for _ in range(1000):
        for mu in GROUP_MEANS:
            k = 50
            b_true = mu + TAU * rng.standard_normal(k)
            n = rng.integers(30, 61, k)
            b_hat, se = np.empty(k), np.empty(k)
            for i in range(k):
                x = PRICE_SD * rng.standard_normal(n[i])
                y = 3.0 + b_true[i] * x + NOISE_SD * rng.standard_normal(n[i])
                xc = x - x.mean()
                b_hat[i] = (xc @ (y - y.mean())) / (xc @ xc)
                resid = y - y.mean() - b_hat[i] * xc
                se[i] = np.sqrt(resid @ resid / (n[i] - 2) / (xc @ xc))
            g = pool_group(b_hat, se)
            hits += g.mean_lo <= mu <= g.mean_hi
            total += 1
    coverage = hits / total
    print(f"coverage {coverage:.4f} over {total} bands")
    assert abs(coverage - 0.95) <= 0.02


def test_bh_equals_statsmodels_multipletests():
    rng = np.random.default_rng(4)
    p = np.concatenate([rng.uniform(size=80), rng.uniform(0, 0.002, size=20)])
    p[3] = np.nan
    ours = bh_reject(p, 0.1)
    ok = np.isfinite(p)
    ref = multipletests(p[ok], alpha=0.1, method="fdr_bh")[0]   # statsmodels
    assert ours[ok].tolist() == ref.tolist()
    assert not ours[3]
    assert ours.sum() >= 20


def test_series_that_differ_are_flagged_and_null_groups_rarely():
    frame, true_b = simulate_fleet(seed=21)
    odd = frame.index[frame["group"] == "cat1"][:4]
    frame.loc[odd, "beta"] += 3.0                      # four series far from their group
    per_series, per_group = pool_snapshot(frame, fdr=0.05)
    assert per_series.loc[odd, "differs"].all()
    assert per_group.set_index("group").loc["cat1", "n_differ"] >= 4


def test_identical_series_are_rarely_flagged():
    """Global null (every series of a group has its group's b): BH keeps the chance of any
    flag in a fleet at or below the FDR (5%); over 4 fleets we allow one stray flag."""
    global TAU
    saved, TAU = TAU, 0.0
    try:
        flags = [int(pool_snapshot(simulate_fleet(seed)[0])[0]["differs"].sum())
                 for seed in (31, 32, 33, 34)]
    finally:
        TAU = saved
    assert sum(flags) <= 1, flags


def test_snapshot_handles_missing_se_small_groups_and_no_group():
    frame = pd.DataFrame({"series": list("abcdefg"),
                          "group": ["x", "x", "x", "x", "y", "y", None],
                          "beta": [-1.0, -1.2, -1.5, np.nan, -2.0, -2.1, -1.0],
                          "beta_se": [0.2, 0.3, 0.25, np.nan, 0.2, 0.2, 0.1]})
    per_series, per_group = pool_snapshot(frame)
    assert per_series["beta_pooled"].notna().tolist() == [True, True, True, False, False, False, False]
    assert per_group.set_index("group")["n_pooled"].to_dict() == {"x": 3, "y": 2}
    assert np.isnan(per_group.set_index("group").loc["y", "mean"])


def test_stream_equals_snapshot_at_every_row():
    """The compiled per-row pooling equals pool_group over the members' current estimates."""
    rng = np.random.default_rng(8)
    rows = []
    for t in range(40):
        for s in rng.choice(12, size=5, replace=False):
            se = np.nan if rng.uniform() < 0.1 else rng.uniform(0.1, 0.5)
            rows.append({"series": f"s{s}", "ts": f"2024-01-01T{t // 60:02d}:{t % 60:02d}:00Z",
                         "beta": -1.5 + rng.normal(0, 0.4), "beta_se": se})
    est = pd.DataFrame(rows).sample(frac=1.0, random_state=1)     # any row order
    group_of = {f"s{i}": ("g1" if i < 7 else "g2") for i in range(11)}   # s11 has no group
    got = pooled_columns(est, group_of)
    ordered = est.sort_values("ts", kind="stable")
    current: dict = {}
    checked = 0
    for idx, r in ordered.iterrows():
        current[r["series"]] = (r["beta"], r["beta_se"])
        g = group_of.get(r["series"])
        assert got.loc[idx, "group"] is g or got.loc[idx, "group"] == g
        members = [current[s] for s in current if group_of.get(s) == g
                   and np.isfinite(current[s][1])]
        if g is None or not np.isfinite(r["beta_se"]) or len(members) < 3:
            assert np.isnan(got.loc[idx, "beta_pooled"])
            continue
        b, se = np.array(members).T
        ref = pool_group(b, se)
        i = [k for k, s in enumerate(s for s in current if group_of.get(s) == g
                                     and np.isfinite(current[s][1])) if s == r["series"]][0]
        assert got.loc[idx, "beta_pooled"] == pytest.approx(ref.pooled[i], abs=1e-12)
        assert got.loc[idx, "beta_pooled_se"] == pytest.approx(ref.pooled_se[i], abs=1e-12)
        checked += 1
    assert checked > 150


def test_pool_group_validates_inputs():
    with pytest.raises(ValueError, match="at least 3"):
        pool_group([-1.0, -2.0], [0.1, 0.1])
    with pytest.raises(ValueError, match="finite"):
        pool_group([-1.0, -2.0, np.nan], [0.1, 0.1, 0.1])
    with pytest.raises(ValueError, match="method"):
        pool_group([-1.0, -2.0, -1.5], [0.1, 0.1, 0.1], method="reml")
