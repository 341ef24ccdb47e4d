"""Per-series elasticity bounds from a table ``series, low, high``: read, checked, applied.

One reader and one set of rules for every place a bounds table comes in: ``elmon bounds load
FILE`` (into the store), ``[bounds] file = "..."`` in the configuration (the service loads it
into the store at start and again whenever the file changes; replay and tuning apply it to
their series directly, since they have no store), and :func:`per_series_limits`, which turns
the own bounds of a batch's series into the ``low`` / ``high`` arrays of
``Pipeline.run`` (a side a series does not set keeps the ``[bounds]`` limit).

Rules of a table (all or nothing: one bad row refuses the whole table, and the message names
every bad row, 1-based after the header with its line in the file, its field, its value and
the rule): columns ``series``, ``low``, ``high``; ``series`` non-empty and not repeated;
``low`` / ``high`` empty (no own bound on that side) or a finite number; ``low < high``.

>>> t = pd.DataFrame({"series": ["north/oat-bar", "east/rye"], "low": ["-3", ""],
...                   "high": ["-0.5", "-0.2"]})
>>> check_bounds_table(t, "example")
[('north/oat-bar', -3.0, -0.5), ('east/rye', None, -0.2)]
>>> per_series_limits(["east/rye", "west/plain"], {"east/rye": (None, -0.2)}, -4.0, 0.0)
(array([-4., -4.]), array([-0.2,  0. ]))
"""

from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Mapping

import numpy as np
import pandas as pd

from monitor.errors import ConfigError

COLUMNS = ("series", "low", "high")


def bound_value(side: str, value) -> float | None:
    """``value`` as a finite float, or ``None`` for an empty cell (no bound on this side).

    Raises ``ValueError`` naming the side and the value when it is not a finite number.
    """
    if value is None or (isinstance(value, float) and math.isnan(value)) \
            or str(value).strip() == "":
        return None
    if isinstance(value, bool):
        raise ValueError(f"{side} = {value!r} is not a number")
    try:
        v = float(str(value).strip())
    except ValueError:
        raise ValueError(f"{side} = {str(value)!r} is not a number") from None
    if not math.isfinite(v):
        raise ValueError(f"{side} = {str(value)!r} is not a finite number")
    return v


def check_bounds_table(table: pd.DataFrame, source: str, known: set | None = None,
                       unknown_hint: str = "") -> list[tuple[str, float | None, float | None]]:
    """The rows ``(series, low, high)`` of a bounds table, in table order, after every rule
    above; with ``known`` also: the series is one of them (``unknown_hint`` ends that message).

    Raises ``ValueError`` with every bad row named when any row breaks a rule.
    """
    missing = [c for c in COLUMNS if c not in table.columns]
    if missing:
        raise ValueError(f"{source}: missing column(s) {', '.join(missing)}; the header must "
                         f"be series,low,high")
    problems, rows, seen = [], [], {}
    for i, rec in enumerate(table[list(COLUMNS)].itertuples(index=False), start=1):
        name = "" if pd.isna(rec.series) else str(rec.series).strip()
        where = f"row {i} (line {i + 1}, series {name!r})"
        if not name:
            problems.append(f"row {i} (line {i + 1}): field 'series' is empty")
            continue
        if name in seen:
            problems.append(f"{where}: field 'series' repeats row {seen[name]}")
            continue
        seen[name] = i
        sides, bad = {}, False
        for side in ("low", "high"):
            raw = getattr(rec, side)
            try:
                sides[side] = bound_value(side, raw)
            except ValueError:
                problems.append(f"{where}: field '{side}' value {str(raw)!r} is not a finite "
                                f"number (leave the cell empty for no {side} bound)")
                bad = True
        lo, hi = sides.get("low"), sides.get("high")
        if not bad and lo is not None and hi is not None and not lo < hi:
            problems.append(f"{where}: low = {lo:g} must be below high = {hi:g}")
        if known is not None and name not in known:
            problems.append(f"{where}: no such series in the store{unknown_hint}")
        rows.append((name, lo, hi))
    if problems:
        more = f"; and {len(problems) - 20} more" if len(problems) > 20 else ""
        raise ValueError(f"{source}: {len(problems)} bad row(s), nothing changed: "
                         + "; ".join(problems[:20]) + more)
    return rows


def read_bounds_file(path: str | Path) -> pd.DataFrame:
    """A bounds CSV as text cells (an empty cell stays ``""``); ``ConfigError`` when the file
    is missing or not a CSV table."""
    try:
        return pd.read_csv(path, dtype=str, keep_default_na=False)
    except FileNotFoundError:
        raise ConfigError(f"bounds file {str(path)!r} does not exist") from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise ConfigError(f"bounds file {str(path)!r} is not a CSV file: {exc}") from None


def bounds_file_path(config, base: str | Path | None = None) -> Path | None:
    """The ``[bounds] file`` of ``config``, or ``None`` when it is not set. A relative path is
    taken from ``base`` when given (the service's folder for relative paths), else from the
    config file's folder, else the working directory."""
    name = str(config.section("bounds").get("file") or "")
    if not name:
        return None
    p = Path(name).expanduser()
    if p.is_absolute():
        return p
    if base is not None:
        return Path(base) / p
    if getattr(config, "path", None) and Path(config.path).is_file():
        return Path(config.path).parent / p
    return p


def config_bounds(config) -> dict[str, tuple[float | None, float | None]]:
    """``{series: (low, high)}`` from the ``[bounds] file`` of ``config`` (empty when none is
    set); ``ConfigError`` naming the file and every bad row when it breaks a rule."""
    path = bounds_file_path(config)
    if path is None:
        return {}
    try:
        rows = check_bounds_table(read_bounds_file(path), f"[bounds] file {str(path)!r}")
    except ValueError as exc:
        raise ConfigError(str(exc)) from None
    return {name: (lo, hi) for name, lo, hi in rows}


def per_series_limits(names, own: Mapping[str, tuple], low: float, high: float
                      ) -> tuple[np.ndarray, np.ndarray]:
    """``low`` / ``high`` arrays for ``Pipeline.run``, one per series of ``names``: a series'
    own bound where it sets that side, else the ``[bounds]`` limit (``-inf`` / ``inf``: none)."""
    lo = np.full(len(names), float(low))
    hi = np.full(len(names), float(high))
    for i, n in enumerate(names):
        o = own.get(n)
        if o is not None:
            if o[0] is not None:
                lo[i] = o[0]
            if o[1] is not None:
                hi[i] = o[1]
    return lo, hi


class BoundsFileWatch:
    """Notices when a bounds file changed (size, modification time or inode) since the last
    look, so a service re-loads it at its next batch and not on every one."""

    def __init__(self, path: str | Path):
        self.path = Path(path)
        self._seen: tuple | None = None

    def changed(self) -> bool:
        """True on the first call and whenever the file differs from the last call's look; a
        missing file counts as a change (loading it then names the problem)."""
        try:
            st = os.stat(self.path)
            key = (st.st_size, st.st_mtime_ns, st.st_ino)
        except OSError:
            key = None
        if key is not None and key == self._seen:
            return False
        self._seen = key
        return True
