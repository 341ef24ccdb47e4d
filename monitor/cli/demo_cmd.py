"""``elmon demo``: the live demo (scenario feed -> service -> store -> dashboard)."""

from __future__ import annotations

from pathlib import Path

from monitor.cli import HelpFormatter


EXAMPLE = """example:
  elmon demo                                   # retail price test, dashboard on :8501
  elmon demo --scenario load --speed 7200 --port 8600
  elmon demo --no-dashboard --duration 60      # headless, stops by itself
"""


def handle(args) -> int:
    from monitor.cli.demo import DemoSettings, run_demo

    run_demo(DemoSettings(scenario=args.scenario, workdir=Path(args.workdir),
                          db=Path(args.db) if args.db else None, speed=args.speed,
                          seed=args.seed, port=args.port, dashboard=not args.no_dashboard,
                          duration=args.duration),
             out=lambda line: print(line, flush=True))
    return 0


def register(sub) -> None:
    p = sub.add_parser("demo", help="run the live demo: a simulated price test watched end to end",
                       description="Append a simulated scenario to a CSV feed in live mode, run the "
                                   "service over it into a new SQLite store, and serve the dashboard "
                                   "on 127.0.0.1. Ctrl-C or SIGTERM stops every part cleanly.",
                       epilog=EXAMPLE, formatter_class=HelpFormatter)
    p.add_argument("--scenario", default="retail", help="retail (default), load, observational, flat")
    p.add_argument("--speed", type=float, default=None,
                   help="simulated seconds per wall second (default 172800 = 2 days a second for the daily scenarios: the retail year runs about 3 minutes; 14400 = 4 hours a second for load)")
    p.add_argument("--db", default=None, help="store path (default WORKDIR/elmon-demo.sqlite; replaced)")
    p.add_argument("--workdir", default="demo-work", help="working folder (default ./demo-work)")
    p.add_argument("--seed", type=int, default=1, help="scenario seed (default 1)")
    p.add_argument("--port", type=int, default=8501, help="dashboard port (default 8501)")
    p.add_argument("--no-dashboard", action="store_true", help="terminal output only")
    p.add_argument("--duration", type=float, default=None, help="stop after this many seconds")
    p.set_defaults(func=handle)
