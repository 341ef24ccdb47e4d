"""examples/elmon.toml goes through the real config loader and builds the real service.

Issue 16 (first use): the example is what a new user copies, so every key in it, including the
commented optional tables (folder and SQL sources, webhook and e-mail sinks), must be accepted
by the code as it is now (the e-mail sink's TLS mode is ``tls``, see monitor/live/mail.py).
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest

from monitor.live.service import Service, configured_sinks
from monitor.settings import load_config

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "elmon.toml"
_KEY_LINE = re.compile(r"^[a-z_]+ = ")


def uncommented(text: str) -> str:
    """The example with every commented ``# [table]`` block made live.

    A block starts at a line ``# [name]`` and goes on over ``# key = value`` lines and
    ``#   # note`` continuation lines; it ends at the first other line.
    """
    out, inside = [], False
    for line in text.splitlines():
        body = line[2:] if line.startswith("# ") else None
        if body is not None and body.startswith("["):
            inside = True
        elif inside and (body is None or not (_KEY_LINE.match(body) or body.lstrip().startswith("#"))):
            inside = False
        out.append(body if inside else line)
    return "\n".join(out) + "\n"


def test_example_loads_and_builds_the_service(tmp_path):
    cfg_path = tmp_path / "elmon.toml"
    shutil.copy(EXAMPLE, cfg_path)
    config = load_config(cfg_path)
    with Service(config, store=tmp_path / "s.sqlite") as svc:
        assert list(svc.sources) == ["feed"]
        assert svc.sources["feed"].path == tmp_path / "feed.csv"
        assert list(svc.sinks) == ["log"]
        assert svc.settings["poll_interval_s"] == 2.0
    assert config.section("estimator")["forgetting"] == 0.98


def test_every_commented_table_of_the_example_is_accepted(tmp_path, monkeypatch):
    text = EXAMPLE.read_text(encoding="utf-8")
    assert "starttls = true" not in text, "the e-mail sink's TLS key is tls = \"starttls\""
    live = uncommented(text)
    for key in ("ts_format", "delimiter"):              # the commented [columns] format keys
        assert f"\n# {key} = " in live
        live = live.replace(f"\n# {key} = ", f"\n{key} = ")
    for table in ("[sources.drops]", "[sources.meters]", "[sinks.ops]", "[sinks.mail]"):
        assert f"\n{table}" in live, f"{table} is no longer in the example"
    cfg_path = tmp_path / "elmon.toml"
    cfg_path.write_text(live, encoding="utf-8")
    config = load_config(cfg_path)            # every key checked against the schemas
    assert set(config.section("sources")) == {"feed", "drops", "meters"}
    assert config.section("columns")["delimiter"] == ";"
    from monitor.ingest.logio import column_names
    from monitor.rows.validate import validation_from_config
    assert column_names(config).delimiter == ";"
    assert validation_from_config(config).ts_format == "%d/%m/%Y"
    for var in ("ELMON_WEBHOOK_SECRET", "ELMON_SMTP_USER", "ELMON_SMTP_PASSWORD"):
        monkeypatch.setenv(var, "x")
    sinks = configured_sinks(config, tmp_path)
    assert set(sinks) == {"log", "ops", "mail"}
    assert sinks["mail"].tls == "starttls" and sinks["mail"].port == 587
    assert sinks["mail"].timeout == 10.0


def test_old_starttls_key_still_accepted_and_disagreement_refused():
    """The older spelling keeps working; both keys that disagree is a config error."""
    from monitor.errors import ConfigError
    from monitor.live.sinks import sinks_from_config

    base = {"type": "email", "host": "localhost", "port": 587, "sender": "a@example.org",
            "recipients": ["b@example.org"]}
    assert sinks_from_config({"m": {**base, "starttls": True}})["m"].tls == "starttls"
    with pytest.raises(ConfigError, match=r"sinks\.m.*tls = 'none' and starttls = True disagree"):
        sinks_from_config({"m": {**base, "starttls": True, "tls": "none"}})


def test_relative_ca_file_is_taken_from_the_config_folder(tmp_path):
    """Like every path in the file, ``ca_file`` is relative to the config's folder, not the cwd."""
    from monitor.settings import validate

    (tmp_path / "ca.pem").write_text("not read until a delivery\n")
    config = validate({"sinks": {"m": {"type": "email", "host": "localhost", "port": 587,
                                       "sender": "a@example.org", "recipients": ["b@example.org"],
                                       "tls": "starttls", "ca_file": "ca.pem"}}})
    assert configured_sinks(config, tmp_path)["m"].ca_file == str(tmp_path / "ca.pem")
