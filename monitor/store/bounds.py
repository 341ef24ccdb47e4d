"""Per-series elasticity bounds: the ``low`` / ``high`` columns of the ``series`` table.

A series' own bounds replace the ``[bounds]`` limits of the configuration side by side: a side
left NULL keeps the ``[bounds]`` limit (:func:`monitor.store.live.series_bounds` reads them, the
live service applies them to each batch). ``bound_low`` / ``bound_high`` are different: they
record the bounds the service last *applied* (what the dashboard draws) and only the service
writes them.

Writing bounds takes no writer lock of its own. The service holds the store's writer lock for
as long as it runs, so a command that needed it could only change bounds with the service
stopped, while the point is that the running service picks them up at its next batch (it reads
the ``series`` table for every batch and caches nothing). The change is one ``BEGIN IMMEDIATE``
transaction on one row; SQLite's write lock (busy timeout 10 s) orders it with the service's
batch transactions, and the service never writes ``low`` / ``high``. A service that caches
the bounds learns of a change from ``PRAGMA data_version`` (a commit by another connection) or,
for a change through its own connection, from ``Store.bounds_version``, which
:func:`set_series_bounds` counts up.
"""

from __future__ import annotations

import difflib
import math

import pandas as pd

from monitor.errors import StoreError
from monitor.ingest.bounds_file import check_bounds_table
from monitor.store.codec import wall_ts
from monitor.store.core import Store, accepts_path

#: sentinel: leave this side as stored
KEEP = object()


def _checked(side: str, value) -> float | None:
    """``value`` as a finite float, or ``None`` (no bound on this side)."""
    if value is None:
        return None
    if isinstance(value, bool):
        raise StoreError(f"bounds: {side} = {value!r} is not a number")
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise StoreError(f"bounds: {side} = {value!r} is not a number (give an elasticity "
                         f"such as -3.5, or 'none' for no {side} bound)") from None
    if not math.isfinite(v):
        raise StoreError(f"bounds: {side} = {value!r} must be a finite number (leave the side "
                         f"out, or 'none', for no {side} bound)")
    return v


def set_series_bounds(store: Store, series: str, *, low=KEEP, high=KEEP,
                      create: bool = False) -> dict:
    """Set a series' own elasticity bounds (unitless: d log q / d log p).

    Parameters
    ----------
    store : Store
        The writer.
    series : str
        Series id, exactly as stored.
    low, high : float, None or KEEP
        The new side (``None`` removes it, so the ``[bounds]`` limit applies); ``KEEP`` (the
        default) leaves the stored side as it is.
    create : bool
        Add the series when the store does not know it yet (bounds set ahead of its first
        row). Without it an unknown name is refused: a mistyped name would otherwise hold
        bounds that no row ever meets.

    Returns
    -------
    dict
        ``series``, ``low``, ``high`` (after the change), ``before`` (``(low, high)``) and
        ``created``.

    Raises
    ------
    StoreError
        A side that is not a finite number, ``low >= high`` after the change, or an unknown
        series without ``create``.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> db = pathlib.Path(tempfile.mkdtemp()) / "b.sqlite"
    >>> with Store.open(db) as st:
    ...     r = set_series_bounds(st, "shop1/tea", low=-4, create=True)
    ...     r = set_series_bounds(st, "shop1/tea", high=-0.5)
    ...     (r["low"], r["high"]), r["before"]
    ((-4.0, -0.5), (-4.0, None))
    """
    series = str(series)
    new = {side: (KEEP if v is KEEP else _checked(side, v))
           for side, v in (("low", low), ("high", high))}
    with store.atomic():
        rows = store.rows("SELECT low, high FROM series WHERE series = ?", (series,))
        created = not rows
        if created and not create:
            names = [r["series"] for r in store.rows("SELECT series FROM series")]
            near = difflib.get_close_matches(series, names, n=3, cutoff=0.6)
            hint = f"; close names: {', '.join(repr(n) for n in near)}" if near else ""
            raise StoreError(f"no series {series!r} in the store ({len(names)} series{hint}); "
                             f"names are exact (elmon bounds list, elmon status --json). To set "
                             f"bounds before a series' first row, add --create")
        before = (None, None) if created else (rows[0]["low"], rows[0]["high"])
        lo = before[0] if new["low"] is KEEP else new["low"]
        hi = before[1] if new["high"] is KEEP else new["high"]
        if lo is not None and hi is not None and not lo < hi:
            raise StoreError(f"series {series!r}: bounds low = {lo:g} must be below high = "
                             f"{hi:g}")
        now = wall_ts()
        if created:
            store.execute("INSERT INTO series (series, low, high, updated_at) VALUES (?, ?, ?, ?)",
                          (series, lo, hi, now))
        else:
            # updated_at stays: it is the wall time of the series' last rows, which the stale
            # check reads (a bounds change is not the series sending data)
            store.execute("UPDATE series SET low = ?, high = ? WHERE series = ?",
                          (lo, hi, series))
    # a cache of bounds on this same connection (the service's) compares this count; another
    # connection's commit shows in its PRAGMA data_version instead
    store.bounds_version = getattr(store, "bounds_version", 0) + 1
    return {"series": series, "low": lo, "high": hi, "before": before, "created": created}


def clear_series_bounds(store: Store, series: str) -> dict:
    """Remove a series' own bounds (both sides); the ``[bounds]`` limits then apply to it.
    Raises :class:`StoreError` for an unknown series."""
    return set_series_bounds(store, series, low=None, high=None)


@accepts_path(readonly=True)
def list_series_bounds(store: Store) -> pd.DataFrame:
    """Series with bounds of their own, by name.

    Columns: ``series, low, high`` (their own bounds; NULL: that side follows ``[bounds]``)
    and ``bound_low, bound_high`` (the bounds the service last applied to the series, NULL
    before its first batch or where no bound is in effect).
    """
    return store.frame("SELECT series, low, high, bound_low, bound_high FROM series "
                       "WHERE low IS NOT NULL OR high IS NOT NULL ORDER BY series")


def load_series_bounds(store: Store, table: pd.DataFrame, *, create: bool = False,
                       source: str = "bounds file") -> list[dict]:
    """Set the bounds of many series from a table with columns ``series, low, high`` (an
    empty cell: no own bound on that side, so ``[bounds]`` applies to it).

    All or nothing: every row is checked first, and one bad row refuses the whole table with a
    message naming each bad row (1-based after the header, and its line in the file), its field, its value and the
    rule, so that a file is never half applied. Rules: ``series`` non-empty and not repeated;
    ``low`` / ``high`` empty or a finite number; ``low < high``; the series known to the store
    unless ``create``. Returns the :func:`set_series_bounds` records in table order.
    """
    known = None if create else {r["series"] for r in store.rows("SELECT series FROM series")}
    try:
        rows = check_bounds_table(table, source, known,
                                  " (add --create to set bounds before its first row)")
    except ValueError as exc:
        raise StoreError(str(exc)) from None
    with store.atomic():
        return [set_series_bounds(store, name, low=lo, high=hi, create=create)
                for name, lo, hi in rows]
