"""The exposure of a Poisson store is kept in ``observations.exposure`` (store migration 11,
issue 13), so the store can be re-run from its own observations.

- A Poisson store fed by the service (a CSV source) and one fed by ``elmon ingest``, re-run
  from their stored observations (price, quantity, controls and exposure read back with
  :func:`monitor.store.series_observations`), give the live run's estimates to the bit: a
  fresh engine over the stored rows (the same code path), and the replay (the path
  tests/test_engine_poisson.py holds equal to the live engine's).
- The one-row path (``Monitor.observe``) stores the exposure as the batch path does.
- A store made before the migration opens, its old rows read NULL (no exposure, i.e. 1), and
  it keeps working.
- A bad exposure (zero, negative, text, empty) is rejected naming row, field, value and rule,
  kept in ``rejects`` and not stored as an observation; the store refuses a bad exposure
  given to it directly.

Data: invented kiosk series of Poisson counts, log E[q] = a - 1.5 log p + 0.3 promo +
log(hours / 8), mean counts 0.4-3, so zeros are common.
"""

from __future__ import annotations

import sqlite3

import numpy as np
import pandas as pd
import pytest

import monitor.store as ms
from monitor.cli import main as elmon
from monitor.errors import ValidationError
from monitor.live.monitor import Monitor
from monitor.live.service import Service
from monitor.replay.driver import run_replay
from monitor.settings import validate as validate_config
from monitor.store.schema import MIGRATIONS
from tests.conftest import DESIGNED
from tests.service_helpers import assert_same_store, csv_bytes, frame

ESTIMATOR = {"model": "poisson", "exposure": "hours", "forgetting": 0.99, "controls": ["promo"]}
FLOATS = ("beta", "beta_se", "beta_lo", "beta_hi", "n_eff", "intercept", "resid_sd",
          "innovation", "z")


def config(**sections):
    base = {"estimator": dict(ESTIMATOR), "detectors": dict(DESIGNED)}
    for k, v in sections.items():
        base[k] = {**base.get(k, {}), **v}
    return validate_config(base)


def count_log(seed: int = 5, n_series: int = 3, length: int = 110) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    t0 = pd.Timestamp("2024-04-01T00:00:00Z")
    parts = []
    for s in range(n_series):
        p = np.round(2.0 * np.exp(rng.normal(0, 0.3, length)), 2)
        hours = rng.choice([3.0, 6.5, 8.0, 12.0], length)
        promo = (rng.random(length) < 0.25).astype(float)
        mu = np.exp(0.3 * s - 1.0 - 1.5 * np.log(p / 2) + 0.3 * promo + np.log(hours / 8))
        q = rng.poisson(mu).astype(float)
        if s == 2:
            q[length // 2:] = rng.poisson(mu[length // 2:] * 2.5)     # a level shift
        parts.append(pd.DataFrame({
            "series": f"pier-{s}/plum-tart", "price": p, "quantity": q, "promo": promo,
            "hours": hours,
            "ts": [(t0 + pd.Timedelta(hours=i)).strftime("%Y-%m-%dT%H:%M:%SZ")
                   for i in range(length)]}))
    log = pd.concat(parts, ignore_index=True)
    return log.iloc[np.lexsort((log["series"], log["ts"]))].reset_index(drop=True)


def stored_log(db) -> pd.DataFrame:
    """A store's observations as a log again: one series after another, each in time order,
    the controls spread into columns and the exposure under its configured name (NULL = no
    exposure = 1)."""
    names = frame(db, "SELECT series FROM series ORDER BY series")["series"].tolist()
    parts = []
    for name in names:
        o = ms.series_observations(db, name)
        parts.append(pd.DataFrame({
            "series": o["series"], "ts": ms.format_ts_array(o["ts"]), "price": o["price"],
            "quantity": o["quantity"], "promo": [c["promo"] for c in o["controls"]],
            "hours": o["exposure"].fillna(1.0)}))
    return pd.concat(parts, ignore_index=True)


def estimates(db) -> pd.DataFrame:
    return frame(db, "SELECT * FROM estimates ORDER BY series, ts")


def assert_same_estimates(a: pd.DataFrame, b: pd.DataFrame) -> None:
    assert len(a) == len(b)
    assert a["series"].tolist() == b["series"].tolist() and a["ts"].tolist() == b["ts"].tolist()
    for c in FLOATS:
        assert a[c].to_numpy(np.float64).tobytes() == b[c].to_numpy(np.float64).tobytes(), c
    assert a["status"].tolist() == b["status"].tolist()


@pytest.fixture(scope="module")
def fed(tmp_path_factory):
    """One log with a bad exposure and a bad price, fed to a store by the service (batches of
    100 rows) and to another by ``elmon ingest`` (batches of 70 rows)."""
    d = tmp_path_factory.mktemp("exposure")
    log = count_log()
    log = log.astype({"hours": object})
    log.loc[25, "hours"] = 0.0
    log.loc[140, "price"] = -2.0
    (d / "feed.csv").write_bytes(csv_bytes(log))
    cfg = config(store={"path": "service.sqlite"}, service={"batch_rows": 100},
                 sources={"feed": {"type": "csv", "path": "feed.csv"}})
    with Service(cfg, base=d) as svc:
        totals = svc.run_once()
    assert totals["rows"] == len(log) and totals["rejected"] == 2
    code = elmon(["ingest", str(d / "feed.csv"), "--db", str(d / "ingest.sqlite"),
                  "--model", "poisson", "--exposure-col", "hours", "--control", "promo",
                  "--forgetting", "0.99", "--cusum-h", str(DESIGNED["cusum_h"]),
                  "--slope-h", str(DESIGNED["slope_h"]), "--batch-rows", "70", "--quiet"])
    assert code == 0
    return d, log


@pytest.mark.parametrize("store", ["service.sqlite", "ingest.sqlite"])
def test_a_poisson_store_rerun_from_its_observations_gives_its_estimates(fed, tmp_path, store):
    d, log = fed
    db = d / store
    live = estimates(db)
    assert len(live) == len(log) - 2 and (live["status"] == "ok").any()
    assert (frame(db, "SELECT quantity FROM observations")["quantity"] == 0).mean() > 0.15
    again = stored_log(db)
    # the stored exposure is the log's, for every accepted row (none NULL)
    good = log.drop(index=[25, 140]).sort_values(["series", "ts"], ignore_index=True)
    assert again["hours"].to_numpy().tobytes() == \
        good["hours"].to_numpy(np.float64).tobytes()
    assert frame(db, "SELECT count(*) AS n FROM observations WHERE exposure IS NULL")["n"][0] == 0
    # the same code path (the engine's batch path) over the stored rows: equal to the bit
    with Monitor(tmp_path / "rerun.sqlite", config()) as mon:
        rep = mon.observe_many(again)
    assert rep.rejected == 0
    assert_same_estimates(estimates(tmp_path / "rerun.sqlite"), live)
    # the replay over the stored rows: equal to the bit (pyarrow writes shortest repr)
    (tmp_path / "again.csv").write_bytes(csv_bytes(again))
    run_replay(tmp_path / "again.csv", tmp_path / "replay", config())
    rep = pd.read_csv(tmp_path / "replay" / "estimates.csv").sort_values(["series", "ts"],
                                                                          ignore_index=True)
    assert_same_estimates(rep, live)
    # without the stored exposure (every row exposure 1) the re-run would differ: the column
    # is what makes it exact
    with Monitor(tmp_path / "flat.sqlite", config()) as mon:
        mon.observe_many(again.assign(hours=1.0))
    flat = estimates(tmp_path / "flat.sqlite")
    assert not np.allclose(flat["intercept"].to_numpy(), live["intercept"].to_numpy(),
                           equal_nan=True)


def test_service_and_ingest_store_the_same_observations(fed):
    d, _ = fed
    a = frame(d / "service.sqlite", "SELECT series, ts, price, quantity, controls, exposure "
                                    "FROM observations ORDER BY series, ts")
    b = frame(d / "ingest.sqlite", "SELECT series, ts, price, quantity, controls, exposure "
                                   "FROM observations ORDER BY series, ts")
    pd.testing.assert_frame_equal(a, b, check_exact=True)
    assert_same_estimates(estimates(d / "service.sqlite"), estimates(d / "ingest.sqlite"))


def test_one_row_path_stores_the_exposure_like_the_batch_path(tmp_path):
    log = count_log(seed=8, n_series=2, length=60)
    with Monitor(tmp_path / "one.sqlite", config()) as mon:
        for r in log.itertuples(index=False):
            mon.observe(r.series, r.ts, price=r.price, quantity=r.quantity, promo=r.promo,
                        hours=r.hours)
        assert mon.plain_calls > 0.9 * len(log)
    with Monitor(tmp_path / "many.sqlite", config()) as mon:
        mon.observe_many(log)
    assert_same_store(tmp_path / "one.sqlite", tmp_path / "many.sqlite")   # exposure included
    got = frame(tmp_path / "one.sqlite", "SELECT exposure FROM observations ORDER BY series, ts")
    want = log.sort_values(["series", "ts"])["hours"].to_numpy()
    assert got["exposure"].to_numpy().tobytes() == want.tobytes()


def test_a_log_log_store_keeps_no_exposure(tmp_path):
    log = count_log(seed=3, n_series=1, length=30)
    log = log.assign(quantity=log["quantity"] + 1.0)
    with Monitor(tmp_path / "ll.sqlite", validate_config(
            {"estimator": {"controls": ["promo"]}, "detectors": dict(DESIGNED)})) as mon:
        mon.observe_many(log)
    got = frame(tmp_path / "ll.sqlite", "SELECT exposure FROM observations")
    assert len(got) == len(log) and got["exposure"].isna().all()


def test_a_store_made_before_the_migration_opens_and_keeps_working(tmp_path):
    path = tmp_path / "old.sqlite"
    conn = sqlite3.connect(path, isolation_level=None)
    old = ms.Store(conn, path, readonly=False)
    mig = next(i for i, name, _ in MIGRATIONS if name == "observation exposure")
    assert ms.migrate(old, until=mig - 1) == list(range(1, mig))
    assert "exposure" not in [r[1] for r in conn.execute("PRAGMA table_info(observations)")]
    log = count_log(seed=11, n_series=2, length=80)
    first, rest = log.iloc[:50], log.iloc[50:]
    # rows written by the code before the migration: the seven columns of that time
    conn.execute("INSERT INTO observations (series, ts, price, quantity, controls, source, "
                 "source_row) VALUES ('pier-9/old-bun', '2024-01-01T00:00:00Z', 2.0, 3.0, "
                 "'{\"promo\": 0.0}', 'api', 1)")
    conn.execute("INSERT INTO series (series, updated_at) VALUES ('pier-9/old-bun', 'then')")
    conn.close()
    new = ms.Store.open(path)
    assert new.applied_on_open == list(range(mig, ms.SCHEMA_VERSION + 1))
    new.close()
    old_rows = ms.series_observations(path, "pier-9/old-bun")
    assert len(old_rows) == 1 and old_rows["exposure"].isna().all()   # NULL: no exposure (1)
    assert old_rows["exposure"].dtype == np.float64
    with Monitor(path, config()) as mon:                     # the store keeps working
        mon.observe_many(first)
        for r in rest.itertuples(index=False):
            mon.observe(r.series, r.ts, price=r.price, quantity=r.quantity, promo=r.promo,
                        hours=r.hours)
    got = frame(path, "SELECT series, exposure FROM observations WHERE series != "
                      "'pier-9/old-bun' ORDER BY series, ts")
    assert got["exposure"].to_numpy().tobytes() == \
        log.sort_values(["series", "ts"])["hours"].to_numpy().tobytes()
    # the same rows in a store made now give the same estimates
    with Monitor(tmp_path / "now.sqlite", config()) as mon:
        mon.observe_many(log)
    assert_same_estimates(frame(path, "SELECT * FROM estimates WHERE series != 'pier-9/old-bun'"
                                      " ORDER BY series, ts"), estimates(tmp_path / "now.sqlite"))


BAD = [("0", "an exposure must be > 0"), ("-4", "an exposure must be > 0"),
       ("eight", "not a number"), ("", "empty field")]


def test_a_bad_exposure_is_rejected_naming_row_field_value_and_rule(tmp_path):
    log = count_log(seed=2, n_series=1, length=40).astype({"hours": object})
    rows = [6, 13, 20, 27]
    for i, (text, _) in zip(rows, BAD):
        log.loc[i, "hours"] = text
    with Monitor(tmp_path / "s.sqlite", config()) as mon:
        rep = mon.observe_many(log)
        # the one-row path hands a bad exposure to the batch path, which words it
        with pytest.raises(ValidationError) as err:
            mon.observe("pier-0/plum-tart", "2024-05-01T00:00:00Z", price=2.0, quantity=1.0,
                        promo=0.0, hours=-1.0)
    assert err.value.field == "hours" and "an exposure must be > 0" in str(err.value)
    rej = frame(tmp_path / "s.sqlite", "SELECT row, series, field, value, reason, raw "
                                       "FROM rejects ORDER BY id")
    assert rep.rejected == 4 and len(rej) == 5
    assert rej["row"].tolist()[:4] == [i + 1 for i in rows]
    assert (rej["field"] == "hours").all()
    assert rej["value"].fillna("").tolist() == ["0", "-4", "eight", "", "-1.0"]
    for (text, rule), reason, row in zip(BAD, rej["reason"], rej["row"]):
        assert reason.startswith(f"row {row}: field 'hours'")
        assert rule in reason
    obs = frame(tmp_path / "s.sqlite", "SELECT exposure FROM observations")
    assert len(obs) == len(log) - 4 and (obs["exposure"] > 0).all()


@pytest.mark.parametrize("value, rule", [(0.0, "> 0"), (-3.0, "> 0"), (float("inf"), "finite"),
                                         ("x", "not a number")])
def test_the_store_refuses_a_bad_exposure_given_to_it(tmp_path, value, rule):
    store = ms.Store.open(tmp_path / "s.sqlite", create=True)
    rows = pd.DataFrame({"series": ["a", "a"], "ts": ["2024-01-01T00:00:00Z",
                                                      "2024-01-02T00:00:00Z"],
                         "price": [2.0, 2.1], "quantity": [0.0, 3.0], "exposure": [8.0, value]})
    with pytest.raises(ValidationError, match=f"exposure.*{rule}") as err:
        ms.write_batch(store, observations=rows)
    assert err.value.field == "exposure"
    assert "observation 1 (series 'a', ts '2024-01-02T00:00:00Z')" in str(err.value)
    assert store.scalar("SELECT count(*) FROM observations") == 0   # nothing half-written
    ms.write_batch(store, observations=rows.assign(exposure=[8.0, None]))
    got = store.frame("SELECT exposure FROM observations ORDER BY ts")["exposure"]
    assert got.iloc[0] == 8.0 and np.isnan(got.iloc[1])            # missing: NULL, read as 1
    store.close()


def test_an_experiment_read_from_the_store_fits_the_quantity_per_unit_of_exposure(tmp_path):
    """``elmon experiment status`` reads the store's rows again and fits b: with the stored
    exposure as the offset it gives the fit on the log's rows (the replay's path) and the
    within-series least squares of log(q / hours) from statsmodels."""
    import statsmodels.formula.api as smf

    from monitor.experiments import plan_from_config
    from monitor.experiments.sources import status_from_store, statuses_from_frame
    from monitor.experiments.status import evaluate

    log = count_log(seed=13, n_series=3, length=200)
    with Monitor(tmp_path / "s.sqlite", config()) as mon:
        mon.observe_many(log)
    start = log["ts"].iloc[len(log) // 4]
    plan = plan_from_config("kiosk-trial", {"series": ["pier-*"], "start": start})
    stored = status_from_store(tmp_path / "s.sqlite", plan, ["promo"], [])
    rows = log.assign(ts=pd.to_datetime(log["ts"], utc=True))
    cfg = validate_config({"estimator": dict(ESTIMATOR), "experiments": {
        "kiosk-trial": {"series": ["pier-*"], "start": start}}})
    from_log = statuses_from_frame(rows, cfg)[0]
    b = stored.summary["b"]
    assert b == pytest.approx(from_log.summary["b"], rel=1e-12, abs=0)
    assert stored.summary["n_obs"] == from_log.summary["n_obs"] > 150
    # reference: statsmodels OLS with series dummies (the within estimator) on the window's
    # rows with q > 0 (the log-log fit leaves zeros out)
    win = rows[(rows["ts"] >= pd.Timestamp(start)) & (rows["quantity"] > 0)]
    fit = smf.ols("np.log(quantity / hours) ~ np.log(price) + promo + C(series)",
                  data=win).fit()
    assert b == pytest.approx(fit.params["np.log(price)"], rel=1e-9)
    # without the exposure the fit is another one: the stored column is what is used
    plain = evaluate(rows, plan, ["promo"], [])
    assert abs(plain.summary["b"] - b) > 1e-6


def test_the_dashboards_window_slopes_use_the_stored_exposure(tmp_path):
    """The series page's log-log windows re-fit slopes from the stored rows: of log(q / hours)
    when the store has the exposure (scipy's linregress on the log's rows as reference)."""
    from scipy.stats import linregress

    from dashboard import loglog

    log = count_log(seed=17, n_series=1, length=120)
    with Monitor(tmp_path / "s.sqlite", config()) as mon:
        mon.observe_many(log)
    pts = loglog.loglog_points(ms.series_history(tmp_path / "s.sqlite", log["series"].iloc[0]))
    pos = log[log["quantity"] > 0]
    assert pts.attrs["per_exposure"] and len(pts) == len(pos)
    assert pts.attrs["not_on_log_scale"] == len(log) - len(pos)
    fit = loglog.fit_window(pts["log_price"], pts["log_quantity"])
    ref = linregress(np.log(pos["price"]), np.log(pos["quantity"] / pos["hours"]))
    assert fit["slope"] == pytest.approx(ref.slope, rel=1e-9)
    plain = linregress(np.log(pos["price"]), np.log(pos["quantity"]))
    assert abs(plain.slope - ref.slope) > 1e-6                # the exposure changes the slope
