"""``elmon simulate``: write a scenario's observation log and truth, or append it live."""

from __future__ import annotations

import argparse
import signal
import sys
import threading
from contextlib import contextmanager

from monitor.errors import ConfigError

EPILOG = """example:
  elmon simulate --list
  elmon simulate retail --out retail.csv --truth retail_truth.csv --seed 7
  elmon simulate load --out load.parquet --series 4 --length 2000
  elmon simulate retail --out retail.csv --set freq=h --set noise=poisson
  elmon simulate retail --out feed.csv --truth feed_truth.csv --live --rate 200 --max-rows 2000
  elmon simulate load --out feed.db --table observations --live --speed 36000

The truth file lists change points (series, ts, kind, end_ts, beta_before, beta_after, note);
TRUTH_path.csv beside it holds the true series, ts, beta, intercept of every log row, and
TRUTH_bad.csv (baddata) the row number and reason of every bad row."""


def register(sub) -> None:
    from monitor.cli import HelpFormatter

    p = sub.add_parser(
        "simulate", help="write a scenario's log with known truth, or append it live",
        description="Generate an invented scenario with known truth: an observation log "
                    "(series, ts, price, quantity, controls) and the change points behind it. "
                    "Output format follows the suffix: .csv or .parquet; live mode writes .csv "
                    "or a SQLite database (.db, .sqlite).",
        epilog=EPILOG, formatter_class=HelpFormatter)
    p.add_argument("scenario", nargs="?", help="scenario name (see --list)")
    p.add_argument("--list", action="store_true", help="print each scenario with a description")
    p.add_argument("--out", metavar="LOG", help="log file to write (.csv, .parquet; live: .csv, "
                                                ".db, .sqlite)")
    p.add_argument("--truth", metavar="TRUTH", help="change-point file to write (.csv)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--series", type=int, metavar="N", help="number of series")
    p.add_argument("--length", type=int, metavar="N", help="time steps per series")
    p.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="scenario option, e.g. freq=h, noise=poisson, sigma=0.1 (repeatable)")
    live = p.add_argument_group("live mode")
    live.add_argument("--live", action="store_true", help="append rows at a pace instead of "
                                                          "writing the file at once")
    live.add_argument("--rate", type=float, help="rows per second of wall time (default 100)")
    live.add_argument("--speed", type=float, help="simulated seconds per wall second "
                                                  "(instead of --rate)")
    live.add_argument("--max-rows", type=int, metavar="N", help="stop after N rows")
    live.add_argument("--max-seconds", type=float, metavar="S", help="stop after S seconds")
    live.add_argument("--table", default="observations", help="SQLite table (default "
                                                              "observations)")
    live.add_argument("--append", action="store_true", help="append to what the target holds")
    live.add_argument("--realtime", action="store_true", help="shift timestamps to start now")
    p.set_defaults(func=run)


def parse_setting(text: str) -> tuple[str, object]:
    """``"sigma=0.1"`` -> ``("sigma", 0.1)``; ints, floats, true/false, else text."""
    key, sep, raw = text.partition("=")
    if not sep or not key:
        raise ConfigError(f"--set {text!r}: expected KEY=VALUE")
    low = raw.lower()
    if low in ("true", "false"):
        return key, low == "true"
    for conv in (int, float):
        try:
            return key, conv(raw)
        except ValueError:
            pass
    return key, raw


@contextmanager
def _stop_on_signals(stop: threading.Event):
    """SIGINT / SIGTERM set ``stop`` (a clean stop after the current write)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    old = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}
    for s in old:
        signal.signal(s, lambda *_: stop.set())
    try:
        yield
    finally:
        for s, h in old.items():
            signal.signal(s, h)


def run(args: argparse.Namespace) -> int:
    from simulators import SCENARIOS, LiveAppender, simulate, write_outputs, write_truth

    if args.list:
        width = max(map(len, SCENARIOS))
        for name, (_, text) in SCENARIOS.items():
            print(f"{name:<{width}}  {text}")
        return 0
    if not args.scenario:
        raise ConfigError("SCENARIO: give a scenario name, or --list to see them")
    if not args.out:
        raise ConfigError("--out: give the log file to write")
    options = dict(parse_setting(s) for s in args.set)
    sim = simulate(args.scenario, seed=args.seed, n_series=args.series, length=args.length,
                   **options)
    n_series = sim.log["series"].nunique()
    if not args.live:
        written = write_outputs(sim, args.out, args.truth)
        print(f"wrote {len(sim.log)} rows of {n_series} series to {written['log']}")
        for key in ("truth", "path", "bad"):
            if key in written:
                print(f"wrote {key} to {written[key]}")
        return 0
    if args.truth:
        for key, path in write_truth(sim, args.truth).items():
            print(f"wrote {key} to {path}")
    stop = threading.Event()
    appender = LiveAppender(sim.log, args.out, rate=args.rate, speed=args.speed,
                            table=args.table, append=args.append, max_rows=args.max_rows,
                            max_seconds=args.max_seconds, stop_event=stop,
                            realtime=args.realtime)
    pace = f"{appender.rate:g} rows/s" if appender.speed is None else f"speed {appender.speed:g}x"
    print(f"appending {args.scenario} ({len(sim.log)} rows, {n_series} series) to {args.out} "
          f"at {pace}; Ctrl-C stops", flush=True)
    with _stop_on_signals(stop):
        n = appender.run()
    print(f"appended {n} rows to {args.out} in {appender.elapsed:.1f} s", file=sys.stdout)
    return 0
