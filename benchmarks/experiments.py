"""Experiments (issue 18): is the confidence sequence valid under looks after every observation,
how wide is it, and how good is the time-to-precision forecast?

``python -m benchmarks.experiments [--quick] [--experiments N]`` prints the figures;
``run(ctx)`` returns them as rows for ``benchmarks.run`` (group ``experiments``).

Design (``simulators.experiment.ladder_arrays``): 4 series, observations round-robin, each
price a random rung of the 5-point ladder 0.85..1.15 times a series base price, b = -1.6 and
never changing, noise sd 0.15 on log quantity. The pooled fit with series intercepts runs at
forgetting 1 and is looked at after every observation up to 2,000:

- *CS excludes b at some look*: share of experiments where the 95% confidence sequence
  (Lindon, Ham, Tingley & Bojinov 2022; mixture precision phi = 1) leaves out the true b at any
  of the 2,000 looks. Target <= 5%.
- *fixed band excludes b at some look*: the same for the fixed 95% t band (Armitage, McPherson
  & Rowe 1969: repeated looks inflate its error rate).
- *a series' own CS excludes its b at some look*: the same for each series' own fit (its rows
  only, own intercept), 500 looks per series. Target <= 5%.
- *CS / fixed width at n = 2,000*: target <= 2.
- *forecast within +-25%*: target half-width 0.12; the forecast made at a quarter of the
  observations the CS needed (the realized number) is within 25% of it. Target >= 80%.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from benchmarks.common import Context, Row
from monitor.experiments.pooled import design_matrix, pooled_path
from monitor.experiments.precision import observations_to_target
from monitor.experiments.sequence import cs_radius, fixed_radius
from simulators.experiment import ladder_arrays

B_TRUE = -1.6
ALPHA = 0.05
PHI = 1.0


def coverage(n_experiments: int, n_obs: int = 2000, seed: int = 18) -> dict:
    """Crossing rates of the CS and the fixed band over looks after every observation."""
    rng = np.random.default_rng(seed)
    cs_out = fixed_out = series_out = series_n = 0
    ratios = []
    for chunk in range(0, n_experiments, 100):
        m = min(100, n_experiments - chunk)
        codes, lp, lq = ladder_arrays(rng, m, n_obs, b=B_TRUE)
        for e in range(m):
            p = pooled_path(codes, design_matrix(lp[e], None, lq[e]))
            err = np.abs(p.b - B_TRUE)
            r_cs = cs_radius(p.info, p.df, ALPHA, PHI)
            r_fx = fixed_radius(p.df, 1 - ALPHA)
            with np.errstate(invalid="ignore"):
                cs_out += bool(np.any(err > r_cs * p.se))
                fixed_out += bool(np.any(err > r_fx * p.se))
            ratios.append(r_cs[-1] / r_fx[-1])
            # each series' own confidence sequence (own intercept), at every look of that series
            s_codes = codes[codes == 0]
            for s in range(codes.max() + 1):
                rows = codes == s
                ps = pooled_path(s_codes, design_matrix(lp[e, rows], None, lq[e, rows]))
                with np.errstate(invalid="ignore"):
                    series_out += bool(np.any(np.abs(ps.b - B_TRUE) >
                                              cs_radius(ps.info, ps.df, ALPHA, PHI) * ps.se))
                series_n += 1
    return {"cs_rate": cs_out / n_experiments, "fixed_rate": fixed_out / n_experiments,
            "series_rate": series_out / series_n, "series_n": series_n,
            "width_ratio_median": float(np.median(ratios)), "width_ratio_max": float(max(ratios)),
            "n": n_experiments}


def forecast(n_experiments: int, target: float = 0.12, n_obs: int = 4000, seed: int = 19) -> dict:
    """Share of forecasts made a quarter of the way in that land within +-25% of the realized
    number of observations to the target half-width."""
    rng = np.random.default_rng(seed)
    codes, lp, lq = ladder_arrays(rng, n_experiments, n_obs, b=B_TRUE)
    rel = []
    for e in range(n_experiments):
        p = pooled_path(codes, design_matrix(lp[e], None, lq[e]))
        hw = cs_radius(p.info, p.df, ALPHA, PHI) * p.se
        hit = np.flatnonzero(hw <= target)
        if hit.size == 0:
            rel.append(np.inf)
            continue
        realized = int(hit[0]) + 1
        q = realized // 4 - 1
        m = observations_to_target(p.n[q], p.sigma[q], p.info[q] / p.n[q], p.n_series[q] + 1,
                                   target, ALPHA, PHI)
        rel.append(float(m) / realized - 1)
    rel = np.asarray(rel)
    return {"within_25": float(np.mean(np.abs(rel) <= 0.25)),
            "p5_p50_p95": np.percentile(rel[np.isfinite(rel)], [5, 50, 95]).tolist(),
            "n": n_experiments}


def run(ctx: Context) -> list[Row]:
    n = ctx.size(1000, 100)
    t0 = time.perf_counter()
    cov = coverage(n)
    t_cov = time.perf_counter() - t0
    fc = forecast(ctx.size(500, 60))
    note = f"{cov['n']} experiments x 2,000 looks in {t_cov:.0f} s"
    return [
        Row("experiments: CS excludes true b at some look", 100 * cov["cs_rate"], "%",
            [100 * cov["cs_rate"]], "<= 5%", cov["cs_rate"] <= 0.05, better="lower",
            check=note),
        Row("experiments: fixed 95% band excludes true b at some look", 100 * cov["fixed_rate"],
            "%", [100 * cov["fixed_rate"]], reference=True, better="lower",
            ratio=f"CS {100 * cov['cs_rate']:.1f}% vs fixed {100 * cov['fixed_rate']:.1f}%"),
        Row("experiments: a series' own CS excludes its b at some look",
            100 * cov["series_rate"], "%", [100 * cov["series_rate"]], "<= 5%",
            cov["series_rate"] <= 0.05, better="lower",
            check=f"{cov['series_n']} series, 500 looks each"),
        Row("experiments: CS / fixed band width at n = 2,000 (median)",
            cov["width_ratio_median"], "x", [cov["width_ratio_median"]], "<= 2",
            cov["width_ratio_max"] <= 2.0, better="lower",
            check=f"max over experiments {cov['width_ratio_max']:.3f}"),
        Row("experiments: time-to-precision forecast at 1/4 within +-25%",
            100 * fc["within_25"], "%", [100 * fc["within_25"]], ">= 80%",
            fc["within_25"] >= 0.8,
            check="relative error p5/p50/p95 " + "/".join(f"{v:+.3f}" for v in fc["p5_p50_p95"])
                  + f" over {fc['n']} experiments"),
    ]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m benchmarks.experiments", description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="100 experiments instead of 1,000")
    args = ap.parse_args(argv)
    for r in run(Context(quick=args.quick)):
        met = "" if r.met is None else ("  met" if r.met else "  NOT MET")
        print(f"{r.figure}: {r.value:.3f} {r.unit}{met}  {r.target}  {r.ratio} {r.check}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
