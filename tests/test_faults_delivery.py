"""Delivery faults (issue 14, item 3 in part): a webhook that redirects is a failed delivery,
the redirect is not followed (no header or signature reaches the other host), and the error
kept in the outbox names the URL without its token."""

from __future__ import annotations

import pytest
from werkzeug import Response


from monitor.live import sinks as mk


@pytest.mark.parametrize("code", [301, 302, 303, 307, 308])
def test_a_redirect_is_a_failure_and_is_not_followed(httpserver, monkeypatch, code):
    monkeypatch.setenv("HOOK_SECRET", "sig-key-not-for-others")
    other = httpserver.url_for("/elsewhere")
    httpserver.expect_request("/hook").respond_with_response(
        Response("moved", status=code, headers={"Location": other}))
    httpserver.expect_request("/elsewhere").respond_with_data("taken")
    hook = mk.WebhookSink(httpserver.url_for("/hook") + "?token=t0k3n-value", timeout=5,
                          secret_env="HOOK_SECRET", headers={"Authorization": "Bearer abc"})
    with pytest.raises(mk.DeliveryError, match=f"HTTP {code}.*redirects are not followed") as err:
        hook.send({"event": "open", "delivery_id": 1, "series": "a"})
    paths = [req.path for req, _ in httpserver.log]
    assert paths == ["/hook"]                      # the other address was never asked
    assert "t0k3n-value" not in str(err.value)     # the URL's token is not in the message
    assert "t0k3n-value" not in repr(hook)


def test_shown_url_drops_user_password_query_and_fragment():
    assert mk.shown_url("http://u:p@127.0.0.1:8080/a/b?x=1#f") == "http://127.0.0.1:8080/a/b"


# ---------------------------------------------------------------- each sink on its own

import email
import email.policy
import json
import logging
import ssl
import subprocess
import threading

import pandas as pd
from aiosmtpd.controller import Controller

from monitor import store as ms
from monitor.cli import main
from monitor.errors import ConfigError
from monitor.store.outbox import failed_deliveries
from tests.service_helpers import Inbox, free_port

NOW = pd.Timestamp("2024-06-01T09:00:00Z")


def at(seconds: float) -> str:
    return ms.wall_ts(NOW + pd.Timedelta(seconds=seconds))


def open_alerts(store, sinks, n, series="depot01/item{:05d}"):
    store.sinks = tuple(sinks)
    return [ms.open_alert(store, series.format(i), "elasticity_change", "2024-06-01T06:00:00Z",
                          -0.61, -0.85, -0.37, "elasticity moved", now=at(0)) for i in range(n)]


def log_lines(path):
    return [json.loads(x) for x in path.read_text().splitlines()] if path.exists() else []


def wait_for(predicate, what, guard_s=60.0):
    """Poll until ``predicate()`` holds (``guard_s`` is a hang guard, far above the need)."""
    done = threading.Event()
    for _ in range(int(guard_s / 0.02)):
        if predicate():
            return
        done.wait(0.02)
    raise AssertionError(f"never happened: {what}")


def test_a_hung_webhook_holds_back_no_other_sink(store, httpserver, tmp_path):
    release, seen = threading.Event(), []

    def hang(request):                 # the webhook takes the request and does not answer
        seen.append(json.loads(request.data)["delivery_id"])
        release.wait(60)               # hang guard
        return Response("down", status=500)

    httpserver.expect_request("/hook").respond_with_handler(hang)
    open_alerts(store, ["log", "ops"], 30)
    path = tmp_path / "alerts.jsonl"
    sinks = {"log": mk.LogSink(path),
             "ops": mk.WebhookSink(httpserver.url_for("/hook"), timeout=30)}
    result = {}
    worker = threading.Thread(target=lambda: result.update(
        mk.deliver_due(ms.Store.open(store.path), sinks, now=at(1))))
    worker.start()
    # all 30 messages reach the log while the webhook still holds its first request
    wait_for(lambda: len(log_lines(path)) == 30, "30 lines in the log")
    assert len(seen) == 1 and not release.is_set() and worker.is_alive()
    release.set()
    worker.join(90)
    assert result == {"delivered": 30, "retrying": 1, "failed": 0}
    rows = ms.list_outbox(store)
    ops = rows[rows["sink"] == "ops"]
    # the webhook stopped at its failure: 1 try recorded, 29 untouched and still due
    assert sorted(ops["attempts"].tolist()) == [0] * 29 + [1]
    assert (ops["status"] == "pending").all()
    assert sorted({m["alert_id"] for m in log_lines(path)}) == sorted(rows["alert_id"].unique())


# ---------------------------------------------------------------- e-mail

def test_cr_lf_in_a_series_id_never_reaches_an_email_header(store):
    inbox = Inbox()
    ctl = Controller(inbox, hostname="127.0.0.1", port=free_port())
    ctl.start()
    try:
        open_alerts(store, ["mail"], 1, series="depot01\r\nBcc: thief@example.net\r\nX: {}")
        mail = mk.EmailSink("127.0.0.1", ctl.port, "elmon@example.org",
                            ["ops@example.org"], tls="none")
        assert mk.deliver_due(store, {"mail": mail}, now=at(1))["delivered"] == 1
    finally:
        ctl.stop()
    env, = inbox.envelopes
    assert env.rcpt_tos == ["ops@example.org"]
    msg = email.message_from_bytes(env.content, policy=email.policy.default)   # unfolds lines
    assert msg["Bcc"] is None and msg["X"] is None
    assert "\r" not in msg["Subject"] and "\n" not in msg["Subject"]
    assert "depot01\\r\\nBcc: thief@example.net" in msg["Subject"]
    assert mk.render_text({"series": "a\nb"})[1].count("series:     a\\nb") == 1


@pytest.fixture
def tls_files(tmp_path):
    """A self-signed certificate for 127.0.0.1 made by the openssl command (skipped without
    it: the test needs a real TLS server)."""
    key, cert = tmp_path / "key.pem", tmp_path / "cert.pem"
    try:
        subprocess.run(["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "2",
                        "-keyout", str(key), "-out", str(cert), "-subj", "/CN=127.0.0.1",
                        "-addext", "subjectAltName=IP:127.0.0.1"],
                       check=True, capture_output=True, timeout=120)
    except (OSError, subprocess.CalledProcessError) as exc:
        pytest.skip(f"no openssl command to make a test certificate: {exc}")
    return key, cert


def test_implicit_tls_on_port_465_delivers_to_a_real_tls_server(store, tls_files):
    key, cert = tls_files
    server_ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    server_ctx.load_cert_chain(cert, key)
    inbox = Inbox()
    ctl = Controller(inbox, hostname="127.0.0.1", port=free_port(), ssl_context=server_ctx)
    ctl.start()
    try:
        open_alerts(store, ["mail"], 1)
        mail = mk.EmailSink("127.0.0.1", ctl.port, "elmon@example.org", ["ops@example.org"],
                            tls="implicit", ca_file=str(cert))
        assert mk.deliver_due(store, {"mail": mail}, now=at(1))["delivered"] == 1
        # a client that does not trust the certificate fails: TLS really is in use
        plain = mk.EmailSink("127.0.0.1", ctl.port, "elmon@example.org", ["ops@example.org"],
                             tls="implicit")
        with pytest.raises(mk.DeliveryError, match="CERTIFICATE_VERIFY_FAILED|certificate"):
            plain.send({"alert_id": 1, "series": "a"})
    finally:
        ctl.stop()
    assert len(inbox.envelopes) == 1
    assert mk.EmailSink("smtp.example.org", 465, "a@example.org", ["b@example.org"]).tls == \
        "implicit"
    assert mk.EmailSink("smtp.example.org", 587, "a@example.org", ["b@example.org"],
                        starttls=True).tls == "starttls"


def test_plain_smtp_to_another_host_warns_at_config_load(caplog):
    spec = {"type": "email", "host": "smtp.example.org", "port": 25,
            "sender": "elmon@example.org", "recipients": ["ops@example.org"]}
    with caplog.at_level(logging.WARNING, logger="monitor.live.sinks"):
        mk.sinks_from_config({"mail": spec})
    assert any("no TLS" in r.getMessage() and "smtp.example.org" in r.getMessage()
               for r in caplog.records)
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="monitor.live.sinks"):
        mk.sinks_from_config({"mail": {**spec, "host": "127.0.0.1"}})
        mk.sinks_from_config({"mail": {**spec, "tls": "starttls"}})
    assert not caplog.records
    with pytest.raises(ConfigError, match="tls = 'tls1'"):
        mk.sinks_from_config({"mail": {**spec, "tls": "tls1"}})


# ---------------------------------------------------------------- requeue and state changes

def test_failed_deliveries_are_listed_and_requeued_from_the_cli(store, tmp_path, capsys):
    open_alerts(store, ["log"], 2)
    out = mk.deliver_due(store, {}, now=at(1), max_attempts=1)    # no such sink: fails
    assert out == {"delivered": 0, "retrying": 0, "failed": 2}
    db = str(store.path)
    assert main(["deliveries", "list", "--db", db]) == 0
    text = capsys.readouterr().out
    assert "2 failed deliveries" in text and "no sink named 'log'" in text
    assert main(["deliveries", "requeue", "--db", db]) == 2          # says which: refused
    first = failed_deliveries(store)[0]["id"]
    assert main(["deliveries", "requeue", "--id", str(first), "--db", db]) == 0
    assert "1 failed deliveries put back" in capsys.readouterr().out
    path = tmp_path / "alerts.jsonl"        # (the CLI works on the wall clock: now=None)
    assert mk.deliver_due(store, {"log": mk.LogSink(path)}, now=None)["delivered"] == 1
    assert main(["deliveries", "requeue", "--all", "--db", db]) == 0
    assert mk.deliver_due(store, {"log": mk.LogSink(path)}, now=None)["delivered"] == 1
    assert mk.deliver_due(store, {"log": mk.LogSink(path)}, now=None)["delivered"] == 0
    got = log_lines(path)
    assert sorted(m["alert_id"] for m in got) == [1, 2]               # each exactly once
    assert failed_deliveries(store) == []


def test_ack_and_resolve_from_the_cli_reach_the_sinks_of_the_opening(store, tmp_path):
    a, b = open_alerts(store, ["log", "backup"], 2)
    path, backup = tmp_path / "alerts.jsonl", tmp_path / "backup.jsonl"
    sinks = {"log": mk.LogSink(path), "backup": mk.LogSink(backup)}
    assert mk.deliver_due(store, sinks, now=at(1))["delivered"] == 4
    db = str(store.path)
    # the CLI opens the store with no sinks configured
    assert main(["alerts", "ack", str(a), "--note", "checking", "--who", "kim", "--db", db]) == 0
    assert main(["alerts", "resolve", str(b), "--note", "done", "--who", "lee", "--db", db]) == 0
    assert mk.deliver_due(store, sinks, now=None)["delivered"] == 4
    for p in (path, backup):
        events = [(m["alert_id"], m["event"], m["who"]) for m in log_lines(p)]
        assert events == [(a, "opened", None), (b, "opened", None), (a, "acknowledged", "kim"),
                          (b, "resolved", "lee")]


# ---------------------------------------------------------------- a send outliving its round

def _slow_hook(answer_after_s: float, step_s: float):
    """A real local HTTP server that counts every request it receives, then answers 200 one
    byte at a time, ``step_s`` apart (so the client's socket timeout never fires), finishing
    ``answer_after_s`` after the request. Returns ``(server, count list, url)``."""
    import http.server

    got = []

    class Handler(http.server.BaseHTTPRequestHandler):
        def do_POST(self):
            body = self.rfile.read(int(self.headers["Content-Length"]))
            got.append(json.loads(body)["delivery_id"])
            answer = b"HTTP/1.1 200 OK\r\nContent-Length: 0\r\nConnection: close\r\n\r\n"
            pause = threading.Event()
            per = max(step_s, answer_after_s / len(answer))
            for i in range(len(answer)):
                pause.wait(per)
                self.wfile.write(answer[i:i + 1])
                self.wfile.flush()
            self.close_connection = True

        def log_message(self, *args):
            pass

    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    return server, got, f"http://127.0.0.1:{server.server_address[1]}/hook"


def test_a_send_outliving_twice_its_timeout_is_delivered_once(store, tmp_path):
    """The webhook (timeout 0.4 s) answers 200 after 2 s, more than twice its timeout: the
    round stops waiting, a second round and a second process's sink (another object: the
    in-process busy check cannot see it) find the row claimed, the late success is recorded
    by the sending thread, and a later round sends nothing: the server counts one request."""
    server, got, url = _slow_hook(answer_after_s=2.0, step_s=0.05)
    try:
        open_alerts(store, ["ops"], 1)
        first = mk.deliver_due(store, {"ops": mk.WebhookSink(url, timeout=0.4)}, now=at(1),
                               grace_s=0.0)
        assert first == {"delivered": 0, "retrying": 0, "failed": 0}   # still sending
        assert got == [1]
        other = ms.Store.open(store.path)          # another writer connection
        try:
            again = mk.deliver_due(other, {"ops": mk.WebhookSink(url, timeout=0.4)},
                                   now=at(2), grace_s=0.0)
        finally:
            other.close()
        assert again == {"delivered": 0, "retrying": 0, "failed": 0}
        wait_for(lambda: ms.list_outbox(store)["status"].tolist() == ["delivered"],
                 "the late success recorded")
        later = mk.deliver_due(store, {"ops": mk.WebhookSink(url, timeout=0.4)}, now=at(3),
                               grace_s=0.0)
        assert later == {"delivered": 0, "retrying": 0, "failed": 0}
        row = ms.list_outbox(store).iloc[0]
        assert row["attempts"] == 1 and row["last_error"] is None
        assert got == [1]                          # one delivery reached the server
    finally:
        server.shutdown()
        server.server_close()


def test_an_abandoned_claim_runs_out_and_the_row_is_sent_again(store):
    """A claim left by a process that died (never recorded) runs out after its lease: the
    row is due again (at least once)."""
    from monitor.store.outbox import claim_deliveries, due_deliveries

    open_alerts(store, ["log"], 1)
    (row,) = due_deliveries(store, at(1), 10)
    assert claim_deliveries(store, [row["id"]], at(1), at(1 + mk.LEASE_MIN_S)) == [row["id"]]
    assert claim_deliveries(store, [row["id"]], at(2), at(500)) == []      # taken
    assert due_deliveries(store, at(2), 10) == []
    assert [r["id"] for r in due_deliveries(store, at(1 + mk.LEASE_MIN_S), 10)] == [row["id"]]
