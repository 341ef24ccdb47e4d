"""Start the Streamlit server with a Host / Origin check in front of every request.

``python -m dashboard.serve --allow-host NAME ... -- STREAMLIT-ARGS`` installs
:func:`install_host_guard` and then runs Streamlit's own command line with ``STREAMLIT-ARGS``
(``run dashboard/app.py --server.port ...``); ``elmon dashboard`` and ``elmon demo`` start the
dashboard this way.

Why: a page on another site can make the viewer's browser talk to a dashboard on the viewer's
own machine by pointing a name it controls at 127.0.0.1 (DNS rebinding). The browser then sends
that foreign name in the ``Host`` header (and, for the WebSocket, in ``Origin``). Streamlit's
own checks compare the Origin with the Host, which agree in that attack, so the dashboard
refuses (HTTP 403, before Streamlit sees it) any request whose ``Host`` is not one of the allowed
names, and any request carrying an ``Origin`` whose host is not allowed. Allowed by default: ``127.0.0.1``,
``localhost`` and ``::1`` (any port), plus the bind address when it is a specific one; more
names with ``--allow-host`` (for a dashboard served to other machines under a DNS name).
"""

from __future__ import annotations

import sys
import urllib.parse
from typing import Iterable

#: Host names always allowed (the machine itself).
LOCAL_HOSTS = ("127.0.0.1", "localhost", "::1")


def host_name(value: str | None) -> str | None:
    """The host name of a ``Host`` header value (``name``, ``name:port``, ``[v6]:port``),
    lower case without port; ``None`` when it is empty or malformed.

    >>> host_name("LocalHost:8501"), host_name("[::1]:8501"), host_name("127.0.0.1")
    ('localhost', '::1', '127.0.0.1')
    >>> host_name("evil.example:8501"), host_name(""), host_name("a b")
    ('evil.example', None, None)
    """
    if not value:
        return None
    value = value.strip()
    if any(c.isspace() or c in "/@?#" for c in value):
        return None
    if value.startswith("["):
        end = value.find("]")
        if end < 0:
            return None
        return value[1:end].lower() or None
    name = value.rsplit(":", 1)[0] if value.count(":") == 1 else value
    return name.lower().rstrip(".") or None


def origin_host(origin: str | None) -> str | None:
    """The host name of an ``Origin`` header (``scheme://host[:port]``); ``None`` if absent or
    opaque (``null``).

    >>> origin_host("http://127.0.0.1:8501"), origin_host("https://evil.example"), origin_host("null")
    ('127.0.0.1', 'evil.example', None)
    """
    if not origin or origin.strip().lower() == "null":
        return None
    return (urllib.parse.urlsplit(origin.strip()).hostname or "").lower() or None


def allowed_hosts(address: str = "127.0.0.1", extra: Iterable[str] = ()) -> frozenset[str]:
    """The host names the dashboard answers to: :data:`LOCAL_HOSTS`, the bind ``address``
    unless it is a wildcard (``0.0.0.0`` / ``::``), and ``extra``.

    >>> sorted(allowed_hosts("0.0.0.0", ["Prices.Example.org"]))
    ['127.0.0.1', '::1', 'localhost', 'prices.example.org']
    """
    names = set(LOCAL_HOSTS)
    if address and address not in ("0.0.0.0", "::", ""):
        names.add(host_name(address) or address.lower())
    for e in extra:
        n = host_name(e)
        if n:
            names.add(n)
    return frozenset(names)


def request_allowed(host: str | None, origin: str | None, allowed: frozenset[str]) -> bool:
    """``True`` when the ``Host`` header names an allowed host and an ``Origin`` header, if
    any, does too.

    >>> ok = allowed_hosts()
    >>> request_allowed("127.0.0.1:8501", "http://127.0.0.1:8501", ok)
    True
    >>> request_allowed("rebind.evil.example:8501", "http://rebind.evil.example:8501", ok)
    False
    >>> request_allowed("localhost:8501", "https://evil.example", ok)
    False
    """
    h = host_name(host)
    if h is None or h not in allowed:
        return False
    if origin is not None and origin.strip() and origin.strip().lower() != "null":
        o = origin_host(origin)
        if o is None or o not in allowed:
            return False
    return True


class HostGuard:
    """ASGI middleware: a request (HTTP or WebSocket handshake) that :func:`request_allowed`
    refuses gets HTTP 403 and never reaches the app."""

    def __init__(self, app, allowed: frozenset[str]):
        self.app = app
        self.allowed = allowed

    async def __call__(self, scope, receive, send):
        if scope.get("type") in ("http", "websocket"):
            headers = {k.decode("latin-1").lower(): v.decode("latin-1")
                       for k, v in scope.get("headers") or []}
            if not request_allowed(headers.get("host"), headers.get("origin"), self.allowed):
                if scope["type"] == "websocket":
                    # closing before accepting makes the server answer the handshake with 403
                    await send({"type": "websocket.close", "code": 1008})
                    return
                body = b"403: this dashboard answers only requests for its own host name\n"
                await send({"type": "http.response.start", "status": 403,
                            "headers": [(b"content-type", b"text/plain; charset=utf-8"),
                                        (b"content-length", str(len(body)).encode())]})
                await send({"type": "http.response.body", "body": body})
                return
        await self.app(scope, receive, send)


def install_host_guard(allowed: frozenset[str]) -> None:
    """Put :class:`HostGuard` first in Streamlit's middleware stack (Streamlit 1.67 serves
    through Starlette; the stack is built by ``create_streamlit_middleware``)."""
    from starlette.middleware import Middleware
    from streamlit.web.server.starlette import starlette_app

    original = starlette_app.create_streamlit_middleware
    original = getattr(original, "_elmon_original", original)

    def create_streamlit_middleware():
        return [Middleware(HostGuard, allowed=allowed), *original()]

    create_streamlit_middleware._elmon_original = original
    starlette_app.create_streamlit_middleware = create_streamlit_middleware


def main(argv: list[str] | None = None) -> int:
    """``--address A --allow-host NAME ... -- STREAMLIT-ARGS``: guard, then run Streamlit."""
    argv = list(sys.argv[1:] if argv is None else argv)
    if "--" not in argv:
        print("usage: python -m dashboard.serve [--address A] [--allow-host NAME ...] -- "
              "STREAMLIT-ARGS", file=sys.stderr)
        return 2
    cut = argv.index("--")
    ours, theirs = argv[:cut], argv[cut + 1:]
    address, extra = "127.0.0.1", []
    it = iter(ours)
    for a in it:
        if a == "--address":
            address = next(it, address)
        elif a == "--allow-host":
            extra.append(next(it, ""))
        else:
            print(f"dashboard.serve: unknown option {a!r}", file=sys.stderr)
            return 2
    install_host_guard(allowed_hosts(address, extra))
    from streamlit.web import cli as stcli

    sys.argv = ["streamlit", *theirs]
    return stcli.main()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
