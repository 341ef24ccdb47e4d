"""``elmon alerts list --format``, ``elmon alerts mark`` and ``elmon alerts truth`` (issue 16,
item 9): alerts as CSV or JSON for other tools, what people found an alert to be, and the
confirmed changes as a truth file that ``elmon tune`` accepts.

The ``alerts`` command group itself is built in :mod:`monitor.cli.store_cmd`; its
``register`` calls :func:`register_review` with the group's sub-parsers.
"""

from __future__ import annotations

import getpass
import json
import math
import sys


#: Columns of ``elmon alerts list --format csv|json``.
EXPORT_COLUMNS = ["id", "series", "kind", "state", "severity", "opened_ts", "change_ts",
                  "beta", "beta_lo", "beta_hi", "beta_before", "beta_after", "message",
                  "verdict"]


def _clean(v):
    import pandas as pd

    if v is None or v is pd.NaT or (isinstance(v, float) and not math.isfinite(v)):
        return None
    if isinstance(v, pd.Timestamp):
        from monitor.store.codec import format_ts
        return format_ts(v)
    if hasattr(v, "item"):
        return v.item()
    return v


def export_alerts(alerts, verdicts, fmt: str) -> str:
    """``alerts`` (a :func:`monitor.store.list_alerts` frame) with each alert's verdict
    (``confirmed``, ``false_alarm`` or empty) as CSV (RFC 4180, UTF-8, header row) or as a
    JSON array of objects (missing values ``null``, never NaN)."""
    import pandas as pd

    df = alerts.copy()
    marks = dict(zip(verdicts["alert_id"].astype(int), verdicts["verdict"])) if len(verdicts) \
        else {}
    df["verdict"] = [marks.get(int(i)) for i in df["id"]] if len(df) else []
    df = df.reindex(columns=EXPORT_COLUMNS)
    rows = [{c: _clean(v) for c, v in zip(EXPORT_COLUMNS, r)}
            for r in df.itertuples(index=False)]
    if fmt == "json":
        return json.dumps(rows, indent=1, allow_nan=False, ensure_ascii=False)
    return pd.DataFrame(rows, columns=EXPORT_COLUMNS).to_csv(index=False).rstrip("\n")


def cmd_list_formatted(args, fallback) -> int:
    """``alerts list``: the text table (``fallback``) or ``--format csv|json``."""
    if getattr(args, "format", "text") == "text":
        return fallback(args)
    from monitor import store as mstore
    from monitor.store.verdicts import list_verdicts

    with mstore.open_store(args.db, readonly=True) as store:
        df = mstore.list_alerts(store, state=args.state, series=args.series, kind=args.kind,
                                limit=args.limit)
        verdicts = list_verdicts(store)
    print(export_alerts(df, verdicts, args.format))
    return 0


def cmd_mark(args) -> int:
    from monitor.store.verdicts import mark_alert

    verdict = "confirmed" if args.confirmed else "false_alarm"
    who = args.who or getpass.getuser()
    mark_alert(args.db, args.id, verdict, who=who, note=args.note)
    print(f"alert {args.id}: marked as "
          f"{'a confirmed change' if verdict == 'confirmed' else 'a false alarm'} by {who}")
    return 0


def cmd_truth(args) -> int:
    from monitor.store.verdicts import truth_from_verdicts

    truth, n = truth_from_verdicts(args.db)
    text = truth.to_csv(index=False)
    if args.out in (None, "-"):
        sys.stdout.write(text)
    else:
        with open(args.out, "w", encoding="utf-8", newline="") as f:
            f.write(text)
    print(f"elmon alerts truth: {n['confirmed']} confirmed change(s) written"
          f"{'' if args.out in (None, '-') else ' to ' + args.out}; {n['false_alarm']} marked "
          f"false alarm (left out, so alarms there count as false); {n['unmarked']} change "
          f"alert(s) not marked (left out: mark them for a complete truth file)"
          + (f"; {n['not_a_change']} confirmed alert(s) of other kinds left out"
             if n["not_a_change"] else ""), file=sys.stderr)
    return 0


def add_format_option(p) -> None:
    """``--format text|csv|json`` for ``alerts list``."""
    p.add_argument("--format", choices=["text", "csv", "json"], default="text",
                   help="text table (default), CSV or a JSON array, each alert with its "
                        "verdict if marked")


def register_review(asub, parser_factory) -> None:
    """Add ``mark`` and ``truth`` to the ``alerts`` group (``parser_factory`` is
    store_cmd's ``_parser(sub, name, help, example, func)``, which adds ``--db``)."""
    p = parser_factory(asub, "mark", "mark an alert as a confirmed change or a false alarm",
                       "elmon alerts mark 7 --false-alarm --note 'promo calendar error' "
                       "--db elmon.sqlite", cmd_mark)
    p.add_argument("id", type=int, help="alert id")
    which = p.add_mutually_exclusive_group(required=True)
    which.add_argument("--confirmed", action="store_true", help="a real change")
    which.add_argument("--false-alarm", action="store_true", help="no change happened")
    p.add_argument("--note", help="how it was checked")
    p.add_argument("--who", help="your name (default: the login name)")
    p = parser_factory(asub, "truth", "write the confirmed change alerts as a truth file for "
                       "elmon tune / elmon replay --truth",
                       "elmon alerts truth --db elmon.sqlite --out truth.csv", cmd_truth)
    p.add_argument("--out", metavar="CSV", help="file to write (default: standard output)")

