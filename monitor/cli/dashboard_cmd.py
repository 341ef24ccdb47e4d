"""``elmon dashboard``: serve the Streamlit dashboard over a store (bound to 127.0.0.1 by default).

The command runs ``python -m streamlit run dashboard/app.py --server.headless true
--server.address ADDRESS --server.port PORT --browser.gatherUsageStats false --theme.base light
--client.toolbarMode minimal -- --db PATH [--truth FILE]`` and waits for it; Ctrl-C stops the server.
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
                      truth: str | None = None) -> list[str]:
    """The argument list that starts the dashboard server.

    >>> cmd = streamlit_command("store.sqlite", 8600)
    >>> cmd[1:4], cmd[cmd.index("--") + 1:]
    (['-m', 'streamlit', 'run'], ['--db', 'store.sqlite'])
    """
    if not (0 < int(port) < 65536):
        raise ConfigError(f"--port = {port}: must be between 1 and 65535")
    cmd = [sys.executable, "-m", "streamlit", "run", str(app_path()),
           "--server.headless", "true", "--server.address", address,
           "--server.port", str(int(port)), "--browser.gatherUsageStats", "false",
           "--theme.base", "light", "--client.toolbarMode", "minimal",
           "--", "--db", str(db)]
    if truth:
        cmd += ["--truth", str(truth)]
    return cmd


def run_dashboard(db: str, port: int = DEFAULT_PORT, address: str = "127.0.0.1",
                  truth: str | None = None) -> int:
    """Check the inputs, print the URL and run the server until it exits or Ctrl-C."""
    dbp = Path(db)
    if not dbp.is_file():
        raise StoreError(f"--db {db!r}: no such store file; create one with the service or "
                         f"'elmon demo'")
    if truth and not Path(truth).is_file():
        raise ConfigError(f"--truth {truth!r}: no such file (expected a CSV with columns "
                          f"series, ts, kind)")
    cmd = streamlit_command(str(dbp.resolve()), port, address,
                            str(Path(truth).resolve()) if truth else None)
    print(f"elmon dashboard: serving {dbp} at http://{address}:{int(port)}/  (Ctrl-C stops)",
          flush=True)
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
    return run_dashboard(args.db, args.port, args.address, args.truth)


def register(sub) -> None:
    p = sub.add_parser(
        "dashboard", help="serve the web dashboard over a store",
        description="Serve the Streamlit dashboard (overview, series detail, alerts, replay) "
                    "over an elmon store, read-only except for acknowledging and resolving "
                    "alerts. Binds 127.0.0.1 unless --address says otherwise.",
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
    p.set_defaults(func=_handler)
