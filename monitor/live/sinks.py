"""Alert delivery: a JSON-lines log, a webhook and e-mail, fed from the store's outbox.

Alert events (opened, acknowledged, resolved, reminded) are written to the ``outbox`` table in
the same transaction as the alert change, one row per configured sink (``store.sinks``).
:func:`deliver_due` sends the rows that are due; a failure is retried with exponential backoff
and never lost: after ``max_attempts`` the row stays in the outbox with status ``failed`` and
its last error, visible in ``elmon status``. Delivery is at least once: a process killed
between sending and recording the success sends that row again on restart, so every message
carries ``delivery_id`` (the outbox row id) for the receiver to drop repeats.

The message (webhook body, log line) is a JSON object::

    {"delivery_id": 12, "alert_id": 3, "event": "opened", "state": "open",
     "series": "depot01/item00042", "kind": "elasticity_change", "severity": "warning",
     "ts": "2024-03-05T04:00:00Z", "opened_ts": "2024-03-05T04:00:00Z",
     "beta": -0.61, "beta_lo": -0.85, "beta_hi": -0.37, "message": "...",
     "details": {...}, "who": null, "note": null, "sent_at": "2024-03-05T04:00:02.123456Z"}

``ts`` is the data time of the event (the opening time for acknowledgements and reminders);
numbers that are not defined are ``null``.

Configuration (``sinks_from_config``), for example from TOML::

    [sinks.log]                          # type defaults to the name for log/webhook/email
    path = "alerts.jsonl"

    [sinks.ops]
    type = "webhook"
    url = "https://hooks.example.org/elmon"
    timeout = 5                          # seconds
    secret_env = "ELMON_WEBHOOK_SECRET"  # HMAC-SHA256 key, read from this variable
    headers = { "X-Team" = "pricing" }

    [sinks.mail]
    type = "email"
    host = "smtp.example.org"
    port = 587
    sender = "elmon@example.org"
    recipients = ["pricing-ops@example.org"]
    tls = "starttls"                     # or "implicit" (port 465) or "none"
    user_env = "ELMON_SMTP_USER"         # credentials only from the environment
    password_env = "ELMON_SMTP_PASSWORD"

Each sink delivers on its own: :func:`deliver_due` runs every sink in its own thread, each
send bounded by that sink's ``timeout``, and a sink that fails stops for this round (its
other rows wait for the next), so one hung webhook never holds back the log or the e-mail.

E-mail: ``tls = "starttls"`` (upgrade after connecting, port 587), ``"implicit"`` (TLS from
the first byte, port 465: the default on that port) or ``"none"``; ``ca_file`` names a CA
bundle for a private certificate authority. A sink without TLS to a host that is not this
machine logs a warning when the configuration is loaded (a login would cross the network in
plain text). Values from series ids and messages are put on one line with control characters
escaped before they reach the subject, so a CR/LF in a series id never makes a header.

With ``secret_env`` each webhook request carries ``X-Elmon-Signature: sha256=<hex>``, the
HMAC-SHA256 of the raw body under the secret; a receiver recomputes it over the bytes it got
and compares with :func:`hmac.compare_digest`.
"""

from __future__ import annotations

import json
import logging
import math
import os
import queue
import threading
import time
import urllib.error
import urllib.parse
import urllib.request
from pathlib import Path
from typing import Any, Mapping

import pandas as pd

from monitor.errors import ConfigError
from monitor.live.mail import TLS_MODES, EmailSink, is_local_host
from monitor.live.message import (CAUTION, DeliveryError, Sink, encode, env_value, one_line,
                                  render_text, sign)
from monitor.store.codec import parse_ts, wall_ts
from monitor.store.core import Store, accepts_path
from monitor.store.outbox import (claim_deliveries, due_deliveries, release_claims,
                                  record_delivered, record_failure)


log = logging.getLogger(__name__)

#: names of the message and e-mail modules, importable from here as before
__all__ = ["CAUTION", "DeliveryError", "EmailSink", "LogSink", "Sink", "TLS_MODES",
           "WebhookSink", "deliver_due", "encode", "is_local_host", "one_line", "render_text",
           "shown_url", "sign", "sinks_from_config"]

class LogSink:
    """Append each message as one JSON line to ``path`` (flushed and fsynced)."""

    #: seconds one send may take before the round stops waiting for it (a local file)
    timeout = 30.0

    def __init__(self, path: str | Path):
        self.path = Path(path)

    def send(self, message: dict) -> None:
        line = encode(message) + b"\n"
        with open(self.path, "ab") as fh:
            fh.write(line)
            fh.flush()
            os.fsync(fh.fileno())

    def __repr__(self) -> str:
        return f"LogSink({str(self.path)!r})"


class WebhookSink:
    """HTTP POST of the JSON message to ``url``; any non-2xx answer or network error fails.

    Parameters
    ----------
    url : str
        ``http://`` or ``https://`` address.
    timeout : float
        Seconds for connecting and for the answer.
    secret_env : str, optional
        Name of the environment variable holding the HMAC key (never the key itself).
    headers : mapping, optional
        Extra request headers.
    """

    def __init__(self, url: str, timeout: float = 5, secret_env: str | None = None,
                 headers: Mapping[str, str] | None = None):
        if not isinstance(url, str) or not url.startswith(("http://", "https://")):
            raise ConfigError(f"webhook url {url!r} must start with http:// or https://")
        if not float(timeout) > 0 or not math.isfinite(float(timeout)):
            raise ConfigError(f"webhook timeout {timeout!r} must be a finite number > 0 seconds")
        self.url, self.timeout, self.secret_env = url, float(timeout), secret_env
        if headers is not None and not (isinstance(headers, Mapping) and all(
                isinstance(k, str) and isinstance(v, str) for k, v in headers.items())):
            raise ConfigError(f"headers = {headers!r}: must be a table of header names to text "
                              f"values, e.g. headers = {{ \"X-Team\" = \"pricing\" }}")
        bad = [k for k, v in (headers or {}).items() if any(c in k + v for c in "\r\n\0")]
        if bad:
            raise ConfigError(f"headers {bad!r}: a header name or value must not hold a line "
                              f"break or NUL")
        self.headers = dict(headers or {})
        env_value(secret_env, "webhook secret_env")

    def send(self, message: dict) -> None:
        body = encode(message)
        headers = {"Content-Type": "application/json", "User-Agent": "elmon",
                   "X-Elmon-Event": one_line(message.get("event", "")),
                   "X-Elmon-Delivery": one_line(message.get("delivery_id", "")), **self.headers}
        secret = env_value(self.secret_env, "webhook secret_env")
        if secret is not None:
            headers["X-Elmon-Signature"] = sign(body, secret)
        request = urllib.request.Request(self.url, data=body, headers=headers, method="POST")
        where = shown_url(self.url)
        try:
            with _NO_REDIRECTS.open(request, timeout=self.timeout) as answer:
                status = answer.status
        except urllib.error.HTTPError as exc:
            more = " (redirects are not followed)" if 300 <= exc.code < 400 else ""
            raise DeliveryError(f"webhook {where}: HTTP {exc.code} {exc.reason}{more}") from None
        except (urllib.error.URLError, OSError) as exc:
            raise DeliveryError(f"webhook {where}: {getattr(exc, 'reason', exc)}") from None
        if not 200 <= status < 300:
            raise DeliveryError(f"webhook {where}: HTTP {status}")

    def __repr__(self) -> str:
        return f"WebhookSink({shown_url(self.url)!r})"


class _RefuseRedirects(urllib.request.HTTPRedirectHandler):
    """A 3xx answer is returned as an error, never followed: following it would resend the
    body, the configured headers (e.g. Authorization) and the signature to another host."""

    def redirect_request(self, req, fp, code, msg, headers, newurl):
        return None


_NO_REDIRECTS = urllib.request.build_opener(_RefuseRedirects)


def shown_url(url: str) -> str:
    """``url`` without user, password, query and fragment (which may carry tokens), for
    messages and the outbox's last error.

    >>> shown_url("https://bot:pw@hooks.example/t/abc?token=s3cret#x")
    'https://hooks.example/t/abc'
    """
    parts = urllib.parse.urlsplit(url)
    host = parts.hostname or ""
    if parts.port:
        host = f"{host}:{parts.port}"
    return urllib.parse.urlunsplit((parts.scheme, host, parts.path, "", ""))


SINK_KEYS = {"log": ({"path"}, set()),
         "webhook": ({"url"}, {"timeout", "secret_env", "headers"}),
         "email": ({"host", "port", "sender", "recipients"},
                   {"starttls", "tls", "ca_file", "user_env", "password_env", "timeout"})}
_SECRET_WORDS = ("secret", "password", "user", "token", "key")


def sinks_from_config(mapping: Mapping[str, Mapping[str, Any]]) -> dict[str, Sink]:
    """Build sinks from ``{name: {type, ...keys}}`` (the ``[sinks.NAME]`` tables).

    ``type`` is ``log`` (key ``path``), ``webhook`` (``url``; ``timeout``, ``secret_env``,
    ``headers``) or ``email`` (``host``, ``port``, ``sender``, ``recipients``; ``tls``,
    ``starttls``, ``ca_file``, ``user_env``, ``password_env``, ``timeout``); it defaults to the name when the name is
    one of those. A secret in the file (``secret``, ``password`` ...) is refused: name the
    environment variable instead. Errors are :class:`ConfigError` naming ``sinks.NAME.KEY``.
    """
    sinks: dict[str, Sink] = {}
    for name, spec in (mapping or {}).items():
        where = f"sinks.{name}"
        if not isinstance(spec, Mapping):
            raise ConfigError(f"{where}: expected a table of settings, got {spec!r}")
        spec = dict(spec)
        kind = spec.pop("type", name if name in SINK_KEYS else None)
        if kind not in SINK_KEYS:
            raise ConfigError(f"{where}.type = {kind!r}: must be one of {', '.join(SINK_KEYS)}")
        required, optional = SINK_KEYS[kind]
        for key in spec:
            if key not in required | optional:
                hint = (" (secrets never go in the config file: put it in an environment "
                        "variable and name that variable with *_env)"
                        if any(w in key.lower() for w in _SECRET_WORDS) else "")
                raise ConfigError(f"{where}.{key}: unknown key for a {kind} sink; allowed: "
                                  f"{', '.join(sorted(required | optional))}{hint}")
        missing = sorted(required - set(spec))
        if missing:
            raise ConfigError(f"{where}.{missing[0]}: required for a {kind} sink")
        try:
            cls = {"log": LogSink, "webhook": WebhookSink, "email": EmailSink}[kind]
            sinks[name] = cls(**spec)
        except ConfigError as exc:
            raise ConfigError(f"{where}: {exc}") from None
        except (TypeError, ValueError) as exc:
            raise ConfigError(f"{where}: {exc}") from None
    return sinks


def _retry_delay(attempts: int, backoff: float, max_backoff: float) -> float:
    """Seconds before the next try after ``attempts`` failures: min(cap, backoff * 2^(n-1))."""
    return min(max_backoff, backoff * 2.0 ** (attempts - 1))


#: sinks whose sending thread from an earlier round has not returned yet (never sent twice)
_BUSY: dict[int, threading.Thread] = {}
_BUSY_LOCK = threading.Lock()

#: shortest claim (lease) on an outbox row while it is being sent, seconds
LEASE_MIN_S = 300.0


def lease_seconds(sink) -> float:
    """How long an attempt claims its rows: ``max(LEASE_MIN_S, 20 * timeout)``. A send that
    is still running is never raced by another round or process within it; a claim left by a
    process that died runs out after it, and the row is sent again (at least once)."""
    return max(LEASE_MIN_S, 20.0 * float(getattr(sink, "timeout", 10.0) or 10.0))


class _Job:
    """One sink's sending thread in one round. While the round waits for it, outcomes go
    through the round's queue; once the round stops waiting (``abandon``), the thread records
    its outcomes itself, however late, so a late success is recorded and never sent again."""

    def __init__(self, name: str, record, release):
        self.name, self.record, self.release = name, record, release
        self.lock = threading.Lock()
        self.abandoned = False

    def abandon(self) -> None:
        with self.lock:
            self.abandoned = True

    def outcome(self, out: queue.Queue, row, error) -> None:
        with self.lock:
            if not self.abandoned:
                out.put((row, error))
                return
        try:
            self.record(row, error, wall_ts())
            log.warning("sink %s: delivery %s finished after the round stopped waiting; "
                        "recorded as %s", self.name, row["id"],
                        "delivered" if error is None else "failed")
        except Exception as exc:   # e.g. the store was closed: the lease runs out, sent again
            log.error("sink %s: late outcome of delivery %s not recorded: %s", self.name,
                      row["id"], exc)

    def finished(self, out: queue.Queue, unsent: list[int]) -> None:
        with self.lock:
            if not self.abandoned:
                out.put((self.name, ("done", unsent)))
                return
        try:
            self.release(unsent)
        except Exception as exc:
            log.error("sink %s: claims not released: %s", self.name, exc)


def _send_all(job: _Job, sink: Sink | None, rows: list, now_s: str, out: queue.Queue) -> None:
    """Thread body: send ``rows`` to one sink in order; stop at its first failure (the rest
    wait for the next round: their claims are released). Each outcome goes to
    :meth:`_Job.outcome`."""
    done = 0
    try:
        if sink is None:              # nothing to wait for: every row fails at once
            for row in rows:
                job.outcome(out, row, f"DeliveryError: no sink named {job.name!r} is configured")
                done += 1
            return
        for row in rows:
            message = {**json.loads(row["payload"]), "delivery_id": row["id"], "sent_at": now_s}
            try:
                sink.send(message)
            except Exception as exc:  # any failure of a sink is recorded and retried
                done += 1
                job.outcome(out, row, f"{type(exc).__name__}: {exc}"[:1000])
                return
            done += 1
            job.outcome(out, row, None)
    finally:
        job.finished(out, [r["id"] for r in rows[done:]])


@accepts_path(readonly=False)
def deliver_due(store: Store, sinks: Mapping[str, Sink], now: Any = None, max_attempts: int = 8,
                backoff: float = 30.0, max_backoff: float = 3600.0, limit: int = 500,
                grace_s: float = 5.0) -> dict:
    """Send the outbox rows that are due (oldest first per sink) and record each outcome.

    A row is due when ``status = 'pending'``, ``next_attempt_at <= now`` and it is not
    claimed. Before sending, the round claims its rows (``outbox.claimed_until``, for
    :func:`lease_seconds` of the sink): no other round or process takes a claimed row, so a
    send that outlives the round's patience is never raced by a second copy. Each sink sends
    its rows in its own thread, so a slow or hung sink delays no other; a sink stops at its
    first failure in a round (its later rows are released unchanged, due for the next
    round), and a sink whose thread from an earlier round is still sending is skipped.
    Success sets ``delivered``; failure (an exception from the sink, or no sink of that name
    in ``sinks``) adds an attempt, stores the error and schedules the next try after
    ``min(max_backoff, backoff * 2**(attempts - 1))`` seconds; the ``max_attempts``-th failure
    sets ``failed`` (kept, shown by ``elmon status``, put back by ``elmon deliveries requeue``
    through :func:`monitor.store.outbox.requeue_failed`). Each outcome is committed as it
    arrives, outside any network call. The round waits for a sink at most
    ``2 * timeout + grace_s`` seconds per row it is sending, then leaves it running: the
    thread then records its own outcome when the send returns (a late success is
    ``delivered``, not sent again). A process killed mid-send leaves the claim, which runs
    out: that message is sent again (at least once; receivers drop repeats by
    ``delivery_id``).

    Returns
    -------
    dict
        Counts ``delivered``, ``retrying``, ``failed`` (outcomes recorded by this round).
    """
    now_s = wall_ts(now)
    due = due_deliveries(store, now_s, limit)
    counts = {"delivered": 0, "retrying": 0, "failed": 0}

    def record(row, error, when_s) -> str:
        if error is None:
            record_delivered(store, row["id"], when_s)
            return "delivered"
        attempts = row["attempts"] + 1
        status = "failed" if attempts >= max_attempts else "pending"
        later = wall_ts(parse_ts(when_s) + pd.Timedelta(
            seconds=_retry_delay(attempts, backoff, max_backoff)))
        record_failure(store, row["id"], attempts, status, later, error)
        return "failed" if status == "failed" else "retrying"

    by_sink: dict[str, list] = {}
    for row in due:
        by_sink.setdefault(row["sink"], []).append(row)
    out: queue.Queue = queue.Queue()
    running: dict[str, float] = {}
    jobs: dict[str, _Job] = {}
    with _BUSY_LOCK:
        for name, rows in by_sink.items():
            sink = sinks.get(name)
            key = id(sink) if sink is not None else hash(name)
            busy = _BUSY.get(key)
            if busy is not None and busy.is_alive():
                log.warning("sink %s is still sending from an earlier round; its %d due "
                            "message(s) wait", name, len(rows))
                continue
            until = wall_ts(parse_ts(now_s) + pd.Timedelta(seconds=lease_seconds(sink)))
            claimed = set(claim_deliveries(store, [r["id"] for r in rows], now_s, until))
            rows = [r for r in rows if r["id"] in claimed]
            if not rows:
                continue
            job = jobs[name] = _Job(name, record, lambda ids: release_claims(store, ids))
            thread = threading.Thread(target=_send_all, args=(job, sink, rows, now_s, out),
                                      name=f"elmon-sink-{name}", daemon=True)
            _BUSY[key] = thread
            thread.start()
            running[name] = float(getattr(sink, "timeout", 10.0) or 10.0) * 2 + float(grace_s)
    deadline = {name: time.monotonic() + wait for name, wait in running.items()}

    def handle(row, error) -> None:
        if isinstance(error, tuple):                  # ("done", ids never attempted)
            running.pop(row, None)
            release_claims(store, error[1])
            return
        name = row["sink"]
        if name in running:
            deadline[name] = time.monotonic() + running[name]
        counts[record(row, error, now_s)] += 1

    while running:
        try:
            row, error = out.get(timeout=max(0.01, min(deadline[n] for n in running)
                                             - time.monotonic()))
        except queue.Empty:
            for name in [n for n in running if deadline[n] <= time.monotonic()]:
                log.error("sink %s did not answer within its time; left running, it records "
                          "its outcome when the send returns", name)
                jobs[name].abandon()
                del running[name]
            continue
        handle(row, error)
    while True:                  # outcomes queued before a sink was abandoned
        try:
            handle(*out.get_nowait())
        except queue.Empty:
            break
    return counts
