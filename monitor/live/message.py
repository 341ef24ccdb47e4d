"""An alert message as sinks send it: the JSON body with its signature, and the plain text
for people, with every value from the data put on one line.

See :mod:`monitor.live.sinks` for the message's fields and the sinks.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import os
import re
from typing import Any, Mapping, Protocol

from monitor.errors import ConfigError, ElmonError


CAUTION = ("Elasticity estimates are statistical evidence to inform decisions, not decisions. "
           "Observational prices can bias them; randomized price tests are the sound basis. "
           "Local rules on pricing and utility tariffs come first.")


class DeliveryError(ElmonError):
    """A sink could not deliver a message (the outbox retries it)."""


class Sink(Protocol):
    """What :func:`monitor.live.sinks.deliver_due` needs from a sink."""

    def send(self, message: dict) -> None:
        """Deliver one message or raise."""


def env_value(name: str | None, what: str) -> str | None:
    """The value of environment variable ``name`` (None when no name is given); a name that
    is not set is a :class:`ConfigError` naming ``what``."""
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


_CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f\u2028\u2029\ufeff]")
#: longest subject (characters): RFC 5322 recommends lines of at most 78
SUBJECT_CHARS = 200


def one_line(value: Any, limit: int | None = None) -> str:
    r"""``value`` as text on one line: control characters (CR, LF, NUL, ...), line and
    paragraph separators and the byte-order mark escaped as ``\xNN`` / ``\uNNNN``, so text
    from the data (a series id) can never start a header or a fake line.

    >>> one_line("depot01\r\nBcc: someone@example.org")
    'depot01\\r\\nBcc: someone@example.org'
    """
    text = _CONTROL.sub(lambda m: ascii(m.group(0))[1:-1], str(value))
    if limit is not None and len(text) > limit:
        text = text[:limit - 3] + "..."
    return text


def render_text(message: Mapping[str, Any]) -> tuple[str, str]:
    """Subject and plain-text body of a message, for people (e-mail).

    Every value from the data is passed through :func:`one_line`; the subject is at most
    :data:`SUBJECT_CHARS` characters.
    """
    def num(key: str) -> str:
        v = message.get(key)
        return "n/a" if v is None else f"{v:.3f}"

    def g(key: str, default: Any = None) -> str:
        return one_line(message.get(key, default))
    subject = one_line(f"[elmon] {g('severity', '')} {g('kind', '')} {g('event', '')}: "
                       f"{g('series', '')}", SUBJECT_CHARS)
    text = str(message.get("message", ""))
    lines = ["\n".join(one_line(part) for part in text.split("\n")), "",
             f"series:     {g('series')}",
             f"kind:       {g('kind')} ({g('severity')})",
             f"event:      {g('event')} (state now {g('state')})",
             f"data time:  {g('ts')}",
             f"elasticity: {num('beta')} (band {num('beta_lo')} to {num('beta_hi')})",
             f"alert id:   {g('alert_id')}"]
    if message.get("note"):
        lines.append(f"note:       {g('note')} ({one_line(message.get('who') or 'unknown')})")
    lines += ["", CAUTION]
    return subject, "\n".join(lines) + "\n"
