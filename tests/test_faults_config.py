"""Config faults (issue 14, item 7 in part): inf, nan and huge times in [service] are refused
at load with the key named, instead of a traceback or a service that never runs a job."""

from __future__ import annotations

import math

import pytest

from monitor.errors import ConfigError
from monitor.live.settings import MAX_SECONDS, service_settings
from monitor.sections import Config


@pytest.mark.parametrize("key", ["poll_interval_s", "misfire_grace_s", "delivery_interval_s",
                                 "stale_check_s", "delivery_backoff_s", "series_stale_after_s",
                                 "reminder_every_s", "delivery_max_backoff_s"])
@pytest.mark.parametrize("value", [math.inf, math.nan, 1e300, MAX_SECONDS + 1.0])
def test_a_time_that_is_not_finite_or_is_huge_is_refused_naming_the_key(key, value):
    with pytest.raises(ConfigError, match=rf"\[service\] {key} = "):
        service_settings(Config({"service": {key: value}}))


def test_the_longest_accepted_time_still_loads():
    sec = service_settings(Config({"service": {"misfire_grace_s": float(MAX_SECONDS),
                                               "reminder_every_s": 0.0}}))
    assert sec["misfire_grace_s"] == MAX_SECONDS


# ---------------------------------------------------------------- round 3 (issue 14, item 9)

@pytest.mark.parametrize("section, key, value, words", [
    ("validation", "max_future_s", math.inf, "max_future_s = inf: must be a finite number"),
    ("validation", "allowed_lateness_s", math.nan, "allowed_lateness_s = nan: must be a finite"),
    ("validation", "unit_ratio", math.inf, "unit_ratio = inf: must be > 1 and finite"),
    ("validation", "quantity_ratio", math.nan, "quantity_ratio = nan: must be > 1 and finite"),
])
def test_validation_times_and_ratios_must_be_finite(section, key, value, words):
    from monitor.rows.validate import validation_from_config
    from monitor.settings import validate

    with pytest.raises(ConfigError, match=words.replace("(", r"\(")):
        validation_from_config(validate({section: {key: value}}))


@pytest.mark.parametrize("spec, words", [
    ({"type": "folder", "path": "in", "patterns": [1, 2]}, r"patterns = \[1, 2\]: must be a list"),
    ({"type": "folder", "path": "in", "settle_s": math.inf}, "settle_s = inf: must be a finite"),
    ({"type": "csv", "path": "f.csv", "poll_interval_s": 1e300},
     r"poll_interval_s = 1e\+300: must be a finite"),
])
def test_source_settings_are_refused_at_load_naming_the_key(spec, words):
    from monitor.settings import validate

    with pytest.raises(ConfigError, match=r"\[sources.x\] " + words):
        validate({"sources": {"x": spec}})


def test_webhook_headers_that_are_not_a_table_name_the_key():
    from monitor.live.sinks import sinks_from_config

    with pytest.raises(ConfigError, match=r"sinks\.w: headers = 'abc': must be a table"):
        sinks_from_config({"w": {"type": "webhook", "url": "https://hooks.example.org/x",
                                 "headers": "abc"}})
    with pytest.raises(ConfigError, match="line break"):
        sinks_from_config({"w": {"type": "webhook", "url": "https://hooks.example.org/x",
                                 "headers": {"X-A": "1\r\nX-B: 2"}}})


def test_run_once_fails_when_a_source_cannot_be_read(tmp_path, capsys):
    from monitor.cli import main

    (tmp_path / "c.toml").write_text('[sources.feed]\ntype = "csv"\npath = "missing.csv"\n')
    rc = main(["run", "--config", str(tmp_path / "c.toml"), "--db", str(tmp_path / "s.sqlite"),
               "--once", "--log-level", "error"])
    err = capsys.readouterr().err
    assert rc == 2 and "error: source feed: SourceError:" in err and "missing.csv" in err


def test_a_config_file_that_is_not_utf8_is_an_error_naming_the_line(tmp_path, capsys):
    from monitor.cli import main

    (tmp_path / "c.toml").write_bytes(b'[store]\npath = "\xff\xfe.sqlite"\n')
    assert main(["run", "--config", str(tmp_path / "c.toml"), "--once"]) == 2
    err = capsys.readouterr().err
    assert "c.toml: line 2: not UTF-8 text (byte 0xff at offset 16)" in err
