"""Alert e-mail through SMTP: plain text with the JSON message attached, over STARTTLS,
implicit TLS (port 465) or, with a warning when the server is not this machine, no TLS.
"""

from __future__ import annotations

import ipaddress
import logging
import math
import re
import smtplib
import ssl
from email.message import EmailMessage
from pathlib import Path

from monitor.errors import ConfigError
from monitor.live.message import DeliveryError, encode, env_value, one_line, render_text

log = logging.getLogger("monitor.live.sinks")    # one logger for every sink's messages


class EmailSink:
    """Plain-text e-mail through an SMTP server (stdlib :mod:`smtplib`).

    ``user_env`` / ``password_env`` name environment variables holding the login; without
    them no login is attempted. ``tls`` is ``"starttls"`` (upgrade the connection before
    logging in), ``"implicit"`` (TLS from the start, :class:`smtplib.SMTP_SSL`; the default on
    port 465) or ``"none"``; the older ``starttls = true`` means ``tls = "starttls"``.
    ``ca_file`` is a CA bundle (PEM) trusted instead of the system's (for a server with a
    certificate from an internal CA; :func:`ssl.create_default_context` with ``cafile`` loads
    no system certificates).
    """

    def __init__(self, host: str, port: int, sender: str, recipients: list[str] | str,
                 starttls: bool | None = None, user_env: str | None = None,
                 password_env: str | None = None, timeout: float = 10, tls: str | None = None,
                 ca_file: str | None = None):
        recipients = [recipients] if isinstance(recipients, str) else list(recipients)
        if not recipients or not all(isinstance(r, str) and "@" in r for r in recipients):
            raise ConfigError(f"email recipients {recipients!r} must be addresses")
        if not all(_ADDRESS.match(r) for r in [sender, *recipients] if isinstance(r, str)):
            raise ConfigError(f"email addresses {[sender, *recipients]!r} must not hold "
                              f"spaces, commas or control characters")
        if not isinstance(sender, str) or "@" not in sender:
            raise ConfigError(f"email sender {sender!r} must be an address")
        if not (isinstance(port, int) and 0 < port < 65536):
            raise ConfigError(f"email port {port!r} must be an integer 1-65535")
        if (user_env is None) != (password_env is None):
            raise ConfigError("email login needs both user_env and password_env (or neither)")
        if tls is None:
            tls = "starttls" if starttls else ("implicit" if port == 465 and starttls is None
                                               else "none")
        elif starttls is not None and (tls == "starttls") != bool(starttls):
            raise ConfigError(f"email tls = {tls!r} and starttls = {starttls!r} disagree: "
                              f"give tls only")
        if tls not in TLS_MODES:
            raise ConfigError(f"email tls = {tls!r}: must be one of {', '.join(TLS_MODES)}")
        if not float(timeout) > 0 or not math.isfinite(float(timeout)):
            raise ConfigError(f"email timeout {timeout!r} must be a finite number > 0 seconds")
        self.host, self.port, self.sender, self.recipients = host, port, sender, recipients
        self.tls, self.user_env, self.password_env = tls, user_env, password_env
        self.starttls = tls == "starttls"
        self.ca_file = ca_file
        self.timeout = float(timeout)
        env_value(user_env, "email user_env")
        env_value(password_env, "email password_env")
        if ca_file is not None and not Path(ca_file).is_file():
            raise ConfigError(f"email ca_file {ca_file!r}: no such file")
        if tls == "none" and not is_local_host(host):
            log.warning("email sink to %s:%s has no TLS (tls = \"none\"): messages%s cross the "
                        "network in plain text; set tls = \"starttls\" (port 587) or "
                        "\"implicit\" (port 465)", host, port,
                        " and the login" if user_env else "")

    def _context(self) -> ssl.SSLContext:
        return ssl.create_default_context(cafile=self.ca_file)

    def send(self, message: dict) -> None:
        subject, text = render_text(message)
        mail = EmailMessage()
        mail["Subject"], mail["From"], mail["To"] = subject, self.sender, ", ".join(self.recipients)
        mail["X-Elmon-Delivery"] = one_line(message.get("delivery_id", ""))
        mail.set_content(text)
        alert_id = message.get("alert_id")
        name = f"elmon-alert-{int(alert_id)}.json" if isinstance(alert_id, int) else \
            "elmon-alert.json"
        mail.add_attachment(encode(message), maintype="application", subtype="json",
                            filename=name)
        try:
            if self.tls == "implicit":
                smtp = smtplib.SMTP_SSL(self.host, self.port, timeout=self.timeout,
                                        context=self._context())
            else:
                smtp = smtplib.SMTP(self.host, self.port, timeout=self.timeout)
            with smtp:
                if self.tls == "starttls":
                    smtp.starttls(context=self._context())
                if self.user_env:
                    smtp.login(env_value(self.user_env, "email user_env"),
                               env_value(self.password_env, "email password_env"))
                smtp.send_message(mail)
        except (smtplib.SMTPException, OSError, ValueError) as exc:
            raise DeliveryError(f"email via {self.host}:{self.port}: {exc}") from None

    def __repr__(self) -> str:
        return f"EmailSink({self.host!r}, {self.port}, tls={self.tls!r})"


TLS_MODES = ("starttls", "implicit", "none")
_ADDRESS = re.compile(r"^[^\s,<>\x00-\x1f\x7f]+@[^\s,<>\x00-\x1f\x7f]+$")


def is_local_host(host: str) -> bool:
    """``host`` is this machine (``localhost`` or a loopback address): plain SMTP stays local.

    >>> is_local_host("127.0.0.1"), is_local_host("localhost"), is_local_host("smtp.example.org")
    (True, True, False)
    """
    if str(host).lower().rstrip(".") in ("localhost", "localhost.localdomain"):
        return True
    try:
        return ipaddress.ip_address(str(host).strip("[]")).is_loopback
    except ValueError:
        return False
