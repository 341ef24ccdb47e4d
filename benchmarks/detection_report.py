"""Tables and target rows of the detection grid (:mod:`benchmarks.detection_grid`).

:func:`section` renders the side-by-side tables (information bound, elmon, the slope chart as
it was before issue 12, river's PageHinkley and ADWIN, all on the same rows in one run);
:func:`target_rows` gives one :class:`~benchmarks.common.Row` per done-when check of issue 12
(worst cell shown, so a single bad cell is a **NO**).

Monte Carlo error: an alert rate from ``m`` alerts has a relative standard error of about
``1 / sqrt(m)``; the in-control cells are sized for about 100 alerts at ARL0 20,000 (10%), so
the +-25% band is about 2.5 standard errors wide. The 95% interval of each rate ratio is shown.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from benchmarks.common import Row
from benchmarks.detection_grid import KINDS, LEVEL_WINDOW, START_WINDOW, Grid


def _r(v: float, nd: int = 2) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "—"
    if isinstance(v, float) and math.isinf(v):
        return "∞"
    return f"{v:.{nd}f}"


def _pct(v: float) -> str:
    return "—" if v is None or math.isnan(v) else f"{100 * v:.0f}%"


def poisson_ci(count: int, expected: float) -> tuple[float, float]:
    """95% interval of ``count / expected`` (exact Poisson, Garwood 1936)."""
    lo = stats.chi2.ppf(0.025, 2 * count) / 2 if count > 0 else 0.0
    hi = stats.chi2.ppf(0.975, 2 * count + 2) / 2
    return lo / expected, hi / expected


def _oracle_cells(r: dict) -> list[str]:
    """The known-time oracle's delay / bound and share within 5x (in brackets: with only the
    rows since elmon's last elasticity_change before the change); '-' for records of runs
    made before the oracle was measured."""
    a, b = r.get("oracle"), r.get("oracle_since")
    if not a or not b:
        return ["-", "-"]
    return [_r(a["ratio"]), f"{_pct(a['within5'])} ({_pct(b['within5'])})"]


def _oracle_note(r: dict, key: str) -> str:
    """'; known-time oracle there: ...' for a target row's check (empty for older records)."""
    a, b = r.get("oracle"), r.get("oracle_since")
    if not a or not b:
        return ""
    if key == "ratio":
        return f"; the known-time oracle there: {_r(a['ratio'])}x"
    return (f" (the known-time oracle there: {_pct(a['within5'])}, with only the rows since "
            f"elmon's last elasticity_change before the change {_pct(b['within5'])})")


def slope_table(g: Grid) -> str:
    head = ("| prices | change | db | ARL0 | bound (obs) | rows before the change | elmon delay / bound | elmon ≤ 5x bound "
            "| label right (ceiling) | \\|τ̂ − τ\\| / delay | known-time oracle delay / bound "
            "| oracle ≤ 5x (with elmon's history) | old slope chart delay / bound | old ≤ 5x "
            "| PageHinkley on z | PH ≤ 5x | ADWIN on z | ADWIN ≤ 5x |")
    lines = [head, "|" + "---|" * 18]
    for r in g.slope:
        e, o = r["elmon"], r["old"]
        md = e["median_delay"]
        cerr = e["change_err"] / md if md and math.isfinite(md) and md > 0 else math.nan
        lines.append("| " + " | ".join([
            r["pattern"], r["form"], f"{r['size']:g}", f"{r['arl0']:,.0f}", f"{r['bound']:.0f}",
            f"{r.get('history', 600):,}", _r(e["ratio"]), _pct(e["within5"]),
            f"{_pct(e['label'])} ({_pct(e.get('label_ceiling', math.nan))})", _r(cerr),
            *_oracle_cells(r), _r(o["ratio"]),
            _pct(o["within5"]), _r(r["ph"]["ratio"]), _pct(r["ph"]["within5"]),
            _r(r["adwin"]["ratio"]), _pct(r["adwin"]["within5"])]) + " |")
    return "\n".join(lines)


def control_table(g: Grid) -> str:
    head = ("| pattern | ARL0 | design | elmon elasticity_change | elmon level_shift | elmon in the "
            f"first {START_WINDOW} obs (ec / ls) | old slope chart | PageHinkley on z | ADWIN on z |")
    lines = [head, "|" + "---|" * 9]
    for r in g.control:
        e = r["elmon"]
        lines.append("| " + " | ".join([
            r["cell"], f"{r['arl0']:,.0f}", _r(r["design"]),
            f"{_r(e[KINDS[0]])} ({e['n'][KINDS[0]]})", f"{_r(e[KINDS[1]])} ({e['n'][KINDS[1]]})",
            f"{_r(e['start'][KINDS[0]])} / {_r(e['start'][KINDS[1]])}",
            _r(r["old"][KINDS[0]]), _r(r["ph"]), _r(r["adwin"])]) + " |")
    return "\n".join(lines)


def level_table(g: Grid) -> str:
    head = (f"| pattern | level shift | ARL0 | design | elmon elasticity_change in {LEVEL_WINDOW} "
            "obs after (count) | old slope chart | elmon level_shift ≤ 5x level bound | "
            "level bound (obs) |")
    lines = [head, "|" + "---|" * 8]
    for r in g.level:
        lines.append("| " + " | ".join([
            r["pattern"], f"{r['shift']:+.0%}", f"{r['arl0']:,.0f}", _r(r["design"]),
            f"{_r(r['elmon']['ec_rate'])} ({r['elmon']['ec_n']})", _r(r["old"]["ec_rate"]),
            _pct(r["elmon"]["ls_within5"]), f"{r['level_bound']:.0f}"]) + " |")
    return "\n".join(lines)


def second_table(g: Grid) -> str:
    lines = ["| ARL0 | bound (obs) | elmon: first alert open | elmon: fresh series | "
             "known-time oracle: first change open (with elmon's history) | oracle: fresh series | "
             "old chart: first alert open | old chart: fresh series |", "|" + "---|" * 8]
    for r in g.second:
        a, b = r["open"], r["fresh"]
        orc = ([f"{_r(a['oracle'], 0)} ({_r(a['oracle_since'], 0)})", _r(b["oracle"], 0)]
               if "oracle" in a and "oracle" in b else ["-", "-"])
        lines.append("| " + " | ".join([
            f"{r['arl0']:,.0f}", f"{b['bound']:.0f}",
            f"{_r(a['elmon'], 0)} ({_pct(a['elmon_within5'])} ≤ 5x)",
            f"{_r(b['elmon'], 0)} ({_pct(b['elmon_within5'])})", *orc,
            f"{_r(a['old'], 0)} ({_pct(a['old_within5'])})",
            f"{_r(b['old'], 0)} ({_pct(b['old_within5'])})"]) + " |")
    return "\n".join(lines)


def section(g: Grid, title: str = "Detection against the information bound (issue 12)") -> str:
    """The markdown section: what was run, then the four tables."""
    n = {k: len(getattr(g, k)) for k in ("slope", "control", "level", "second")}
    return "\n".join([
        f"## {title}", "",
        f"One run ({g.seconds / 60:.1f} min): {n['slope']} slope-change cells, {n['control']} "
        f"in-control cells, {n['level']} level-shift cells and {n['second']} second-change pairs "
        "(simulators/change_grid.py; typical price 10, noise sd 0.15 on the log scale, b = -1 "
        "before). Every method sees the same rows: elmon's default pipeline (`[detectors] arl0` "
        "only), the slope chart as it was before issue 12 (benchmarks/detection_old_slope.py, "
        "a copy checked row for row against the pipeline of commit 4b04b35), and river's "
        "PageHinkley (threshold designed for the ARL0, delta 0.5) and ADWIN (defaults) on the "
        "standardized innovations z of the same estimator, on the first series of each cell. "
        "Bound = ln(ARL0) / I (Lorden 1971), I = db² Var(x̃) / (2σ²) per observation from the "
        "simulated design (x̃: log price after the intercept and controls; pre-whitened for "
        "AR errors). Delays are medians over series, an undetected series counting as "
        "infinitely late (∞: fewer than half found within the horizon of 6 bounds, at least 1,000 "
        "observations); *label right*: the first change alert after the change is "
        "`elasticity_change` (the target is for pivots, pure slope changes; with the intercept "
        "held the level moves as well); in brackets the ceiling a perfect labeller could reach: "
        "the chance that no in-control level_shift (1 / ARL0 per observation) opens between the "
        "change and the elasticity_change alert; change-time "
        "error over the median delay (target ≤ 0.5; the old chart's 'started' time is the start "
        "of its excursion); *known-time oracle*: a reference that knows the change time and the "
        "noise sd, fits b before and after it (each with its own intercept) and alarms when "
        "(b_A − b_B)² / (2 (v_A + v_B)) passes elmon's slope threshold; it tests one change time "
        "and needs no label, so it shows what the rows allow (in brackets: the same oracle "
        "with only the rows since elmon's last `elasticity_change` before the change, where elmon "
        "starts again after an in-control alarm; benchmarks.detection_grid.oracle_delays).", "",
        "### Changes of the elasticity", "", slope_table(g), "",
        "### In control: alerts opened per 10,000 observations from the first usable estimate (count)", "",
        control_table(g), "",
        "### Pure level shifts: `elasticity_change` per 10,000 observations after the shift", "",
        level_table(g), "",
        "### A second change (b back by 0.8, 150 observations after the first): median delay"
        + (f" ({g.second[0]['fresh']['n']:,} series per cell)"
           if g.second and "n" in g.second[0]["fresh"] else ""), "",
        second_table(g), ""])


def target_rows(g: Grid, prefix: str = "detection") -> list[Row]:
    """One row per done-when check of issue 12, worst cell first."""
    rows = []

    def worst(recs, key, fn):
        vals = [(fn(r), r) for r in recs]
        vals = [(v, r) for v, r in vals if v is not None and not math.isnan(v)]
        return max(vals, key=lambda t: t[0]) if key == "max" else min(vals, key=lambda t: t[0])

    for label, pats, target in (("independent prices", ("indep",), 2.0),
                                ("step prices", ("steps",), 3.0)):
        recs = [r for r in g.slope if r["pattern"].startswith(pats)]
        if not recs:
            continue
        v, r = worst(recs, "max", lambda r: r["elmon"]["ratio"])
        ov = max(q["old"]["ratio"] for q in recs)
        rows.append(Row(f"{prefix}: median delay / information bound, {label} (worst of "
                        f"{len(recs)} cells)", v, "x", [v], target=f"<= {target:g}x",
                        met=v <= target, better="lower",
                        check=f"worst cell: {r['cell']} at ARL0 {r['arl0']:,.0f} (bound "
                              f"{r['bound']:.0f} obs{_oracle_note(r, 'ratio')}); the old slope "
                              f"chart's worst: {_r(ov)}x"))
    v, r = worst(g.slope, "min", lambda r: r["elmon"]["within5"])
    rows.append(Row(f"{prefix}: share of changes of b detected within 5x the bound (worst cell)",
                    100 * v, "%", [100 * v], target=">= 95%", met=v >= 0.95,
                    check=f"worst cell: {r['cell']} at ARL0 {r['arl0']:,.0f}"
                          f"{_oracle_note(r, 'within5')}"))
    # pure slope changes = pivots (no level change at the typical price); a change with the
    # intercept held moves the level too, so a level_shift first is not a wrong label there
    pivots = [r for r in g.slope if r.get("form") == "pivot"]
    lab = [r["elmon"]["label"] for r in pivots if not math.isnan(r["elmon"]["label"])]
    got = worst(pivots, "min", lambda r: r["elmon"]["label"]) if pivots else None
    if got:
        v, r = got
        rows.append(Row(f"{prefix}: detected pure slope changes (pivots) whose first alert is "
                        "elasticity_change (worst cell)", 100 * v, "%", [100 * v],
                        target=">= 95%", met=v >= 0.95,
                        check=f"worst cell: {r['cell']} at ARL0 {r['arl0']:,.0f} (ceiling "
                              f"{_pct(r['elmon'].get('label_ceiling', math.nan))}: in-control "
                              f"level alarms before the elasticity_change at the design rate); "
                              f"mean over pivot cells {100 * float(np.mean(lab)):.0f}%"))

    def cerr(r):
        e = r["elmon"]
        return e["change_err"] / e["median_delay"] if math.isfinite(e["median_delay"]) else math.nan

    got = worst(g.slope, "max", cerr)
    if got:
        v, r = got
        rows.append(Row(f"{prefix}: median |estimated - true change time| / median delay "
                        "(worst cell)", v, "x", [v], target="<= 0.5x", met=v <= 0.5,
                        better="lower", check=f"worst cell: {r['cell']} at ARL0 {r['arl0']:,.0f}"))
    # in control: every kind, every pattern, both ARL0
    ratios = []
    for r in g.control:
        for k in KINDS:
            m = r["elmon"]["n"][k]
            exp = r["elmon"]["obs"] / r["arl0"]
            lo, hi = poisson_ci(m, exp)
            ratios.append((m / exp, lo, hi, r, k))
    far = max(ratios, key=lambda t: abs(math.log(max(t[0], 1e-9))))
    ok = all(0.75 <= t[0] <= 1.25 for t in ratios)
    rows.append(Row(f"{prefix}: in-control alerts / design rate 10,000/ARL0 (farthest of "
                    f"{len(ratios)} pattern x kind x ARL0 cells)", far[0], "x", [far[0]],
                    target="0.75-1.25x", met=ok, check=f"{far[3]['cell']}, {far[4]}, ARL0 "
                    f"{far[3]['arl0']:,.0f}: 95% interval {far[1]:.2f}-{far[2]:.2f}x; cells "
                    f"outside the band: {sum(not 0.75 <= t[0] <= 1.25 for t in ratios)}"))
    starts = []
    for r in g.control:
        for k in KINDS:
            exp = r["elmon"]["start_obs"] / r["arl0"]
            m = r["elmon"]["start_n"][k]
            # a burst: more alerts than a Poisson count at 1.25x the design would give (99.9%)
            starts.append((m / exp, m, exp, m > stats.poisson.ppf(0.999, 1.25 * exp), r, k))
    v, m, exp, _, r, k = max(starts, key=lambda t: t[0])
    bad = sum(t[3] for t in starts)
    rows.append(Row(f"{prefix}: alerts in the first {START_WINDOW} observations from the first "
                    "usable estimate / design rate (worst cell)", v, "x", [v],
                    target="no burst: count <= Poisson 99.9% of 1.25x design", met=bad == 0,
                    better="lower",
                    check=f"{r['cell']}, {k}, ARL0 {r['arl0']:,.0f}: {m} alerts, {exp:.1f} "
                          f"expected; cells above the Poisson limit: {bad} of {len(starts)}"))
    if g.level:
        v, r = worst(g.level, "max", lambda r: r["elmon"]["ec_rate"] / r["design"])
        rows.append(Row(f"{prefix}: elasticity_change after a pure level shift / design rate "
                        "(worst cell)", v, "x", [v], target="<= 1.25x", met=v <= 1.25,
                        better="lower", check=f"{r['cell']}, ARL0 {r['arl0']:,.0f}: "
                        f"{r['elmon']['ec_n']} alerts in {r['obs']:,} observations"))
    for r in g.second:
        a, b = r["open"]["elmon"], r["fresh"]["elmon"]
        v = a / b if b and math.isfinite(b) else math.inf
        rows.append(Row(f"{prefix}: second change with the first alert open / fresh series, "
                        f"median delay, ARL0 {r['arl0']:,.0f}", v, "x", [v], target="<= 1.25x",
                        met=v <= 1.25, better="lower",
                        check=f"{_r(a, 0)} vs {_r(b, 0)} observations (old chart: "
                              f"{_r(r['open']['old'], 0)} vs {_r(r['fresh']['old'], 0)}"
                              + (f"; known-time oracle with elmon's history "
                                 f"{_r(r['open']['oracle_since'], 0)} vs "
                                 f"{_r(r['fresh']['oracle'], 0)} fresh"
                                 if "oracle_since" in r["open"] and "oracle" in r["fresh"]
                                 else "") + ")"))
    return rows
