"""``elmon series reset NAME`` and ``elmon series resets``: start one series afresh, and the
record of every reset."""

from __future__ import annotations

from monitor.cli import HelpFormatter

RESET_EPILOG = """example:
  elmon series reset 'depot01/item00042' --why 'prices were logged in cents until 3 May' \\
      --db elmon.sqlite

The series' estimator, detectors and recent prices (the unit check) start afresh at its next
row, as for a new series; rows not newer than its newest stored time are still late or
duplicates. Its stored history (observations, estimates, alerts, rejects) stays. While a
service runs (it holds the store's writer lock) the reset is recorded as a request and the
service applies it before its next batch (at the latest at its next poll); 'elmon series
resets' shows it as pending until then."""


def cmd_reset(args) -> int:
    from monitor.cli.store_cmd import who_or_login
    from monitor.store import Store
    from monitor.store.live import (WriterBusy, release_writer_lock, request_series_reset,
                                    reset_series, take_writer_lock)

    who = who_or_login(args.who)
    with Store.open(args.db, create=False) as store:
        try:
            lock = take_writer_lock(store.path)
        except WriterBusy as busy:
            rec = request_series_reset(store, args.name, who, args.why)
            print(f"elmon series: reset of {rec['series']!r} requested (record {rec['id']}, by "
                  f"{rec['who']}: {rec['why']}); the process holding the store ({busy.holder}) "
                  f"applies it before its next batch ('elmon series resets' shows it pending "
                  f"until then)")
            return 0
        try:
            rec = reset_series(store, args.name, who, args.why)
        finally:
            release_writer_lock(lock)
    print(f"elmon series: {rec['series']!r} reset (record {rec['id']}, by {rec['who']}: "
          f"{rec['why']}); its next row newer than {rec['last_ts'] or 'any'} starts it afresh")
    return 0


def cmd_resets(args) -> int:
    from monitor.store.live import list_series_resets

    df = list_series_resets(args.db, args.name)
    if not len(df):
        print("elmon series: no resets recorded")
        return 0
    for r in df.itertuples(index=False):
        when = (f"newest row then: {r.last_ts or '-'}" if r.applied_at else
                "pending: the running service applies it before its next batch")
        print(f"{r.id:>4}  {r.at}  {r.series}  by {r.who}: {r.why}  ({when})")
    return 0


def register(subparsers) -> None:
    """Add ``series reset`` and ``series resets`` to the ``elmon`` command line."""
    p = subparsers.add_parser("series", help="reset one series' state; list resets",
                              description="Work with one series' live state.",
                              formatter_class=HelpFormatter,
                              epilog="examples:\n  elmon series reset NAME --why TEXT --db elmon.sqlite"
                                     "\n  elmon series resets --db elmon.sqlite")
    ssub = p.add_subparsers(dest="series_command", metavar="ACTION")
    ssub.required = True
    r = ssub.add_parser("reset", help="forget a series' estimator, detector and gate state",
                        description="Start one series afresh; the reset is recorded.",
                        epilog=RESET_EPILOG, formatter_class=HelpFormatter)
    r.add_argument("name", help="series id, exactly as stored")
    r.add_argument("--why", required=True, help="the reason (recorded)")
    r.add_argument("--who", help="your name (default: the login name)")
    r.add_argument("--db", required=True, metavar="PATH", help="the store file (SQLite)")
    r.set_defaults(func=cmd_reset)
    ls = ssub.add_parser("resets", help="list recorded resets, newest first",
                         epilog="example:\n  elmon series resets --db elmon.sqlite",
                         formatter_class=HelpFormatter)
    ls.add_argument("name", nargs="?", help="only this series")
    ls.add_argument("--db", required=True, metavar="PATH", help="the store file (SQLite)")
    ls.set_defaults(func=cmd_resets)
