"""``elmon tune``: choose the forgetting factor and thresholds for a false-alarm budget."""

from __future__ import annotations

import argparse
import json

from monitor.cli import HelpFormatter


EXAMPLE = """example:
  elmon tune retail.csv --truth retail_truth.csv --space space.toml --max-false-alarms 2 --out tune/
  elmon tune retail.csv --truth retail_truth.csv --space space.toml --engine dask --out tune/
  elmon tune sales.parquet --arl0 20000 --control promo --out tune/      # no known changes

space.toml lists values to try per config key, for example:
  [estimator]
  forgetting = [0.97, 0.98, 0.99]
  [detectors]
  arl0 = [2000, 20000]
  slope_k = [0.5, 1.0]
"""


DESCRIPTION = """\
With --truth: replay the log under every setting of a search space, score each
against the known changes (false alarms per 10,000 observations, detection rate,
median and 90th-percentile delay), show the Pareto front, and recommend the
fastest setting within --max-false-alarms, written as DIR/recommended.toml.

Without --truth: design the thresholds for a target in-control ARL (--arl0) and
check them on in-control logs resampled from the log itself (a block bootstrap of
its own residuals on its own prices). With the default split likelihood-ratio
detector: false alerts per 10,000 observations of each kind (elasticity_change,
level_shift) against the design's 10,000 / ARL0, with a verdict per kind ("design
holds" or "x times the design: the data break it", and why). With the previous
charts: a rate more than 20% away from the design's is flagged, with the
threshold that meets the target on the data."""


#: Search space used when ``--truth`` is given without ``--space`` (issue 16): the
#: forgetting factor (effective windows (1 + λ)/(1 − λ) of 66, 99, 199 and 399 observations)
#: against the in-control ARL per chart, 2 x 4 = 8 settings plus the defaults.
DEFAULT_SPACE = {"estimator": {"forgetting": [0.97, 0.98, 0.99, 0.995]},
                 "detectors": {"arl0": [2000, 20000]}}


def handle(args) -> int:
    from monitor.cli.replay_cmd import config_from_args
    from monitor.tuning.tune import tune

    space = args.space
    if args.truth and space is None:
        space = DEFAULT_SPACE
        if not args.quiet:
            print("no --space given: trying the default grid " + json.dumps(DEFAULT_SPACE))
    summary = tune(args.log, args.out, truth=args.truth, space=space,
                   config=config_from_args(args), max_false_alarms=args.max_false_alarms,
                   arl0=args.arl0, horizon=args.horizon, engine=args.engine,
                   scheduler=args.scheduler, npartitions=args.partitions,
                   chunk_rows=args.chunk_rows, workers=args.workers, progress=not args.quiet,
                   seed=args.seed, bootstrap_steps=args.bootstrap_obs)
    if args.json:
        print(json.dumps(summary, indent=2, sort_keys=True))
    elif "checks" in summary:
        print_calibration(summary, args.out)
    else:
        print_tuning(summary, args.out)
    return 0


def _v(x, spec=".3g") -> str:
    return "—" if x is None else format(x, spec)


def print_tuning(s: dict, out) -> None:
    print(f"evaluated {s['settings']} settings (defaults included) on {s['observations']:,} "
          f"observations in {s['timing']['wall_s']:.1f} s")
    d = s["defaults"]
    print(f"defaults:    {_v(d['false_alarms_per_10k'], '.2f')} false alarms per 10,000, detection "
          f"rate {_v(d['detection_rate'], '.0%')}, median delay {_v(d['median_delay_obs'], '.1f')} obs "
          "over the detected changes")
    r = s["recommended"]
    if r is None:
        print(f"no recommendation: {s['reason']}")
    else:
        print(f"recommended: {r['label']}")
        print(f"             {_v(r['false_alarms_per_10k'], '.2f')} false alarms per 10,000, "
              f"detection rate {_v(r['detection_rate'], '.0%')}, median delay "
              f"{_v(r['median_delay_obs'], '.1f')} obs over the detected changes (90th "
              f"percentile {_v(r['p90_delay_obs'], '.1f')})")
        print(f"             {s['reason']}")
    print(f"Pareto front: settings {', '.join(map(str, s['pareto']))}")
    files = "tuning.csv, tuning.json, report.html" + (", recommended.toml" if r else "")
    print(f"wrote {out}/{files}")


def print_calibration(s: dict, out) -> None:
    print(f"design for ARL0 = {s['arl0']:,.0f} observations per series, checked on "
          f"{s['paths']} bootstrap paths of {s['path_length']:,} observations from "
          f"{s['series_used']} series")
    for c in s["checks"].values():
        print(("FLAG: " if c["flagged"] else "ok:   ") + c["message"])
    a = s.get("alert_rates")
    if a and a.get("checked"):
        h = a["health"]
        if a.get("model") == "poisson":        # count paths (monitor.tuning.count_check)
            health = (f"count health: {h['overdispersed']} of {h['series']} series "
                      f"over-dispersed (median Pearson dispersion "
                      f"{h['median_pearson_dispersion']:.2f}; drawn negative binomial), "
                      f"{h['autocorrelated']} autocorrelated")
        else:
            health = (f"residual health: {h['autocorrelated']} of {h['series']} series "
                      f"autocorrelated, {h['price_linked_variance']} with error variance linked "
                      "to price")
        print(f"split detector: {a['observations']:,} resampled in-control observations "
              f"({a['paths']} paths on the log's own prices); " + health)
        for k in a["kinds"].values():
            tag = {"holds": "ok:   ", "breaks": "FLAG: ", "unsettled": "OPEN: "}[k["verdict"]]
            print(tag + k["message"])
    for text in s.get("unchecked", {}).values():
        print("NOT CHECKED: " + text)
    print(f"wrote {out}/recommended.toml, calibration.json, report.html")


def register(sub) -> None:
    from monitor.cli.replay_cmd import add_common_options
    from monitor.cli.run_options import add_engine_options, add_truth_options, positive_int

    p = sub.add_parser("tune", help="choose thresholds for a false-alarm budget",
                       description=DESCRIPTION,
                       epilog=EXAMPLE, formatter_class=HelpFormatter)
    p.add_argument("log", help="observation log (.csv or .parquet)")
    p.add_argument("--out", required=True, help="output folder")
    add_truth_options(p)
    p.add_argument("--space", metavar="SPACE.toml", help="search space: config keys with lists of "
                                                           "values to try (with --truth; default: "
                                                           "forgetting 0.97-0.995 x arl0 2,000 "
                                                           "and 20,000)")
    p.add_argument("--max-false-alarms", type=float, default=1.0, metavar="X",
                   help="false-alarm budget: alarms per 10,000 observations without a known "
                        "change (default 1)")
    p.add_argument("--workers", type=positive_int, metavar="N",
                   help="local processes (default: every core)")
    p.add_argument("--seed", type=int, default=0, help="seed of the bootstrap (default 0)")
    p.add_argument("--bootstrap-obs", type=positive_int, metavar="N",
                   help="without --truth: resampled observations to run (split detector: "
                        "default 2,000,000, about 1,000 alerts per kind at ARL0 2,000 and 100 "
                        "at 20,000; the charts: total chart steps, default 12,000,000)")
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    add_common_options(p)
    try:     # the replay's detector options may already define --arl0 (same meaning)
        p.add_argument("--arl0", type=float, metavar="N",
                       help="without --truth: target in-control ARL, observations per series "
                            "between false alarms")
    except argparse.ArgumentError:
        pass
    add_engine_options(p)
    p.set_defaults(func=handle)
