"""``elmon replay``: a historical log through the core at full speed."""

from __future__ import annotations

import argparse
import json

from monitor.cli import HelpFormatter


class _ChartChoices:
    """The chart names of :data:`monitor.detectors.spec.CHART_CHOICES`, looked up when a value
    is checked or a command's help is shown: importing the detectors (numba, scipy) while the
    parser is built would slow every command's start, ``elmon --help`` included."""

    def _names(self) -> list[str]:
        from monitor.detectors.spec import CHART_CHOICES

        return CHART_CHOICES

    def __iter__(self):
        return iter(self._names())

    def __contains__(self, value) -> bool:
        return value in self._names()

    def __len__(self) -> int:
        return len(self._names())


EXAMPLE = """example:
  elmon replay sales.csv --out replay-out/ --forgetting 0.98 --control promo
  elmon replay sales.csv --out out/ --bounds -4 -0.3 --arl0 50000
  elmon replay load.parquet --out out/ --log-control temperature --config elmon.toml
  elmon replay shop.csv --out out/ --control weekend --instrument unit_cost
  elmon replay retail.csv --out out/ --truth retail_truth.csv --report out/report.html
  elmon replay sales.csv --out out/ --series-col sku --series-col store --group-col store
  elmon replay big.parquet --out out/ --sample-every 24 --engine dask --scheduler tcp://10.0.0.5:8786
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
    p.add_argument("--instrument", action="append", metavar="NAME",
                   help="instrument column: moves the price, not demand (a cost, a tax, a "
                        "randomized price assignment); repeatable; estimates by recursive 2SLS")
    p.add_argument("--model", choices=["loglinear", "poisson"],
                   help="estimator: log-log least squares (default) or Poisson pseudo-maximum "
                        "likelihood (counts, zeros kept as data)")
    p.add_argument("--band", choices=["hc", "hac", "classic"],
                   help="confidence band: hc heteroskedasticity-robust (default), hac also "
                        "autocorrelation-robust, classic constant-variance")
    p.add_argument("--exposure-col", dest="exposure_col", metavar="NAME",
                   help="column of the exposure behind each quantity (opening hours, customers, "
                        "meters); Poisson model")
    p.add_argument("--zero-policy", choices=["reject", "skip"], help="what to do with zero quantities")
    p.add_argument("--series-col", dest="series_col", action="append", metavar="NAME",
                   help="name of the series column in the log (default 'series'); repeat it for "
                        "a composite id: --series-col sku --series-col store makes ids "
                        "'sku/store' in that order ('/' inside a part is written '\\/')")
    for col in ("ts", "price", "quantity"):
        p.add_argument(f"--{col}-col", dest=f"{col}_col", metavar="NAME",
                       help=f"name of the {col} column in the log (default '{col}')")
    p.add_argument("--delimiter", metavar="CHAR",
                   help="field separator of a CSV log: ',' ';' '|' or 'tab' (default: sniffed "
                        "from the header line; [columns] delimiter)")
    p.add_argument("--ts-format", dest="ts_format", metavar="FORMAT",
                   help="strftime format of the timestamps, e.g. '%%d/%%m/%%Y' for day-first "
                        "dates (default: ISO 8601 or epoch seconds; [columns] ts_format)")
    p.add_argument("--group-col", dest="group_col", action="append", metavar="NAME",
                   help="attribute whose values group the series (repeatable): a key column or "
                        "a column of [series] attributes; adds pooled estimates and group alerts")
    add_detector_options(p)


def add_detector_options(p: argparse.ArgumentParser) -> None:
    """Detector, bounds and alert-rule settings ([detectors], [bounds], [rules] in a config)."""
    g = p.add_argument_group("detectors and alerts (thresholds not given are designed from --arl0)")
    g.add_argument("--arl0", type=float, metavar="N",
                   help="in-control ARL: mean observations per series between false alarms of "
                        "each chart (default 20000)")
    g.add_argument("--bounds", type=float, nargs=2, metavar=("LOW", "HIGH"),
                   help="allowed elasticity range, e.g. --bounds -4 -0.3")
    g.add_argument("--bounds-mode", choices=["interval", "point"],
                   help="breach when the confidence interval (default) or the estimate is outside")
    g.add_argument("--persistence", type=int, metavar="N",
                   help="consecutive breaching updates before a bounds alert (default 3)")
    g.add_argument("--clear-after", type=int, metavar="N",
                   help="consecutive updates back inside before it clears (default 5)")
    # metavar given: argparse would list the choices (importing the detectors) while building
    g.add_argument("--level-chart", choices=_ChartChoices(), metavar="CHART",
                   help="chart on the standardized innovations -> level_shift: %(choices)s "
                        "(default cusum)")
    g.add_argument("--slope-chart", choices=_ChartChoices(), metavar="CHART",
                   help="chart on the fast-minus-reference slope statistic -> elasticity_change: "
                        "%(choices)s (default cusum)")
    g.add_argument("--cusum-k", type=float, metavar="K",
                   help="reference value of the level CUSUM, sd units (default 0.5)")
    g.add_argument("--cusum-h", type=float, metavar="H",
                   help="decision interval of the level CUSUM, sd units (default: designed)")
    g.add_argument("--slope-k", type=float, metavar="K",
                   help="reference value of the slope CUSUM (default 1.0)")
    g.add_argument("--slope-h", type=float, metavar="H",
                   help="decision interval of the slope CUSUM (default: designed)")
    g.add_argument("--fast-forgetting", type=float, metavar="LAM",
                   help="forgetting of the fast slope regression (default 0.95)")
    g.add_argument("--reference-forgetting", type=float, metavar="LAM",
                   help="forgetting of the reference slope regression (default 0.998)")
    g.add_argument("--cooldown", type=int, metavar="N",
                   help="observations after an alert clears before that kind can open again "
                        "(default 50)")


def config_from_args(args) -> "object":
    from monitor.settings import load_config

    cfg = load_config(args.config)
    cfg = cfg.with_overrides("estimator", forgetting=args.forgetting, controls=args.control,
                             log_controls=args.log_control, level=args.level,
                             model=getattr(args, "model", None), band=getattr(args, "band", None),
                             exposure=getattr(args, "exposure_col", None),
                             instruments=getattr(args, "instrument", None))
    cfg = cfg.with_overrides("validation", zero_policy=args.zero_policy)
    series_cols = list(args.series_col or [])
    cfg = cfg.with_overrides("columns", series=series_cols[0] if len(series_cols) == 1 else None,
                             ts=args.ts_col, price=args.price_col, quantity=args.quantity_col,
                             ts_format=getattr(args, "ts_format", None),
                             delimiter=getattr(args, "delimiter", None))
    cfg = cfg.with_overrides("series", key=series_cols if len(series_cols) > 1 else None,
                             groups=getattr(args, "group_col", None))
    get = lambda name: getattr(args, name, None)  # noqa: E731  (commands without the group)
    cfg = cfg.with_overrides("detectors", arl0=get("arl0"), level_chart=get("level_chart"),
                             slope_chart=get("slope_chart"), cusum_k=get("cusum_k"),
                             cusum_h=get("cusum_h"), slope_k=get("slope_k"), slope_h=get("slope_h"),
                             fast_forgetting=get("fast_forgetting"),
                             reference_forgetting=get("reference_forgetting"))
    low, high = get("bounds") or (None, None)
    cfg = cfg.with_overrides("bounds", low=low, high=high, mode=get("bounds_mode"),
                             persistence=get("persistence"), clear_after=get("clear_after"))
    cfg = cfg.with_overrides("rules", cooldown=get("cooldown"))
    return cfg


MAX_LISTED = 40


def print_summary(summary: dict, out_dir) -> None:
    print(f"replayed {summary['rows']} rows of {summary['series']} series: "
          f"{summary['accepted']} processed, {summary['rejected']} rejected, "
          f"{summary['zero_skipped']} zero quantities skipped, {summary['alerts']} alerts")
    if summary.get("alerts_by_rule"):
        print("alerts by kind: " + ", ".join(f"{k} {v}" for k, v in sorted(summary["alerts_by_rule"].items())))
    if summary.get("zero_notes"):
        from monitor.replay.health import ZERO_NOTE_SHARE

        print(f"{summary['zero_notes']} series have {ZERO_NOTE_SHARE:.0%} or more zero quantities: "
              "the log-log model cannot use zeros and is biased on small counts; use "
              "--model poisson (summary.json: each such series' note)")
    t = summary["timing"]
    print(f"wall time {t['wall_s']:.2f} s ({t['rows_per_s']:,.0f} rows/s)")
    print(f"{'series':<32} {'beta':>8} {'95% interval':>20} {'n_eff':>8}  status")
    listed = sorted(summary["final"].items())
    for name, f in listed[:MAX_LISTED]:
        b = "—" if f["beta"] is None else f"{f['beta']:8.3f}"
        band = "—" if f["beta_lo"] is None else f"[{f['beta_lo']:.3f}, {f['beta_hi']:.3f}]"
        print(f"{name:<32} {b:>8} {band:>20} {f['n_eff']:8.1f}  {f['status']}")
    if len(listed) > MAX_LISTED:
        print(f"... and {len(listed) - MAX_LISTED} more series (final estimates in summary.json)")
    print_detection(summary)
    est_file = "estimates." + summary["settings"]["replay"].get("estimates_format", "csv")
    print(f"wrote {out_dir}/{est_file}, alerts.csv, rejects.csv, summary.json"
          + (", detection.csv" if "detection" in summary else "")
          + (f"; report {summary['report']}" if summary.get("report") else ""))


def print_detection(summary: dict) -> None:
    d = summary.get("detection")
    if not d:
        return
    fmt = lambda v, spec: "—" if v is None else format(v, spec)  # noqa: E731
    print(f"known changes: {d['detected']} of {d['changes']} detected "
          f"({fmt(d['detection_rate'], '.0%')}), median delay {fmt(d['median_delay_obs'], '.1f')} obs, "
          f"90th percentile {fmt(d['p90_delay_obs'], '.1f')} obs; false alarms "
          f"{fmt(d['false_alarms_per_10k'], '.2f')} per 10,000 quiet observations "
          f"({d['false_alarms']} in {d['quiet_obs']:,})")


def handle(args) -> int:
    from monitor.cli.run_options import engine_kwargs
    from monitor.replay.driver import replay

    summary = replay(args.log, args.out, config_from_args(args), truth=args.truth,
                     report=args.report, report_series=args.report_series,
                     sample_every=args.sample_every, horizon=args.horizon,
                     estimates_format=args.estimates_format, **engine_kwargs(args))
    if args.json:
        print(json.dumps(summary, indent=2, sort_keys=True))
    else:
        print_summary(summary, args.out)
    from monitor.cli import reject_share
    from pathlib import Path

    rejects = Path(args.out) / "rejects.csv"
    if summary["rows"] and summary["rejected"] / summary["rows"] > args.max_reject_share:
        reject_share.check("replay", summary["rows"], summary["rejected"],
                           reject_share.first_from_csv(rejects), args.max_reject_share,
                           str(rejects), reject_share.renamed(args))
    return 0


def register(sub) -> None:
    p = sub.add_parser("replay", help="replay a historical log at full speed",
                       description="Run a CSV or Parquet observation log through the estimator, "
                                   "detectors and rules; write estimates, alerts, rejects and a summary.",
                       epilog=EXAMPLE, formatter_class=HelpFormatter)
    p.add_argument("log", help="observation log (.csv or .parquet): series, ts, price, quantity, controls")
    p.add_argument("--out", required=True, help="output folder")
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    p.add_argument("--estimates-format", choices=("csv", "parquet"), default="csv",
                   help="estimates.csv (default) or estimates.parquet: the same columns; "
                        "Parquet for large logs with every estimate kept")
    add_common_options(p)
    add_replay_options(p)
    from monitor.cli import reject_share

    reject_share.add_option(p)
    p.set_defaults(func=handle)


def add_replay_options(p: argparse.ArgumentParser) -> None:
    """Truth, report, sampling and engine options (monitor.cli.run_options)."""
    from monitor.cli.run_options import add_engine_options, add_truth_options, positive_int

    add_truth_options(p)
    p.add_argument("--report", metavar="PATH",
                   help="write a self-contained HTML report (plots need no network)")
    p.add_argument("--report-series", action="append", metavar="NAME",
                   help="series to plot in the report (repeatable; default: those in --truth)")
    p.add_argument("--sample-every", type=positive_int, default=1, metavar="N",
                   help="write every N-th estimate per series plus status changes and alerts "
                        "(default 1: all)")
    add_engine_options(p)
