"""Hand-built inline SVG charts for the self-contained HTML reports (no script, no network).

A :class:`Chart` maps data to a plot area with linear x and y scales, draws bands, lines,
markers and reference lines, and labels "nice" ticks (1-2-5 steps for numbers; calendar steps
for time axes, whose values are int64 ns UTC). Every marker carries a ``<title>`` so hovering
shows its value in any browser. Colours are those of the dashboard (``dashboard/legend.py``,
checked there for WCAG contrast on white); meaning never rests on colour alone: each alert kind
also has its own marker shape.

>>> c = Chart(x_range=(0.0, 10.0), y_range=(-3.0, 0.0), title="b")
>>> c.line([0, 5, 10], [-1.0, -2.0, float("nan")])
>>> svg = c.to_svg()
>>> svg.startswith("<svg") and svg.count("<path") == 1
True
"""

from __future__ import annotations

import html
import math

import numpy as np
import pandas as pd


COLOURS = {"estimate": "#0b5563", "band": "#7fc4cf", "alert": "#a3231b", "truth": "#333333",
           "front": "#9a4a00", "other": "#1d4f91", "grid": "#e3e3e3", "axis": "#555555"}
#: alert rule -> (marker shape, colour)
RULE_MARKERS = {"elasticity_change": ("diamond", "#a3231b"), "level_shift": ("square", "#1d4f91"),
                "out_of_bounds": ("triangle", "#5b2a86"), "sign_flip": ("cross", "#9a4a00"),
                "low_variation": ("circle", "#3b3b58")}
_CLIP_IDS = 0   # unique clip-path ids within one process (one report page)
_TIME_STEPS_S = [60, 300, 900, 3600, 6 * 3600, 86400, 7 * 86400, 30 * 86400, 91 * 86400, 365 * 86400]


def esc(text) -> str:
    """HTML-escape any value for text or attributes."""
    return html.escape(str(text), quote=True)


def nice_ticks(lo: float, hi: float, n: int = 5) -> list[float]:
    """About ``n`` round tick values covering [lo, hi] (steps 1, 2, 5 x 10^k; common practice).

    >>> nice_ticks(-2.3, -0.4)
    [-2.0, -1.5, -1.0, -0.5]
    """
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return [lo] if math.isfinite(lo) else []
    raw = (hi - lo) / max(n, 1)
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw)
    first = math.ceil(lo / step) * step
    out = []
    v = first
    while v <= hi + 1e-9 * step:
        out.append(round(v, 10))
        v += step
    return out


def time_ticks(lo_ns: float, hi_ns: float, n: int = 6) -> tuple[list[float], str]:
    """Tick positions (ns) on calendar steps and the strftime format to label them.

    Every tick sits exactly at the time its label names: steps of a month or more are calendar
    months (1, 3 or 12) starting on the 1st at 00:00 UTC, labelled ``%Y-%m``; day steps start
    at 00:00 UTC, labelled ``%Y-%m-%d``; steps under a day are labelled with the time (and the
    date when the span is longer than a day). Before issue 16, month labels sat at multiples of
    30 days since 1970 (2023-01-26 labelled 2023-01), so events read four weeks early.
    """
    span_s = (hi_ns - lo_ns) / 1e9
    step = next((s for s in _TIME_STEPS_S if span_s / s <= n), _TIME_STEPS_S[-1])
    if hi_ns <= lo_ns:
        return [lo_ns], "%Y-%m-%d %H:%M"
    if step >= 30 * 86400:
        months = {30 * 86400: 1, 91 * 86400: 3}.get(step, 12)
        lo, hi = pd.Timestamp(int(lo_ns), tz="UTC"), pd.Timestamp(int(hi_ns), tz="UTC")
        start = pd.Timestamp(year=lo.year, month=1, day=1, tz="UTC")
        while start + pd.DateOffset(months=months) <= lo:
            start += pd.DateOffset(months=months)
        ticks = []
        t = start
        while t <= hi:
            if t >= lo:
                ticks.append(float(t.value))
            t += pd.DateOffset(months=months)
        return ticks, ("%Y" if months == 12 else "%Y-%m")
    step_ns = step * 1e9
    first = math.ceil(lo_ns / step_ns) * step_ns
    ticks = list(np.arange(first, hi_ns + 1, step_ns))
    if step >= 86400:
        fmt = "%Y-%m-%d"
    else:
        fmt = "%H:%M" if span_s <= 86400 else "%m-%d %H:%M"
    return ticks, fmt


def _fmt_num(v: float) -> str:
    return f"{v:g}"


class Chart:
    """One SVG plot: call drawing methods in back-to-front order, then :meth:`to_svg`.

    Parameters
    ----------
    x_range, y_range : (float, float)
        Data limits; a zero-width range is widened by 1 (or by 1 day for time axes).
    x_time : bool
        x values are int64 ns UTC (tick labels are dates).
    width, height : int
        Size in CSS pixels; the plot area leaves margins for the axes.
    """

    def __init__(self, x_range, y_range, *, x_time=False, width=860, height=240, title="",
                 xlabel="", ylabel="", y_categories: list[str] | None = None):
        self.width, self.height = width, height
        self.m = (40, 16, 36, 64 if not y_categories else 190)  # top, right, bottom, left
        x0, x1 = (float(v) for v in x_range)
        y0, y1 = (float(v) for v in y_range)
        if not x1 > x0:
            pad = 86400e9 if x_time else 1.0
            x0, x1 = x0 - pad, x1 + pad
        if not y1 > y0:
            y0, y1 = y0 - 1.0, y1 + 1.0
        self.x0, self.x1, self.y0, self.y1 = x0, x1, y0, y1
        self.x_time, self.title, self.xlabel, self.ylabel = x_time, title, xlabel, ylabel
        self.cats = y_categories
        self.parts: list[str] = []    # marks, clipped to the plot area
        self.keys: list[str] = []     # legend, above the plot area

    # scales -------------------------------------------------------------------------------
    def sx(self, x) -> np.ndarray:
        left, right = self.m[3], self.width - self.m[1]
        return left + (np.asarray(x, dtype=float) - self.x0) / (self.x1 - self.x0) * (right - left)

    def sy(self, y) -> np.ndarray:
        top, bottom = self.m[0], self.height - self.m[2]
        return bottom - (np.asarray(y, dtype=float) - self.y0) / (self.y1 - self.y0) * (bottom - top)

    # marks --------------------------------------------------------------------------------
    def band(self, x, lo, hi, colour=COLOURS["band"], opacity=0.45) -> None:
        """Filled area between ``lo`` and ``hi``; gaps where either is NaN."""
        x, lo, hi = (np.asarray(v, dtype=float) for v in (x, lo, hi))
        for a, b in _runs(np.isfinite(lo) & np.isfinite(hi) & np.isfinite(x)):
            px, pl, ph = self.sx(x[a:b]), self.sy(lo[a:b]), self.sy(hi[a:b])
            pts = " ".join(f"{u:.1f},{v:.1f}" for u, v in zip(np.r_[px, px[::-1]], np.r_[ph, pl[::-1]]))
            self.parts.append(f'<polygon points="{pts}" fill="{colour}" fill-opacity="{opacity}" stroke="none"/>')

    def line(self, x, y, colour=COLOURS["estimate"], width=1.6, dash: str | None = None,
             label: str | None = None) -> None:
        """Polyline through finite points; NaN breaks the line."""
        x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
        d = []
        for a, b in _runs(np.isfinite(x) & np.isfinite(y)):
            px, py = self.sx(x[a:b]), self.sy(y[a:b])
            d.append("M" + " L".join(f"{u:.1f},{v:.1f}" for u, v in zip(px, py)))
        if not d:
            return
        dash_attr = f' stroke-dasharray="{dash}"' if dash else ""
        title = f"<title>{esc(label)}</title>" if label else ""
        self.parts.append(f'<path d="{" ".join(d)}" fill="none" stroke="{colour}" '
                          f'stroke-width="{width}"{dash_attr}>{title}</path>')

    def markers(self, x, y, shape="circle", colour=COLOURS["alert"], size=5.0, titles=None,
                filled=True) -> None:
        """Markers of one shape (circle, square, diamond, triangle, cross) with hover titles."""
        px, py = self.sx(x), self.sy(y)
        titles = list(titles) if titles is not None else [None] * len(px)
        fill = colour if filled else "white"
        for u, v, t in zip(px, py, titles):
            if not (math.isfinite(u) and math.isfinite(v)):
                continue
            tt = f"<title>{esc(t)}</title>" if t else ""
            self.parts.append(_shape(shape, u, v, size, fill, colour, tt))

    def vline(self, x, colour=COLOURS["truth"], dash="4 3", label: str | None = None) -> None:
        u = float(self.sx([x])[0])
        top, bottom = self.m[0], self.height - self.m[2]
        title = f"<title>{esc(label)}</title>" if label else ""
        self.parts.append(f'<line x1="{u:.1f}" x2="{u:.1f}" y1="{top}" y2="{bottom}" stroke="{colour}" '
                          f'stroke-width="1.2" stroke-dasharray="{dash}">{title}</line>')

    def hline(self, y, colour=COLOURS["truth"], dash="4 3", label: str | None = None) -> None:
        v = float(self.sy([y])[0])
        title = f"<title>{esc(label)}</title>" if label else ""
        self.parts.append(f'<line x1="{self.m[3]}" x2="{self.width - self.m[1]}" y1="{v:.1f}" '
                          f'y2="{v:.1f}" stroke="{colour}" stroke-width="1.2" '
                          f'stroke-dasharray="{dash}">{title}</line>')

    def legend(self, items: list[tuple[str, str, str]]) -> None:
        """Items ``(shape or 'line', colour, text)`` in a row above the plot area."""
        x = self.m[3]
        for shape, colour, text in items:
            if shape == "line":
                self.keys.append(f'<line x1="{x}" x2="{x + 16}" y1="30" y2="30" stroke="{colour}" stroke-width="2"/>')
            elif shape == "dash":
                self.keys.append(f'<line x1="{x}" x2="{x + 16}" y1="30" y2="30" stroke="{colour}" '
                                  'stroke-width="1.5" stroke-dasharray="4 3"/>')
            elif shape == "area":
                self.keys.append(f'<rect x="{x}" y="25" width="16" height="10" fill="{colour}" fill-opacity="0.45"/>')
            else:
                self.keys.append(_shape(shape, x + 8, 30, 4.5, colour, colour, ""))
            self.keys.append(f'<text x="{x + 20}" y="34" font-size="11">{esc(text)}</text>')
            x += 28 + 6.5 * len(text)

    # output -------------------------------------------------------------------------------
    def _axes(self) -> list[str]:
        top, bottom = self.m[0], self.height - self.m[2]
        left, right = self.m[3], self.width - self.m[1]
        out = [f'<rect x="{left}" y="{top}" width="{right - left}" height="{bottom - top}" '
               f'fill="none" stroke="{COLOURS["axis"]}" stroke-width="0.8"/>']
        if self.x_time:
            ticks, fmt = time_ticks(self.x0, self.x1)
            labels = pd.to_datetime(np.asarray(ticks, dtype=np.int64), utc=True).strftime(fmt)
        else:
            ticks = nice_ticks(self.x0, self.x1)
            labels = [_fmt_num(t) for t in ticks]
        for t, lab in zip(ticks, labels):
            u = float(self.sx([t])[0])
            out.append(f'<line x1="{u:.1f}" x2="{u:.1f}" y1="{top}" y2="{bottom}" stroke="{COLOURS["grid"]}"/>')
            out.append(f'<text x="{u:.1f}" y="{bottom + 14}" font-size="10" text-anchor="middle">{esc(lab)}</text>')
        if self.cats:
            yt = [(i, c) for i, c in enumerate(self.cats)]
        else:
            yt = [(t, _fmt_num(t)) for t in nice_ticks(self.y0, self.y1)]
        for t, lab in yt:
            v = float(self.sy([t])[0])
            out.append(f'<line x1="{left}" x2="{right}" y1="{v:.1f}" y2="{v:.1f}" stroke="{COLOURS["grid"]}"/>')
            out.append(f'<text x="{left - 5}" y="{v + 3.5:.1f}" font-size="10" text-anchor="end">{esc(lab)}</text>')
        if self.title:
            out.append(f'<text x="{left}" y="16" font-size="13" font-weight="bold">{esc(self.title)}</text>')
        if self.xlabel:
            out.append(f'<text x="{(left + right) / 2:.0f}" y="{self.height - 4}" font-size="11" '
                       f'text-anchor="middle">{esc(self.xlabel)}</text>')
        if self.ylabel:
            out.append(f'<text x="12" y="{(top + bottom) / 2:.0f}" font-size="11" text-anchor="middle" '
                       f'transform="rotate(-90 12 {(top + bottom) / 2:.0f})">{esc(self.ylabel)}</text>')
        return out

    def to_svg(self) -> str:
        """The chart as an ``<svg>`` element string."""
        global _CLIP_IDS
        _CLIP_IDS += 1
        cid = f"plot{_CLIP_IDS}"
        top, bottom = self.m[0], self.height - self.m[2]
        left, right = self.m[3], self.width - self.m[1]
        clip = (f'<clipPath id="{cid}"><rect x="{left - 6}" y="{top - 6}" width="{right - left + 12}" '
                f'height="{bottom - top + 12}"/></clipPath>')
        body = "\n".join(self._axes() + [clip, f'<g clip-path="url(#{cid})">'] + self.parts + ["</g>"]
                           + self.keys)
        return (f'<svg xmlns="http://www.w3.org/2000/svg" width="{self.width}" height="{self.height}" '
                f'viewBox="0 0 {self.width} {self.height}" font-family="sans-serif" role="img" '
                f'aria-label="{esc(self.title)}">\n{body}\n</svg>')


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """[start, stop) of the runs of True in ``mask``."""
    m = np.r_[False, np.asarray(mask, dtype=bool), False].astype(np.int8)
    d = np.diff(m)
    return list(zip(np.flatnonzero(d == 1), np.flatnonzero(d == -1)))


def _shape(shape: str, u: float, v: float, s: float, fill: str, stroke: str, title: str) -> str:
    a = f'fill="{fill}" stroke="{stroke}" stroke-width="1"'
    if shape == "square":
        return f'<rect x="{u - s:.1f}" y="{v - s:.1f}" width="{2 * s:.1f}" height="{2 * s:.1f}" {a}>{title}</rect>'
    if shape == "diamond":
        pts = f"{u:.1f},{v - s * 1.3:.1f} {u + s:.1f},{v:.1f} {u:.1f},{v + s * 1.3:.1f} {u - s:.1f},{v:.1f}"
        return f'<polygon points="{pts}" {a}>{title}</polygon>'
    if shape == "triangle":
        pts = f"{u:.1f},{v - s * 1.2:.1f} {u + s:.1f},{v + s * 0.8:.1f} {u - s:.1f},{v + s * 0.8:.1f}"
        return f'<polygon points="{pts}" {a}>{title}</polygon>'
    if shape == "cross":
        return (f'<path d="M{u - s:.1f},{v - s:.1f} L{u + s:.1f},{v + s:.1f} M{u - s:.1f},{v + s:.1f} '
                f'L{u + s:.1f},{v - s:.1f}" stroke="{stroke}" stroke-width="2">{title}</path>')
    return f'<circle cx="{u:.1f}" cy="{v:.1f}" r="{s:.1f}" {a}>{title}</circle>'


def thin(n: int, max_points: int = 1500) -> np.ndarray:
    """Indices of at most about ``max_points`` evenly spaced rows out of ``n`` (last one kept)."""
    if n <= max_points:
        return np.arange(n)
    idx = np.unique(np.linspace(0, n - 1, max_points).round().astype(np.int64))
    return idx
