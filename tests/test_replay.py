"""`elmon replay` first form: output files, ordering, rejects, equality with the streaming
estimator, CSV and Parquet inputs agree."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from monitor.cli import main
from monitor.estimators import ElasticityRLS
from monitor.replay.driver import run_replay


def _log(rng, n_days=150, series=(("oat-bar@harbor", -1.6), ("trail-mix@millbrook", -2.3))):
    rows = []
    t0 = pd.Timestamp("2026-01-01", tz="UTC")
    for name, b in series:
        for d in range(n_days):
            p = 4.0 * np.exp(rng.normal(0, 0.1))
            promo = float(rng.random() < 0.2)
            q = 80 * (p / 4) ** b * np.exp(0.3 * promo + rng.normal(0, 0.2))
            rows.append((name, (t0 + pd.Timedelta(days=d)).strftime("%Y-%m-%dT%H:%M:%SZ"), p, q, promo))
    return pd.DataFrame(rows, columns=["series", "ts", "price", "quantity", "promo"])


def test_replay_writes_files_and_matches_streaming(tmp_path, rng):
    df = _log(rng)
    shuffled = df.sample(frac=1.0, random_state=1)          # arrival order is not time order
    shuffled.to_csv(tmp_path / "log.csv", index=False)
    summary = run_replay(tmp_path / "log.csv", tmp_path / "out",
                         config=_cfg(forgetting=0.97, controls=["promo"]))
    est = pd.read_csv(tmp_path / "out" / "estimates.csv")
    assert list(est.columns[:8]) == ["series", "ts", "beta", "beta_se", "beta_lo", "beta_hi", "n_eff", "status"]
    assert len(est) == len(df) and summary["accepted"] == len(df) and summary["rejected"] == 0
    for name, g in est.groupby("series", sort=False):
        assert g["ts"].is_monotonic_increasing                # processed in time order
        ref = ElasticityRLS(forgetting=0.97, controls=["promo"])
        src = df[df.series == name].sort_values("ts")
        betas = []
        for _, r in src.iterrows():
            ref.learn_one({"price": r.price, "promo": r.promo}, r.quantity)
            betas.append(ref.elasticity)
        # CSV round trip of floats (pyarrow writes shortest repr): exact to 1e-12
        np.testing.assert_allclose(g["beta"].to_numpy(), betas, rtol=0, atol=1e-12)
        assert summary["final"][name]["beta"] == pytest.approx(ref.elasticity, abs=1e-12)
    # warming-up rows have empty se fields, explained by their status
    blank = est["beta_se"].isna()
    assert (est.loc[blank, "status"] == "warming_up").all()
    for f in ("alerts.csv", "rejects.csv", "summary.json"):
        assert (tmp_path / "out" / f).exists()
    s = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert s["settings"]["estimator"]["forgetting"] == 0.97


def _cfg(**est):
    from monitor.settings import Config

    return Config().with_overrides("estimator", **est)


def test_rejects_keep_row_numbers_and_reasons(tmp_path, rng):
    df = _log(rng, n_days=30).astype({"price": object, "quantity": object})
    df.loc[3, "price"] = "abc"
    df.loc[7, "quantity"] = "-2"
    df.loc[9, "ts"] = "not-a-time"
    df.loc[12, "price"] = ""
    df.to_csv(tmp_path / "log.csv", index=False)
    run_replay(tmp_path / "log.csv", tmp_path / "out")
    rej = pd.read_csv(tmp_path / "out" / "rejects.csv")
    got = dict(zip(rej["row"], rej["reason"]))
    # row numbers are 1-based data rows (the header is not counted)
    assert "not a number" in got[4] and "'abc'" in got[4]
    assert "quantity must be >= 0" in got[8]
    assert "unparsable timestamp" in got[10]
    assert "empty field" in got[13]
    est = pd.read_csv(tmp_path / "out" / "estimates.csv")
    assert len(est) + len(rej) == len(df)


def test_csv_and_parquet_inputs_agree(tmp_path, rng):
    df = _log(rng, n_days=60)
    df.to_csv(tmp_path / "log.csv", index=False)
    df.to_parquet(tmp_path / "log.parquet", index=False)
    run_replay(tmp_path / "log.csv", tmp_path / "a")
    run_replay(tmp_path / "log.parquet", tmp_path / "b")
    a = pd.read_csv(tmp_path / "a" / "estimates.csv")
    b = pd.read_csv(tmp_path / "b" / "estimates.csv")
    pd.testing.assert_frame_equal(a, b, check_exact=False, rtol=1e-12)


def test_typed_and_text_reading_paths_agree(tmp_path, rng):
    from monitor.ingest.logio import read_log
    from monitor.rows.validate import validate_frame

    df = _log(rng, n_days=40)
    df.to_csv(tmp_path / "log.csv", index=False)
    fast = validate_frame(read_log(tmp_path / "log.csv"))
    text = validate_frame(read_log(tmp_path / "log.csv", text=True))
    pd.testing.assert_frame_equal(fast.good, text.good)


def test_cli_replay_prints_estimates(tmp_path, rng, capsys):
    _log(rng, n_days=80).to_csv(tmp_path / "log.csv", index=False)
    rc = main(["replay", str(tmp_path / "log.csv"), "--out", str(tmp_path / "o"),
               "--forgetting", "0.98", "--control", "promo"])
    assert rc == 0
    out = capsys.readouterr().out
    assert "oat-bar@harbor" in out and "trail-mix@millbrook" in out and "ok" in out


def test_estimates_as_parquet_equal_the_csv_to_the_bit(tmp_path, rng):
    """--estimates-format parquet writes estimates.parquet with the same columns and values as
    estimates.csv (CSV text round-trips float64 exactly: shortest repr)."""
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    from monitor.replay.driver import replay

    _log(rng, n_days=60).to_csv(tmp_path / "log.csv", index=False)
    rc = main(["replay", str(tmp_path / "log.csv"), "--out", str(tmp_path / "p"),
               "--estimates-format", "parquet", "--control", "promo"])
    assert rc == 0
    assert not (tmp_path / "p" / "estimates.csv").exists()
    replay(tmp_path / "log.csv", tmp_path / "c", _cfg(controls=["promo"]), progress=False)
    par = pq.read_table(tmp_path / "p" / "estimates.parquet")
    csv = pacsv.read_csv(tmp_path / "c" / "estimates.csv",
                         convert_options=pacsv.ConvertOptions(column_types=par.schema,
                                                              strings_can_be_null=True))
    # (an empty CSV field is NULL: the band kind of an estimate without a band, issue 13)
    assert par.num_rows == 120 and par.schema.names == csv.schema.names
    assert par.equals(csv)
    s = json.loads((tmp_path / "p" / "summary.json").read_text())
    assert s["settings"]["replay"]["estimates_format"] == "parquet"
    assert s["estimates_written"] == 120


def test_unknown_estimates_format_is_refused_by_name(tmp_path, rng):
    from monitor.errors import ConfigError
    from monitor.replay.driver import replay

    _log(rng, n_days=5).to_csv(tmp_path / "log.csv", index=False)
    with pytest.raises(ConfigError, match="estimates_format = 'xlsx'"):
        replay(tmp_path / "log.csv", tmp_path / "o", estimates_format="xlsx", progress=False)


def test_summary_json_is_the_same_value_as_the_indented_dump():
    """summary.json writes each series on one line (C encoder); the JSON value is the same as
    ``json.dumps(summary, indent=2, sort_keys=True)``, text outside the block included."""
    from monitor.replay.driver import summary_json

    summary = {"rows": 3, "final": {f"s{i}/é\"x": {"beta": -1.5 + i, "beta_lo": None,
                                                   "status": "ok", "n_obs": i}
                                    for i in (3, 1, 2)},
               "timing": {"wall_s": 0.5}, "alerts_by_rule": {}}
    text = summary_json(summary)
    assert json.loads(text) == summary
    assert list(json.loads(text)["final"]) == sorted(summary["final"])
    plain = json.dumps(summary, indent=2, sort_keys=True)
    head = plain.split('"final"')[0]
    assert text.startswith(head) and text.endswith(plain[plain.index('\n  "rows"'):])
    assert len([ln for ln in text.splitlines() if '"beta": ' in ln]) == 3    # one line each
    assert summary_json({"final": {}}) == json.dumps({"final": {}}, indent=2, sort_keys=True)
