"""Issue 16 (first use): what the dashboard reads is recorded by the engine, and drawn.

The bounds in effect (``[bounds]`` or a series' own) and the forgetting factor are written to
the store's ``series`` record by :class:`monitor.live.monitor.Monitor`; the dashboard pages
draw/read them (checked with streamlit's AppTest on a seeded store).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from monitor import store as mstore
from monitor.live.monitor import Monitor
from monitor.settings import validate


def _frame(n: int = 60, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    ts = pd.date_range("2024-01-01", periods=n, freq="h", tz="UTC")
    price = 5.0 * np.exp(rng.normal(0, 0.1, n))
    qty = np.exp(3.0 - 1.5 * np.log(price) + rng.normal(0, 0.05, n))
    return pd.concat([pd.DataFrame({"series": s, "ts": ts, "price": price, "quantity": qty})
                      for s in ("shop1/tea", "shop2/oats")], ignore_index=True)


def test_engine_records_bounds_in_effect_and_forgetting(tmp_path):
    cfg = validate({"bounds": {"low": -3.0, "high": -0.2}, "estimator": {"forgetting": 0.97}})
    store = mstore.open_store(tmp_path / "s.db", create=True)
    # shop2/oats has its own low bound; its high side keeps [bounds]
    mstore.write_batch(store, series=[{"series": "shop2/oats", "low": -2.5}])
    mon = Monitor(store, cfg)
    mon.observe_many(_frame())
    lat = mstore.latest_estimates(store).set_index("series")
    assert lat.loc["shop1/tea", "forgetting"] == 0.97
    assert lat.loc["shop1/tea", ["bound_low", "bound_high"]].tolist() == [-3.0, -0.2]
    assert lat.loc["shop2/oats", ["bound_low", "bound_high"]].tolist() == [-2.5, -0.2]
    # the series' own bounds are untouched: shop1 has none, shop2 only its low side
    assert pd.isna(lat.loc["shop1/tea", "low"]) and pd.isna(lat.loc["shop1/tea", "high"])
    assert lat.loc["shop2/oats", "low"] == -2.5 and pd.isna(lat.loc["shop2/oats", "high"])


def test_no_bounds_configured_records_null_bounds(tmp_path):
    store = mstore.open_store(tmp_path / "s.db", create=True)
    Monitor(store, validate({})).observe_many(_frame(30))
    lat = mstore.latest_estimates(store)
    assert lat["bound_low"].isna().all() and lat["bound_high"].isna().all()
    assert (lat["forgetting"] == 0.99).all()          # the [estimator] default


# ----------------------------------------------------------------------------- the pages
import json                                                      # noqa: E402
from pathlib import Path                                         # noqa: E402

import pytest                                                    # noqa: E402
from streamlit.testing.v1 import AppTest                        # noqa: E402

APP = Path(__file__).resolve().parents[1] / "dashboard" / "app.py"
START = pd.Timestamp("2024-05-01T00:00:00Z")
SPIKE = (-12.0, 15.0)           # early estimates of a young series, just past warm-up


def _seed(d: Path) -> dict:
    """A store whose series has bounds in effect only through [bounds] (bound_low/high), a
    forgetting factor, a warm-up spike, a change of b from -1.3 to -2.3 and an alert with a
    change time; a truth file with one change point inside the data and one in the future;
    a replay folder whose rejects hold the text value 'n/a'."""
    n = 200
    ts = START + pd.to_timedelta(np.arange(n), unit="h")
    b = np.where(np.arange(n) < 120, -1.3, -2.3) + 0.02 * np.sin(np.arange(n) / 4.0)
    beta = b.copy()
    beta[:10] = np.nan                                  # warming up
    beta[10], beta[11] = SPIKE                          # wild first estimates
    est = pd.DataFrame({"series": "shop1/tea", "ts": ts, "beta": beta, "beta_se": 0.05,
                        "beta_lo": beta - 0.1, "beta_hi": beta + 0.1, "n_eff": 50.0,
                        "status": ["warming_up"] * 10 + ["ok"] * (n - 10)})
    obs = pd.DataFrame({"series": "shop1/tea", "ts": ts, "price": 5.0, "quantity": 10.0})
    path = d / "store.sqlite"
    store = mstore.open_store(path, create=True)
    mstore.write_batch(store, observations=obs, estimates=est,
                       series=[{"series": "shop1/tea", "bound_low": -3.0, "bound_high": -0.2,
                                "forgetting": 0.98}])
    aid = mstore.open_alert(store, "shop1/tea", "elasticity_change", ts[130], -2.3, -2.4, -2.2,
                            "elasticity moved", severity="warning",
                            details={"statistic": 9.5, "threshold": 5.0, "beta_before": -1.3,
                                     "beta_after": -2.3, "change_ts": "2024-05-06T00:00:00Z",
                                     "started_ts": "2024-05-06T00:00:00Z"})
    store.close()
    truth = d / "truth.csv"
    pd.DataFrame({"series": ["shop1/tea"] * 2, "kind": ["elasticity_change"] * 2,
                  "ts": ["2024-05-06T00:00:00Z", "2025-06-01T00:00:00Z"]}).to_csv(truth,
                                                                                    index=False)
    rep = d / "replay-out"
    rep.mkdir()
    est.assign(ts=est["ts"].dt.strftime("%Y-%m-%dT%H:%M:%SZ")).to_csv(rep / "estimates.csv",
                                                                     index=False)
    pd.DataFrame(columns=["series", "ts", "rule", "beta"]).to_csv(rep / "alerts.csv", index=False)
    pd.DataFrame({"row": [5, 9], "series": ["shop1/tea"] * 2, "field": ["price", "quantity"],
                  "value": ["n/a", "NA"], "reason": ["row 5: field 'price' = 'n/a': not a number",
                                                     "row 9: field 'quantity' = 'NA': not a number"]}
                 ).to_csv(rep / "rejects.csv", index=False)
    return {"db": str(path), "truth": str(truth), "replay": str(rep), "alert": aid}


@pytest.fixture(scope="module")
def seeded(tmp_path_factory):
    return _seed(tmp_path_factory.mktemp("first_use"))


@pytest.fixture()
def app(seeded, monkeypatch):
    monkeypatch.setenv("ELMON_DB", seeded["db"])
    monkeypatch.setenv("ELMON_TRUTH", seeded["truth"])
    at = AppTest.from_file(str(APP), default_timeout=60)
    at.run()
    assert not at.exception, [e.value for e in at.exception]
    return at


def _charts(at) -> list[dict]:
    return [json.loads(c.proto.spec) for c in at.get("vega_lite_chart")]


def _layer_values(chart, layer: dict) -> list[dict]:
    """Rows of a layer's named data set (sent beside the spec as Arrow IPC bytes)."""
    import pyarrow as pa
    name = layer["data"]["name"]
    ds = next(d for d in chart.proto.datasets if d.name == name)
    return pa.ipc.open_stream(ds.data.data).read_pandas().to_dict("records")


def _downloads(at) -> list[str]:
    """File names offered by the download buttons (their labels read 'Download NAME')."""
    return [b.proto.label.removeprefix("Download ") for b in at.get("download_button")]


def test_series_page_draws_bounds_memory_and_a_readable_axis(app):
    at = app
    at.switch_page("views/series.py")
    at.query_params["series"] = "shop1/tea"
    at.run()
    assert not at.exception and not at.error
    m = {x.label: x.value for x in at.metric}
    assert m["Forgetting factor λ"] == "0.9800"           # recorded, not "not recorded"
    # Kish: (1 + 0.98) / (1 - 0.98) = 99 observations
    assert m["Effective window (observations)"] == "99"
    assert "ok" in m["Status"]
    chart = at.get("vega_lite_chart")[0]
    spec = json.loads(chart.proto.spec)
    layers = spec["layer"]
    rules = [ly for ly in layers if ly["mark"]["type"] == "rule"
             and ly["encoding"].get("y", {}).get("field") == "y"]
    assert len(rules) == 1                                   # the bounds layer
    assert sorted(r["y"] for r in _layer_values(chart, rules[0])) == [-3.0, -0.2]
    # y axis: excludes the warm-up spike (-12, +15) yet holds the change and both bounds
    area = next(ly for ly in layers if ly["mark"]["type"] == "area")
    lo, hi = area["encoding"]["y"]["scale"]["domain"]
    assert SPIKE[0] < lo <= -3.0 and -0.2 <= hi < SPIKE[1]
    assert lo < -2.3 - 0.1 and hi > -1.3 + 0.1
    # x axis: the future change point (2025-06-01) is not drawn, the one inside is
    truth = [ly for ly in layers if ly["mark"]["type"] == "rule"
             and ly["encoding"].get("x", {}).get("field") == "ts"]
    drawn = [str(v["ts"]) for v in _layer_values(chart, truth[0])]
    assert len(drawn) == 1 and "2024-05-06" in drawn[0]
    assert "1 known change point(s) lie outside" in "\n".join(c.value for c in at.caption)


def test_overview_each_sparkline_on_its_own_scale_and_stale_is_one_number(app):
    at = app
    table = at.dataframe[0].value
    t = np.asarray(table["trend"].iloc[0], dtype=float)
    assert np.nanmin(t) == 0.0 and np.nanmax(t) == 1.0      # its own range, not flat
    # the text gives that row's own range: a wiggle of +-0.02 around -2.3
    lo, hi = (float(v.replace("\u2212", "-")) for v in table["trend_range"].iloc[0].split(" to "))
    assert -2.33 < lo < hi < -2.27
    labels = [x.label for x in at.metric]
    assert "Stale" in labels and "Stale sources" not in labels
    assert "series.csv" in _downloads(at)


def test_alerts_table_has_change_columns_csv_and_explain_view(app, seeded):
    at = app
    at.switch_page("views/alerts.py").run()
    assert not at.exception and not at.error
    table = at.dataframe[0].value
    assert {"change_ts", "size", "beta_before", "beta_after"} <= set(table.columns)
    names = _downloads(at)
    assert "alerts.csv" in names and f"alert{seeded['alert']}_events.csv" in names
    m = {x.label: x.value for x in at.metric}
    assert m["Statistic at the alarm"] == "9.50" and m["Threshold"] == "5.00"
    assert m["b before"] == "\u22121.30" and m["b after"] == "\u22122.30"   # typographic minus
    cap = "\n".join(c.value for c in at.caption)
    assert "Estimated change began: 2024-05-06 00:00 UTC" in cap


def test_replay_rejects_show_text_values(app, seeded):
    at = app
    at.switch_page("views/replay.py").run()
    at.text_input(key="rp_folder_text").input(seeded["replay"]).run()
    assert not at.exception, [e.value for e in at.exception]
    rej = next(df.value for df in at.dataframe if "reason" in df.value.columns)
    assert rej["value"].tolist() == ["n/a", "NA"]
    assert "rejects.csv" in _downloads(at)
