"""``--ts-format`` (issue 16, item 3): day-first dates replay and ingest correctly when their
format is stated; without it the run exits 2 naming the field, the first bad value and the
option to use. Reference: the same rows written in ISO 8601, which need no format."""

from __future__ import annotations

import numpy as np
import pytest
import pandas as pd

from monitor import store as mstore
from monitor.cli import main


def _log(path, fmt):
    rng = np.random.default_rng(5)
    n = 90
    ts = pd.date_range("2024-01-01", periods=n, freq="D", tz="UTC")
    p = 4 * np.exp(rng.normal(0, 0.12, n))
    q = np.exp(3.5 - 1.4 * np.log(p) + rng.normal(0, 0.1, n))
    pd.DataFrame({"series": "elm-row/rye-loaf",            # invented demo series
                  "ts": ts.strftime(fmt), "price": p.round(3),
                  "quantity": q.round(2)}).to_csv(path, index=False)
    return path


def test_day_first_dates_with_ts_format_equal_the_iso_log(tmp_path, capsys):
    iso = _log(tmp_path / "iso.csv", "%Y-%m-%dT%H:%M:%SZ")
    dmy = _log(tmp_path / "dmy.csv", "%d/%m/%Y")
    assert main(["replay", str(iso), "--out", str(tmp_path / "a"), "--quiet"]) == 0
    assert main(["replay", str(dmy), "--out", str(tmp_path / "b"), "--quiet",
                 "--ts-format", "%d/%m/%Y"]) == 0
    a = pd.read_csv(tmp_path / "a" / "estimates.csv")
    b = pd.read_csv(tmp_path / "b" / "estimates.csv")
    assert len(a) == 90
    pd.testing.assert_frame_equal(a, b)
    assert main(["ingest", str(dmy), "--db", str(tmp_path / "s.sqlite"), "--quiet",
                 "--ts-format", "%d/%m/%Y"]) == 0
    hist = mstore.series_history(tmp_path / "s.sqlite", "elm-row/rye-loaf")
    assert len(hist) == 90
    np.testing.assert_allclose(hist["beta"].to_numpy(float), a["beta"].to_numpy(float),
                               rtol=0, atol=1e-12, equal_nan=True)


def test_without_the_format_the_error_names_the_value_and_the_option(tmp_path, capsys):
    dmy = _log(tmp_path / "dmy.csv", "%d/%m/%Y")
    rc = main(["ingest", str(dmy), "--db", str(tmp_path / "s.sqlite"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2
    assert "first: row 1, field 'ts' = '01/01/2024'" in err
    assert "--ts-format '%d/%m/%Y' (day first) or '%m/%d/%Y' (month first)" in err
    rc = main(["replay", str(dmy), "--out", str(tmp_path / "o"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2 and "first: row 1, field 'ts' = '01/01/2024'" in err
    assert "--ts-format '%d/%m/%Y' (day first)" in err


def test_rows_that_do_not_match_the_stated_format_are_rejected_by_name(tmp_path, capsys):
    dmy = _log(tmp_path / "dmy.csv", "%d/%m/%Y")
    with open(dmy, "a") as fh:
        fh.write("elm-row/rye-loaf,2024-04-01,4.0,20\n")          # ISO among day-first rows
    assert main(["ingest", str(dmy), "--db", str(tmp_path / "s.sqlite"), "--quiet",
                 "--ts-format", "%d/%m/%Y"]) == 0
    rej = mstore.list_rejects(tmp_path / "s.sqlite")
    assert list(rej["row"]) == [91] and list(rej["field"]) == ["ts"]
    assert "timestamp does not match the stated format '%d/%m/%Y'" in rej["reason"].iloc[0]


def test_a_format_without_codes_is_a_clear_error(tmp_path, capsys):
    dmy = _log(tmp_path / "dmy.csv", "%d/%m/%Y")
    rc = main(["replay", str(dmy), "--out", str(tmp_path / "o"), "--ts-format", "dd/mm/yyyy"])
    err = capsys.readouterr().err
    assert rc == 2 and "ts_format = 'dd/mm/yyyy': must be a strftime format" in err


# ---------------------------------------------------------------- the field separator

def _sep_log(path, sep):
    comma = _log(path.with_suffix(".comma.csv"), "%Y-%m-%dT%H:%M:%SZ")
    text = comma.read_text()
    path.write_text(text.replace(",", sep))
    return comma, path


@pytest.mark.parametrize("sep, option", [(";", None), (";", ";"), ("\t", "tab"), ("|", None)])
def test_a_stated_or_sniffed_separator_reads_as_the_comma_log(tmp_path, sep, option):
    comma, log = _sep_log(tmp_path / "log.csv", sep)
    extra = ["--delimiter", option] if option else []
    assert main(["replay", str(comma), "--out", str(tmp_path / "a"), "--quiet"]) == 0
    assert main(["replay", str(log), "--out", str(tmp_path / "b"), "--quiet", *extra]) == 0
    a = pd.read_csv(tmp_path / "a" / "estimates.csv")
    pd.testing.assert_frame_equal(a, pd.read_csv(tmp_path / "b" / "estimates.csv"))
    assert main(["ingest", str(log), "--db", str(tmp_path / "s.sqlite"), "--quiet", *extra]) == 0
    hist = mstore.series_history(tmp_path / "s.sqlite", "elm-row/rye-loaf")
    np.testing.assert_allclose(hist["beta"].to_numpy(float), a["beta"].to_numpy(float),
                               rtol=0, atol=1e-12, equal_nan=True)


def test_a_wrong_separator_says_which_one_to_give(tmp_path, capsys):
    _comma, log = _sep_log(tmp_path / "log.csv", ";")
    rc = main(["ingest", str(log), "--db", str(tmp_path / "s.sqlite"), "--delimiter", ","])
    err = capsys.readouterr().err
    assert rc == 2 and "give --delimiter ';'" in err
    rc = main(["replay", str(log), "--out", str(tmp_path / "o"), "--delimiter", ","])
    err = capsys.readouterr().err
    assert rc == 2 and "missing column(s)" in err and "give --delimiter ';'" in err
    rc = main(["replay", str(log), "--out", str(tmp_path / "o"), "--delimiter", "ab"])
    assert rc == 2 and "delimiter = 'ab': must be one character" in capsys.readouterr().err


def test_the_folder_source_sniffs_each_file(tmp_path):
    from monitor.live.service import Service
    from monitor.settings import validate

    (tmp_path / "in").mkdir()
    _sep_log(tmp_path / "in" / "a.csv", ";")
    (tmp_path / "in" / "a.comma.csv").unlink()
    cfg = validate({"store": {"path": "s.sqlite"},
                    "sources": {"drops": {"type": "folder", "path": "in", "settle_s": 0.0}}})
    with Service(cfg, base=tmp_path) as svc:
        t = svc.run_once()
    assert t["accepted"] == 90 and t["rejected"] == 0


def test_the_dask_engine_reads_a_semicolon_log_like_the_local_one(tmp_path):
    comma, log = _sep_log(tmp_path / "log.csv", ";")
    assert main(["replay", str(comma), "--out", str(tmp_path / "a"), "--quiet"]) == 0
    assert main(["replay", str(log), "--out", str(tmp_path / "d"), "--quiet", "--engine",
                 "dask", "--delimiter", ";"]) == 0
    a = pd.read_csv(tmp_path / "a" / "estimates.csv")
    d = pd.read_csv(tmp_path / "d" / "estimates.csv").sort_values(["series", "ts"])
    np.testing.assert_allclose(d["beta"].to_numpy(float), a["beta"].to_numpy(float),
                               rtol=0, atol=1e-12, equal_nan=True)


def test_the_error_names_the_log_s_own_column(tmp_path, capsys):
    dmy = _log(tmp_path / "dmy.csv", "%d/%m/%Y")
    dmy.write_text(dmy.read_text().replace("series,ts,", "series,sold_on,", 1))
    rc = main(["replay", str(dmy), "--out", str(tmp_path / "o"), "--quiet", "--ts-col",
               "sold_on"])
    err = capsys.readouterr().err
    assert rc == 2 and "field 'ts' (column 'sold_on' of the log) = '01/01/2024'" in err
    rc = main(["ingest", str(dmy), "--db", str(tmp_path / "s.sqlite"), "--ts-col", "sold_on"])
    assert rc == 2 and "(column 'sold_on' of the log)" in capsys.readouterr().err
    assert main(["ingest", str(dmy), "--db", str(tmp_path / "t.sqlite"), "--quiet",
                 "--ts-col", "sold_on", "--ts-format", "%d/%m/%Y"]) == 0
