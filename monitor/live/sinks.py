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
    starttls = true
    user_env = "ELMON_SMTP_USER"         # credentials only from the environment
    password_env = "ELMON_SMTP_PASSWORD"

With ``secret_env`` each webhook request carries ``X-Elmon-Signature: sha256=<hex>``, the
HMAC-SHA256 of the raw body under the secret; a receiver recomputes it over the bytes it got
and compares with :func:`hmac.compare_digest`.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import os
import smtplib
import ssl
import urllib.error
import urllib.parse
import urllib.request
from email.message import EmailMessage
from pathlib import Path
from typing import Any, Mapping, Protocol

import pandas as pd

from monitor.errors import ConfigError, ElmonError
from monitor.store.codec import parse_ts, wall_ts
from monitor.store.core import Store, accepts_path
from monitor.store.outbox import due_deliveries, record_delivered, record_failure


CAUTION = ("Elasticity estimates are statistical evidence to inform decisions, not decisions. "
           "Observational prices can bias them; randomized price tests are the sound basis. "
           "Local rules on pricing and utility tariffs come first.")


class DeliveryError(ElmonError):
    """A sink could not deliver a message (the outbox retries it)."""


class Sink(Protocol):
    """What :func:`deliver_due` needs from a sink."""

    def send(self, message: dict) -> None:
        """Deliver one message or raise."""


def _env(name: str | None, what: str) -> str | None:
    if name is None:
        return None
    if name not in os.environ:
        raise ConfigError(f"{what}: environment variable {name!r} is not set")
    return os.environ[name]


def encode(message: Mapping[str, Any]) -> bytes:
    """The JSON body of a message: UTF-8, sorted keys, no NaN."""
    return json.dumps(message, sort_keys=True, separators=(",", ":"),
                      allow_nan=False).encode("utf-8")


def sign(body: bytes, secret: str) -> str:
    """``sha256=<hex>``: HMAC-SHA256 of ``body`` under ``secret`` (RFC 2104)."""
    return "sha256=" + hmac.new(secret.encode("utf-8"), body, hashlib.sha256).hexdigest()


def render_text(message: Mapping[str, Any]) -> tuple[str, str]:
    """Subject and plain-text body of a message, for people (e-mail)."""
    def num(key: str) -> str:
        v = message.get(key)
        return "n/a" if v is None else f"{v:.3f}"
    subject = (f"[elmon] {message.get('severity', '')} {message.get('kind', '')} "
               f"{message.get('event', '')}: {message.get('series', '')}")
    lines = [str(message.get("message", "")), "",
             f"series:     {message.get('series')}",
             f"kind:       {message.get('kind')} ({message.get('severity')})",
             f"event:      {message.get('event')} (state now {message.get('state')})",
             f"data time:  {message.get('ts')}",
             f"elasticity: {num('beta')} (band {num('beta_lo')} to {num('beta_hi')})",
             f"alert id:   {message.get('alert_id')}"]
    if message.get("note"):
        lines.append(f"note:       {message['note']} ({message.get('who') or 'unknown'})")
    lines += ["", CAUTION]
    return subject, "\n".join(lines) + "\n"


class LogSink:
    """Append each message as one JSON line to ``path`` (flushed and fsynced)."""

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
        if not float(timeout) > 0:
            raise ConfigError(f"webhook timeout {timeout!r} must be > 0 seconds")
        self.url, self.timeout, self.secret_env = url, float(timeout), secret_env
        self.headers = dict(headers or {})
        _env(secret_env, "webhook secret_env")

    def send(self, message: dict) -> None:
        body = encode(message)
        headers = {"Content-Type": "application/json", "User-Agent": "elmon",
                   "X-Elmon-Event": str(message.get("event", "")),
                   "X-Elmon-Delivery": str(message.get("delivery_id", "")), **self.headers}
        secret = _env(self.secret_env, "webhook secret_env")
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


class EmailSink:
    """Plain-text e-mail through an SMTP server (stdlib :mod:`smtplib`).

    ``user_env`` / ``password_env`` name environment variables holding the login; without
    them no login is attempted. ``starttls=True`` upgrades the connection before logging in.
    """

    def __init__(self, host: str, port: int, sender: str, recipients: list[str] | str,
                 starttls: bool = False, user_env: str | None = None,
                 password_env: str | None = None, timeout: float = 10):
        recipients = [recipients] if isinstance(recipients, str) else list(recipients)
        if not recipients or not all(isinstance(r, str) and "@" in r for r in recipients):
            raise ConfigError(f"email recipients {recipients!r} must be addresses")
        if not isinstance(sender, str) or "@" not in sender:
            raise ConfigError(f"email sender {sender!r} must be an address")
        if not (isinstance(port, int) and 0 < port < 65536):
            raise ConfigError(f"email port {port!r} must be an integer 1-65535")
        if (user_env is None) != (password_env is None):
            raise ConfigError("email login needs both user_env and password_env (or neither)")
        self.host, self.port, self.sender, self.recipients = host, port, sender, recipients
        self.starttls, self.user_env, self.password_env = bool(starttls), user_env, password_env
        self.timeout = float(timeout)
        _env(user_env, "email user_env")
        _env(password_env, "email password_env")

    def send(self, message: dict) -> None:
        subject, text = render_text(message)
        mail = EmailMessage()
        mail["Subject"], mail["From"], mail["To"] = subject, self.sender, ", ".join(self.recipients)
        mail["X-Elmon-Delivery"] = str(message.get("delivery_id", ""))
        mail.set_content(text)
        mail.add_attachment(encode(message), maintype="application", subtype="json",
                            filename=f"elmon-alert-{message.get('alert_id')}.json")
        try:
            with smtplib.SMTP(self.host, self.port, timeout=self.timeout) as smtp:
                if self.starttls:
                    smtp.starttls(context=ssl.create_default_context())
                if self.user_env:
                    smtp.login(_env(self.user_env, "email user_env"),
                               _env(self.password_env, "email password_env"))
                smtp.send_message(mail)
        except (smtplib.SMTPException, OSError) as exc:
            raise DeliveryError(f"email via {self.host}:{self.port}: {exc}") from None

    def __repr__(self) -> str:
        return f"EmailSink({self.host!r}, {self.port})"


SINK_KEYS = {"log": ({"path"}, set()),
         "webhook": ({"url"}, {"timeout", "secret_env", "headers"}),
         "email": ({"host", "port", "sender", "recipients"},
                   {"starttls", "user_env", "password_env", "timeout"})}
_SECRET_WORDS = ("secret", "password", "user", "token", "key")


def sinks_from_config(mapping: Mapping[str, Mapping[str, Any]]) -> dict[str, Sink]:
    """Build sinks from ``{name: {type, ...keys}}`` (the ``[sinks.NAME]`` tables).

    ``type`` is ``log`` (key ``path``), ``webhook`` (``url``; ``timeout``, ``secret_env``,
    ``headers``) or ``email`` (``host``, ``port``, ``sender``, ``recipients``; ``starttls``,
    ``user_env``, ``password_env``, ``timeout``); it defaults to the name when the name is
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


@accepts_path(readonly=False)
def deliver_due(store: Store, sinks: Mapping[str, Sink], now: Any = None, max_attempts: int = 8,
                backoff: float = 30.0, max_backoff: float = 3600.0, limit: int = 500) -> dict:
    """Send the outbox rows that are due (oldest first) and record each outcome.

    A row is due when ``status = 'pending'`` and ``next_attempt_at <= now``. Success sets
    ``delivered``; failure (an exception from the sink, or no sink of that name in ``sinks``)
    adds an attempt, stores the error and schedules the next try after
    ``min(max_backoff, backoff * 2**(attempts - 1))`` seconds; the ``max_attempts``-th failure
    sets ``failed`` (kept, shown by ``elmon status``, retried by :func:`monitor.store.outbox.requeue_failed`).
    Each outcome commits on its own, outside any network call.

    Returns
    -------
    dict
        Counts ``delivered``, ``retrying``, ``failed``.
    """
    now_s = wall_ts(now)
    due = due_deliveries(store, now_s, limit)
    counts = {"delivered": 0, "retrying": 0, "failed": 0}
    for row in due:
        message = {**json.loads(row["payload"]), "delivery_id": row["id"], "sent_at": now_s}
        sink = sinks.get(row["sink"])
        try:
            if sink is None:
                raise DeliveryError(f"no sink named {row['sink']!r} is configured")
            sink.send(message)
        except Exception as exc:  # any failure of a sink is recorded and retried
            attempts = row["attempts"] + 1
            error = f"{type(exc).__name__}: {exc}"[:1000]
            status = "failed" if attempts >= max_attempts else "pending"
            later = wall_ts(parse_ts(now_s) + pd.Timedelta(
                seconds=_retry_delay(attempts, backoff, max_backoff)))
            record_failure(store, row["id"], attempts, status, later, error)
            counts["failed" if status == "failed" else "retrying"] += 1
            continue
        record_delivered(store, row["id"], now_s)
        counts["delivered"] += 1
    return counts
