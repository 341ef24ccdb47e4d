"""``elmon deliveries list`` and ``elmon deliveries requeue``: alert messages that a sink
never took.

A delivery (one outbox row: one alert event for one sink) is marked ``failed`` after the
service's last attempt (``[service] delivery_max_attempts``). It is kept with its last error;
these commands list such rows and put them back in the queue, due at once, with their attempt
count reset. The running service (or the next ``elmon run --once``) sends them at its next
delivery round; a message may then arrive twice at a receiver that took it without answering,
so each message carries ``delivery_id`` for the receiver to drop repeats.
"""

from __future__ import annotations

from monitor.cli import HelpFormatter
from monitor.errors import ConfigError


def render_failed(rows: list[dict]) -> str:
    """The text of ``elmon deliveries list``: one line per failed delivery."""
    if not rows:
        return "no failed deliveries"
    out = [f"{len(rows)} failed deliveries (id, alert, event, sink, attempts, last error):"]
    for r in rows:
        error = (r["last_error"] or "-").replace("\n", " ")
        out.append(f"  {r['id']}  alert {r['alert_id']}  {r['event']}  {r['sink']}  "
                   f"{r['attempts']}  {error[:200]}")
    return "\n".join(out)


def cmd_list(args) -> int:
    from monitor import store as mstore
    from monitor.store.outbox import failed_deliveries

    with mstore.open_store(args.db, readonly=True) as store:
        print(render_failed(failed_deliveries(store, sink=args.sink)))
    return 0


def cmd_requeue(args) -> int:
    if not args.all and not args.id and args.sink is None:
        raise ConfigError("say which failed deliveries to requeue: --id N (repeatable), "
                          "--sink NAME or --all")
    from monitor import store as mstore
    from monitor.store.outbox import requeue_failed

    with mstore.open_store(args.db) as store:
        n = requeue_failed(store, ids=args.id or None, sink=args.sink)
    print(f"elmon deliveries: {n} failed deliveries put back in the queue; the service sends "
          f"them at its next delivery round")
    return 0


def _parser(sub, name: str, help: str, example: str, func):
    p = sub.add_parser(name, help=help, description=help, epilog="example:\n  " + example,
                       formatter_class=HelpFormatter)
    p.add_argument("--db", required=True, metavar="PATH", help="the store file (SQLite)")
    p.add_argument("--sink", metavar="NAME", help="only deliveries to this sink")
    p.set_defaults(func=func)
    return p


def register(subparsers) -> None:
    """Add ``deliveries list`` and ``deliveries requeue`` to the ``elmon`` command line."""
    group = subparsers.add_parser(
        "deliveries", help="list alert deliveries that failed, and put them back in the queue",
        description="A delivery (one alert event for one sink) is marked failed after the "
                    "service's last attempt and kept with its last error. 'list' shows them; "
                    "'requeue' puts them back in the queue, due at once, attempts reset: the "
                    "service sends them at its next delivery round. A receiver may get a "
                    "message twice; each carries delivery_id to drop repeats.",
        epilog="examples:\n  elmon deliveries list --db elmon.sqlite\n"
               "  elmon deliveries requeue --sink ops --db elmon.sqlite",
        formatter_class=HelpFormatter)
    sub = group.add_subparsers(dest="deliveries_command", metavar="ACTION")
    sub.required = True
    _parser(sub, "list", "failed deliveries with their last error, oldest first",
            "elmon deliveries list --db elmon.sqlite", cmd_list)
    p = _parser(sub, "requeue", "put failed deliveries back in the queue (attempts reset)",
                "elmon deliveries requeue --id 12 --id 13 --db elmon.sqlite", cmd_requeue)
    p.add_argument("--id", type=int, action="append", metavar="N",
                   help="this delivery (an id from 'elmon deliveries list'; repeatable)")
    p.add_argument("--all", action="store_true", help="every failed delivery")
