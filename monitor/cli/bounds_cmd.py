"""``elmon bounds set``, ``load`` and ``list``: a series' own elasticity bounds."""

from __future__ import annotations

import math

from monitor.cli import HelpFormatter
from monitor.errors import ConfigError

SET_EPILOG = """examples:
  elmon bounds set 'depot01/item00042' --low -4 --high -0.5 --db elmon.sqlite
  elmon bounds set 'depot01/item00042' --high none --db elmon.sqlite   # drop one side
  elmon bounds set 'depot01/item00042' --clear --db elmon.sqlite       # back to [bounds]

Bounds are elasticities (d log q / d log p, unitless). A side given here replaces the
[bounds] limit of the configuration for this series; a side not given keeps what the store
holds; 'none' removes a side, so the [bounds] limit applies to it again. A running service
(elmon run) applies the change from its next batch: it reads the bounds for every batch. No
service needs to be stopped. An unknown series is refused (a mistyped name would hold bounds
no row meets); --create adds it, to set bounds before its first row.

Bounds are a check on the estimate, not a decision: an estimate outside them is statistical
evidence to look into."""

LIST_EPILOG = """examples:
  elmon bounds list --db elmon.sqlite
  elmon bounds list --db elmon.sqlite --config elmon.toml   # also the [bounds] default

'own' is what 'elmon bounds set' stored; 'applied' is what the service last used for the
series (blank before its next batch)."""


def _side(text: str | None, side: str):
    """The option's text as a bound: ``None`` for 'none', a finite float, else an error."""
    from monitor.store.bounds import KEEP

    if text is None:
        return KEEP
    if text.strip().lower() == "none":
        return None
    try:
        v = float(text)
    except ValueError:
        raise ConfigError(f"--{side} {text!r}: not a number (give an elasticity such as -3.5, "
                          f"or 'none' to remove the {side} bound)") from None
    if not math.isfinite(v):
        raise ConfigError(f"--{side} {text!r}: must be a finite number (or 'none')")
    return v


def _unset(v) -> bool:
    return v is None or (isinstance(v, float) and math.isnan(v))


def _fmt(v) -> str:
    return "none" if _unset(v) else f"{v:g}"


def cmd_set(args) -> int:
    from monitor.store import Store
    from monitor.store.bounds import set_series_bounds

    if args.clear and (args.low is not None or args.high is not None):
        raise ConfigError("--clear removes both sides: give it without --low / --high")
    if not args.clear and args.low is None and args.high is None:
        raise ConfigError("give --low, --high or both (or --clear to remove the series' bounds)")
    low = None if args.clear else _side(args.low, "low")
    high = None if args.clear else _side(args.high, "high")
    with Store.open(args.db, create=False) as store:
        rec = set_series_bounds(store, args.name, low=low, high=high, create=args.create)
    if args.clear:
        print(f"elmon bounds: {rec['series']!r} has no bounds of its own now (were "
              f"{_fmt(rec['before'][0])}, {_fmt(rec['before'][1])}); the [bounds] limits apply "
              f"from the service's next batch")
        return 0
    what = "added with bounds" if rec["created"] else "bounds"
    print(f"elmon bounds: {rec['series']!r} {what} low = {_fmt(rec['low'])}, high = "
          f"{_fmt(rec['high'])} (were {_fmt(rec['before'][0])}, {_fmt(rec['before'][1])}); "
          f"a side 'none' follows [bounds]. A running service applies them from its next batch")
    return 0


def cmd_load(args) -> int:
    from monitor.ingest.bounds_file import read_bounds_file
    from monitor.store import Store
    from monitor.store.bounds import load_series_bounds

    table = read_bounds_file(args.file)
    with Store.open(args.db, create=False) as store:
        recs = load_series_bounds(store, table, create=args.create,
                                  source=f"bounds file {args.file!r}")
    made = sum(r["created"] for r in recs)
    print(f"elmon bounds: {len(recs)} series' bounds set from {args.file}"
          + (f" ({made} series added)" if made else "")
          + "; a running service applies them from its next batch")
    return 0


def cmd_list(args) -> int:
    from monitor.store.bounds import list_series_bounds

    df = list_series_bounds(args.db)
    if args.config:
        from monitor.settings import load_config

        sec = load_config(args.config).section("bounds")
        print(f"[bounds] default ({args.config}): low = {_fmt(sec.get('low'))}, high = "
              f"{_fmt(sec.get('high'))}, mode = {sec.get('mode')}")
        if sec.get("file"):
            from monitor.ingest.bounds_file import bounds_file_path

            print(f"[bounds] file: {bounds_file_path(load_config(args.config))} (the service "
                  "loads it at start and whenever it changes; replay applies it)")
    else:
        print("[bounds] default: in the service's configuration (give --config FILE to show "
              "it; the built-in default is none on both sides)")
    if not len(df):
        print("no series has bounds of its own")
        return 0
    width = max(6, int(df["series"].str.len().max()))
    print(f"{'series':<{width}}  {'own low':>8}  {'own high':>8}  {'applied':>17}")
    for r in df.itertuples(index=False):
        applied = ("" if _unset(r.bound_low) and _unset(r.bound_high) else f"[{_fmt(r.bound_low)}, {_fmt(r.bound_high)}]")
        print(f"{r.series:<{width}}  {_fmt(r.low):>8}  {_fmt(r.high):>8}  {applied:>17}")
    return 0


def register(subparsers) -> None:
    """Add ``bounds set`` and ``bounds list`` to the ``elmon`` command line."""
    p = subparsers.add_parser("bounds", help="set or list a series' own elasticity bounds",
                              description="A series' own elasticity bounds, in place of the "
                                          "[bounds] limits of the configuration.",
                              formatter_class=HelpFormatter,
                              epilog="examples:\n  elmon bounds set NAME --low -4 --high -0.5 "
                                     "--db elmon.sqlite\n  elmon bounds load bounds.csv --db elmon.sqlite"
                                     "\n  elmon bounds list --db elmon.sqlite")
    bsub = p.add_subparsers(dest="bounds_command", metavar="ACTION")
    bsub.required = True
    s = bsub.add_parser("set", help="set (or --clear) one series' bounds",
                        description="Set one series' own elasticity bounds.",
                        epilog=SET_EPILOG, formatter_class=HelpFormatter)
    s.add_argument("name", help="series id, exactly as stored")
    s.add_argument("--low", metavar="B", help="lowest allowed elasticity, or 'none'")
    s.add_argument("--high", metavar="B", help="highest allowed elasticity, or 'none'")
    s.add_argument("--clear", action="store_true",
                   help="remove both sides: the [bounds] limits apply to the series again")
    s.add_argument("--create", action="store_true",
                   help="add the series when the store does not know it yet")
    s.add_argument("--db", required=True, metavar="PATH", help="the store file (SQLite)")
    s.set_defaults(func=cmd_set)
    ld = bsub.add_parser("load", help="set many series' bounds from a CSV file (series,low,high)",
                         description="Set the bounds of every series in a CSV file with the "
                                     "header series,low,high; an empty cell: no own bound on that "
                                     "side. One bad row refuses the whole file (nothing changes).",
                         epilog="example:\n  elmon bounds load bounds.csv --db elmon.sqlite",
                         formatter_class=HelpFormatter)
    ld.add_argument("file", help="CSV file: series,low,high")
    ld.add_argument("--create", action="store_true",
                    help="add series the store does not know yet")
    ld.add_argument("--db", required=True, metavar="PATH", help="the store file (SQLite)")
    ld.set_defaults(func=cmd_load)
    ls = bsub.add_parser("list", help="series with bounds of their own, and the [bounds] default",
                         description="List the series that have bounds of their own.",
                         epilog=LIST_EPILOG, formatter_class=HelpFormatter)
    ls.add_argument("--db", required=True, metavar="PATH", help="the store file (SQLite)")
    ls.add_argument("--config", metavar="TOML", help="the service's configuration ([bounds])")
    ls.set_defaults(func=cmd_list)
