"""``elmon init``, ``elmon status`` and ``elmon alerts ...``: the store from the command line.

Each handler opens the store (read-only for reading commands), calls one function of
:mod:`monitor.store` and prints; a missing or foreign store file is a
:class:`~monitor.errors.StoreError` (exit 2) naming ``elmon init``.
"""

from __future__ import annotations

import getpass
import json
import math
from pathlib import Path
from typing import Any

from monitor.cli import HelpFormatter
from monitor.errors import ConfigError


def who_or_login(name: str | None) -> str:
    """``name``, else the login name (``unknown`` when there is none)."""
    if name:
        return name
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return "unknown"


def _fmt(value: Any) -> str:
    import pandas as pd

    from monitor import store as mstore

    if value is None or (isinstance(value, float) and math.isnan(value)) or value is pd.NaT:
        return "-"
    if isinstance(value, pd.Timestamp):
        return mstore.format_ts(value)
    if isinstance(value, float):
        return f"{value:.3f}"
    return str(value)


def _table(df: pd.DataFrame, cols: list[str]) -> str:
    if not len(df):
        return "  (none)"
    cells = [[_fmt(v) for v in row] for row in df[cols].itertuples(index=False)]
    width = [max(len(c), *(len(r[i]) for r in cells)) for i, c in enumerate(cols)]
    lines = ["  " + "  ".join(c.ljust(w) for c, w in zip(cols, width)).rstrip()]
    lines += ["  " + "  ".join(v.ljust(w) for v, w in zip(r, width)).rstrip() for r in cells]
    return "\n".join(lines)


# ---------------------------------------------------------------- handlers

def cmd_init(args) -> int:
    from monitor import store as mstore

    existed = Path(args.db).exists()
    with mstore.Store.open(args.db, create=True) as store:
        applied, version = store.applied_on_open, store.schema_version()
    if not existed:
        print(f"elmon init: created store {args.db} (schema version {version}, WAL mode)")
    elif applied:
        print(f"elmon init: migrated store {args.db} to schema version {version} "
              f"(applied {', '.join(map(str, applied))})")
    else:
        print(f"elmon init: store {args.db} is up to date (schema version {version})")
    return 0


def _watch_lines(latest) -> list[str]:
    """Detectability (issue 12): how many series can show a change of 0.5 in b within the
    watch horizon, and the ones whose prices do not move enough (up to 10 named)."""
    from monitor.detectability import WATCH_HORIZON_OBS

    if "delay50_obs" not in latest.columns or not len(latest):
        return []
    d = latest["delay50_obs"].astype(float)
    known = d.notna()
    slow = latest.loc[known & (d > WATCH_HORIZON_OBS)].sort_values("delay50_obs",
                                                                    ascending=False)
    out = ["", f"detectability: {int((known & (d <= WATCH_HORIZON_OBS)).sum())} series show a "
               f"change of 0.5 in b within {WATCH_HORIZON_OBS:,} observations (median delay); "
               f"{len(slow)} do not (their prices do not move enough to watch b); "
               f"{int((~known).sum())} not yet known"]
    for r in slow.head(10).itertuples(index=False):
        out.append(f"  {r.series}: about {int(round(r.delay50_obs, -1)):,} observations")
    if len(slow) > 10:
        out.append(f"  ... and {len(slow) - 10} more (elmon status --json: delay50_obs)")
    return out


def render_status(store: mstore.Store, now: Any = None, stale_after: float = 3600.0) -> str:
    """The text of ``elmon status``."""
    from monitor import store as mstore

    s = mstore.store_summary(store, now=now, stale_after=stale_after)
    sources = mstore.source_status(store, now=now)
    active = mstore.open_alerts(store)
    failed = mstore.list_outbox(store, status="failed", limit=10)
    st = s["alerts_by_state"]
    out = [f"store {store.path} (schema {s['schema_version']}, {s['file_bytes'] / 1e6:.1f} MB)",
           f"series: {s['series']}   observations: {s['observations']}   "
           f"estimates: {s['estimates']}   rejects: {s['rejects']}   "
           f"newest observation: {s['last_obs_ts'] or '-'}",
           f"alerts: {st['open']} open, {st['acknowledged']} acknowledged, "
           f"{st['resolved']} resolved",
           f"outbox: {s['outbox']['pending']} pending, {s['outbox']['failed']} failed, "
           f"{s['outbox']['delivered']} delivered",
           "", f"sources ({s['sources']}, {s['stale_sources']} with no run for over "
               f"{stale_after:g} s):"]
    if len(sources):
        sources = sources.assign(lag_s=[f"{v:.0f}" for v in sources["lag_seconds"]],
                                 position=[mstore.to_json(p) for p in sources["position"]])
    out.append(_table(sources, ["source", "kind", "rows_read", "rows_rejected", "last_run_at",
                                "lag_s", "last_error", "position"]))
    out += _watch_lines(mstore.latest_estimates(store))
    out += ["", "open alerts:", _table(active.head(20), ["id", "severity", "state", "series",
                                                         "kind", "opened_ts", "message"])]
    if len(active) > 20:
        out.append(f"  ... and {len(active) - 20} more (elmon alerts list --state active)")
    if len(failed):
        out += ["", "failed deliveries (elmon status shows the last 10):",
                _table(failed, ["id", "alert_id", "event", "sink", "attempts", "last_error"])]
    return "\n".join(out)


#: per-series fields of ``elmon status --json`` (the newest estimate of each series)
STATUS_SERIES_FIELDS = ["series", "ts", "status", "beta", "beta_lo", "beta_hi", "n_eff",
                        "n_obs", "open_alerts", "alert_severity", "delay50_obs"]


def _json_value(value: Any):
    import pandas as pd

    from monitor import store as mstore

    if isinstance(value, dict):
        return {str(k): _json_value(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_value(v) for v in value]
    if value is None or value is pd.NaT or (isinstance(value, float) and not math.isfinite(value)):
        return None
    if isinstance(value, pd.Timestamp):
        return mstore.format_ts(value)
    if hasattr(value, "item"):          # numpy scalars
        return _json_value(value.item())
    return value


def status_json(store: mstore.Store, now: Any = None, stale_after: float = 3600.0) -> dict:
    """What ``elmon status --json`` prints: the store's counts and, per series, its newest
    estimate with ``delay50_obs`` (expected observations to detect a change of 0.5 in b at
    its price variation and the configured ARL0; null where b is not identified)."""
    from monitor import store as mstore

    s = mstore.store_summary(store, now=now, stale_after=stale_after)
    lat = mstore.latest_estimates(store)
    series = [{k: _json_value(v) for k, v in zip(STATUS_SERIES_FIELDS, row)}
              for row in lat[STATUS_SERIES_FIELDS].itertuples(index=False)]
    return {"store": str(store.path),
            "summary": _json_value(s),
            "series": series}


def cmd_status(args) -> int:
    from monitor import store as mstore

    with mstore.open_store(args.db, readonly=True) as store:
        if args.json:
            print(json.dumps(status_json(store, stale_after=args.stale_after), indent=1,
                             allow_nan=False))
            return 0
        print(render_status(store, stale_after=args.stale_after))
        if args.group_by:
            from monitor.cli.group_text import render_groups

            try:
                print("\n" + render_groups(store, args.group_by))
            except ValueError as exc:
                raise ConfigError(f"--group-by: {exc}") from None
    return 0


def cmd_alerts_list(args) -> int:
    from monitor import store as mstore

    with mstore.open_store(args.db, readonly=True) as store:
        df = mstore.list_alerts(store, state=args.state, series=args.series, kind=args.kind,
                                limit=args.limit)
    print(_table(df, ["id", "severity", "state", "series", "kind", "opened_ts", "beta",
                      "message"]))
    return 0


def render_alert(alert: dict, events: pd.DataFrame) -> str:
    """The text of ``elmon alerts show``."""
    from monitor import store as mstore

    keys = ["id", "series", "kind", "severity", "state", "opened_ts", "opened_at",
            "resolved_ts", "resolved_at", "beta", "beta_lo", "beta_hi", "message",
            "last_reminded_at"]
    out = [f"  {k + ':':<17} {_fmt(alert[k])}" for k in keys]
    if alert.get("details"):
        out.append(f"  {'details:':<17} {mstore.to_json(alert['details'])}")
    out += ["", "events:", _table(events, ["at", "event", "ts", "who", "note"])]
    return f"alert {alert['id']}\n" + "\n".join(out)


def cmd_alerts_show(args) -> int:
    from monitor import store as mstore

    with mstore.open_store(args.db, readonly=True) as store:
        print(render_alert(mstore.get_alert(store, args.id), mstore.alert_events(store, args.id)))
    return 0


def cmd_alerts_ack(args) -> int:
    from monitor import store as mstore

    with mstore.open_store(args.db) as store:
        alert = mstore.acknowledge_alert(store, args.id, note=args.note, who=who_or_login(args.who))
    print(f"elmon alerts: alert {alert['id']} ({alert['series']}, {alert['kind']}) acknowledged")
    return 0


def cmd_alerts_resolve(args) -> int:
    from monitor import store as mstore

    with mstore.open_store(args.db) as store:
        alert = mstore.resolve_alert(store, args.id, note=args.note, who=who_or_login(args.who))
    print(f"elmon alerts: alert {alert['id']} ({alert['series']}, {alert['kind']}) resolved")
    return 0


def cmd_alerts_note(args) -> int:
    from monitor import store as mstore

    with mstore.open_store(args.db) as store:
        mstore.add_note(store, args.id, args.note, who=who_or_login(args.who))
    print(f"elmon alerts: note added to alert {args.id}")
    return 0


def cmd_alerts_silence(args) -> int:
    from monitor import store as mstore

    with mstore.open_store(args.db) as store:
        sid = mstore.silence(store, args.series, args.kind, args.until or args.duration,
                             note=args.note, who=who_or_login(args.who))
        until = mstore.list_silences(store, active_only=False).set_index("id").loc[sid, "until"]
    print(f"elmon alerts: silence {sid} for series {args.series!r}, kind {args.kind!r} "
          f"until {mstore.wall_ts(until)}")
    return 0


# ---------------------------------------------------------------- parsers

def _parser(sub, name: str, help: str, example: str, func, description: str | None = None):
    p = sub.add_parser(name, help=help, description=description or help,
                       epilog="example:\n  " + example, formatter_class=HelpFormatter)
    p.add_argument("--db", required=True, metavar="PATH", help="the store file (SQLite)")
    p.set_defaults(func=func)
    return p


def register(subparsers) -> None:
    """Add ``init``, ``status`` and ``alerts`` to the ``elmon`` command line."""
    _parser(subparsers, "init", "create a store, or migrate an existing one to this version",
            "elmon init --db elmon.sqlite", cmd_init,
            "Create the SQLite store (WAL mode) or apply pending schema migrations. "
            "Safe to run again: an up-to-date store is left as it is.")
    p = _parser(subparsers, "status", "sources, offsets, counts, open alerts and outbox backlog",
                "elmon status --db elmon.sqlite --group-by category", cmd_status,
                "Print each source's offset, rows read and rejected, last run and lag; the "
                "counts of series, observations and rejects; open alerts; the delivery "
                "backlog. Reads the store read-only, so it is safe beside a running service.")
    p.add_argument("--stale-after", type=float, default=3600.0, metavar="SECONDS",
                   help="count a source as stale after this long without a run (default 3600)")
    p.add_argument("--json", action="store_true",
                   help="print the counts and each series' newest estimate as JSON, with "
                        "delay50_obs: observations a change of 0.5 in b takes to detect")
    p.add_argument("--group-by", action="append", metavar="NAME",
                   help="also list the groups of this series attribute (repeatable): series, "
                        "group mean b with its band, spread, series that differ")

    alerts = subparsers.add_parser(
        "alerts", help="list, show, acknowledge, resolve, annotate or silence alerts",
        description="Work with alerts: open -> acknowledged -> resolved.",
        epilog="examples:\n  elmon alerts list --state active --db elmon.sqlite\n"
               "  elmon alerts ack 7 --note 'price test running' --db elmon.sqlite",
        formatter_class=HelpFormatter)
    asub = alerts.add_subparsers(dest="alerts_command", metavar="ACTION")
    asub.required = True
    p = _parser(asub, "list", "list alerts, newest first",
                "elmon alerts list --state open --kind elasticity_change --db elmon.sqlite",
                cmd_alerts_list)
    p.add_argument("--state", choices=["open", "acknowledged", "resolved", "active"],
                   help="only alerts in this state ('active' = open or acknowledged)")
    p.add_argument("--series", help="only this series")
    p.add_argument("--kind", help="only this kind, e.g. out_of_bounds, elasticity_change")
    p.add_argument("--limit", type=int, help="at most this many")
    from monitor.cli import alert_review    # --format csv|json, mark, truth (issue 16)

    alert_review.add_format_option(p)
    p.set_defaults(func=lambda args: alert_review.cmd_list_formatted(args, cmd_alerts_list))
    p = _parser(asub, "show", "one alert with its event history",
                "elmon alerts show 7 --db elmon.sqlite", cmd_alerts_show)
    p.add_argument("id", type=int, help="alert id")
    p = _parser(asub, "ack", "acknowledge an open alert",
                "elmon alerts ack 7 --note 'checking the promo calendar' --db elmon.sqlite",
                cmd_alerts_ack)
    p.add_argument("id", type=int, help="alert id")
    p.add_argument("--note", required=True, help="what is being done about it")
    p.add_argument("--who", help="your name (default: the login name)")
    p = _parser(asub, "resolve", "resolve an open or acknowledged alert",
                "elmon alerts resolve 7 --note 'test cell closed' --db elmon.sqlite",
                cmd_alerts_resolve)
    p.add_argument("id", type=int, help="alert id")
    p.add_argument("--note", help="why it is resolved")
    p.add_argument("--who", help="your name (default: the login name)")
    p = _parser(asub, "note", "add a note to an alert in any state",
                "elmon alerts note 7 --note 'supplier price change on 3 May' --db elmon.sqlite",
                cmd_alerts_note)
    p.add_argument("id", type=int, help="alert id")
    p.add_argument("--note", required=True, help="the note")
    p.add_argument("--who", help="your name (default: the login name)")
    p = _parser(asub, "silence", "stop deliveries and reminders for a series and kind for a time",
                "elmon alerts silence --series 'depot01/item00042' --kind '*' --for 12h "
                "--note 'planned price test' --db elmon.sqlite", cmd_alerts_silence)
    p.add_argument("--series", required=True, help="series id, or '*' for all")
    p.add_argument("--kind", required=True, help="alert kind, or '*' for all")
    when = p.add_mutually_exclusive_group(required=True)
    when.add_argument("--for", dest="duration", metavar="DURATION",
                      help="how long, e.g. 30min, 12h, 2d")
    when.add_argument("--until", metavar="TIME", help="until this UTC time (ISO 8601)")
    p.add_argument("--note", help="why")
    p.add_argument("--who", help="your name (default: the login name)")
    alert_review.register_review(asub, _parser)
