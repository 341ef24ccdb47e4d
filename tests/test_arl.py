"""Tests of the ARL calculator (monitor.detectors.arl, monitor.detectors.arl_mc) and the ``elmon arl`` command."""

from __future__ import annotations

import ast
import json
import math
import pathlib
import subprocess
import sys

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import norm

from monitor.cli import main
from monitor.detectors import arl, arl_mc
from monitor.errors import ConfigError


ROOT = pathlib.Path(__file__).resolve().parents[1]


def _table_ok(value: float, tabled: float, decimals: int) -> bool:
    """A value printed to ``decimals`` places is matched when ours rounds to it (half a unit
    in the last place, plus 1e-9 for float noise)."""
    return abs(value - tabled) <= 0.5 * 10.0 ** (-decimals) + 1e-9


# ----------------------------------------------------------------------------- CUSUM tables
# As quoted in the issue, from Lucas & Crosier (1982) Table 1: two-sided CUSUM, k = 0.5, h = 4.
LUCAS_CROSIER_K05_H4 = [(0.0, 168.0, 0), (0.5, 26.6, 1), (1.0, 8.38, 2), (2.0, 3.34, 2),
                        (3.0, 2.19, 2)]


@pytest.mark.parametrize("method", ["integral", "markov"])
@pytest.mark.parametrize("shift,tabled,decimals", LUCAS_CROSIER_K05_H4)
def test_two_sided_cusum_matches_lucas_crosier_1982(method, shift, tabled, decimals):
    # Lucas & Crosier (1982) Table 1, as quoted in the issue
    assert _table_ok(arl.cusum_arl(0.5, 4.0, shift, sides=2, method=method), tabled, decimals)


@pytest.mark.parametrize("method", ["integral", "markov"])
def test_one_sided_cusum_matches_brook_evans_1972(method):
    # Brook & Evans (1972): one-sided CUSUM, k = 0.5, h = 3, in control: ARL 117.6
    assert _table_ok(arl.cusum_arl(0.5, 3.0, 0.0, sides=1, method=method), 117.6, 1)


def test_cusum_integral_and_markov_agree():
    # two independent numerical methods; the Markov chain's O(width^2) error is removed by one
    # Richardson step, leaving about 1e-8 relative for moderate ARLs and about 1e-6 for ARLs
    # near 1e9 (observed 1.2e-6 at k = 0, h = 3, shift -1), hence 5e-6
    for k, h in [(0.0, 3.0), (0.25, 8.0), (0.5, 4.0), (1.0, 2.5), (1.5, 1.0)]:
        for sides in (1, 2):
            shifts = np.array([-1.0, 0.0, 0.5, 1.0, 2.0])
            a = arl.cusum_arl(k, h, shifts, sides, method="integral")
            b = arl.cusum_arl(k, h, shifts, sides, method="markov")
            np.testing.assert_allclose(a, b, rtol=5e-6)


def test_cusum_quadrature_has_converged():
    # Gauss-Legendre on a smooth kernel converges geometrically: quadrupling the nodes moves
    # the answer by less than 1e-9 relative (common practice for a Nystrom convergence check)
    for k, h in [(0.5, 4.0), (0.25, 15.9), (0.5, 12.7)]:
        coarse = arl.cusum_arl(k, h, [0.0, 1.0], n_nodes=int(5 * math.ceil(h)))
        fine = arl.cusum_arl(k, h, [0.0, 1.0], n_nodes=int(20 * math.ceil(h)))
        np.testing.assert_allclose(coarse, fine, rtol=1e-9)


def test_cusum_scalar_and_array_shapes():
    assert isinstance(arl.cusum_arl(0.5, 4.0), float)
    out = arl.cusum_arl(0.5, 4.0, [[0.0, 1.0], [2.0, 3.0]])
    assert out.shape == (2, 2)
    assert out[0, 1] == pytest.approx(arl.cusum_arl(0.5, 4.0, 1.0), rel=1e-14)


def test_two_sided_relation_lemma_upper_is_zero_at_a_lower_alarm():
    # The exactness argument for 1/ARL = 1/ARL+ + 1/ARL- (Van Dobben de Bruyn 1968): with
    # zero starts and k >= 0, S+ is exactly 0 whenever S- first exceeds h. Checked on paths.
    rng = np.random.default_rng(7)
    for k, h in [(0.0, 2.0), (0.25, 5.0), (0.5, 4.0)]:
        x = rng.normal(0.0, 1.0, size=(2000, 400))
        up = np.zeros(2000)
        down = np.zeros(2000)
        alive = np.ones(2000, bool)
        checked = 0
        for t in range(x.shape[1]):
            up = np.maximum(0.0, up + x[:, t] - k)
            down = np.maximum(0.0, down - x[:, t] - k)
            lower_alarm = alive & (down > h)
            checked += lower_alarm.sum()
            assert np.all(up[lower_alarm] == 0.0)
            alive &= ~((up > h) | (down > h))
        assert checked > 100


def test_huge_arl_is_reported_as_infinite():
    # above ARL_CEILING the float64 solve cannot resolve the value; the chart never signals
    assert arl.cusum_arl(0.5, 4.0, -6.0, sides=1) == math.inf
    assert math.isfinite(arl.cusum_arl(0.5, 4.0, -6.0, sides=2))


# ----------------------------------------------------------------------------- Siegmund
def test_siegmund_within_its_known_accuracy_for_small_shifts():
    # Siegmund (1985) vs the exact integral-equation ARL at k = 0.5, h = 4. The issue quotes
    # "about 2% for shifts up to 1 sd"; observed here: at most 0.82% (at shift 0), so 1%.
    shifts = np.linspace(0.0, 1.0, 11)
    rel = arl.siegmund_arl(0.5, 4.0, shifts) / arl.cusum_arl(0.5, 4.0, shifts) - 1.0
    assert np.max(np.abs(rel)) < 0.01
    # and it degrades for large shifts, where its diffusion correction is poorest
    # (observed: -3.6% at 2 sd, -9.5% at 3 sd)
    far = arl.siegmund_arl(0.5, 4.0, [2.0, 3.0]) / arl.cusum_arl(0.5, 4.0, [2.0, 3.0]) - 1.0
    assert 0.02 < -far[0] < 0.05 and 0.05 < -far[1] < 0.15


def test_siegmund_no_drift_limit_is_continuous():
    # at D = shift - k = 0 the formula's limit is b^2 (Siegmund 1985); near it the code uses
    # the Taylor series b^2 (1 - x/3 + x^2/12), x = 2 D b, so both branches must agree with
    # the series (to 1e-8: the closed form loses about eps / x^2 there)
    b = 4.0 + 1.166
    assert arl.siegmund_arl(0.5, 4.0, 0.5, sides=1) == pytest.approx(b * b, rel=1e-12)
    for x in (-2e-3, -0.99e-3, 0.5e-3, 1.01e-3, 3e-3):  # both sides of the |x| = 1e-3 switch
        d = x / (2 * b)
        series = b * b * (1 - x / 3 + x * x / 12 - x**3 / 60)
        assert arl.siegmund_arl(0.5, 4.0, 0.5 + d, sides=1) == pytest.approx(series, rel=1e-8)


# ----------------------------------------------------------------------------- EWMA
# Lucas & Saccucci (1990), designs with in-control ARL about 500 (from memory).
LUCAS_SACCUCCI_500 = [(0.05, 2.615), (0.10, 2.814), (0.25, 2.998), (0.50, 3.071),
                      (0.75, 3.087), (1.00, 3.090)]


@pytest.mark.parametrize("lam,L", LUCAS_SACCUCCI_500)
def test_ewma_designs_of_lucas_saccucci_1990_give_arl0_500(lam, L):
    # Lucas & Saccucci (1990) (from memory): L is tabled to 3 decimals, which moves ARL0 by
    # well under 1%
    assert arl.ewma_arl(lam, L, 0.0) == pytest.approx(500.0, rel=0.01)


def test_ewma_lam_01_shifted_arls_match_lucas_saccucci_1990():
    # Lucas & Saccucci (1990), lam = 0.1, L = 2.814 (from memory): 31.3 at 0.5 sd, 10.3 at 1 sd
    assert _table_ok(arl.ewma_arl(0.1, 2.814, 0.5), 31.3, 1)
    assert _table_ok(arl.ewma_arl(0.1, 2.814, 1.0), 10.3, 1)


def test_ewma_with_lam_1_is_the_shewhart_chart():
    # lam = 1: ARL = 1 / P(|X| > L) for X ~ N(shift, 1), computed with scipy.stats.norm
    for L in (2.0, 3.09, 4.5):
        for d in (0.0, 0.7, 2.0):
            exact = 1.0 / (norm.sf(L - d) + norm.cdf(-L - d))
            assert arl.ewma_arl(1.0, L, d) == pytest.approx(exact, rel=1e-10)


def test_ewma_integral_and_markov_agree():
    # Crowder (1987) integral equation vs Lucas & Saccucci (1990) Markov chain (with one
    # Richardson step): agree to about 1e-6
    for lam, L in [(0.05, 2.615), (0.1, 2.814), (0.3, 3.5), (0.75, 3.087)]:
        d = np.array([0.0, 0.5, 1.0, 2.0])
        a = arl.ewma_arl(lam, L, d, method="integral")
        b = arl.ewma_arl(lam, L, d, method="markov")
        np.testing.assert_allclose(a, b, rtol=2e-6)


@settings(max_examples=25, deadline=None)
@given(k=st.floats(0.0, 1.5), h=st.floats(0.3, 8.0), d=st.floats(-1.0, 3.0))
def test_cusum_arl_grows_with_h_and_methods_agree(k, h, d):
    a = arl.cusum_arl(k, h, d)
    assert arl.cusum_arl(k, h * 1.1, d) > a >= 1.0
    assert arl.cusum_arl(k, h, d, method="markov") == pytest.approx(a, rel=1e-5)


# ----------------------------------------------------------------------------- Monte Carlo
def test_cusum_monte_carlo_within_a_few_standard_errors():
    # simulation is an independent check of the numerics (and of the two-sided relation)
    for k, h, d, sides in [(0.5, 4.0, 0.0, 2), (0.5, 4.0, 1.0, 2), (0.25, 5.0, 0.25, 2),
                           (0.5, 3.0, 0.0, 1)]:
        est = arl_mc.cusum_arl_mc(k, h, d, sides, n_runs=4000, seed=11)
        assert est.n_censored == 0 and est.n_runs == 4000
        assert abs(est.arl - arl.cusum_arl(k, h, d, sides)) < 4.0 * est.se


def test_ewma_monte_carlo_within_a_few_standard_errors():
    for lam, L, d in [(0.1, 2.814, 0.0), (0.1, 2.814, 1.0), (0.5, 3.0, 0.5)]:
        est = arl_mc.ewma_arl_mc(lam, L, d, n_runs=4000, seed=5)
        assert abs(est.arl - arl.ewma_arl(lam, L, d)) < 4.0 * est.se


def test_monte_carlo_is_seeded_and_reports_censoring():
    a = arl_mc.cusum_arl_mc(0.5, 4.0, [0.0, 1.0], n_runs=500, seed=3)
    b = arl_mc.cusum_arl_mc(0.5, 4.0, [0.0, 1.0], n_runs=500, seed=3)
    np.testing.assert_array_equal(a.arl, b.arl)
    cut = arl_mc.cusum_arl_mc(0.5, 4.0, 0.0, n_runs=500, seed=3, max_len=50)
    assert cut.n_censored > 0 and cut.arl <= 50


# ----------------------------------------------------------------------------- inverse design
@pytest.mark.parametrize("sides", [1, 2])
@pytest.mark.parametrize("k", [0.25, 0.5, 1.0])
def test_cusum_h_for_arl0_round_trips(k, sides):
    for target in (100.0, 20_000.0, 1e6):
        h = arl.cusum_h_for_arl0(k, target, sides)
        assert arl.cusum_arl(k, h, 0.0, sides) == pytest.approx(target, rel=1e-8)


def test_cusum_h_for_arl0_recovers_lucas_crosier_h4():
    # Lucas & Crosier (1982) Table 1 (as quoted in the issue): h = 4 gives 168 at k = 0.5
    exact = arl.cusum_arl(0.5, 4.0)
    assert arl.cusum_h_for_arl0(0.5, exact) == pytest.approx(4.0, abs=1e-8)


@pytest.mark.parametrize("lam", [0.02, 0.05, 0.1, 0.25, 0.5, 1.0])
def test_ewma_L_for_arl0_round_trips(lam):
    for target in (370.4, 20_000.0, 1e6):
        L = arl.ewma_L_for_arl0(lam, target)
        assert arl.ewma_arl(lam, L) == pytest.approx(target, rel=1e-8)


def test_ewma_L_for_arl0_at_lam_1_is_the_normal_quantile():
    # lam = 1 is the Shewhart chart: L = z_{1 - 1/(2 ARL0)} (scipy.stats.norm)
    assert arl.ewma_L_for_arl0(1.0, 500.0) == pytest.approx(norm.isf(0.5 / 500.0), abs=1e-9)
    # and Lucas & Saccucci's (1990) lam = 0.1 design (from memory): L = 2.814 for 500
    assert arl.ewma_L_for_arl0(0.1, 500.0) == pytest.approx(2.814, abs=5e-4)


def test_inverse_design_is_cached_and_the_cache_gives_the_solved_value():
    # the detectors set default thresholds through these (each uncached solve takes a few ms;
    # speed is not asserted here); a cleared cache solves again to the same value
    for call, args in [(arl._cusum_h_cached, (0.5, 20_000.0, 2)),
                       (arl._ewma_L_cached, (0.1, 20_000.0))]:
        call.cache_clear()
        first = call(*args)
        assert call.cache_info().misses == 1
        assert call(*args) == first and call.cache_info().hits == 1


def test_arl0_below_the_h_to_zero_limit_is_rejected():
    with pytest.raises(ConfigError, match=r"arl0 = 1.5 is out of range.*1.621"):
        arl.cusum_h_for_arl0(0.5, 1.5)


# ----------------------------------------------------------------------------- validation
@pytest.mark.parametrize("call,pattern", [
    (lambda: arl.cusum_arl(-0.1, 4.0), r"k = -0.1 is out of range: k must be >= 0"),
    (lambda: arl.cusum_arl(0.5, 0.0), r"h = 0.0 is out of range: h must be > 0"),
    (lambda: arl.cusum_arl(0.5, 4.0, sides=3), r"sides = 3 is out of range"),
    (lambda: arl.cusum_arl(0.5, 4.0, [0.0, float("nan")]), r"shift = .* must be finite"),
    (lambda: arl.cusum_arl(0.5, 4.0, method="table"), r"method = 'table'"),
    (lambda: arl.siegmund_arl(0.5, float("inf")), r"h = inf is out of range"),
    (lambda: arl.ewma_arl(0.0, 3.0), r"lam = 0.0 is out of range: lam must be > 0 and <= 1"),
    (lambda: arl.ewma_arl(1.5, 3.0), r"lam = 1.5 is out of range"),
    (lambda: arl.ewma_arl(0.1, -1.0), r"L = -1.0 is out of range: L must be > 0"),
    (lambda: arl.ewma_L_for_arl0(0.1, 1.0), r"arl0 = 1.0 is out of range: arl0 must be > 1"),
    (lambda: arl.cusum_h_for_arl0("a", 500.0), r"k = 'a' is not a number"),
    (lambda: arl_mc.cusum_arl_mc(0.5, 4.0, n_runs=1), r"n_runs = 1 is out of range"),
    (lambda: arl.cusum_arl(0.0, 700.0), r"needs 3500 quadrature nodes"),
])
def test_bad_arguments_raise_config_error_naming_the_parameter(call, pattern):
    with pytest.raises(ConfigError, match=pattern) as info:
        call()
    assert isinstance(info.value, ValueError)


# ----------------------------------------------------------------------------- simulation design
def _cusum_paths(k: float, steps: int, chunks: int):
    """In-control two-sided CUSUM statistic max(S+, S-) on iid N(0, 1), in chunks."""
    def simulate(n, rng):
        up, down = np.zeros(n), np.zeros(n)
        for _ in range(chunks):
            x = rng.standard_normal((n, steps))
            out = np.empty_like(x)
            for t in range(steps):
                up = np.maximum(0.0, up + x[:, t] - k)
                down = np.maximum(0.0, down - x[:, t] - k)
                out[:, t] = np.maximum(up, down)
            yield out
    return simulate


def test_design_by_simulation_recovers_the_exact_cusum_threshold():
    # the exact h for ARL0 = 200 comes from the integral equation; the simulated design must
    # land within 3 of its own standard errors (and within 0.15 sd) of it
    exact = arl.cusum_h_for_arl0(0.5, 200.0)
    d = arl_mc.design_threshold_by_simulation(_cusum_paths(0.5, 500, 40), 200.0, 1.0, 8.0,
                                           n_paths=1000, seed=1)
    assert d.n_censored == 0 and d.n_paths == 1000
    assert abs(d.threshold - exact) < max(3.0 * d.threshold_se, 0.02)
    assert abs(d.threshold - exact) < 0.15
    assert d.n_steps < 40 * 500  # stopped once every path had crossed a high enough level
    assert d.arl_se == pytest.approx(200.0 / math.sqrt(1000), rel=0.25)  # near-geometric RL


def test_design_by_simulation_accepts_one_array_and_reports_bad_input():
    def shewhart(n, rng):
        return rng.standard_normal((n, 3000))
    d = arl_mc.design_threshold_by_simulation(shewhart, 50.0, 0.5, 4.0, n_paths=1000, seed=2)
    assert abs(d.threshold - norm.isf(1 / 50.0)) < 0.05  # exact Shewhart h from scipy
    with pytest.raises(ConfigError, match="lower = 3.5 is too high"):
        arl_mc.design_threshold_by_simulation(shewhart, 50.0, 3.5, 4.0, n_paths=100)
    with pytest.raises(ConfigError, match="upper = 1 is too low"):
        arl_mc.design_threshold_by_simulation(shewhart, 50.0, 0.0, 1.0, n_paths=100)
    with pytest.raises(ConfigError, match="stopped after max_len = 20 steps"):
        arl_mc.design_threshold_by_simulation(shewhart, 50.0, 0.0, 4.0, n_paths=100, max_len=20)

    def broken(n, rng):
        x = rng.standard_normal((n, 10))
        x[3, 7] = np.nan
        return x
    with pytest.raises(ConfigError, match="chunk 0, path 3, step 7: value nan"):
        arl_mc.design_threshold_by_simulation(broken, 50.0, 0.0, 4.0, n_paths=10)
    with pytest.raises(ConfigError, match=r"has shape \(5, 10\): expected \(10, steps\)"):
        arl_mc.design_threshold_by_simulation(lambda n, rng: np.zeros((5, 10)), 50.0, 0.0, 4.0,
                                           n_paths=10)


# ----------------------------------------------------------------------------- layering
def test_arl_modules_import_no_detector_classes_replay_or_tuning():
    """The ARL numerics stand alone: no detector class, pipeline, replay or tuning module, and
    the simulation module builds on the calculator, never the other way round."""
    banned = ("monitor.pipeline", "monitor.replay", "monitor.tuning", "monitor.live")
    allowed = {"arl.py": set(), "arl_mc.py": {"monitor.detectors.arl"}}
    for name, ok in allowed.items():
        tree = ast.parse((ROOT / "monitor" / "detectors" / name).read_text())
        for node in ast.walk(tree):
            mods = [a.name for a in node.names] if isinstance(node, ast.Import) else \
                [node.module or ""] if isinstance(node, ast.ImportFrom) else []
            assert not any(m.startswith(banned) for m in mods), (name, mods)
            assert all(m in ok for m in mods if m.startswith("monitor.detectors")), (name, mods)
    # importing the simulation module first must work too (it builds on monitor.detectors.arl)
    code = "import monitor.detectors.arl_mc as m; print(m.cusum_arl_mc.__module__)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         cwd=ROOT, check=True)
    assert out.stdout.strip() == "monitor.detectors.arl_mc"


# ----------------------------------------------------------------------------- CLI
def test_cli_cusum_table_reproduces_lucas_crosier(capsys):
    rc = main(["arl", "cusum", "--k", "0.5", "--h", "4", "--shift", "0", "0.5", "1", "2", "3"])
    out = capsys.readouterr().out.splitlines()
    assert rc == 0
    assert out[0] == "CUSUM, two-sided, k = 0.5, h = 4"
    assert out[1].split() == ["shift", "ARL", "(Siegmund)"]
    # Lucas & Crosier (1982) Table 1 (as quoted in the issue), printed to 2 decimals
    assert [line.split()[:2] for line in out[2:]] == [
        ["0", "167.68"], ["0.5", "26.63"], ["1", "8.38"], ["2", "3.34"], ["3", "2.19"]]
    assert out[2].split()[2] == "(169.05)"


def test_cli_cusum_json_and_arl0_design(capsys):
    assert main(["arl", "cusum", "--k", "0.5", "--arl0", "500", "--shift", "0", "1",
                 "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["chart"] == "cusum" and doc["arl0_target"] == 500.0 and doc["sides"] == 2
    assert doc["h"] == pytest.approx(arl.cusum_h_for_arl0(0.5, 500.0), rel=1e-12)
    assert doc["rows"][0]["arl"] == pytest.approx(500.0, rel=1e-8)
    assert doc["rows"][1]["siegmund"] == pytest.approx(
        arl.siegmund_arl(0.5, doc["h"], 1.0), rel=1e-12)


def test_cli_ewma_plain_json_and_solve(capsys):
    assert main(["arl", "ewma", "--lam", "0.1", "--L", "2.814", "--shift", "0", "1"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0] == "EWMA, two-sided, lam = 0.1, L = 2.814"
    assert [line.split() for line in lines[2:]] == [["0", "499.58"], ["1", "10.33"]]
    assert main(["arl", "ewma", "--lam", "0.1", "--arl0", "500", "--shift", "1"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0] == "L = 2.81431 gives in-control ARL 500"
    assert main(["arl", "ewma", "--lam", "0.1", "--L", "2.814", "--shift", "1", "--mc", "500",
                 "--json"]) == 0
    row = json.loads(capsys.readouterr().out)["rows"][0]
    assert abs(row["mc_arl"] - row["arl"]) < 4 * row["mc_se"] and row["mc_censored"] == 0


def test_cli_reports_bad_values_and_never_prints_infinity(capsys):
    assert main(["arl", "cusum", "--k", "-1", "--h", "4"]) == 2
    assert "k = -1.0 is out of range" in capsys.readouterr().err
    assert main(["arl", "cusum", "--h", "4", "--sides", "1", "--shift", "-6", "--json"]) == 0
    row = json.loads(capsys.readouterr().out)["rows"][0]
    assert row["arl"] is None and "above 1e+15" in row["note"]


@pytest.mark.parametrize("chart", ["cusum", "ewma"])
def test_cli_help_has_examples(chart, capsys):
    with pytest.raises(SystemExit) as info:
        main(["arl", chart, "--help"])
    assert info.value.code == 0
    assert f"elmon arl {chart} " in capsys.readouterr().out
