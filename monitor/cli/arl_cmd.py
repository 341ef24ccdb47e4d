"""``elmon arl``: average run length (ARL) tables of CUSUM and EWMA charts, and threshold design.

Thin commands over :mod:`monitor.detectors.arl`: parse, compute, print a table (or JSON with ``--json``).
"""

from __future__ import annotations

import argparse
import json
import math

from monitor.cli import HelpFormatter

# monitor.detectors (numba, scipy) is imported by the commands that use it, not here: every
# command's start, elmon --help included, would pay for it


DEFAULT_SHIFTS = (0.0, 0.5, 1.0, 2.0, 3.0)
DEFAULT_ARL0 = 20_000.0

_ABOUT = """\
The average run length (ARL) is the expected number of observations until a chart signals.
At shift 0 it is the mean time between false alarms (ARL0); at a shift of d standard
deviations it is the mean detection delay. Observations are standardized (mean 0, sd 1 in
control); k, h, L and the shifts are in standard deviations.

Give the threshold (--h, --L) or a target in-control ARL (--arl0) to solve for it; with
neither, the threshold is designed for ARL0 = 20,000 observations. With 1,000 series observed
hourly, ARL0 = 20,000 means about 1,000 * 24 / 20,000 = 1.2 false alarms a day in total."""


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "arl", help="average run length of CUSUM and EWMA charts and the split detector; design "
        "thresholds",
        description=_ABOUT, formatter_class=HelpFormatter,
        epilog="examples:\n  elmon arl cusum --k 0.5 --h 4 --shift 0 1 2\n"
               "  elmon arl ewma --lam 0.1 --arl0 500 --json")
    charts = p.add_subparsers(dest="chart", metavar="CHART")
    charts.required = True

    c = charts.add_parser(
        "cusum", help="two- or one-sided tabular CUSUM (reference value k, decision interval h)",
        description=_ABOUT + "\n\nCUSUM: S+ = max(0, S+ + x - k), S- = max(0, S- - x - k); "
        "signal when a side exceeds h.\nExact ARL by the integral equation (or Brook & Evans' "
        "Markov chain), Siegmund's (1985)\napproximation beside it.",
        formatter_class=HelpFormatter,
        epilog="examples:\n  elmon arl cusum --k 0.5 --h 4 --shift 0 0.5 1 2 3\n"
               "  elmon arl cusum --k 0.5 --arl0 500 --sides 1\n"
               "  elmon arl cusum --k 0.25 --h 8 --mc 5000 --json")
    c.add_argument("--k", type=float, default=0.5,
                   help="reference value, sd (default 0.5: tuned to a 1 sd shift)")
    g = c.add_mutually_exclusive_group()
    g.add_argument("--h", type=float, help="decision interval, sd")
    g.add_argument("--arl0", type=float, help="target in-control ARL: solve for h")
    c.add_argument("--sides", type=int, choices=(1, 2), default=2,
                   help="2: both directions (default); 1: upper side only")
    c.add_argument("--method", choices=("integral", "markov"), default="integral",
                   help="integral equation (default) or Markov chain")
    _common(c)
    c.set_defaults(func=_cusum)

    e = charts.add_parser(
        "ewma", help="two-sided EWMA chart (smoothing lam, limit width L)",
        description=_ABOUT + "\n\nEWMA: z = (1 - lam) z + lam x from z = 0; signal when "
        "|z| > L sqrt(lam / (2 - lam)).",
        formatter_class=HelpFormatter,
        epilog="examples:\n  elmon arl ewma --lam 0.1 --L 2.814 --shift 0 1\n"
               "  elmon arl ewma --lam 0.2 --arl0 20000 --json")
    e.add_argument("--lam", type=float, default=0.1, help="smoothing, 0 < lam <= 1 (default 0.1)")
    g = e.add_mutually_exclusive_group()
    g.add_argument("--L", type=float, help="limit width in asymptotic sd of z")
    g.add_argument("--arl0", type=float, help="target in-control ARL: solve for L")
    e.add_argument("--method", choices=("integral", "markov"), default="integral",
                   help="integral equation (default) or Markov chain")
    _common(e)
    e.set_defaults(func=_ewma)

    sp = charts.add_parser(
        "split", help="the split likelihood-ratio detector of a change in b or the level",
        description="The default change detector (monitor.detectors.split_glr): its slope and "
        "level thresholds\ndesigned for an in-control ARL by simulation, and for a change db of "
        "b at a given\nlog-price sd and noise sd the information per observation I = db^2 "
        "sd_p^2 / (2 sd_e^2),\nLorden's (1971) bound ln(ARL0) / I on any detector's delay, and "
        "this detector's\nexpected delay.", formatter_class=HelpFormatter,
        epilog="examples:\n  elmon arl split --arl0 20000 --db 0.5 --price-sd 0.15 "
               "--noise-sd 0.15\n  elmon arl split --arl0 2000 --db 0.3 0.5 0.8 --json")
    sp.add_argument("--arl0", type=float, default=DEFAULT_ARL0,
                    help="in-control ARL per chart and series (default 20000)")
    sp.add_argument("--db", type=float, nargs="+", default=[0.3, 0.5, 0.8], metavar="DB",
                    help="changes of b (default: 0.3 0.5 0.8)")
    sp.add_argument("--price-sd", type=float, default=0.15,
                    help="sd of log price after the controls (default 0.15)")
    sp.add_argument("--noise-sd", type=float, default=0.15,
                    help="sd of the log-quantity errors (default 0.15)")
    sp.add_argument("--json", action="store_true", help="print JSON instead of a table")
    sp.set_defaults(func=_split)


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--shift", type=float, nargs="+", default=list(DEFAULT_SHIFTS),
                   metavar="D", help="mean shifts in sd (default: 0 0.5 1 2 3)")
    p.add_argument("--mc", type=int, default=0, metavar="RUNS",
                   help="add a Monte Carlo check with this many runs per shift")
    p.add_argument("--seed", type=int, default=0, help="Monte Carlo seed (default 0)")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")


def _cusum(args) -> int:
    from monitor.detectors import arl, arl_mc

    h = arl.cusum_h_for_arl0(args.k, _target(args), args.sides) if args.h is None else args.h
    values = arl.cusum_arl(args.k, h, args.shift, args.sides, method=args.method)
    approx = arl.siegmund_arl(args.k, h, args.shift, args.sides)
    mc = arl_mc.cusum_arl_mc(args.k, h, args.shift, args.sides, n_runs=args.mc,
                          seed=args.seed) if args.mc else None
    side = "two-sided" if args.sides == 2 else "one-sided (upper)"
    head = {"chart": "cusum", "k": args.k, "h": h, "sides": args.sides, "method": args.method}
    title = f"CUSUM, {side}, k = {args.k:g}, h = {h:.6g}"
    _emit(args, head, title, values, ("Siegmund", approx), mc)
    return 0


def _ewma(args) -> int:
    from monitor.detectors import arl, arl_mc

    L = arl.ewma_L_for_arl0(args.lam, _target(args)) if args.L is None else args.L
    values = arl.ewma_arl(args.lam, L, args.shift, method=args.method)
    mc = arl_mc.ewma_arl_mc(args.lam, L, args.shift, n_runs=args.mc,
                         seed=args.seed) if args.mc else None
    head = {"chart": "ewma", "lam": args.lam, "L": L,
            "limit": arl.ewma_limit(args.lam, L), "method": args.method}
    title = f"EWMA, two-sided, lam = {args.lam:g}, L = {L:.6g}"
    _emit(args, head, title, values, None, mc)
    return 0


def _split(args) -> int:
    from monitor.detectors.split_design import (expected_delay, information, information_bound,
                                                split_thresholds)

    t = split_thresholds(args.arl0)
    rows = []
    for db in args.db:
        info = information(db, args.price_sd, args.noise_sd)
        rows.append({"db": db, "information": info,
                     "bound": information_bound(db, args.price_sd, args.noise_sd, args.arl0),
                     "expected_delay": expected_delay(t.slope, info)})
    head = {"chart": "split", "arl0": t.arl0, "h_slope": t.slope, "h_level": t.level,
            "method": t.method, "price_sd": args.price_sd, "noise_sd": args.noise_sd}
    if args.json:
        print(json.dumps({**head, "delays": rows}, indent=2))
        return 0
    print(f"split GLR, ARL0 = {t.arl0:g} per chart: slope threshold {t.slope:.4g}, level "
          f"threshold {t.level:.4g} ({t.method})")
    print(f"log-price sd {args.price_sd:g}, noise sd {args.noise_sd:g}")
    print(f"{'db':>6}  {'I per obs':>10}  {'bound':>8}  {'expected delay':>14}")
    for r in rows:
        print(f"{r['db']:>6g}  {r['information']:>10.4g}  {r['bound']:>8.1f}  "
              f"{r['expected_delay']:>14.1f}")
    return 0


def _target(args) -> float:
    return DEFAULT_ARL0 if args.arl0 is None else args.arl0


def _number(v: float) -> float | None:
    return float(v) if math.isfinite(v) else None  # JSON has no inf: null with a note


def _fmt(v: float) -> str:
    from monitor.detectors import arl

    if not math.isfinite(v):
        return f"> {arl.ARL_CEILING:.0e}"
    return f"{v:.2f}" if v < 1e6 else f"{v:.4e}"


def _emit(args, head, title, values, approx, mc) -> None:
    from monitor.detectors import arl

    threshold = "h" if head["chart"] == "cusum" else "L"
    solved = getattr(args, threshold) is None
    head = {**head, "arl0_target": _target(args) if solved else None}
    rows = []
    for i, shift in enumerate(args.shift):
        row = {"shift": shift, "arl": _number(values[i])}
        if not math.isfinite(values[i]):
            row["note"] = f"ARL above {arl.ARL_CEILING:.0e} observations (never signals)"
        if approx is not None:
            row["siegmund"] = _number(approx[1][i])
        if mc is not None:
            row.update(mc_arl=float(mc.arl[i]), mc_se=float(mc.se[i]),
                       mc_censored=int(mc.n_censored[i]))
        rows.append(row)
    if args.json:
        print(json.dumps({**head, "mc_runs": args.mc or None, "rows": rows}, indent=2))
        return
    if solved:
        print(f"{threshold} = {head[threshold]:.6g} gives in-control ARL {head['arl0_target']:g}")
    print(title)
    header = ["shift", "ARL"] + (["(Siegmund)"] if approx else []) + (["MC +- se"] if mc else [])
    table = [header]
    for i, row in enumerate(rows):
        line = [f"{row['shift']:g}", _fmt(values[i])]
        if approx is not None:
            line.append(f"({_fmt(approx[1][i])})")
        if mc is not None:
            line.append(f"{_fmt(mc.arl[i])} +- {mc.se[i]:.2g}")
        table.append(line)
    widths = [max(len(r[j]) for r in table) for j in range(len(header))]
    for r in table:
        print("  ".join(cell.rjust(w) for cell, w in zip(r, widths)))
