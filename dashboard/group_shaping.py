"""Data shaping and charts of the Groups page (no streamlit here; tested on their own).

Inputs are the frames of :func:`monitor.store.groups.pool_latest`: per series ``series, group,
beta, beta_se, beta_lo, beta_hi, beta_pooled, beta_pooled_se, shrink, z, p, differs, status``
and per group ``group, n_series, n_pooled, mean, mean_se, mean_lo, mean_hi, tau2, tau, q,
n_differ``.
"""

from __future__ import annotations

import altair as alt
import numpy as np
import pandas as pd

from dashboard.legend import COLOURS

#: z of the pooled estimate's band on the chart (normal, 95%).
Z95 = 1.959963984540054
#: Most series drawn in the comparison chart (the table lists all).
MAX_DRAWN = 120
#: Colours of the page's elements (own estimate from the shared legend).
GROUP_COLOURS = {"own estimate": COLOURS["estimate"], "pooled estimate": COLOURS["recent"],
                 "group mean": COLOURS["bound"], "differs from group": COLOURS["alert"]}


def group_table(per_group: pd.DataFrame) -> pd.DataFrame:
    """One row per group for the summary table, sorted by group mean."""
    cols = ["group", "n_series", "n_pooled", "mean", "mean_lo", "mean_hi", "tau", "n_differ"]
    out = per_group[cols].sort_values(["mean", "group"], na_position="last", kind="stable")
    return out.reset_index(drop=True)


def members_table(per_series: pd.DataFrame, group: str) -> pd.DataFrame:
    """The series of ``group`` sorted by their own b (no estimate last), with the pooled band.

    Columns ``series, status, beta, beta_lo, beta_hi, beta_pooled, pooled_lo, pooled_hi,
    shrink, p, differs``.
    """
    part = per_series[per_series["group"] == group].copy()
    part["pooled_lo"] = part["beta_pooled"] - Z95 * part["beta_pooled_se"]
    part["pooled_hi"] = part["beta_pooled"] + Z95 * part["beta_pooled_se"]
    part = part.sort_values(["beta", "series"], na_position="last", kind="stable")
    cols = ["series", "status", "beta", "beta_lo", "beta_hi", "beta_pooled", "pooled_lo",
            "pooled_hi", "shrink", "p", "differs"]
    return part[cols].reset_index(drop=True)


def comparison_chart(members: pd.DataFrame, summary: dict | None,
                     height_per_series: int = 14) -> alt.LayerChart:
    """Each series' own b and band beside its pooled b and band, sorted by own b; the group
    mean and its band as a vertical rule and shaded strip; series that differ in red."""
    drawn = members[np.isfinite(members["beta"].to_numpy(dtype=float))].head(MAX_DRAWN)
    order = drawn["series"].tolist()
    own = drawn.assign(kind="own estimate", b=drawn["beta"], lo=drawn["beta_lo"],
                       hi=drawn["beta_hi"])
    pooled = drawn.assign(kind="pooled estimate", b=drawn["beta_pooled"],
                          lo=drawn["pooled_lo"], hi=drawn["pooled_hi"])
    long = pd.concat([own, pooled], ignore_index=True)[["series", "kind", "b", "lo", "hi",
                                                          "differs"]]
    long = long[np.isfinite(long["b"].to_numpy(dtype=float))]
    names = ["own estimate", "pooled estimate"]
    colour = alt.Color("kind:N", title=None, scale=alt.Scale(
        domain=names, range=[GROUP_COLOURS[n] for n in names]))
    y = alt.Y("series:N", sort=order, title=None)
    yoff = alt.YOffset("kind:N", sort=names)
    base = alt.Chart(long)
    bands = base.mark_rule(strokeWidth=2).encode(
        x=alt.X("lo:Q", title="elasticity b (band: 95%)"), x2="hi:Q", y=y, yOffset=yoff,
        color=colour)
    points = base.mark_point(filled=True, size=40).encode(
        x="b:Q", y=y, yOffset=yoff, color=colour,
        shape=alt.Shape("differs:N", title="differs from group",
                        scale=alt.Scale(domain=[False, True], range=["circle", "diamond"])),
        tooltip=["series", "kind", alt.Tooltip("b:Q", format=".3f"),
                 alt.Tooltip("lo:Q", format=".3f"), alt.Tooltip("hi:Q", format=".3f"),
                 "differs"])
    layers = [bands, points]
    if summary and np.isfinite(summary.get("mean", np.nan)):
        g = pd.DataFrame([{"mean": summary["mean"], "lo": summary["mean_lo"],
                           "hi": summary["mean_hi"]}])
        layers.insert(0, alt.Chart(g).mark_rect(opacity=0.15, color=GROUP_COLOURS["group mean"])
                      .encode(x="lo:Q", x2="hi:Q"))
        layers.insert(1, alt.Chart(g).mark_rule(color=GROUP_COLOURS["group mean"],
                                                strokeDash=[5, 3]).encode(x="mean:Q"))
    height = max(160, height_per_series * 2 * max(1, len(order)))
    return alt.layer(*layers).properties(height=height)


def distribution_chart(members: pd.DataFrame, summary: dict | None, bins: int = 20):
    """Histogram of the group's own b with the fitted between-series normal curve
    ``N(mean, tau^2)`` scaled to the counts (the spread pooling assumes)."""
    b = members["beta"].to_numpy(dtype=float)
    b = b[np.isfinite(b)]
    if not len(b):
        return None
    hist = alt.Chart(pd.DataFrame({"b": b})).mark_bar(
        color=GROUP_COLOURS["own estimate"], opacity=0.7).encode(
        x=alt.X("b:Q", bin=alt.Bin(maxbins=bins), title="own elasticity b"),
        y=alt.Y("count():Q", title="series"))
    layers = [hist]
    if summary and np.isfinite(summary.get("tau", np.nan)) and summary["tau"] > 0:
        width = (b.max() - b.min()) / bins if b.max() > b.min() else 1.0
        xs = np.linspace(min(b.min(), summary["mean"] - 3 * summary["tau"]),
                         max(b.max(), summary["mean"] + 3 * summary["tau"]), 200)
        dens = (np.exp(-0.5 * ((xs - summary["mean"]) / summary["tau"]) ** 2)
                / (summary["tau"] * np.sqrt(2 * np.pi)) * len(b) * width)
        layers.append(alt.Chart(pd.DataFrame({"b": xs, "n": dens})).mark_line(
            color=GROUP_COLOURS["group mean"]).encode(x="b:Q", y="n:Q"))
    return alt.layer(*layers).properties(height=220)
