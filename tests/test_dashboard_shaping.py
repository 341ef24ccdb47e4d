"""Unit tests of the dashboard's pure data shaping (no streamlit, no store)."""

from __future__ import annotations

import ast
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from dashboard import files, legend, loglog, shaping


ROOT = Path(__file__).resolve().parents[1]


def _history(n=500, seed=3, beta=-1.4):
    rng = np.random.default_rng(seed)
    ts = pd.date_range("2024-01-01", periods=n, freq="h", tz="UTC")
    b = beta + 0.05 * np.cumsum(rng.normal(size=n)) / np.sqrt(n)
    se = 0.1 + 0.05 * rng.random(n)
    b[:20] = np.nan  # warming up
    return pd.DataFrame({"series": "s1", "ts": ts.strftime("%Y-%m-%dT%H:%M:%SZ"), "beta": b,
                         "beta_se": se, "beta_lo": b - 1.96 * se, "beta_hi": b + 1.96 * se,
                         "status": np.where(np.isnan(b), "warming_up", "ok")})


# ---------------------------------------------------------------- purity
@pytest.mark.parametrize("module", ["shaping", "loglog", "files", "legend", "charts"])
def test_shaping_modules_do_not_import_streamlit(module):
    tree = ast.parse((ROOT / "dashboard" / f"{module}.py").read_text())
    names = {a.name.split(".")[0] for n in ast.walk(tree) if isinstance(n, ast.Import)
             for a in n.names}
    names |= {n.module.split(".")[0] for n in ast.walk(tree)
              if isinstance(n, ast.ImportFrom) and n.module}
    assert "streamlit" not in names


# ---------------------------------------------------------------- downsampling
def test_downsample_keeps_extremes_alerts_and_ends():
    h = shaping.band_frame(_history(20_000, seed=1))
    drawn = h.loc[h["drawable"]].reset_index(drop=True)
    alert_rows = [137, 5_000, 12_345]
    keep = np.zeros(len(drawn), dtype=bool)
    keep[alert_rows] = True
    thin, total = shaping.downsample(drawn, max_points=700, keep=keep)
    assert total == len(drawn)
    assert len(thin) < len(drawn) and len(thin) <= 700 + len(alert_rows)
    kept = set(thin.index)
    for c in ("beta", "beta_lo", "beta_hi"):
        assert drawn[c].idxmin() in kept and drawn[c].idxmax() in kept
    assert set(alert_rows) <= kept
    assert 0 in kept and len(drawn) - 1 in kept
    assert thin.index.is_monotonic_increasing  # original order preserved


def test_downsample_keeps_every_bucket_extreme():
    # a spike in every 100-row stretch must survive thinning to ~10 rows per 100
    n = 10_000
    y = np.zeros(n)
    spikes = np.arange(50, n, 100)
    y[spikes] = 5.0
    y[spikes + 7] = -5.0
    df = pd.DataFrame({"beta": y})
    thin, total = shaping.downsample(df, columns=("beta",), max_points=3 * (n // 100))
    assert total == n
    assert set(spikes) <= set(thin.index) and set(spikes + 7) <= set(thin.index)


def test_downsample_short_input_unchanged():
    df = pd.DataFrame({"beta": [1.0, 2.0, np.nan]})
    thin, total = shaping.downsample(df, max_points=10)
    assert total == 3 and thin.equals(df)


def test_nearest_keep_mask_marks_row_at_or_before():
    ts = pd.Series(pd.date_range("2024-01-01", periods=10, freq="D", tz="UTC"))
    m = shaping.nearest_keep_mask(ts, [pd.Timestamp("2024-01-03 12:00", tz="UTC"),
                                       "2024-01-10T00:00:00Z"])
    assert list(np.flatnonzero(m)) == [2, 9]


# ---------------------------------------------------------------- band columns
def test_band_frame_columns_and_drawable_flag():
    h = _history(100)
    b = shaping.band_frame(h)
    assert list(b.columns) == ["ts", "beta", "beta_lo", "beta_hi", "status", "drawable"]
    assert str(b["ts"].dtype).startswith("datetime64") and b["ts"].dt.tz is not None
    d = b.loc[b["drawable"]]
    assert (d["beta_lo"] <= d["beta"]).all() and (d["beta"] <= d["beta_hi"]).all()
    assert not b.loc[~b["drawable"], "status"].eq("ok").any()  # every gap has its status
    assert (~b["drawable"]).sum() == 20


# ---------------------------------------------------------------- price change
def test_price_change_against_hand_computation():
    # hand computation: 2 ** -1.5 = 1 / (2 * sqrt(2)) = 0.353553..., so a doubling at b = -1.5
    # is a 64.6% fall (the example in DESIGN.md), not -150%
    e = shaping.price_change_effect(10.0, 20.0, -1.5, -1.8, -1.2)
    assert e["change"] == pytest.approx(1 / (2 * math.sqrt(2)) - 1, rel=1e-12)
    assert e["change_lo"] == pytest.approx(2 ** -1.8 - 1, rel=1e-12)   # 0.287175 - 1
    assert e["change_hi"] == pytest.approx(2 ** -1.2 - 1, rel=1e-12)   # 0.435275 - 1
    assert e["price_change"] == pytest.approx(1.0)


def test_price_change_cut_orders_interval():
    # a 10% cut: 0.9 ** -1.2 = 1.13476..., 0.9 ** -1.8 = 1.20880... (hand computation)
    e = shaping.price_change_effect(5.0, 4.5, -1.5, -1.8, -1.2)
    assert e["change_lo"] == pytest.approx(0.9 ** -1.2 - 1, rel=1e-12)
    assert e["change_hi"] == pytest.approx(0.9 ** -1.8 - 1, rel=1e-12)
    assert e["change_lo"] < e["change"] < e["change_hi"]


def test_price_change_nan_beta_and_bad_price():
    e = shaping.price_change_effect(5.0, 6.0, math.nan, math.nan, math.nan)
    assert math.isnan(e["change"]) and math.isnan(e["change_lo"])
    with pytest.raises(ValueError, match="new price = -1.0"):
        shaping.price_change_effect(5.0, -1.0, -1.0, -1.0, -1.0)


# ---------------------------------------------------------------- effective window
def test_effective_window_matches_kish_sum():
    lam = 0.98
    w = lam ** np.arange(20_000)
    kish = w.sum() ** 2 / (w ** 2).sum()   # Kish (1965) effective sample size, numerically
    ts = pd.date_range("2024-01-01", periods=50, freq="2h", tz="UTC")
    out = shaping.effective_window(lam, ts)
    assert out["n_obs"] == pytest.approx(kish, rel=1e-9)
    assert out["n_obs"] == pytest.approx(99.0)            # (1 + 0.98) / (1 - 0.98)
    assert out["spacing"] == pd.Timedelta(hours=2)
    # 99 * 2 h; (1 + 0.98) / (1 - 0.98) is 98.99999999999991 in float64, hence approx
    assert out["time"].total_seconds() == pytest.approx(198 * 3600.0, abs=1e-3)
    assert math.isinf(shaping.effective_window(1.0)["n_obs"])
    with pytest.raises(ValueError, match="forgetting = 1.5"):
        shaping.effective_window(1.5)


# ---------------------------------------------------------------- overview
def _latest(n=6):
    st = ["ok", "changed", "warming_up", "out_of_bounds", "ok", "low_variation"][:n]
    beta = np.array([-1.2, -0.4, np.nan, -3.5, -1.9, -0.8])[:n]
    return pd.DataFrame({"series": [f"store{i}/item{i}" for i in range(n)],
                         "ts": pd.date_range("2024-05-01", periods=n, freq="D", tz="UTC"),
                         "beta": beta, "beta_lo": beta - 0.3, "beta_hi": beta + 0.3,
                         "n_eff": 50.0, "status": st, "n_obs": 100,
                         "open_alerts": [0, 2, 0, 1, 0, 0]})


def test_overview_table_filter_and_sort():
    spark = pd.DataFrame({"series": ["store1/item1"] * 3, "ts": [3, 1, 2],
                          "beta": [-0.4, -1.0, np.nan]})
    t = shaping.overview_table(_latest(), shaping.sparkline_lists(spark))
    assert t.loc[t["series"] == "store1/item1", "trend"].iloc[0] == [-1.0, -0.4]
    assert t.loc[t["series"] == "store0/item0", "trend"].iloc[0] == []
    assert t.loc[2, "status"] == "◌ warming up" and math.isnan(t.loc[2, "elasticity"])
    first = shaping.sort_overview(t, "needs attention first")["series"].tolist()
    assert first[:2] == ["store1/item1", "store3/item3"]
    neg = shaping.sort_overview(t, "elasticity, most negative first")["series"].tolist()
    assert neg[0] == "store3/item3" and neg[-1] == "store2/item2"   # NaN last
    assert len(shaping.filter_overview(t, ["ok"])) == 2
    assert shaping.filter_overview(t, text="ITEM4")["series"].tolist() == ["store4/item4"]
    assert len(shaping.filter_overview(t, text="item.")) == 0        # literal, not a regex
    assert len(shaping.filter_overview(t, only_open_alerts=True)) == 2
    with pytest.raises(ValueError, match="sort 'nope'"):
        shaping.sort_overview(t, "nope")


def test_formatting_never_shows_nan():
    assert shaping.fmt_num(np.nan) == "—" and shaping.fmt_pct(None) == "—"
    assert shaping.fmt_pct(-0.6464466) == "−64.6%"
    assert shaping.fmt_timedelta(pd.Timedelta(hours=36)) == "1.5 days"
    assert shaping.fmt_timedelta(pd.NaT) == "—"


# ---------------------------------------------------------------- log-log windows
def test_window_fits_recover_each_window_slope():
    rng = np.random.default_rng(11)
    n = 400
    ts = pd.date_range("2024-01-01", periods=n, freq="D", tz="UTC")
    p = np.exp(rng.normal(0, 0.15, n)) * 10
    b = np.where(np.arange(n) < 250, -0.8, -2.0)   # change at row 250
    q = np.exp(5 + b * np.log(p) + rng.normal(0, 0.02, n))
    q[10] = 0.0  # cannot go on the log scale: counted, not silently dropped
    pts = loglog.loglog_points(pd.DataFrame({"ts": ts, "price": p, "quantity": q}))
    assert pts.attrs["not_on_log_scale"] == 1 and len(pts) == n - 1
    win = loglog.pick_windows(pts, 150, "preceding")
    assert (win["window"] == "recent").sum() == 150 and (win["window"] == "earlier").sum() == 150
    fits, lines = loglog.fit_lines(win)
    # the simulated windows' true slopes (earlier: rows 100-249, recent: rows 250-399); the
    # slope's standard error is about 0.02 / (0.15 * sqrt(150)) = 0.001, so 0.05 is generous
    assert fits["recent"]["slope"] == pytest.approx(-2.0, abs=0.05)
    assert fits["earlier"]["slope"] == pytest.approx(-0.8, abs=0.05)
    assert set(lines["window"]) == {"earlier", "recent"} and len(lines) == 4
    first = loglog.pick_windows(pts, 100, "first")
    assert first.loc[first["window"] == "earlier", "ts"].iloc[0] == pts["ts"].iloc[0]
    anc = loglog.pick_windows(pts, 50, "anchor", anchor_ts=ts[120])
    assert anc.loc[anc["window"] == "earlier", "ts"].iloc[-1] <= ts[120]


def test_fit_window_explains_no_price_variation():
    f = loglog.fit_window(np.full(30, np.log(4.0)), np.linspace(1, 2, 30))
    assert math.isnan(f["slope"]) and "price barely moved" in f["reason"]
    # numpy.polyfit reference on an exact line: slope -1.3, intercept 2
    x = np.linspace(0, 1, 10)
    f = loglog.fit_window(x, 2 - 1.3 * x)
    assert f["slope"] == pytest.approx(-1.3, abs=1e-12) and f["intercept"] == pytest.approx(2.0)


# ---------------------------------------------------------------- legend
def test_palette_contrast_meets_wcag_against_white():
    # WCAG 2.1: 3:1 for graphical objects (SC 1.4.11), 4.5:1 for text (SC 1.4.3); the band is an
    # area under a line and is exempt, every other colour is held to the text level
    for name, colour in legend.COLOURS.items():
        if name == "band":
            continue
        assert legend.contrast_ratio(colour) >= 4.5, name
    # WCAG 2.1 worked value: #767676 on white is 4.54:1 (from memory, widely quoted)
    assert legend.contrast_ratio("#767676") == pytest.approx(4.54, abs=0.01)


def test_every_status_and_kind_has_a_distinct_symbol():
    syms = [s for s, _ in legend.STATUS_STYLE.values()]
    shapes = [s for s, _ in legend.ALERT_SHAPES.values()]
    assert len(set(syms)) == len(syms) == 5 and len(set(shapes)) == len(shapes) == 6
    assert set(legend.STATUS_STYLE) == {"warming_up", "ok", "low_variation", "out_of_bounds",
                                        "changed"}


# ---------------------------------------------------------------- files
def test_load_truth_keeps_bad_rows_with_reasons(tmp_path):
    f = tmp_path / "truth.csv"
    f.write_text("series,ts,kind\na,2024-01-02T00:00:00Z,elasticity_change\n"
                 ",2024-01-03T00:00:00Z,level_shift\nb,yesterday,level_shift\nc,1704153600,x\n")
    good, bad = files.load_truth(f)
    assert good["series"].tolist() == ["a", "c"]
    assert good["ts"].iloc[1] == pd.Timestamp("2024-01-02", tz="UTC")  # epoch 1704153600
    assert bad[["row", "field"]].values.tolist() == [[2, "series"], [3, "ts"]]
    assert "yesterday" in bad["value"].tolist()
    (tmp_path / "t2.csv").write_text("series,when\n")
    with pytest.raises(files.ValidationError, match=r"missing column\(s\) \['ts', 'kind'\]"):
        files.load_truth(tmp_path / "t2.csv")


def test_replay_folder_and_detection_summary(tmp_path):
    d = tmp_path / "out"
    d.mkdir()
    h = _history(50)
    h.to_csv(d / "estimates.csv", index=False)
    pd.DataFrame(columns=["series", "ts", "rule", "beta", "beta_lo", "beta_hi", "message"]
                 ).to_csv(d / "alerts.csv", index=False)
    (d / "summary.json").write_text('{"false_alarms": 1}')
    pd.DataFrame({"series": ["s1", "s1", "s2"], "ts": ["2024-01-01T00:00:00Z"] * 3,
                  "kind": ["elasticity_change", "level_shift", "elasticity_change"],
                  "detected": [True, False, True], "delay_obs": [12, np.nan, 30]}
                 ).to_csv(d / "detection.csv", index=False)
    assert files.find_replay_folders(tmp_path) == [str(d)]
    rep = files.load_replay(d)
    assert rep["missing"] == ["rejects.csv"] and rep["summary"]["false_alarms"] == 1
    s = files.detection_summary(rep["detection"]).set_index("kind")
    assert s.loc["elasticity_change", "detected"] == 2
    assert s.loc["elasticity_change", "median_delay_obs"] == 21.0
    assert s.loc["all", "detection_rate"] == pytest.approx(2 / 3)
    assert math.isnan(s.loc["level_shift", "median_delay_obs"])
    with pytest.raises(files.SourceError, match="no estimates.csv"):
        files.load_replay(tmp_path)


def test_detection_summary_reads_status_column():
    # the layout of monitor.replay.detection.DETECTION_COLUMNS: status detected / missed / no_data /
    # not_scored; only detected and missed are scored, delays only over the detected
    det = pd.DataFrame({"kind": ["elasticity_change"] * 4 + ["flat_price"],
                        "status": ["detected", "missed", "detected", "no_data", "not_scored"],
                        "delay_obs": [4, np.nan, 10, np.nan, np.nan]})
    s = files.detection_summary(det).set_index("kind")
    row = s.loc["elasticity_change"]
    assert (row["change_points"], row["scored"], row["detected"], row["missed"]) == (4, 3, 2, 1)
    assert row["detection_rate"] == pytest.approx(2 / 3) and row["median_delay_obs"] == 7.0
    assert s.loc["flat_price", "scored"] == 0 and math.isnan(s.loc["flat_price", "detection_rate"])
    assert s.loc["all", "change_points"] == 5


def test_latest_per_series_takes_last_row():
    e = pd.DataFrame({"series": ["a", "b", "a"], "ts": ["2024-01-02T00:00:00Z",
                      "2024-01-01T00:00:00Z", "2024-01-01T00:00:00Z"], "beta": [1.0, 2.0, 3.0]})
    out = shaping.latest_per_series(e)
    assert out["beta"].tolist() == [1.0, 2.0]


def test_trend_range_is_common_and_robust():
    trends = [[-1.0, -1.1], [], [-2.0, np.nan, -0.5]] + [[-1.2]] * 200
    lo, hi = shaping.trend_range(trends)
    # numpy.quantile reference on the finite values
    vals = np.array([-1.0, -1.1, -2.0, -0.5] + [-1.2] * 200)
    assert (lo, hi) == tuple(np.quantile(vals, [0.01, 0.99]))
    assert shaping.trend_range([[], []]) is None
    assert shaping.trend_range([[1.0, 1.0]]) == (0.5, 1.5)


# ---------------------------------------------------------------- elmon dashboard command
def test_dashboard_command_line_and_errors(tmp_path, capsys):
    from monitor.cli import main
    from monitor.cli.dashboard_cmd import streamlit_command

    cmd = streamlit_command("s.sqlite", 8765, truth="t.csv")
    # the Host/Origin guard runs first, then streamlit's own command line (issue 14)
    assert cmd[1:5] == ["-m", "dashboard.serve", "--address", "127.0.0.1"]
    cmd = [cmd[0], "-m", "streamlit"] + cmd[cmd.index("--") + 1:]
    flags = dict(zip(cmd[5:-5:2], cmd[6:-5:2]))
    assert cmd[1:4] == ["-m", "streamlit", "run"] and cmd[4].endswith("dashboard/app.py")
    assert flags["--server.address"] == "127.0.0.1" and flags["--server.port"] == "8765"
    assert flags["--server.headless"] == "true" and flags["--browser.gatherUsageStats"] == "false"
    assert cmd[-5:] == ["--", "--db", "s.sqlite", "--truth", "t.csv"]
    assert main(["dashboard", "--db", str(tmp_path / "none.sqlite")]) == 2
    assert "none.sqlite" in capsys.readouterr().err
    (tmp_path / "s.sqlite").write_bytes(b"")
    assert main(["dashboard", "--db", str(tmp_path / "s.sqlite"), "--port", "70000"]) == 2
    assert "--port = 70000" in capsys.readouterr().err


def test_scale_trends_maps_onto_common_unit_range():
    out = shaping.scale_trends([[-2.0, -1.0, 0.5], []], (-2.0, 0.0))
    assert out == [[0.0, 0.5, 1.0], []]          # (b - lo) / (hi - lo), clipped to [0, 1]
    assert shaping.scale_trends([[1.0]], None) == [[1.0]]
