"""``elmon run`` (the live service) and ``elmon ingest`` (one file through the same path)."""

from __future__ import annotations

import logging
import sys
from pathlib import Path

from monitor.cli import HelpFormatter


RUN_EPILOG = """example:
  elmon run --config examples/elmon.toml
  elmon run --config elmon.toml --once          # drain every source once, then exit

Stops cleanly on SIGTERM or Ctrl-C: the batch in progress is committed first. Killed
any other way, the next start resumes exactly where the last committed batch ended.
Relative paths in the config are taken from the config file's folder."""

INGEST_EPILOG = """example:
  elmon ingest sales.csv --db elmon.sqlite
  elmon ingest load.parquet --db elmon.sqlite --config elmon.toml --batch-rows 20000

Run it again after an interruption and it continues after the last committed batch; run it
again over a file already read and it adds nothing."""


def cmd_run(args) -> int:
    from monitor.live.service import Service
    from monitor.settings import load_config

    logging.basicConfig(level=getattr(logging, args.log_level.upper()), stream=sys.stderr,
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    logging.getLogger("apscheduler").setLevel(max(logging.WARNING, logging.root.level))
    # "skipped: maximum number of running instances reached" is max_instances=1 at work (a
    # poll still draining a backlog); the service logs its own problems
    logging.getLogger("apscheduler.scheduler").setLevel(logging.ERROR)
    config = load_config(args.config)
    cols = list(args.series_col or [])
    config = config.with_overrides("columns", series=cols[0] if len(cols) == 1 else None)
    config = config.with_overrides("series", key=cols if len(cols) > 1 else None,
                                   groups=args.group_col)
    base = Path(args.config).resolve().parent
    for name in args.reset_source or []:
        print(reset_source_position(config, args.db, base, name), file=sys.stderr)
    service = Service(config, store=args.db, base=base)
    print(f"elmon run: store {service.store.path}, {len(service.monitor.series)} series "
          f"restored, sources: {', '.join(service.sources) or 'none'}", file=sys.stderr,
          flush=True)
    if args.once:
        try:
            t = service.run_once()
            errors = service.source_errors
        finally:
            service.close()
        print(f"elmon run --once: {t['rows']} rows in {t['batches']} batches: {t['accepted']} "
              f"processed, {t['rejected']} rejected, {t['zero_skipped']} zero quantities "
              f"skipped, {t['alerts_opened']} alerts opened")
        for name, msg in errors.items():     # a source that could not be read is a failure
            print(f"elmon run --once: error: source {name}: {msg}", file=sys.stderr)
        return 2 if errors else 0
    return service.run()


def reset_source_position(config, db, base: Path, name: str) -> str:
    """Forget source ``name``'s position in the store (``--reset-source``); returns a message."""
    from monitor.errors import ConfigError
    from monitor.live import settings as service_config
    from monitor.store import Store
    from monitor.store.live import release_writer_lock, reset_source, take_writer_lock

    if name not in config.section("sources"):
        raise ConfigError(f"--reset-source {name}: no [sources.{name}] in the config")
    path = Path(db) if db else Path(service_config.store_settings(config)["path"]).expanduser()
    path = path if path.is_absolute() or db else base / path
    with Store.open(path, create=True) as store:
        lock = take_writer_lock(store.path)
        try:
            known = reset_source(store, name)
        finally:
            release_writer_lock(lock)
    return (f"elmon run: source {name}: position forgotten; it is read again from its start"
            if known else f"elmon run: source {name}: no position stored yet")


def cmd_ingest(args) -> int:
    from monitor.cli.replay_cmd import config_from_args
    from monitor.live.service import ingest_file

    out = ingest_file(args.file, args.db, config_from_args(args), batch_rows=args.batch_rows)
    if not args.quiet:
        print(describe_ingest(out, args.file))
    if out["rows"] and out["rejected"] / out["rows"] > args.max_reject_share:
        from monitor.cli import reject_share

        reject_share.check("ingest", out["rows"], out["rejected"],
                           reject_share.first_from_store(args.db, out["source"]),
                           args.max_reject_share,
                           f"elmon status --db {args.db} (rejects table of the store)",
                           reject_share.renamed(args))
    return 0


def _where(position) -> str:
    if not position:
        return "the start"
    if "offset" in position:
        return f"row {position['rows']} (byte {position['offset']})"
    return f"row {position.get('rows', 0)}"


def describe_ingest(out: dict, file) -> str:
    """The text ``elmon ingest`` prints."""
    lines = [f"elmon ingest: notice: {n}" for n in out["notices"]]
    if out["nothing_new"]:
        lines.append(f"elmon ingest: nothing new in {file}: already ingested up to "
                     f"{_where(out['start'])}; nothing added")
        return "\n".join(lines)
    how = f"continuing after {_where(out['start'])}" if out["resumed"] else "from the start"
    lines.append(f"elmon ingest: {file} ({how}): {out['rows']} rows in {out['batches']} "
                 f"batches: {out['accepted']} processed, {out['rejected']} rejected, "
                 f"{out['zero_skipped']} zero quantities skipped, {out['alerts_opened']} alerts "
                 f"opened; now at {_where(out['end'])} ({out['seconds']:.2f} s)")
    return "\n".join(lines)


def register(sub) -> None:
    from monitor.cli.replay_cmd import add_common_options

    p = sub.add_parser("run", help="run the live service: poll sources, alert, deliver",
                       description="Poll every source in the config on a schedule, process new "
                                   "rows in committed batches, raise stale alerts and deliver "
                                   "alerts to the configured sinks.",
                       epilog=RUN_EPILOG, formatter_class=HelpFormatter)
    p.add_argument("--config", required=True, help="TOML config ([store], [sources.*], ...)")
    p.add_argument("--db", metavar="PATH", help="store file (overrides [store] path)")
    p.add_argument("--once", action="store_true",
                   help="drain every source once, check staleness, deliver, then exit")
    p.add_argument("--reset-source", action="append", metavar="NAME",
                   help="read source NAME again from its start (after a replaced file with "
                        "on_reset = 'stop'; rows already stored are rejected as duplicates)")
    p.add_argument("--log-level", default="info", choices=["debug", "info", "warning", "error"],
                   help="logging detail on stderr (default info)")
    p.add_argument("--series-col", action="append", metavar="NAME",
                   help="series column (overrides [columns] series); repeat for a composite id "
                        "(overrides [series] key)")
    p.add_argument("--group-col", action="append", metavar="NAME",
                   help="attribute that groups the series (repeatable; overrides [series] groups)")
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("ingest", help="load a CSV or Parquet file into a store, resumably",
                       description="Load a finished file through the service's path: "
                                   "validation with quarantine, estimator, detectors, alerts. "
                                   "The file is recorded as a source with its committed offset.",
                       epilog=INGEST_EPILOG, formatter_class=HelpFormatter)
    p.add_argument("file", help="observation log (.csv or .parquet)")
    p.add_argument("--db", required=True, metavar="PATH", help="store file (created if missing)")
    p.add_argument("--batch-rows", type=int, metavar="N",
                   help="rows per committed batch (default [service] batch_rows, 50000)")
    add_common_options(p)
    p.add_argument("--quiet", action="store_true", help="print nothing on success")
    from monitor.cli import reject_share

    reject_share.add_option(p)
    p.set_defaults(func=cmd_ingest)
