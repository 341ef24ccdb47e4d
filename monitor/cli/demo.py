"""``elmon demo``: a simulated price test watched live, end to end, on this machine.

One process starts three parts and stops all of them on Ctrl-C or SIGTERM:

1. the scenario's log appended to ``WORKDIR/feed.csv`` in live mode
   (:class:`simulators.live.LiveAppender`, a thread), its truth file beside it;
2. the service (:class:`monitor.live.service.Service`, APScheduler jobs in threads) tailing the feed
   every second into a new SQLite store, with alerts delivered to ``WORKDIR/alerts.jsonl``;
3. the dashboard (``elmon dashboard``, a child process) on 127.0.0.1.

The terminal shows the estimates and each alert as it opens. The configuration the demo uses is
written to ``WORKDIR/elmon.toml``, so ``elmon run --config WORKDIR/elmon.toml`` runs the same
service by itself.
"""

from __future__ import annotations

import logging
import signal
import socket
import subprocess
import sys
import threading
import time
import urllib.request
from dataclasses import dataclass
from pathlib import Path

from monitor.errors import ConfigError


#: default pace of the daily scenarios: 2 simulated days per wall second. The retail year then
#: lasts about 3 minutes (at 8 days a second it ended 45 s after the start and the dashboard
#: went still, issue 16), and its headline change (elm-cross/rye-crackers, b -1.4 -> -2.2 on
#: day 164, a deep price test) is in the feed 82 s after the start, leaving 76 simulated days
#: of the first two minutes for the detection delay. At the production ARL0 of 20,000 it was
#: found 9-56 days after the change over seeds 1-9 (replays; tests/test_demo_alerts.py).
DAILY_SPEED = 2 * 86400.0

#: the production false-alarm budget: in-control ARL of each chart of each series, in
#: observations (the default of ``[detectors] arl0``)
PRODUCTION_ARL0 = 20000

#: per scenario: estimator settings and the default speed (simulated seconds per wall second)
SCENARIO_SETTINGS = {
    "retail": {"forgetting": 0.98, "controls": ["promo", "weekend"], "speed": DAILY_SPEED},
    "load": {"forgetting": 0.995, "controls": ["hdd", "cdd", "event", "shoulder", "peak"],
             "speed": 4 * 3600.0, "wording": "load", "rows_per_day": 24},
    "observational": {"forgetting": 0.98, "controls": ["weekend"], "speed": DAILY_SPEED},
    "flat": {"forgetting": 0.98, "controls": ["weekend"], "speed": DAILY_SPEED},
}


def pace_text(log_ts, truth_ts, speed: float) -> str:
    """What the pace means in wall time: how long the feed runs and when the scenario's true
    events arrive, in seconds after the start (``log_ts`` / ``truth_ts``: ISO times).

    >>> pace_text(["2024-01-01T00:00:00Z", "2024-12-30T00:00:00Z"], ["2024-06-13T00:00:00Z"],
    ...           2 * 86400.0)
    "the feed runs 3 min 2 s (364 simulated days at 2 a second); the scenario's events (truth.csv) arrive 82 s after the start"
    """
    import pandas as pd

    ts = pd.to_datetime(pd.Series(list(log_ts)), utc=True, errors="coerce").dropna()
    t0, span = ts.min(), (ts.max() - ts.min()).total_seconds()
    wall = span / speed
    text = (f"the feed runs {int(wall // 60)} min {int(round(wall % 60))} s "
            f"({span / 86400:.0f} simulated days at {speed / 86400:g} a second)")
    ch = pd.to_datetime(pd.Series(list(truth_ts)), utc=True, errors="coerce").dropna()
    if len(ch):
        at = sorted({int(round((t - t0).total_seconds() / speed)) for t in ch})
        when = f"{at[0]} s" if len(at) == 1 else f"{at[0]} s to {at[-1]} s"
        text += f"; the scenario's events (truth.csv) arrive {when} after the start"
    return text


def budget_text(rows: int, arl0: float) -> str:
    """The false-alarm budget in the demo's terms: two change charts per series, each with an
    in-control ARL of ``arl0`` observations, expect ``2 rows / arl0`` false change alerts over
    a feed of ``rows`` observations.

    >>> budget_text(4380, 20000)
    'change alerts at the production budget (ARL0 20,000 observations per chart and series): about 0.4 false ones expected over the whole feed'
    """
    return (f"change alerts at the production budget (ARL0 {arl0:,.0f} observations per chart "
            f"and series): about {2.0 * rows / arl0:.1f} false ones expected over the whole feed")


#: File name of the store the demo writes in its work folder (``elmon dashboard --help``
#: names it in its example).
DEMO_DB_NAME = "elmon-demo.sqlite"


@dataclass
class DemoSettings:
    scenario: str = "retail"
    workdir: Path = Path("demo-work")
    db: Path | None = None
    speed: float | None = None       # simulated seconds per wall second
    seed: int = 1
    port: int = 8501
    dashboard: bool = True
    duration: float | None = None    # stop by itself after this many seconds
    status_every: float = 5.0


def arl0_comment(rows_per_day: int) -> str:
    """The config's comment on its ARL0 (the production default), in the data's own time.

    >>> print(arl0_comment(1))
    # the production false-alarm budget: an in-control ARL of 20,000 observations per chart and
    # series, about 55 years of daily rows (see "Choosing thresholds for a false-alarm budget")
    """
    years = PRODUCTION_ARL0 / (365.0 * rows_per_day)
    text = (f"# the production false-alarm budget: an in-control ARL of {PRODUCTION_ARL0:,} "
            f"observations per chart and\n# series, about "
            + (f"{years:.0f} years of daily rows" if rows_per_day == 1 else
               f"{years:.1f} years of hourly rows"))
    if rows_per_day == 1:
        return text + ' (see "Choosing thresholds for a false-alarm budget")'
    days = 2 * 6 * 182 * rows_per_day / PRODUCTION_ARL0
    return text + (f". The budget counts observations: over half a year\n"
                   f"# of 6 hourly feeders the design expects about {days:.1f} false change "
                   f"alerts in all. The same\n# budget in time as daily data (55 years) "
                   f"would be 480,000 hourly rows per chart")


def demo_config_text(s: DemoSettings, db: Path) -> str:
    """The TOML the demo runs with (written beside the feed for reuse)."""
    est = SCENARIO_SETTINGS[s.scenario]
    controls = ", ".join(f'"{c}"' for c in est["controls"])
    return f"""# written by `elmon demo`; run the same service with: elmon run --config {s.workdir}/elmon.toml
[store]
path = "{db.resolve()}"

[estimator]
forgetting = {est['forgetting']}
controls = [{controls}]

[validation]
zero_policy = "skip"

[rules]
# the words of the alert texts: "retail" (shops) or "load" (feeders and tariffs)
wording = "{est.get('wording', 'retail')}"

[detectors]
{arl0_comment(est.get("rows_per_day", 1))}
arl0 = {PRODUCTION_ARL0}

[service]
poll_interval_s = 1.0
delivery_interval_s = 2.0
stale_check_s = 10

[sources.feed]
type = "csv"
path = "{(s.workdir / 'feed.csv').resolve()}"
poll_interval_s = 1.0
stale_after_s = 120

[sinks.log]
path = "{(s.workdir / 'alerts.jsonl').resolve()}"
"""


def pick_port(wanted: int, host: str = "127.0.0.1") -> int:
    """``wanted`` when nothing listens on it at ``host``, else a free port the system chooses
    (issue 16: with 8501 taken the demo printed 8501 while the browser showed another
    process's page). A port can still be taken between this check and the dashboard's start;
    the health check after the start then reports it."""
    for port in (wanted, 0):
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
            try:
                sock.bind((host, port))
            except OSError:
                continue
            return int(sock.getsockname()[1])
    raise ConfigError(f"no free port for the dashboard on {host} (asked for {wanted})")


def _wait_healthy(port: int, timeout: float = 30.0) -> bool:
    url = f"http://127.0.0.1:{port}/_stcore/health"
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        try:
            with urllib.request.urlopen(url, timeout=1) as r:
                if r.read().strip() == b"ok":
                    return True
        except OSError:
            time.sleep(0.25)
    return False


def run_demo(s: DemoSettings, out=print) -> dict:
    """Run the demo until Ctrl-C, SIGTERM or ``s.duration``; returns a summary."""
    import pandas as pd

    import simulators
    from monitor.live.service import Service
    from monitor.settings import load_config
    from monitor.store import latest_estimates, list_alerts, open_store
    from simulators.live import LiveAppender

    if s.scenario not in SCENARIO_SETTINGS:
        raise ConfigError(f"--scenario {s.scenario!r}: must be one of {', '.join(SCENARIO_SETTINGS)}")
    wd = Path(s.workdir)
    wd.mkdir(parents=True, exist_ok=True)
    db = Path(s.db) if s.db else wd / DEMO_DB_NAME
    for stale in (db, Path(f"{db}-wal"), Path(f"{db}-shm"), wd / "feed.csv", wd / "alerts.jsonl"):
        if stale.exists():
            stale.unlink()                      # a new store and feed every time
    sim = simulators.simulate(s.scenario, seed=s.seed)
    simulators.write_truth(sim, wd / "truth.csv")
    truth = pd.read_csv(wd / "truth.csv")
    cfg_path = wd / "elmon.toml"
    cfg_path.write_text(demo_config_text(s, db))
    speed = s.speed or SCENARIO_SETTINGS[s.scenario]["speed"]

    # skipped polls (a batch still committing when the next tick comes) are expected here
    logging.getLogger("apscheduler").setLevel(logging.ERROR)
    stop = threading.Event()
    previous = {}
    if threading.current_thread() is threading.main_thread():
        for sig in (signal.SIGINT, signal.SIGTERM):
            previous[sig] = signal.signal(sig, lambda *_: stop.set())
    appender = LiveAppender(sim.log, wd / "feed.csv", speed=speed, stop_event=stop)
    service = Service(load_config(cfg_path), base=wd)
    dash = None
    summary = {"alerts": [], "url": None}
    try:
        out(f"elmon demo: scenario '{s.scenario}' ({len(sim.log)} rows, truth in {wd / 'truth.csv'}), "
            f"{speed / 86400:.2f} simulated days per second")
        out("  " + pace_text(sim.log["ts"], truth["ts"], speed))
        out("  " + budget_text(len(sim.log), PRODUCTION_ARL0))
        appender.start()
        # the service starts only once the feed exists: before, its first poll could come
        # before the appender's thread had created feed.csv ("no such file" at start; issue 16)
        feed_deadline = time.monotonic() + 30
        while not (wd / "feed.csv").exists() and appender.error is None \
                and time.monotonic() < feed_deadline:
            time.sleep(0.05)
        service.start()
        out(f"  feed:    {wd / 'feed.csv'} (appended live)")
        out(f"  store:   {db}")
        if s.dashboard:
            from monitor.cli.dashboard_cmd import streamlit_command

            deadline = time.monotonic() + 20
            while not db.exists() and time.monotonic() < deadline:
                time.sleep(0.2)
            port = pick_port(s.port)
            if port != s.port:
                out(f"  port {s.port} is in use by another program: the dashboard uses port "
                    f"{port} instead (choose one with --port, or make demo PORT=...)")
            dash = subprocess.Popen(streamlit_command(str(db.resolve()), port, "127.0.0.1",
                                                      str((wd / "truth.csv").resolve()),
                                                      replay_root=str(wd.resolve())),
                                    stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            url = f"http://127.0.0.1:{port}/"
            summary["url"] = url
            summary["port"] = port
            healthy = _wait_healthy(port)
            out(f"  dashboard: {url}" + ("" if healthy else "  (not answering yet)"))
        out("  Ctrl-C stops everything. Estimates are statistical evidence, not decisions.")
        t0 = time.monotonic()
        seen: set[int] = set()
        fed = False                   # the feed's last row has been appended
        next_status = t0
        while not stop.wait(0.5):
            if s.duration is not None and time.monotonic() - t0 >= s.duration:
                break
            if time.monotonic() >= next_status and db.exists():
                next_status += s.status_every
                _print_status(open_store(db, readonly=True), seen, summary, out,
                              latest_estimates, list_alerts)
            if appender.error is not None:
                raise appender.error
            if not fed and appender.rows_written >= len(sim.log):
                fed = True
                out(f"  feed ended: all {len(sim.log)} rows appended after "
                    f"{appender.elapsed:.0f} s; no new rows will come. "
                    + ("The dashboard stays up until Ctrl-C" if dash is not None else
                       "The demo keeps running until Ctrl-C")
                    + ("." if s.duration is None else f" (or --duration {s.duration:g} s).")
                    + " Run 'elmon demo' again for a fresh feed.")
    finally:
        stop.set()
        appender.stop()
        appender.join()
        service.stop()
        if service.scheduler is not None:
            service.scheduler.shutdown(wait=True)
        service.run_once()          # the rows already in the feed are all committed
        if db.exists():
            _print_status(open_store(db, readonly=True), seen, summary, out, latest_estimates,
                          list_alerts, final=True)
        service.close()
        if dash is not None:
            dash.terminate()
            try:
                dash.wait(timeout=10)
            except subprocess.TimeoutExpired:
                dash.kill()
        for sig, h in previous.items():
            signal.signal(sig, h)
        out("elmon demo: stopped cleanly")
    summary["rows_appended"] = appender.rows_written
    return summary


def _print_status(store, seen, summary, out, latest_estimates, list_alerts, final=False):
    try:
        est = latest_estimates(store)
        alerts = list_alerts(store)
    finally:
        store.close()
    for _, a in alerts.sort_values("id").iterrows():
        if int(a["id"]) in seen:
            continue
        seen.add(int(a["id"]))
        summary["alerts"].append({"id": int(a["id"]), "series": a["series"], "kind": a["kind"],
                                  "ts": str(a["opened_ts"])})
        out(f"  ALERT #{int(a['id'])} {a['kind']} {a['series']}: {a['message']}")
    if len(est):
        ok = est[est["status"] != "warming_up"]
        head = "final estimates" if final else "estimates"
        out(f"  {head}: {len(est)} series, {len(ok)} past warm-up, "
            f"{int((est['open_alerts'] > 0).sum())} with open alerts")
        if final:
            for _, r in est.sort_values("series").iterrows():
                band = ("—" if r["beta_lo"] != r["beta_lo"]
                        else f"[{r['beta_lo']:.2f}, {r['beta_hi']:.2f}]")
                out(f"    {r['series']:<34} b = {r['beta']:6.2f} {band:>16}  {r['status']}")
