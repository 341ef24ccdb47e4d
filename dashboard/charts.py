"""Altair chart builders for the dashboard (no streamlit here; pages pass the charts to
``st.altair_chart``). Colours and marker shapes come from :mod:`dashboard.legend`; every chart
carries its own legend naming each colour and shape.
"""

from __future__ import annotations

import math

import altair as alt
import pandas as pd

from dashboard.legend import ALERT_SHAPES, COLOURS

#: Legend entries of the elasticity chart, in order, with their colours.
ELASTICITY_ELEMENTS = {
    "elasticity": COLOURS["estimate"],
    "confidence band": COLOURS["band"],
    "bounds (low / high)": COLOURS["bound"],
    "alert": COLOURS["alert"],
    "known change point": COLOURS["truth"],
}


#: Text colour of axis and legend labels (WCAG contrast on white about 12.6:1).
INK = "#31333f"


def _finish(chart):
    """Dark axis and legend text, so labels keep an accessible contrast under any theme."""
    return (chart.configure_axis(labelColor=INK, titleColor=INK, labelFontSize=12)
            .configure_legend(labelColor=INK, titleColor=INK)
            .configure_title(color=INK))


def _element_scale(names) -> alt.Scale:
    return alt.Scale(domain=list(names), range=[ELASTICITY_ELEMENTS[n] for n in names])


def _shape_scale(extra=()) -> alt.Scale:
    words = [w for _, w in ALERT_SHAPES.values()] + [e for e in extra]
    shapes = [s for s, _ in ALERT_SHAPES.values()] + ["circle"] * len(extra)
    return alt.Scale(domain=words, range=shapes)


def _kind_words(kinds) -> list[str]:
    return [ALERT_SHAPES.get(k, (None, str(k).replace("_", " ")))[1] for k in kinds]


def elasticity_chart(band: pd.DataFrame, low: float | None = None, high: float | None = None,
                     alerts: pd.DataFrame | None = None, truth: pd.DataFrame | None = None,
                     height: int = 340, title: str | None = None,
                     y_domain: tuple[float, float] | None = None) -> alt.LayerChart:
    """Elasticity line with its confidence band, the bounds as horizontal rules, alert markers
    (shape = alert kind) and known change points as dotted vertical rules.

    ``band`` needs ``ts, beta, beta_lo, beta_hi, status, drawable`` (see
    :func:`dashboard.shaping.band_frame`); ``alerts`` needs ``ts, beta, kind``; ``truth`` needs
    ``ts, kind``. ``y_domain`` fixes the vertical range (marks beyond it are clipped at the
    edge; see :func:`dashboard.shaping.beta_domain`).
    """
    yscale = (alt.Scale(domain=list(y_domain), zero=False) if y_domain is not None
              else alt.Scale(zero=False))
    clip = y_domain is not None
    names = list(ELASTICITY_ELEMENTS)
    colour = alt.Color("element:N", scale=_element_scale(names),
                       legend=alt.Legend(title=None, orient="top", symbolOpacity=1.0,
                                         symbolStrokeWidth=3, labelFontSize=12))
    data = band.loc[band["drawable"]].assign(element="elasticity")
    x = alt.X("ts:T", title="time (UTC)")
    tip = [alt.Tooltip("ts:T", title="time", format="%Y-%m-%d %H:%M"),
           alt.Tooltip("beta:Q", title="elasticity", format=".3f"),
           alt.Tooltip("beta_lo:Q", title="low end", format=".3f"),
           alt.Tooltip("beta_hi:Q", title="high end", format=".3f"),
           alt.Tooltip("status:N")]
    area = alt.Chart(data.assign(element="confidence band")).mark_area(
        opacity=0.45, clip=clip).encode(
        x=x, y=alt.Y("beta_lo:Q", title="elasticity b (d log q / d log p)", scale=yscale),
        y2="beta_hi:Q", color=colour)
    line = alt.Chart(data).mark_line(strokeWidth=2, clip=clip).encode(
        x=x, y="beta:Q", color=colour, tooltip=tip)
    layers = [area, line]
    rules = [{"y": v, "element": "bounds (low / high)", "which": w}
             for v, w in ((low, "low bound"), (high, "high bound"))
             if v is not None and math.isfinite(float(v))]
    if rules:
        layers.append(alt.Chart(pd.DataFrame(rules)).mark_rule(strokeDash=[6, 4], strokeWidth=2)
                      .encode(y="y:Q", color=colour,
                              tooltip=[alt.Tooltip("which:N", title="bound"),
                                       alt.Tooltip("y:Q", title="value", format=".3f")]))
    if truth is not None and len(truth):
        layers.append(alt.Chart(truth.assign(element="known change point"))
                      .mark_rule(strokeDash=[2, 3], strokeWidth=2)
                      .encode(x="ts:T", color=colour,
                              tooltip=[alt.Tooltip("ts:T", title="known change",
                                                   format="%Y-%m-%d %H:%M"),
                                       alt.Tooltip("kind:N")]))
    if alerts is not None and len(alerts):
        words = _kind_words(alerts["kind"])
        extra = sorted(set(words) - {w for _, w in ALERT_SHAPES.values()})
        layers.append(alt.Chart(alerts.assign(element="alert", alert_kind=words))
                      .mark_point(filled=True, size=130, opacity=1.0, stroke="#ffffff",
                                  strokeWidth=1)
                      .encode(x="ts:T", y="beta:Q", color=colour,
                              shape=alt.Shape("alert_kind:N", scale=_shape_scale(extra),
                                              legend=alt.Legend(
                                                  title="alert marker", orient="right",
                                                  symbolFillColor=COLOURS["alert"],
                                                  symbolStrokeColor=COLOURS["alert"],
                                                  symbolSize=110, labelFontSize=12)),
                              tooltip=[alt.Tooltip("ts:T", title="alert",
                                                   format="%Y-%m-%d %H:%M"),
                                       alt.Tooltip("alert_kind:N", title="kind"),
                                       alt.Tooltip("state:N"),
                                       alt.Tooltip("beta:Q", title="elasticity", format=".3f")]))
    chart = alt.layer(*layers).properties(height=height)
    if title:
        chart = chart.properties(title=title)
    return _finish(chart.resolve_scale(color="shared"))


def loglog_chart(windows: pd.DataFrame, lines: pd.DataFrame, height: int = 320) -> alt.LayerChart:
    """Scatter of log quantity against log price for the earlier and the recent window, each
    with its least-squares line (its slope is that window's elasticity)."""
    scale = alt.Scale(domain=["earlier", "recent"],
                      range=[COLOURS["earlier"], COLOURS["recent"]])
    colour = alt.Color("window:N", scale=scale,
                       legend=alt.Legend(title="window", orient="top", symbolOpacity=1.0))
    shape = alt.Shape("window:N", scale=alt.Scale(domain=["earlier", "recent"],
                                                  range=["circle", "triangle-up"]), legend=None)
    pts = alt.Chart(windows).mark_point(filled=True, size=36, opacity=0.7).encode(
        x=alt.X("log_price:Q", title="log price", scale=alt.Scale(zero=False)),
        y=alt.Y("log_quantity:Q", title="log quantity", scale=alt.Scale(zero=False)),
        color=colour, shape=shape,
        tooltip=[alt.Tooltip("ts:T", format="%Y-%m-%d %H:%M"), "window:N",
                 alt.Tooltip("price:Q", format=".4g"), alt.Tooltip("quantity:Q", format=".4g")])
    layers = [pts]
    if len(lines):
        layers.append(alt.Chart(lines).mark_line(strokeWidth=3).encode(
            x="log_price:Q", y="log_quantity:Q", color=colour, detail="window:N"))
    return _finish(alt.layer(*layers).properties(height=height,
                                                 title="Log-log: recent vs earlier window"))


def residual_chart(resid: pd.DataFrame, height: int = 220) -> alt.LayerChart:
    """One-step-ahead residuals (log scale) over time with a ±2 residual-SD band and zero line."""
    x = alt.X("ts:T", title="time (UTC)")
    band = alt.Chart(resid).mark_area(opacity=0.25, color=COLOURS["band"]).encode(
        x=x, y=alt.Y("lower:Q", title="residual (log q)"), y2="upper:Q")
    pts = alt.Chart(resid).mark_circle(size=14, color=COLOURS["residual"], opacity=0.8).encode(
        x=x, y="residual:Q",
        tooltip=[alt.Tooltip("ts:T", format="%Y-%m-%d %H:%M"),
                 alt.Tooltip("residual:Q", format=".3f"),
                 alt.Tooltip("z:Q", title="standardized", format=".2f")])
    zero = alt.Chart(pd.DataFrame({"y": [0.0]})).mark_rule(color=COLOURS["truth"]).encode(y="y:Q")
    return _finish(alt.layer(band, pts, zero).properties(
        height=height, title="One-step-ahead residuals (band: ±2 residual SD)"))
