"""Colours, symbols and wording shared by the dashboard's pages and charts (no streamlit here).

The palette is our own. Every colour used for a line, a marker or text is checked against the
white page background with the WCAG 2.1 contrast ratio (:func:`contrast_ratio`): at least 4.5:1
for anything that carries meaning (text-like marks), so it also clears the 3:1 asked of
graphical objects. Meaning never rests on colour alone: each status and each alert kind also has
its own symbol (in tables) or marker shape (in charts), and the legend on the page names them.
"""

from __future__ import annotations

#: Shown at the top of every page.
CAUTION = (
    "Caution: these estimates are statistical evidence to inform decisions, not decisions. "
    "Elasticities estimated from observational prices can be biased (prices set in response to "
    "demand, promotions, stock-outs); randomized price tests are the sound basis. Local "
    "regulation on pricing and utility tariffs comes first."
)

#: Page background the contrast checks are made against (the app runs the light theme).
BACKGROUND = "#ffffff"

#: Colours of chart elements (hex, sRGB).
COLOURS = {
    "estimate": "#0b5563",       # elasticity line: deep teal
    "band": "#7fc4cf",           # confidence band fill (an area, drawn under the line)
    "bound": "#5b2a86",          # configured low/high bounds: plum, dashed
    "alert": "#a3231b",          # alert markers: brick red
    "truth": "#333333",          # known change points: charcoal, dotted
    "recent": "#9a4a00",         # recent window in the log-log scatter: rust
    "earlier": "#1d4f91",        # earlier window in the log-log scatter: cobalt
    "residual": "#3b3b58",       # one-step-ahead residuals: slate
}

#: Status of an estimate -> (symbol, words). Symbols differ in shape, not only in colour.
STATUS_STYLE = {
    "changed": ("◆", "changed: a change detector fired"),
    "out_of_bounds": ("▲", "out of bounds: outside the configured low/high range"),
    "low_variation": ("◇", "low variation: price barely moved, estimate not trusted"),
    "warming_up": ("◌", "warming up: too few observations for an estimate yet"),
    "ok": ("●", "ok: estimate current and within bounds"),
}

#: Order used by the "needs attention first" sort (smaller = shown first).
STATUS_RANK = {"changed": 0, "out_of_bounds": 1, "low_variation": 2, "warming_up": 3, "ok": 4}

#: Alert kind -> (Vega-Lite marker shape, words).
ALERT_SHAPES = {
    "out_of_bounds": ("triangle-up", "out of bounds"),
    "elasticity_change": ("diamond", "elasticity change"),
    "level_shift": ("square", "level shift"),
    "sign_flip": ("cross", "sign flip"),
    "low_variation": ("circle", "low variation"),
    "stale": ("triangle-down", "stale source"),
}

#: Alert state -> symbol used in the alerts table.
STATE_SYMBOLS = {"open": "○ open", "acknowledged": "◑ acknowledged", "resolved": "● resolved"}


def status_label(status: str) -> str:
    """Symbol and short name of a status, e.g. ``'▲ out of bounds'``; unknown ones pass through.

    >>> status_label("warming_up")
    '◌ warming up'
    """
    style = STATUS_STYLE.get(str(status))
    if style is None:
        return str(status)
    return f"{style[0]} {str(status).replace('_', ' ')}"


def legend_markdown() -> str:
    """Markdown text explaining every status symbol (placed under the overview table)."""
    parts = [f"{sym} {words}" for sym, words in STATUS_STYLE.values()]
    return " · ".join(parts)


def _channel(c: float) -> float:
    # WCAG 2.1 relative luminance: sRGB channel linearisation
    return c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4


def relative_luminance(hex_colour: str) -> float:
    """Relative luminance L = 0.2126 R + 0.7152 G + 0.0722 B of linearised sRGB (WCAG 2.1).

    >>> round(relative_luminance("#ffffff"), 6), round(relative_luminance("#000000"), 6)
    (1.0, 0.0)
    """
    h = hex_colour.lstrip("#")
    if len(h) != 6:
        raise ValueError(f"colour {hex_colour!r}: expected 6 hex digits like '#0b5563'")
    r, g, b = (int(h[i:i + 2], 16) / 255.0 for i in (0, 2, 4))
    return 0.2126 * _channel(r) + 0.7152 * _channel(g) + 0.0722 * _channel(b)


def contrast_ratio(fg: str, bg: str = BACKGROUND) -> float:
    """WCAG 2.1 contrast ratio (L1 + 0.05) / (L2 + 0.05), L1 the lighter; from 1 to 21.

    >>> round(contrast_ratio("#000000", "#ffffff"), 1)
    21.0
    """
    a, b = relative_luminance(fg), relative_luminance(bg)
    hi, lo = max(a, b), min(a, b)
    return (hi + 0.05) / (lo + 0.05)
