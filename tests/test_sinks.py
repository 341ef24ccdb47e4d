"""Alert delivery through the outbox against real local servers: an HTTP server
(pytest-httpserver) that fails and then recovers, an SMTP server (aiosmtpd) on 127.0.0.1, and
a JSON-lines file. The HMAC check on the server side follows RFC 2104 via Python's hmac module."""

from __future__ import annotations

import email
import hashlib
import hmac
import json
import socket

import pandas as pd
import pytest
from aiosmtpd.controller import Controller
from aiosmtpd.smtp import AuthResult, LoginPassword
from werkzeug import Response

from monitor import store as ms
from monitor.errors import ConfigError
from monitor.live import sinks as mk
from monitor.store.outbox import requeue_failed
from tests.service_helpers import Inbox, free_port


NOW = pd.Timestamp("2024-06-01T09:00:00Z")
SECRET = "s3cret-for-tests-only"


def at(seconds: float) -> str:
    return ms.wall_ts(NOW + pd.Timedelta(seconds=seconds))


def alert(store, sinks, series="depot01/item00042"):
    store.sinks = tuple(sinks)
    return ms.open_alert(store, series, "elasticity_change", "2024-06-01T06:00:00Z", -0.61,
                         -0.85, -0.37, "elasticity moved from -1.4 to -0.6", now=at(0),
                         details={"stat": 7.2, "threshold": 5.0})


def test_log_sink_lines_parse_as_json(store, tmp_path):
    path = tmp_path / "alerts.jsonl"
    aid = alert(store, ["log"])
    ms.acknowledge_alert(store, aid, note="on it", who="ana", now=at(1))
    out = mk.deliver_due(store, {"log": mk.LogSink(path)}, now=at(2))
    assert out == {"delivered": 2, "retrying": 0, "failed": 0}
    lines = [json.loads(x) for x in path.read_text().splitlines()]
    assert [m["event"] for m in lines] == ["opened", "acknowledged"]
    first = lines[0]
    assert first["alert_id"] == aid and first["series"] == "depot01/item00042"
    assert (first["beta"], first["beta_lo"], first["beta_hi"]) == (-0.61, -0.85, -0.37)
    assert first["details"] == {"stat": 7.2, "threshold": 5.0} and first["sent_at"] == at(2)
    assert lines[1]["note"] == "on it" and lines[1]["state"] == "acknowledged"
    assert mk.deliver_due(store, {"log": mk.LogSink(path)}, now=at(3))["delivered"] == 0
    assert ms.list_outbox(store)["status"].eq("delivered").all()


def test_webhook_down_then_up_delivers_exactly_once_with_valid_signature(store, httpserver,
                                                                          monkeypatch):
    monkeypatch.setenv("ELMON_TEST_HOOK_SECRET", SECRET)
    calls, accepted = [], []

    def handler(request):
        body = request.get_data()
        expected = "sha256=" + hmac.new(SECRET.encode(), body, hashlib.sha256).hexdigest()
        signed = hmac.compare_digest(expected, request.headers.get("X-Elmon-Signature", ""))
        calls.append(signed)
        if len(calls) <= 3:
            return Response("down for maintenance", status=500)
        accepted.append(json.loads(body))
        return Response("ok", status=200)

    httpserver.expect_request("/hook", method="POST").respond_with_handler(handler)
    aid = alert(store, ["ops"])
    hook = mk.WebhookSink(httpserver.url_for("/hook"), timeout=2,
                          secret_env="ELMON_TEST_HOOK_SECRET", headers={"X-Team": "pricing"})
    sinks = {"ops": hook}
    # backoff 10 s doubling: tries at 0, 10, 30, 70 s; calls between are not due
    t, tries = 0.0, []
    while t <= 200:
        got = mk.deliver_due(store, sinks, now=at(t), backoff=10, max_attempts=8)
        if sum(got.values()):
            tries.append(t)
        t += 5
    assert tries == [0, 10, 30, 70]
    assert len(calls) == 4 and all(calls)                  # every request correctly signed
    assert len(accepted) == 1 and accepted[0]["alert_id"] == aid
    assert accepted[0]["delivery_id"] == 1 and accepted[0]["event"] == "opened"
    row = ms.list_outbox(store).iloc[0]
    assert row["status"] == "delivered" and row["attempts"] == 4
    assert row["last_error"] is None
    assert httpserver.log[0][0].headers["X-Team"] == "pricing"


def test_webhook_that_stays_down_is_kept_as_failed(store, httpserver):
    httpserver.expect_request("/hook").respond_with_data("nope", status=503)
    alert(store, ["ops"])
    sinks = {"ops": mk.WebhookSink(httpserver.url_for("/hook"), timeout=2)}
    for k in range(5):
        mk.deliver_due(store, sinks, now=at(10_000 * k), backoff=1, max_attempts=3)
    row = ms.list_outbox(store).iloc[0]
    assert row["status"] == "failed" and row["attempts"] == 3
    assert "HTTP 503" in row["last_error"]
    assert len(httpserver.log) == 3                        # no tries after the last attempt
    assert ms.store_summary(store)["outbox"]["failed"] == 1
    assert requeue_failed(store, now=at(50_000)) == 1
    assert ms.list_outbox(store, status="pending").iloc[0]["attempts"] == 0


def test_unreachable_webhook_and_unknown_sink_are_retried(store):
    with socket.socket() as sock:                          # a port with nobody listening
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    alert(store, ["ops", "pager"])
    out = mk.deliver_due(store, {"ops": mk.WebhookSink(f"http://127.0.0.1:{port}/", timeout=1)},
                         now=at(0), backoff=60, max_backoff=100)
    assert out == {"delivered": 0, "retrying": 2, "failed": 0}
    rows = ms.list_outbox(store).set_index("sink")
    assert "refused" in rows.loc["ops", "last_error"].lower()
    assert "no sink named 'pager'" in rows.loc["pager", "last_error"]
    assert rows.loc["ops", "next_attempt_at"] == NOW + pd.Timedelta(seconds=60)
    assert mk._retry_delay(5, 60, 100) == 100              # capped


@pytest.fixture
def smtp_server():
    inbox, logins = Inbox(), []

    def authenticator(server, session, envelope, mechanism, auth_data):
        ok = isinstance(auth_data, LoginPassword) and \
            (auth_data.login, auth_data.password) == (b"elmon-bot", b"pw-from-env")
        logins.append(ok)
        return AuthResult(success=ok, handled=False)   # handled=False: server sends the 535

    ctl = Controller(inbox, hostname="127.0.0.1", port=free_port(), authenticator=authenticator,
                     auth_require_tls=False)
    ctl.start()
    yield ctl, inbox, logins
    ctl.stop()


def test_email_reaches_a_real_smtp_server_with_env_credentials(store, smtp_server,
                                                                monkeypatch):
    ctl, inbox, logins = smtp_server
    monkeypatch.setenv("ELMON_TEST_SMTP_USER", "elmon-bot")
    monkeypatch.setenv("ELMON_TEST_SMTP_PASSWORD", "pw-from-env")
    mail = mk.EmailSink("127.0.0.1", ctl.port, "elmon@example.org",
                        ["ops@example.org", "pricing@example.org"],
                        user_env="ELMON_TEST_SMTP_USER", password_env="ELMON_TEST_SMTP_PASSWORD",
                        timeout=5)
    aid = alert(store, ["mail"])
    assert mk.deliver_due(store, {"mail": mail}, now=at(1))["delivered"] == 1
    assert logins == [True] and len(inbox.envelopes) == 1
    env = inbox.envelopes[0]
    assert env.rcpt_tos == ["ops@example.org", "pricing@example.org"]
    msg = email.message_from_bytes(env.content)
    assert msg["Subject"] == ("[elmon] warning elasticity_change opened: depot01/item00042")
    text, attached = [p.get_payload(decode=True) for p in msg.walk()
                      if not p.is_multipart()]
    assert b"elasticity: -0.610 (band -0.850 to -0.370)" in text and b"not decisions" in text
    assert json.loads(attached)["alert_id"] == aid


def test_email_with_wrong_password_is_retried(store, smtp_server, monkeypatch):
    ctl, inbox, logins = smtp_server
    monkeypatch.setenv("U", "elmon-bot")
    monkeypatch.setenv("P", "wrong")
    alert(store, ["mail"])
    mail = mk.EmailSink("127.0.0.1", ctl.port, "elmon@example.org", "ops@example.org",
                        user_env="U", password_env="P", timeout=5)
    assert mk.deliver_due(store, {"mail": mail}, now=at(1))["retrying"] == 1
    assert logins and not any(logins) and inbox.envelopes == []   # smtplib tries each method
    assert "535" in ms.list_outbox(store).iloc[0]["last_error"]


def test_sinks_from_config_builds_and_names_bad_keys(tmp_path, monkeypatch):
    monkeypatch.setenv("ELMON_TEST_HOOK_SECRET", SECRET)
    sinks = mk.sinks_from_config({
        "log": {"path": str(tmp_path / "a.jsonl")},
        "ops": {"type": "webhook", "url": "http://127.0.0.1:9/x", "timeout": 3,
                "secret_env": "ELMON_TEST_HOOK_SECRET"},
        "mail": {"type": "email", "host": "127.0.0.1", "port": 2525, "sender": "e@example.org",
                 "recipients": ["o@example.org"], "starttls": True}})
    assert isinstance(sinks["log"], mk.LogSink) and sinks["ops"].timeout == 3.0
    assert sinks["mail"].starttls is True
    with pytest.raises(ConfigError, match=r"sinks\.ops\.secret: unknown key.*environment"):
        mk.sinks_from_config({"ops": {"type": "webhook", "url": "http://x", "secret": "abc"}})
    with pytest.raises(ConfigError, match=r"sinks\.mail\.password: unknown key"):
        mk.sinks_from_config({"mail": {"type": "email", "host": "h", "port": 25, "sender": "a@b",
                                       "recipients": ["c@d"], "password": "x"}})
    with pytest.raises(ConfigError, match=r"sinks\.ops\.url: required"):
        mk.sinks_from_config({"ops": {"type": "webhook"}})
    with pytest.raises(ConfigError, match=r"sinks\.pager\.type = None"):
        mk.sinks_from_config({"pager": {"url": "http://x"}})
    with pytest.raises(ConfigError, match="'ELMON_NOT_SET_ANYWHERE' is not set"):
        mk.sinks_from_config({"webhook": {"url": "http://x", "secret_env": "ELMON_NOT_SET_ANYWHERE"}})
    with pytest.raises(ConfigError, match="must start with http"):
        mk.sinks_from_config({"webhook": {"url": "ftp://x"}})
