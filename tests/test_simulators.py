"""Simulators: determinism, recovery of the configured b, truth files, bad rows, live mode, CLI.

Reference fits use statsmodels (OLS and Poisson GLM; Seabold & Perktold 2010) on the log-log
design ``log q = a + b log p + c'z`` with each scenario's controls.

Multiple testing: every regime segment of every scenario gets its own interval, so a fixed
per-interval level would fail a correct simulator somewhere by chance (30 segments at 99 %
fail at least once with probability 1 - 0.99^30 = 26 %). Each family of segments therefore
uses Bonferroni intervals at level 1 - 0.01 / m (family-wise error <= 1 %; Bonferroni's
inequality, common practice). So that the wide intervals cannot hide a wrong simulator, the
tests also bound the interval half-widths and check that the pooled standardized errors
z = (b_hat - b) / se are calibrated: sum z^2 against the chi-square distribution (scipy).
"""

from __future__ import annotations

import io
import sqlite3
import threading
import time

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from monitor.cli import main
from monitor.errors import ConfigError
from simulators import (BAD_KINDS, CHANGE_KINDS, SCENARIOS, LiveAppender, simulate,
                        truth_companions, write_outputs)
from simulators.base import table_bytes

WINDOW_KINDS = ("stockout", "unit_error", "outage")  # rows not drawn from the price model


@pytest.fixture(scope="module")
def sims():
    return {name: simulate(name, seed=0) for name in SCENARIOS}


# ------------------------------------------------------------------------------ helpers

def excluded_rows(sim) -> np.ndarray:
    """Rows inside stock-out, unit-error and outage windows (they follow no price model)."""
    log, changes = sim.log, sim.changes
    out = np.zeros(len(log), dtype=bool)
    for ch in changes[changes["kind"].isin(WINDOW_KINDS)].itertuples():
        end = ch.end_ts or ch.ts
        out |= ((log["series"] == ch.series) & (log["ts"] >= ch.ts) & (log["ts"] <= end)).to_numpy()
    return out


def design(log: pd.DataFrame, controls: list[str], extra: dict | None = None) -> np.ndarray:
    """[1, log p, (extra), controls]; controls constant in the rows are dropped."""
    cols = [np.ones(len(log)), np.log(log["price"].to_numpy(float))]
    cols += list((extra or {}).values())
    for c in controls:
        v = log[c].to_numpy(float)
        if np.ptp(v) > 0:
            cols.append(v)
    return np.column_stack(cols)


def segments(sim, min_rows: int = 30):
    """(series, true b, rows) for each run of constant (beta, intercept) in the path."""
    log, path = sim.log, sim.path
    usable = ~excluded_rows(sim) & (log["quantity"].to_numpy(float) > 0)
    for series, idx in log.groupby("series", sort=True).indices.items():
        beta = path["beta"].to_numpy()[idx]
        icpt = path["intercept"].to_numpy()[idx]
        cut = np.flatnonzero((np.diff(beta) != 0) | (np.diff(icpt) != 0)) + 1
        for part in np.split(np.arange(len(idx)), cut):
            rows = idx[part][usable[idx[part]]]
            if len(rows) >= min_rows and np.ptp(np.log(log["price"].to_numpy()[rows])) > 0:
                yield series, float(beta[part[0]]), rows


def ols_b(log, controls, rows):
    y = np.log(log["quantity"].to_numpy(float)[rows])
    return sm.OLS(y, design(log.iloc[rows], controls)).fit()


def check_recovery(sim, half_width_max: float):
    """Every constant segment: Bonferroni interval (family-wise 1 %) covers the true b."""
    segs = list(segments(sim))
    alpha = 0.01 / len(segs)
    z = []
    for series, b, rows in segs:
        fit = ols_b(sim.log, sim.meta["controls"], rows)
        lo, hi = fit.conf_int(alpha)[1]
        assert lo <= b <= hi, f"{series}: true b {b} outside [{lo:.3f}, {hi:.3f}]"
        assert hi - lo < 2 * half_width_max, f"{series}: interval too wide to mean anything"
        z.append((fit.params[1] - b) / fit.bse[1])
    return np.array(z)


# ------------------------------------------------------------------------------ determinism

@pytest.mark.parametrize("name", list(SCENARIOS))
def test_same_seed_gives_byte_identical_files(tmp_path, name):
    files = []
    for k in range(2):
        d = tmp_path / str(k)
        written = write_outputs(simulate(name, seed=3), d / "log.csv", d / "truth.csv")
        files.append({key: p.read_bytes() for key, p in written.items()})
    assert files[0] == files[1]
    other = write_outputs(simulate(name, seed=4), tmp_path / "o.csv")["log"].read_bytes()
    assert other != files[0]["log"]


def test_parquet_output_is_deterministic_and_round_trips(tmp_path):
    a = write_outputs(simulate("load", seed=1), tmp_path / "a.parquet")["log"]
    b = write_outputs(simulate("load", seed=1), tmp_path / "b.parquet")["log"]
    assert a.read_bytes() == b.read_bytes()
    back = pd.read_parquet(a)
    pd.testing.assert_frame_equal(back, simulate("load", seed=1).log, check_dtype=False)


# ------------------------------------------------------------------------------ recovery of b

def test_randomized_scenarios_recover_b_in_every_segment(sims):
    # half-width bounds: retail se is about sigma / (sd(log p) sqrt(n)) = 0.15 / (0.1 * 12),
    # load about 0.05 / (0.16 * 45); the bounds sit well above those and far below |b|
    zs = {"retail": check_recovery(sims["retail"], 0.6), "load": check_recovery(sims["load"], 0.04),
          "flat": check_recovery(sims["flat"], 0.8)}
    for name, z in zs.items():
        # no systematic bias: mean z ~ N(0, 1/m); |mean| sqrt(m) < 3.29 is the two-sided 0.1 %
        # normal bound (scipy.stats.norm). It catches a shift of every b by about 1.5 se
        # (retail 0.15, load 0.015) that the wide per-segment intervals would let through.
        assert abs(z.mean()) * np.sqrt(len(z)) < stats.norm.isf(0.0005), name
    z = np.concatenate(list(zs.values()))
    assert len(z) >= 25
    # calibration: sum z^2 ~ chi-square(m) if the simulators add exactly the stated noise
    p = stats.chi2.sf(np.sum(z**2), len(z))
    assert 0.001 < p < 0.999, f"standardized errors not calibrated: p = {p:.4g}"


def test_gradual_drift_is_recovered_as_a_linear_ramp(sims):
    sim = sims["retail"]
    log, path = sim.log, sim.path
    drift = sim.changes[sim.changes["kind"] == "gradual_drift"].iloc[0]
    rows = np.flatnonzero((log["series"] == drift.series).to_numpy() & ~excluded_rows(sim))
    ts = log["ts"].to_numpy()[rows]
    pos = np.arange(len(rows), dtype=float)
    c1, c2 = np.searchsorted(ts, drift.ts), np.searchsorted(ts, drift.end_ts)
    ramp = np.clip((pos - c1) / (c2 - c1), 0, 1)
    lp = np.log(log["price"].to_numpy()[rows])
    # beta_t = b0 + (b1 - b0) r_t and intercept_t = alpha - beta_t log p0, so regress on
    # [1, log p, r, r log p, controls]: coefficient 1 is b0, coefficient 3 is b1 - b0
    X = design(log.iloc[rows], sim.meta["controls"], {"r": ramp, "r_lp": ramp * lp})
    fit = sm.OLS(np.log(log["quantity"].to_numpy(float)[rows]), X).fit()
    ci = fit.conf_int(0.01)
    assert ci[1][0] <= drift.beta_before <= ci[1][1]
    assert ci[3][0] <= drift.beta_after - drift.beta_before <= ci[3][1]
    np.testing.assert_allclose(path["beta"].to_numpy()[rows], drift.beta_before
                               + ramp * (drift.beta_after - drift.beta_before), atol=1e-6)


def test_first_retail_series_has_a_step_change_big_enough_to_catch(sims):
    sim = sims["retail"]
    first = sim.log["series"].min()
    ch = sim.changes[sim.changes["series"] == first]
    assert ch["kind"].tolist() == ["elasticity_change"]
    assert (ch["beta_before"].iloc[0], ch["beta_after"].iloc[0]) == (-1.4, -2.2)
    fits = [ols_b(sim.log, sim.meta["controls"], rows) for s, b, rows in segments(sim)
            if s == first]
    (lo1, hi1), (lo2, hi2) = fits[0].conf_int(0.01)[1], fits[1].conf_int(0.01)[1]
    assert hi2 < lo1  # disjoint 99 % intervals: the change is plain in the data


def test_poisson_counts_recover_b_with_a_poisson_glm():
    sim = simulate("retail", seed=2, noise="poisson")
    assert sim.log["quantity"].dtype.kind == "i"
    segs = list(segments(sim))
    alpha = 0.01 / len(segs)
    for series, b, rows in segs:
        part = sim.log.iloc[rows]
        # log E[q] = a + b log p + c'z exactly: a Poisson GLM with log link is the right fit
        fit = sm.GLM(part["quantity"].to_numpy(float), design(part, sim.meta["controls"]),
                     family=sm.families.Poisson()).fit()
        lo, hi = fit.conf_int(alpha)[1]
        assert lo <= b <= hi, series


def test_hourly_retail_recovers_b_with_the_peak_control():
    sim = simulate("retail", seed=5, n_series=2, length=24 * 120, freq="h")
    assert sim.meta["controls"] == ["promo", "weekend", "peak"]
    for series, b, rows in segments(sim):
        lo, hi = ols_b(sim.log, sim.meta["controls"], rows).conf_int(0.01 / 3)[1]
        assert lo <= b <= hi, series


def test_observational_prices_bias_the_naive_slope(sims):
    sim = sims["observational"]
    assert sim.meta["randomized"] is False
    assert sim.changes["note"].str.contains("biased").all()
    for series, b, rows in segments(sim):
        fit = ols_b(sim.log, sim.meta["controls"], rows)
        lo, hi = fit.conf_int(0.01)[1]
        # the 99 % interval lies wholly above the true b: biased toward zero, not noise
        assert lo > b, f"{series}: b_hat {fit.params[1]:.2f} CI [{lo:.2f}, {hi:.2f}] b {b:.2f}"


# ------------------------------------------------------------------------------ truth vs log

@pytest.mark.parametrize("name", list(SCENARIOS))
def test_truth_agrees_with_the_log(sims, name):
    log, changes, path = sims[name]
    assert len(path) == len(log)
    assert (path["series"].to_numpy() == log["series"].to_numpy()).all()
    assert (path["ts"].to_numpy() == log["ts"].to_numpy()).all()
    assert {"series", "ts", "kind"} <= set(changes.columns)
    assert set(changes["kind"]) <= set(CHANGE_KINDS)
    key = set(zip(log["series"], log["ts"]))
    for ch in changes.itertuples():
        rows = log["series"] == ch.series
        if ch.kind == "outage" and "missing" in ch.note:  # rows absent: a gap in the log
            ts = log.loc[rows, "ts"]
            assert not ((ts >= ch.ts) & (ts <= ch.end_ts)).any()
            assert (ts < ch.ts).any() and (ts > ch.end_ts).any()
            continue
        assert (ch.series, ch.ts) in key, (ch.kind, ch.series, ch.ts)
        if ch.end_ts:
            assert (ch.series, ch.end_ts) in key
        win = rows & (log["ts"] >= ch.ts) & (log["ts"] <= (ch.end_ts or ch.ts))
        s_beta = path.loc[rows, "beta"].to_numpy()
        at = np.flatnonzero(log.loc[rows, "ts"].to_numpy() == ch.ts)[0]
        if ch.kind == "elasticity_change":
            assert s_beta[at] == pytest.approx(ch.beta_after, abs=1e-6)
            assert s_beta[at - 1] == pytest.approx(ch.beta_before, abs=1e-6)
        elif ch.kind == "gradual_drift":
            assert s_beta[at] == pytest.approx(ch.beta_before, abs=1e-6)
            end = np.flatnonzero(log.loc[rows, "ts"].to_numpy() == ch.end_ts)[0]
            assert s_beta[end] == pytest.approx(ch.beta_after, abs=1e-6)
        elif ch.kind == "level_shift":
            icpt = path.loc[rows, "intercept"].to_numpy()
            assert s_beta[at] == s_beta[at - 1] and icpt[at] - icpt[at - 1] > 0.1
        elif ch.kind in ("stockout", "outage"):
            assert (log.loc[win, "quantity"] == 0).all() and win.sum() >= 7
        elif ch.kind == "unit_error":
            ratio = log.loc[win, "price"].median() / log.loc[rows & ~win, "price"].median()
            assert 50 < ratio < 200
        elif ch.kind == "flat_price":
            assert np.ptp(log.loc[win, "price"]) <= 0.01 + 1e-9 and win.sum() >= 30


def test_truth_files_are_written_beside_each_other(tmp_path, sims):
    written = write_outputs(sims["load"], tmp_path / "load.csv", tmp_path / "t" / "truth.csv")
    assert written["path"] == tmp_path / "t" / "truth_path.csv"
    changes = pd.read_csv(written["truth"], keep_default_na=False)
    assert list(changes.columns) == ["series", "ts", "kind", "end_ts", "beta_before",
                                     "beta_after", "note"]
    assert len(pd.read_csv(written["path"])) == len(pd.read_csv(written["log"]))
    assert truth_companions("a/x.csv")[2].name == "x_bad.csv"


# ------------------------------------------------------------------------------ bad rows

def test_every_bad_row_is_listed_and_every_other_row_is_clean(tmp_path):
    written = write_outputs(simulate("baddata", seed=1), tmp_path / "bad.csv",
                            tmp_path / "truth.csv")
    log = pd.read_csv(written["log"], dtype=str, keep_default_na=False)
    bad = pd.read_csv(written["bad"], keep_default_na=False, dtype={"value": str})
    assert bad["reason_kind"].value_counts().to_dict() == {k: 2 for k in BAD_KINDS}
    assert bad["row"].is_unique and bad["row"].between(0, len(log) - 1).all()

    def num(v):
        try:
            return float(v)
        except ValueError:
            return None

    ts = pd.to_datetime(log["ts"], utc=True, errors="coerce", format="ISO8601")
    seen: dict[str, set] = {}
    latest: dict[str, pd.Timestamp] = {}
    medians = {s: np.median([float(p) for p in g["price"] if num(p) and 0 < num(p) < 1e3])
               for s, g in log.groupby("series") if s}
    kinds = dict(zip(bad["row"], bad["reason_kind"]))
    for i, r in log.iterrows():
        p, q, kind = num(r["price"]), num(r["quantity"]), kinds.get(i)
        checks = {
            "empty_field": "" in (r["series"], r["ts"], r["price"], r["quantity"]),
            "unparsable_number": p is None or q is None,
            "non_positive_price": p is not None and p <= 0,
            "negative_quantity": q is not None and q < 0,
            "zero_quantity": q == 0,
            "nan_value": (p is not None and np.isnan(p)) or (q is not None and np.isnan(q)),
            "inf_value": (p is not None and np.isinf(p)) or (q is not None and np.isinf(q)),
            "bad_timestamp": pd.isna(ts[i]) and r["ts"] != "",
            "future_timestamp": pd.notna(ts[i]) and ts[i] > pd.Timestamp.now(tz="UTC"),
            "duplicate_key": r["ts"] in seen.get(r["series"], set()),
            "late_row": pd.notna(ts[i]) and r["series"] in latest
                        and ts[i] < latest[r["series"]] and kind != "duplicate_key",
            "unit_error": p is not None and np.isfinite(p) and p > 20 * medians[r["series"]],
        }
        found = [k for k, hit in checks.items() if hit]
        if kind is None:
            assert found == [], f"row {i} should be clean: {found}"
        else:
            assert kind in found, f"row {i} listed as {kind}, shows {found}"
        if kind is None:  # the clean rows set what counts as seen and as latest
            seen.setdefault(r["series"], set()).add(r["ts"])
            latest[r["series"]] = max(latest.get(r["series"], ts[i]), ts[i])
    with pytest.raises(ConfigError, match="CSV only"):
        write_outputs(simulate("baddata"), tmp_path / "bad.parquet")


# ------------------------------------------------------------------------------ live mode

def whole_lines(data: bytes, n_fields: int) -> int:
    assert data.endswith(b"\n")
    lines = data.decode().splitlines()
    assert all(line.count(",") == n_fields - 1 for line in lines)
    return len(lines)


def test_live_csv_appends_whole_lines_at_the_requested_rate(tmp_path, sims):
    out = tmp_path / "live.csv"
    log = sims["retail"].log
    nf = log.shape[1]
    counts, partial_ok = [], []

    def after_write(n):  # after each durable write: only whole lines, header once
        counts.append(n)
        assert whole_lines(out.read_bytes(), nf) == n + 1

    stop = threading.Event()

    def reader():  # a concurrent reader sees well-formed lines up to the last line break
        while not stop.is_set():
            data = out.read_bytes() if out.exists() else b""
            head = data[:data.rfind(b"\n") + 1]
            if head:
                partial_ok.append(whole_lines(head, nf))

    t = threading.Thread(target=reader)
    t.start()
    app = LiveAppender(log, out, rate=200, max_rows=100, on_write=after_write)
    try:
        assert app.run() == 100
    finally:
        stop.set()
        t.join()
    # the pacing itself (no row before it is due) is checked on a simulated clock below
    assert len(counts) >= 5 and counts == sorted(counts) and partial_ok
    assert out.read_bytes().startswith(b"series,ts,price,quantity,promo,weekend\n")


def test_live_csv_full_run_equals_the_batch_file(tmp_path):
    sim = simulate("load", seed=2, n_series=2, length=240)
    LiveAppender(sim, tmp_path / "live.csv", rate=1e6).run()
    assert (tmp_path / "live.csv").read_bytes() == table_bytes(sim.log)


class _SimulatedClock:
    """A clock that moves only when the appender waits (no wall clock read)."""

    def __init__(self):
        self.t = 0.0

    def __call__(self):
        return self.t

    def sleep(self, seconds):
        self.t += seconds


def _paced(log, target, **kw):
    """Run an appender on a simulated clock; return it and (rows written, clock) per write."""
    clock, writes = _SimulatedClock(), []
    app = LiveAppender(log, target, clock=clock, sleep=clock.sleep,
                       on_write=lambda i: writes.append((i, clock())), **kw)
    app.run()
    return app, writes


def test_live_rate_holds_each_row_back_until_it_is_due(tmp_path, sims):
    app, writes = _paced(sims["retail"].log, tmp_path / "r.csv", rate=200, max_rows=100)
    assert app.rows_written == 100 and writes[-1][0] == 100
    # row i is due at i / 200 s: a write at time t holds only rows due by t, and each write
    # takes every row due by then; writes are at least min_interval (0.05 s) apart
    for (i, t) in writes:
        assert (i - 1) / 200 <= t + 1e-12 and (i == 100 or i / 200 > t - 1e-12), (i, t)
    gaps = np.diff([t for _, t in writes])
    assert np.all(gaps >= 0.05 - 1e-12)
    assert writes[-1][1] == pytest.approx(0.5, abs=0.05)     # row 99 is due at 0.495 s


def test_live_speed_follows_simulated_time(tmp_path):
    sim = simulate("load", seed=0)  # 6 feeders, hourly
    app, writes = _paced(sim, tmp_path / "l.csv", speed=72_000, max_rows=60)  # 20 h per second
    # 60 rows = hours 0..9 of 6 feeders; hour h is due at h * 3600 / 72000 = 0.05 h s
    assert app.rows_written == 60
    for i, t in writes:
        last_hour = (i - 1) // 6
        assert last_hour * 0.05 <= t + 1e-12, (i, t)        # no row before it is due
        if i < 60:
            assert (i // 6) * 0.05 > t - 1e-12, (i, t)      # every row due by then is written
    assert writes[-1][1] == pytest.approx(0.45, abs=1e-9)


def test_live_stops_on_event_and_on_max_seconds(tmp_path, sims):
    app = LiveAppender(sims["retail"], tmp_path / "a.csv", rate=100).start()
    time.sleep(0.3)
    app.stop()
    app.join(5)
    assert app.error is None and 10 <= app.rows_written <= 60
    assert whole_lines((tmp_path / "a.csv").read_bytes(), 6) == app.rows_written + 1
    n = LiveAppender(sims["retail"], tmp_path / "b.csv", rate=100, max_seconds=0.3).run()
    assert 20 <= n <= 40  # 100 rows/s for 0.3 s, give or take one 0.05 s batch


def test_live_sqlite_keys_increase_and_append_continues(tmp_path, sims):
    db = tmp_path / "feed.db"
    log = sims["load"].log
    LiveAppender(log, db, rate=5000, max_rows=150).run()
    LiveAppender(log.iloc[150:], db, rate=5000, max_rows=50, append=True).run()
    with sqlite3.connect(db) as conn:
        rows = conn.execute("SELECT id, series, ts, price, event FROM observations "
                            "ORDER BY id").fetchall()
    assert [r[0] for r in rows] == list(range(1, 201))
    expect = log.iloc[:200]
    assert [r[1:] for r in rows] == list(zip(expect["series"], expect["ts"], expect["price"],
                                             expect["event"]))


def test_live_csv_append_keeps_one_header_and_realtime_rebases(tmp_path, sims):
    out = tmp_path / "a.csv"
    log = sims["retail"].log
    LiveAppender(log, out, rate=1e6, max_rows=24).run()
    before = pd.Timestamp.now(tz="UTC").floor("s")
    LiveAppender(log.iloc[24:], out, rate=1e6, max_rows=12, append=True, realtime=True).run()
    after = pd.Timestamp.now(tz="UTC").ceil("s")
    back = pd.read_csv(out)
    assert len(back) == 36 and (back["series"] != "series").all()
    first = pd.Timestamp(back["ts"].iloc[24])
    assert before <= first <= after          # rebased onto the clock while it ran, however slow


def test_live_rejects_bad_settings(tmp_path, sims):
    for kw, msg in [({"rate": 5, "speed": 5}, "not both"), ({"rate": 0}, "rate"),
                    ({"table": "x; DROP"}, "table")]:
        with pytest.raises(ConfigError, match=msg):
            LiveAppender(sims["retail"], tmp_path / "a.csv", **kw)
    with pytest.raises(ConfigError, match="suffix"):
        LiveAppender(sims["retail"], tmp_path / "a.parquet")


# ------------------------------------------------------------------------------ CLI + API

def test_cli_list_prints_every_scenario_name_first(capsys):
    assert main(["simulate", "--list"]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    assert [line.split()[0] for line in lines] == list(SCENARIOS)
    assert all(len(line.split()) > 3 for line in lines)


def test_cli_writes_log_and_truth_and_runs_live(tmp_path, capsys):
    out, truth = tmp_path / "r.csv", tmp_path / "t.csv"
    assert main(["simulate", "retail", "--out", str(out), "--truth", str(truth),
                 "--series", "3", "--length", "60", "--seed", "9", "--set", "sigma=0.1"]) == 0
    assert len(pd.read_csv(out)) == 180 and (tmp_path / "t_path.csv").exists()
    assert "wrote 180 rows of 3 series" in capsys.readouterr().out
    live = tmp_path / "live.csv"
    assert main(["simulate", "load", "--out", str(live), "--live", "--rate", "2000",
                 "--max-rows", "30"]) == 0
    assert whole_lines(live.read_bytes(), 10) == 31


@pytest.mark.parametrize("argv, msg", [
    (["simulate", "nope", "--out", "x.csv"], "unknown"),
    (["simulate", "retail"], "--out"),
    (["simulate"], "SCENARIO"),
    (["simulate", "retail", "--out", "x.csv", "--set", "color=red"], "color"),
    (["simulate", "retail", "--out", "x.csv", "--length", "3"], "length"),
])
def test_cli_user_errors_exit_2_with_a_message(tmp_path, monkeypatch, capsys, argv, msg):
    monkeypatch.chdir(tmp_path)
    assert main(argv) == 2
    assert msg in capsys.readouterr().err


def test_cli_help_has_an_example(capsys):
    with pytest.raises(SystemExit):
        main(["simulate", "--help"])
    assert "elmon simulate retail --out" in capsys.readouterr().out


def test_a_million_rows():
    sim = simulate("retail", n_series=100, length=10_000)   # speed is not asserted here
    assert len(sim.log) == 1_000_000
    buf = io.BytesIO(table_bytes(sim.log.iloc[:3]))
    assert buf.getvalue().count(b"\n") == 4


def test_simulator_doctests_pass():
    # simulators/ is outside pytest's doctest paths (testpaths: tests, monitor), so run them here
    import doctest
    import importlib

    for name in ("base", "retail", "load", "live", "observational", "flat", "baddata"):
        mod = importlib.import_module(f"simulators.{name}")
        assert doctest.testmod(mod, optionflags=doctest.NORMALIZE_WHITESPACE).failed == 0, name
    import simulators
    assert doctest.testmod(simulators, optionflags=doctest.NORMALIZE_WHITESPACE).failed == 0
