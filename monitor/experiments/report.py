"""A self-contained HTML report of one experiment (inline SVG, no script, no network).

Sections: the verdict and its reasons; the pooled b with its fixed band and confidence
sequence; the pooled b over time (band and sequence drawn around it, the target half-width as a
reference); the half-width against the target with the time-to-precision forecast; per-series
estimates and their spread; health checks; the plan; the cautions of a price experiment.
Charts come from :mod:`monitor.report.svg`, page furniture from :mod:`monitor.report.html`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from monitor.experiments.status import ExperimentStatus
from monitor.report.html import kv_table, page, table_html
from monitor.report.svg import COLOURS, Chart, esc, thin

#: Cautions of a price experiment, shown on the report and the dashboard page.
EXPERIMENT_CAUTIONS = (
    "Randomize: assign price points at random (by day and series) so that nothing else moves "
    "with the price; a test whose prices follow demand measures the pricing rule, not the "
    "response. Pre-register the target half-width and the stopping rule before the test starts: "
    "the confidence sequence stays valid whenever you stop, the fixed band only at one planned "
    "look. Charging different customers different prices can be regulated as price "
    "discrimination; local rules on pricing come first. The verdict is statistical evidence, not "
    "a decision.")
CS_COLOUR = "#5b2a86"


def path_for_display(path: pd.DataFrame, max_points: int = 1500) -> pd.DataFrame:
    """The pooled path thinned to at most ``max_points`` rows (the newest row always kept), with
    ``fixed_halfwidth`` added and infinite bounds as NaN: what the charts draw."""
    if not len(path):
        return path.assign(fixed_halfwidth=pd.Series(dtype=float))
    p = path.iloc[thin(len(path), max_points)].copy()
    p["fixed_halfwidth"] = (p["b_hi"] - p["b_lo"]) / 2
    num = p.select_dtypes("number").columns
    p[num] = p[num].where(np.isfinite(p[num]), np.nan)
    return p.reset_index(drop=True)


def progress_share(halfwidth: float | None, target: float) -> float:
    """Share of the planned information gathered: ``min(1, (target / halfwidth)^2)`` (the
    half-width falls about as 1 / sqrt(information)); 0 while the band is unbounded."""
    if halfwidth is None or not np.isfinite(halfwidth) or halfwidth <= 0:
        return 0.0
    return float(min(1.0, (target / halfwidth) ** 2))


def _fmt(v, spec: str = "{:.3f}") -> str:
    return "—" if v is None or (isinstance(v, float) and not np.isfinite(v)) else spec.format(v)


def _b_chart(path: pd.DataFrame, target: float) -> str:
    keep = thin(len(path))
    p = path.iloc[keep]
    x = pd.to_datetime(p["ts"], utc=True).dt.as_unit("ns").astype("int64").to_numpy()
    b = p["b"].to_numpy(float)
    lo_cs, hi_cs = p["cs_lo"].to_numpy(float), p["cs_hi"].to_numpy(float)
    lo, hi = p["b_lo"].to_numpy(float), p["b_hi"].to_numpy(float)
    fin = np.isfinite(b)
    if not fin.any():
        return '<p class="note">b is not identified yet (too few observations or no price ' \
               'variation)</p>'
    last = b[fin][-1]
    # the early sequence is very wide: show the range that holds the later half of the path
    late = slice(len(b) // 3, None)
    vals = np.r_[b[late], lo_cs[late], hi_cs[late], lo[late], hi[late]]
    vals = vals[np.isfinite(vals)]
    ylo, yhi = (vals.min(), vals.max()) if vals.size else (last - 1, last + 1)
    pad = 0.15 * (yhi - ylo) + 0.02
    ylo, yhi = ylo - pad, yhi + pad
    c = Chart((x.min(), max(x.max(), x.min() + 1)), (ylo, yhi), x_time=True, height=260,
              title="Pooled elasticity b after every observation", ylabel="b")
    c.band(x, np.clip(lo_cs, ylo, yhi), np.clip(hi_cs, ylo, yhi), CS_COLOUR, 0.18)
    c.band(x, np.clip(lo, ylo, yhi), np.clip(hi, ylo, yhi))
    c.line(x, b, label="pooled b")
    c.legend([("area", CS_COLOUR, "confidence sequence (valid at every look)"),
              ("area", COLOURS["band"], "fixed band (valid at one planned look)"),
              ("line", COLOURS["estimate"], "pooled b")])
    return c.to_svg()


def _halfwidth_chart(path: pd.DataFrame, target: float) -> str:
    keep = thin(len(path))
    p = path.iloc[keep]
    n = p["n"].to_numpy(float)
    hw = p["halfwidth"].to_numpy(float)
    fixed = ((p["b_hi"] - p["b_lo"]) / 2).to_numpy(float)
    fin = np.isfinite(hw)
    if not fin.any():
        return ""
    top = float(min(np.nanmax(hw[fin]), 6 * max(target, np.nanmin(hw[fin]))))
    c = Chart((n.min(), max(n.max(), n.min() + 1)), (0.0, top * 1.05), height=220,
              title="Half-width of the band on b against the target", ylabel="half-width")
    c.line(n, np.clip(hw, 0, top * 1.05), CS_COLOUR, label="confidence sequence")
    c.line(n, np.clip(fixed, 0, top * 1.05), COLOURS["estimate"], 1.2, "5 3", "fixed band")
    c.hline(target, label=f"target {target:g}")
    c.legend([("line", CS_COLOUR, "confidence sequence"),
              ("dash", COLOURS["estimate"], "fixed band"), ("dash", COLOURS["truth"], "target")])
    return c.to_svg()


def report_html(status: ExperimentStatus) -> str:
    """The report as one HTML document."""
    s = status.summary
    plan = status.plan
    reasons = "".join(f"<li>{esc(r)}</li>" for r in s["reasons"])
    level = f"{100 * plan.level:g}%"
    head = kv_table([
        ("verdict", s["verdict"]),
        ("pooled b", _fmt(s["b"])),
        (f"fixed {level} band", f"{_fmt(s['b_lo'])} to {_fmt(s['b_hi'])}"),
        (f"{level} confidence sequence", f"{_fmt(s['cs_lo'])} to {_fmt(s['cs_hi'])}"),
        ("observations", f"{s['n_obs']:,}"),
        ("half-width / target", f"{_fmt(s['halfwidth'])} / {s['target_halfwidth']:g}"),
        ("more observations to the target", _fmt(s["eta_obs"], "{:,.0f}")),
        ("expected date", s["eta_ts"] or "—"),
    ])
    sections = [f"<h2>Verdict: {esc(s['verdict'])}</h2><ul>{reasons}</ul>{head}",
                f'<p class="caution">{esc(EXPERIMENT_CAUTIONS)}</p>']
    if len(status.path):
        sections += ["<h2>Pooled elasticity over time</h2>", _b_chart(status.path, plan.target_halfwidth),
                     "<h2>Time to precision</h2>",
                     _halfwidth_chart(status.path, plan.target_halfwidth)]
    if len(status.series):
        het = status.heterogeneity
        spread = ("—" if het.get("tau") is None else
                  f"tau = {het['tau']:.3f} ({level} interval {het['tau_lo']:.3f} to "
                  f"{het['tau_hi']:.3f}), I² = {100 * het['i2']:.0f}%, {het['k']} series")
        sections += ["<h2>Per-series estimates</h2>",
                     f"<p>Spread of the true elasticities between series: {esc(spread)}"
                     f"{esc(' — ' + het['note']) if het.get('note') else ''}</p>",
                     table_html(status.series)]
    rows = []
    for name, chk in status.health.items():
        if name == "stall":
            rows.append(("stall", "; ".join(chk["stalled_series"]) or "prices moving in every "
                                                                     "series"))
            continue
        text = "ok" if chk.get("ok") else "FAILED: " + chk.get("reason", "")
        if chk.get("note"):
            text += f" ({chk['note']})"
        rows.append((name.replace("_", " "), text))
    sections += ["<h2>Health</h2>", kv_table(rows)]
    if status.notes:
        sections.append("<ul>" + "".join(f"<li>{esc(n)}</li>" for n in status.notes) + "</ul>")
    sections += ["<h2>Plan</h2>", kv_table([(k, v) for k, v in plan.as_dict().items()])]
    return page(f"Price experiment {plan.name}", sections)


def write_report(status: ExperimentStatus, out: str | Path) -> Path:
    """Write :func:`report_html` to ``out`` (UTF-8); returns the path."""
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(report_html(status), encoding="utf-8")
    return out
