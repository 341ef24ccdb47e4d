"""``elmon experiment status|report``: a live price experiment from the store.

The experiments are the ``[experiments.NAME]`` tables of the config (``--config FILE``, else
the ``ELMON_CONFIG`` environment variable); one can also be given on the command line with
``--series`` and ``--start``. Controls come from ``[estimator]`` (or ``--control``).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys

from monitor.errors import ConfigError

EPILOG_STATUS = """example:
  elmon experiment status --db shop.sqlite --config elmon.toml
  elmon experiment status spring-ladder --db shop.sqlite --config elmon.toml --json
  elmon experiment status trial --db shop.sqlite --series 'harbor-st/*' --start 2024-03-01

Verdicts: collecting, precise (the confidence sequence's half-width reached the target),
stalled (prices are not moving as planned), compromised (a health check failed: prices off the
ladder, levels unbalanced across weekdays or series, prices following demand)."""

EPILOG_REPORT = """example:
  elmon experiment report spring-ladder --db shop.sqlite --config elmon.toml --out spring.html"""


def _add_common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--db", metavar="PATH", help="the store (default: [store] path of the config)")
    p.add_argument("--config", metavar="FILE", help="TOML file with [experiments.NAME] tables "
                                                    "(default: $ELMON_CONFIG)")
    one = p.add_argument_group("an experiment given here instead of in the config")
    one.add_argument("--series", action="append", metavar="GLOB",
                     help="series id pattern, e.g. 'harbor-st/*' (repeatable)")
    one.add_argument("--start", help="first time of the test (ISO 8601, UTC when naive)")
    one.add_argument("--end", help="last time of the test")
    one.add_argument("--target-halfwidth", type=float, help="precision target on b (default 0.2)")
    one.add_argument("--level", type=float, help="confidence level (default 0.95)")
    one.add_argument("--ladder", type=float, nargs="+", metavar="X",
                     help="planned multipliers of the pre-test price")
    p.add_argument("--control", action="append", default=None, metavar="NAME",
                   help="control column (repeatable; default: [estimator] controls)")


def register(sub) -> None:
    from monitor.cli import HelpFormatter

    p = sub.add_parser("experiment", help="a live price experiment: estimate, bands valid at "
                                          "every look, time to precision, verdict",
                       description="Watch a price experiment defined in [experiments.NAME].",
                       epilog=EPILOG_STATUS, formatter_class=HelpFormatter)
    esub = p.add_subparsers(dest="experiment_command", metavar="SUBCOMMAND")
    esub.required = True
    s = esub.add_parser("status", help="pooled b, fixed band, confidence sequence, time to "
                                       "precision and verdict of each experiment",
                        epilog=EPILOG_STATUS, formatter_class=HelpFormatter)
    s.add_argument("name", nargs="?", help="experiment name (default: every experiment)")
    _add_common(s)
    s.add_argument("--json", action="store_true", help="print JSON (an object for one "
                                                       "experiment, else a list)")
    s.add_argument("--details", action="store_true", help="with --json: per-series rows, "
                                                          "heterogeneity, health and the plan")
    s.set_defaults(func=cmd_status)
    r = esub.add_parser("report", help="write a self-contained HTML report of one experiment",
                        epilog=EPILOG_REPORT, formatter_class=HelpFormatter)
    r.add_argument("name", help="experiment name")
    _add_common(r)
    r.add_argument("--out", required=True, metavar="FILE.html", help="report file to write")
    r.set_defaults(func=cmd_report)


def _setup(args) -> tuple[str, dict, list[str], list[str]]:
    """(store path, {name: plan}, controls, log_controls) from the options and the config."""
    from monitor.experiments import plan_from_config
    from monitor.experiments.sources import controls_from_config, plans_from_config
    from monitor.settings import Config, load_config

    path = args.config or os.environ.get("ELMON_CONFIG") or None
    cfg = load_config(path) if path else Config()
    plans = plans_from_config(cfg)
    controls, log_controls = controls_from_config(cfg)
    if args.control is not None:
        controls = list(args.control)
    if args.series or args.start:
        if not (args.series and args.start):
            raise ConfigError("--series and --start: give both to define an experiment here")
        spec = {"series": args.series, "start": args.start}
        for key in ("end", "target_halfwidth", "level", "ladder"):
            if getattr(args, key) is not None:
                spec[key] = getattr(args, key)
        name = getattr(args, "name", None) or "cli"
        plans = {name: plan_from_config(name, spec)}
    if not plans:
        raise ConfigError("no experiment: give --config FILE with [experiments.NAME] tables "
                          "(or set ELMON_CONFIG), or --series and --start")
    db = args.db or cfg.data.get("store", {}).get("path")
    if not db:
        raise ConfigError("--db: give the store (or [store] path in the config)")
    if path and not os.path.isabs(db) and not args.db:
        db = os.path.join(os.path.dirname(os.path.abspath(path)), db)
    return db, plans, controls, log_controls


def _pick(plans: dict, name: str | None) -> dict:
    if name is None:
        return plans
    if name not in plans:
        raise ConfigError(f"experiment {name!r}: not configured (known: "
                          f"{', '.join(sorted(plans)) or 'none'})")
    return {name: plans[name]}


def _fmt(v, spec: str = "{:.3f}") -> str:
    return "-" if v is None or (isinstance(v, float) and not math.isfinite(v)) else spec.format(v)


def render(summary: dict) -> str:
    """The text form of one experiment's status."""
    s = summary
    lines = [f"{s['name']}: {s['verdict']}",
             f"  b = {_fmt(s['b'])}   fixed band [{_fmt(s['b_lo'])}, {_fmt(s['b_hi'])}]   "
             f"confidence sequence [{_fmt(s['cs_lo'])}, {_fmt(s['cs_hi'])}]",
             f"  observations {s['n_obs']:,}   half-width {_fmt(s['halfwidth'])} "
             f"(target {s['target_halfwidth']:g})   more observations to target "
             f"{_fmt(s['eta_obs'], '{:,.0f}')}   expected {s['eta_ts'] or '-'}"]
    lines += [f"  - {r}" for r in s["reasons"]]
    return "\n".join(lines)


def cmd_status(args) -> int:
    from monitor import store as mstore
    from monitor.experiments.sources import status_from_store

    db, plans, controls, log_controls = _setup(args)
    chosen = _pick(plans, args.name)
    with mstore.open_store(db, readonly=True) as store:
        statuses = [status_from_store(store, plan, controls, log_controls)
                    for plan in chosen.values()]
    if args.json:
        docs = [st.to_json(details=args.details) for st in statuses]
        out = docs[0] if args.name else docs
        json.dump(out, sys.stdout, indent=2, allow_nan=False)
        print()
    else:
        print("\n\n".join(render(st.summary) for st in statuses))
    return 0


def cmd_report(args) -> int:
    from monitor import store as mstore
    from monitor.experiments.report import write_report
    from monitor.experiments.sources import status_from_store

    db, plans, controls, log_controls = _setup(args)
    plan = _pick(plans, args.name)[args.name]
    with mstore.open_store(db, readonly=True) as store:
        st = status_from_store(store, plan, controls, log_controls)
    out = write_report(st, args.out)
    print(f"wrote {out} ({st.summary['verdict']}, {st.summary['n_obs']:,} observations)")
    return 0
