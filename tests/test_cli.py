"""The CLI: every command module exists, every command has --help text with an example, and
user errors map to a clear message and exit code 2."""

from __future__ import annotations

import importlib.util
import json

import pytest

from monitor.cli import COMMAND_MODULES, build_parser, main


def test_every_listed_command_module_exists():
    missing = [m for m in COMMAND_MODULES if importlib.util.find_spec(m) is None]
    assert not missing, f"command modules listed but absent: {missing}"


def _commands():
    parser = build_parser()
    sub = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    return sub.choices


@pytest.mark.parametrize("name", sorted(_commands()))
def test_every_command_has_help_with_an_example(name, capsys):
    with pytest.raises(SystemExit) as info:
        main([name, "--help"])
    assert info.value.code == 0
    text = capsys.readouterr().out
    assert "example" in text.lower() and f"elmon {name}" in text


def test_replay_missing_file_is_a_clear_error(tmp_path, capsys):
    rc = main(["replay", str(tmp_path / "absent.csv"), "--out", str(tmp_path / "o")])
    assert rc == 2
    err = capsys.readouterr().err
    assert "absent.csv" in err and "no such file" in err


def test_replay_missing_column_is_a_clear_error(tmp_path, capsys):
    log = tmp_path / "log.csv"
    log.write_text("series,ts,price\na,2026-01-01T00:00:00Z,3.0\n")
    rc = main(["replay", str(log), "--out", str(tmp_path / "o")])
    assert rc == 2
    assert "missing column(s) ['quantity']" in capsys.readouterr().err


def test_replay_unreadable_file_is_a_clear_error(tmp_path, capsys):
    log = tmp_path / "log.parquet"
    log.write_bytes(b"this is not parquet")
    rc = main(["replay", str(log), "--out", str(tmp_path / "o")])
    assert rc == 2
    assert "unreadable parquet file" in capsys.readouterr().err


def test_bad_config_key_is_named(tmp_path, capsys):
    cfg = tmp_path / "elmon.toml"
    cfg.write_text("[estimator]\nforgeting = 0.9\n")
    log = tmp_path / "log.csv"
    log.write_text("series,ts,price,quantity\na,2026-01-01T00:00:00Z,3.0,4\n")
    rc = main(["replay", str(log), "--out", str(tmp_path / "o"), "--config", str(cfg)])
    assert rc == 2
    err = capsys.readouterr().err
    assert "[estimator] forgeting: unknown key" in err


def test_bad_config_value_is_named(tmp_path, capsys):
    cfg = tmp_path / "elmon.toml"
    cfg.write_text("[estimator]\nforgetting = 1.5\n")
    log = tmp_path / "log.csv"
    log.write_text("series,ts,price,quantity\na,2026-01-01T00:00:00Z,3.0,4\n")
    rc = main(["replay", str(log), "--out", str(tmp_path / "o"), "--config", str(cfg)])
    assert rc == 2
    assert "forgetting = 1.5: must be in (0.0, 1.0]" in capsys.readouterr().err
