"""What every source hands on: the :class:`Source` protocol and the :class:`Chunk` it reads
(rows with their file row numbers, line rejects and the position after them)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Protocol

import numpy as np
import pandas as pd

from monitor.ingest.logio import DEFAULT_COLUMNS
from monitor.rows.validate import REJECT_COLUMNS


class Source(Protocol):
    name: str
    kind: str

    def read(self, position: dict | None, max_rows: int) -> Chunk | None:
        """The rows after ``position`` (at most ``max_rows``), or ``None`` if none."""


@dataclass
class Chunk:
    """Rows read from a source, not yet validated.

    Attributes
    ----------
    frame : DataFrame
        Raw rows with canonical column names (``series, ts, price, quantity``, controls).
    rows : int array
        Data row number (1-based, within the file or table) of each frame row.
    rejects : DataFrame
        Lines that could not be split into fields (columns of :data:`REJECT_COLUMNS`).
    position : dict
        The source position once this chunk is committed (JSON-able).
    consumed : int
        Data rows this chunk accounts for (frame rows, rejected lines and blank lines).
    notice : str, optional
        A problem found before reading (file replaced or truncated, a folder file that cannot
        be read); the engine opens an alert of kind ``notice_kind`` about it.
    label : str, optional
        Text written in the ``source`` column of observations and rejects (default: the
        source name; a folder source adds the file name).
    """

    frame: pd.DataFrame
    rows: np.ndarray
    rejects: pd.DataFrame
    position: dict
    consumed: int
    notice: str | None = None
    label: str | None = None
    extra: dict = field(default_factory=dict)
    notice_kind: str = "source_reset"


def empty_rejects() -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=object) for c in REJECT_COLUMNS})


def canonical_names(names: list[str], columns: dict | None) -> list[str]:
    """Rename the file's columns onto ``series, ts, price, quantity`` per the ``[columns]`` map."""
    mapping = {**DEFAULT_COLUMNS, **(columns or {})}
    inverse = {actual: canon for canon, actual in mapping.items() if actual != canon}
    return [inverse.get(n, n) for n in names]
