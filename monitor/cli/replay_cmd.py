"""``elmon replay``: a historical log through the core at full speed."""

from __future__ import annotations

import argparse
import json

from monitor.cli import HelpFormatter
from monitor.config import load_config

EXAMPLE = """example:
  elmon replay sales.csv --out replay-out/ --forgetting 0.98 --control promo
  elmon replay load.parquet --out out/ --log-control temperature --config elmon.toml
"""


def add_common_options(p: argparse.ArgumentParser) -> None:
    """Options shared by every command that runs the core over a log."""
    p.add_argument("--config", help="TOML config file (sections [estimator], [validation], ...)")
    p.add_argument("--forgetting", type=float, help="forgetting factor in (0, 1] (default 0.99)")
    p.add_argument("--control", action="append", default=None, metavar="NAME",
                   help="a control column entered as given (repeatable)")
    p.add_argument("--log-control", action="append", default=None, metavar="NAME",
                   help="a control column entered in logs (repeatable)")
    p.add_argument("--level", type=float, help="confidence level of the band (default 0.95)")
    p.add_argument("--zero-policy", choices=["reject", "skip"], help="what to do with zero quantities")
    for col in ("series", "ts", "price", "quantity"):
        p.add_argument(f"--{col}-col", dest=f"{col}_col", metavar="NAME",
                       help=f"name of the {col} column in the log (default '{col}')")


def config_from_args(args) -> "object":
    cfg = load_config(args.config)
    cfg = cfg.with_overrides("estimator", forgetting=args.forgetting, controls=args.control,
                             log_controls=args.log_control, level=args.level)
    cfg = cfg.with_overrides("validation", zero_policy=args.zero_policy)
    cfg = cfg.with_overrides("columns", series=args.series_col, ts=args.ts_col,
                             price=args.price_col, quantity=args.quantity_col)
    return cfg


def print_summary(summary: dict, out_dir) -> None:
    print(f"replayed {summary['rows']} rows of {summary['series']} series: "
          f"{summary['accepted']} processed, {summary['rejected']} rejected, "
          f"{summary['zero_skipped']} zero quantities skipped, {summary['alerts']} alerts")
    t = summary["timing"]
    print(f"wall time {t['wall_s']:.2f} s ({t['rows_per_s']:,.0f} rows/s)")
    print(f"{'series':<32} {'beta':>8} {'95% interval':>20} {'n_eff':>8}  status")
    for name, f in sorted(summary["final"].items()):
        b = "—" if f["beta"] is None else f"{f['beta']:8.3f}"
        band = "—" if f["beta_lo"] is None else f"[{f['beta_lo']:.3f}, {f['beta_hi']:.3f}]"
        print(f"{name:<32} {b:>8} {band:>20} {f['n_eff']:8.1f}  {f['status']}")
    print(f"wrote {out_dir}/estimates.csv, alerts.csv, rejects.csv, summary.json")


def handle(args) -> int:
    from monitor.replay import run_replay

    summary = run_replay(args.log, args.out, config_from_args(args))
    if args.json:
        print(json.dumps(summary, indent=2, sort_keys=True))
    else:
        print_summary(summary, args.out)
    return 0


def register(sub) -> None:
    p = sub.add_parser("replay", help="replay a historical log at full speed",
                       description="Run a CSV or Parquet observation log through the estimator, "
                                   "detectors and rules; write estimates, alerts, rejects and a summary.",
                       epilog=EXAMPLE, formatter_class=HelpFormatter)
    p.add_argument("log", help="observation log (.csv or .parquet): series, ts, price, quantity, controls")
    p.add_argument("--out", required=True, help="output folder")
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    add_common_options(p)
    p.set_defaults(func=handle)
