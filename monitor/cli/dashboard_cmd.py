"""``elmon dashboard``: serve the Streamlit dashboard over a store (bound to 127.0.0.1 by default).

The command runs ``python -m dashboard.serve --address ADDRESS [--allow-host NAME ...] -- run
dashboard/app.py --server.headless true --server.address ADDRESS --server.port PORT
--browser.gatherUsageStats false --theme.base light --client.toolbarMode minimal -- --db PATH
[--truth FILE] [--replay-root DIR] [--allow-actions]`` and waits for it; Ctrl-C stops the server.

Security model (issue 14): read-only unless ``--allow-actions``; the Replay page reads and
writes only under ``--replay-root`` (default the store's folder); requests naming a host other
than this machine, the bind address or an ``--allow-host`` name are refused (403, against DNS
rebinding); data is shown as text, never as markdown or HTML.
"""

from __future__ import annotations

import signal
import subprocess
import sys
import threading
from pathlib import Path

from monitor.cli import HelpFormatter
from monitor.errors import ConfigError, StoreError

DEFAULT_PORT = 8501


def app_path() -> Path:
    """The dashboard's entry script (``dashboard/app.py`` of the installed package)."""
    import dashboard

    return Path(dashboard.__file__).resolve().parent / "app.py"


def streamlit_command(db: str, port: int = DEFAULT_PORT, address: str = "127.0.0.1",
                      truth: str | None = None, *, allow_actions: bool = False,
                      replay_root: str | None = None,
                      allow_hosts: tuple[str, ...] = ()) -> list[str]:
    """The argument list that starts the dashboard server (through :mod:`dashboard.serve`,
    which refuses foreign ``Host`` / ``Origin`` headers, then runs ``streamlit run``).

    >>> cmd = streamlit_command("store.sqlite", 8600)
    >>> cmd[1:3], cmd[cmd.index("run"):cmd.index("run") + 1], cmd[cmd.index("--db"):]
    (['-m', 'dashboard.serve'], ['run'], ['--db', 'store.sqlite'])
    >>> "--allow-actions" in streamlit_command("s.sqlite", allow_actions=True)
    True
    """
    if not (0 < int(port) < 65536):
        raise ConfigError(f"--port = {port}: must be between 1 and 65535")
    cmd = [sys.executable, "-m", "dashboard.serve", "--address", address]
    for h in allow_hosts:
        cmd += ["--allow-host", str(h)]
    cmd += ["--", "run", str(app_path()),
            "--server.headless", "true", "--server.address", address,
            "--server.port", str(int(port)), "--browser.gatherUsageStats", "false",
            "--theme.base", "light", "--client.toolbarMode", "minimal",
            "--", "--db", str(db)]
    if truth:
        cmd += ["--truth", str(truth)]
    if replay_root:
        cmd += ["--replay-root", str(replay_root)]
    if allow_actions:
        cmd += ["--allow-actions"]
    return cmd


def run_dashboard(db: str, port: int = DEFAULT_PORT, address: str = "127.0.0.1",
                  truth: str | None = None, *, allow_actions: bool = False,
                  replay_root: str | None = None, allow_hosts: tuple[str, ...] = ()) -> int:
    """Check the inputs, print the URL and run the server until it exits or Ctrl-C."""
    dbp = Path(db)
    if not dbp.is_file():
        raise StoreError(f"--db {db!r}: no such store file; create one with the service or "
                         f"'elmon demo'")
    if truth and not Path(truth).is_file():
        raise ConfigError(f"--truth {truth!r}: no such file (expected a CSV with columns "
                          f"series, ts, kind)")
    if replay_root and not Path(replay_root).is_dir():
        raise ConfigError(f"--replay-root {replay_root!r}: no such folder")
    root = str(Path(replay_root or dbp.resolve().parent).resolve())
    cmd = streamlit_command(str(dbp.resolve()), port, address,
                            str(Path(truth).resolve()) if truth else None,
                            allow_actions=allow_actions, replay_root=root,
                            allow_hosts=tuple(allow_hosts))
    print(f"elmon dashboard: serving {dbp} at http://{address}:{int(port)}/  (Ctrl-C stops)",
          flush=True)
    print(f"  {'actions enabled: acknowledge / resolve change the store' if allow_actions else 'read-only (--allow-actions enables acknowledge / resolve)'}; "
          f"replay files only under {root}", flush=True)
    if address not in ("127.0.0.1", "localhost", "::1"):
        print(f"  warning: bound to {address}, so other machines can reach it; the dashboard "
              "has no login: put it behind an authenticating proxy", file=sys.stderr, flush=True)
    proc = subprocess.Popen(cmd)
    if threading.current_thread() is threading.main_thread():
        # a SIGTERM to this command stops the server too (same path as Ctrl-C)
        signal.signal(signal.SIGTERM, _interrupt)
    try:
        return proc.wait()
    except KeyboardInterrupt:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
        raise


def _interrupt(signum, frame):
    raise KeyboardInterrupt


def _handler(args) -> int:
    return run_dashboard(args.db, args.port, args.address, args.truth,
                         allow_actions=args.allow_actions, replay_root=args.replay_root,
                         allow_hosts=tuple(args.allow_host or ()))


def register(sub) -> None:
    p = sub.add_parser(
        "dashboard", help="serve the web dashboard over a store",
        description="Serve the Streamlit dashboard (overview, series detail, alerts, replay) "
                    "over an elmon store. Read-only unless --allow-actions; the Replay page "
                    "reads and writes only under --replay-root; binds 127.0.0.1 unless "
                    "--address says otherwise and answers only requests naming this machine "
                    "(or an --allow-host name).",
        epilog="example:\n  elmon dashboard --db demo-work/elmon-demo.sqlite --port 8501\n"
               "  elmon dashboard --db store.sqlite --truth truth.csv",
        formatter_class=HelpFormatter)
    p.add_argument("--db", required=True, metavar="PATH", help="the store (SQLite file)")
    p.add_argument("--port", type=int, default=DEFAULT_PORT, metavar="N",
                   help=f"port to listen on (default {DEFAULT_PORT})")
    p.add_argument("--address", default="127.0.0.1",
                   help="address to bind (default 127.0.0.1, this machine only)")
    p.add_argument("--truth", metavar="CSV", default=None,
                   help="known change points (columns series, ts, kind) to mark on the charts")
    p.add_argument("--allow-actions", action="store_true",
                   help="offer acknowledge / resolve on the Alerts page (each asks for a name); "
                        "without it the dashboard changes nothing in the store")
    p.add_argument("--replay-root", metavar="DIR", default=None,
                   help="the only folder tree the Replay page reads and writes (default: the "
                        "store's folder)")
    p.add_argument("--allow-host", action="append", metavar="NAME",
                   help="also answer requests for this host name (repeatable; needed when "
                        "served under a DNS name with --address 0.0.0.0)")
    p.set_defaults(func=_handler)
