"""Composite series keys: several key columns joined into one series id, and split back.

A series id made of key columns ``c_1, ..., c_m`` (for example ``sku`` and ``store``) is the
parts joined with :data:`SEPARATOR` in the given order::

    id = escape(c_1) + "/" + escape(c_2) + ... + "/" + escape(c_m)

where ``escape`` writes the escape character ``\\`` as ``\\\\`` and ``/`` as ``\\/`` (the escape
character first, so the mapping is one to one). :func:`split_key` reverses it exactly, so every
part survives as an attribute of the series (:func:`key_attributes`).

A key part that is missing (null) or blank is never filled in or skipped: :func:`compose_series`
reports it per row and key column, and the row path turns that into a reject naming the row,
the field, the value and the rule. A key column absent from the log is a
:class:`~monitor.errors.SourceError`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Iterable, Sequence

import numpy as np
import pandas as pd

from monitor.errors import SourceError, ValidationError

#: Character between the parts of a composite series id.
SEPARATOR = "/"
#: Character that escapes a separator (or itself) inside a part.
ESCAPE = "\\"
#: The rule a blank key part breaks (text of the reject reason).
EMPTY_PART_RULE = "empty key part: every key column needs a value"


def escape_part(part: str) -> str:
    """One key part with the escape character and the separator escaped.

    >>> escape_part("a/b")
    'a\\\\/b'
    """
    return part.replace(ESCAPE, ESCAPE + ESCAPE).replace(SEPARATOR, ESCAPE + SEPARATOR)


def join_key(parts: Sequence[str]) -> str:
    """The series id of ``parts`` (each escaped, joined with ``/`` in the given order).

    >>> join_key(["rye-crackers", "elm-cross"])
    'rye-crackers/elm-cross'
    >>> split_key(join_key(["1/2 litre", "north\\\\east"]))
    ('1/2 litre', 'north\\\\east')
    """
    parts = list(parts)
    if not parts:
        raise ValueError("join_key: at least one part is needed")
    return SEPARATOR.join(escape_part(str(p)) for p in parts)


def split_key(key: str, n_parts: int | None = None) -> tuple[str, ...]:
    """The parts of a series id made by :func:`join_key` (escapes undone).

    Raises :class:`~monitor.errors.ValidationError` for a dangling escape character, or when
    ``n_parts`` is given and the id has another number of parts.
    """
    parts: list[str] = []
    cur: list[str] = []
    i, n = 0, len(key)
    while i < n:
        ch = key[i]
        if ch == ESCAPE:
            if i + 1 >= n or key[i + 1] not in (ESCAPE, SEPARATOR):
                raise ValidationError(
                    f"series {key!r}: escape character at position {i} is not followed by "
                    f"{ESCAPE!r} or {SEPARATOR!r}", field="series", value=key,
                    rule="escape only '\\' and '/' inside a key part")
            cur.append(key[i + 1])
            i += 2
            continue
        if ch == SEPARATOR:
            parts.append("".join(cur))
            cur = []
        else:
            cur.append(ch)
        i += 1
    parts.append("".join(cur))
    if n_parts is not None and len(parts) != n_parts:
        raise ValidationError(f"series {key!r}: {len(parts)} key part(s), expected {n_parts}",
                              field="series", value=key, rule=f"{n_parts} key parts joined by '/'")
    return tuple(parts)


def _as_text(col: pd.Series) -> tuple[pd.Series, np.ndarray]:
    """Cells as text and a mask of blank cells (null, or only white space).

    Whole floats are written without ``.0`` (a key column typed as numbers by the reader: 12.0 is
    store 12); other values with ``str``.
    """
    values = col.to_numpy(dtype=object)
    blank = np.fromiter((v is None or v is pd.NA or (isinstance(v, float) and v != v)
                         or (isinstance(v, str) and not v.strip()) for v in values),
                        dtype=bool, count=len(values))
    text = np.empty(len(values), dtype=object)
    for i, v in enumerate(values):
        if blank[i]:
            text[i] = ""
        elif isinstance(v, str):
            text[i] = v
        elif isinstance(v, (float, np.floating)) and float(v).is_integer():
            text[i] = str(int(v))
        else:
            text[i] = str(v)
    return pd.Series(text, index=col.index, dtype=object), blank


@dataclass
class ComposedKeys:
    """Result of :func:`compose_series`.

    Attributes
    ----------
    series : pandas.Series
        The composite id of every row (object dtype; ``""`` where a part is blank).
    blank : dict
        Key column -> boolean mask of rows whose part is blank (null or only white space).
    raw : dict
        Key column -> the cells as text (what a reject shows as the value).
    """

    series: pd.Series
    blank: dict[str, np.ndarray] = field(default_factory=dict)
    raw: dict[str, pd.Series] = field(default_factory=dict)

    @property
    def bad(self) -> np.ndarray:
        """Rows with at least one blank key part."""
        out = np.zeros(len(self.series), dtype=bool)
        for m in self.blank.values():
            out |= m
        return out


def check_key_columns(columns: Sequence[str]) -> list[str]:
    """The key columns as a list; :class:`ValueError` for none, a blank name or a repeat."""
    cols = [str(c) for c in columns]
    if not cols:
        raise ValueError("series key: at least one key column is needed")
    for c in cols:
        if not c.strip():
            raise ValueError(f"series key: column name {c!r} is blank")
    seen = set()
    for c in cols:
        if c in seen:
            raise ValueError(f"series key: column {c!r} is named twice")
        seen.add(c)
    return cols


def compose_series(frame: pd.DataFrame, columns: Sequence[str]) -> ComposedKeys:
    """Join the key columns of ``frame`` into series ids, row by row.

    Parameters
    ----------
    frame : pandas.DataFrame
        Raw rows holding every key column.
    columns : sequence of str
        Key columns in order. One column gives its cells unchanged (no escaping), so a one-column
        key is the plain ``series`` column users have today.

    Returns
    -------
    ComposedKeys
        Ids (``""`` for a row with a blank part) and, per key column, the blank rows.

    Raises
    ------
    SourceError
        A key column is not in ``frame`` (the message lists the columns it has).
    """
    cols = check_key_columns(columns)
    missing = [c for c in cols if c not in frame.columns]
    if missing:
        raise SourceError(f"series key column(s) {missing} not in the log; the log has columns "
                          f"{list(frame.columns)}")
    texts, blanks = {}, {}
    for c in cols:
        texts[c], blanks[c] = _as_text(frame[c])
    if len(cols) == 1:
        series = texts[cols[0]].copy()
    else:
        escaped = [texts[c].str.replace(ESCAPE, ESCAPE + ESCAPE, regex=False)
                   .str.replace(SEPARATOR, ESCAPE + SEPARATOR, regex=False) for c in cols]
        series = escaped[0]
        for part in escaped[1:]:
            series = series + SEPARATOR + part
    any_blank = np.zeros(len(frame), dtype=bool)
    for m in blanks.values():
        any_blank |= m
    series = series.astype(object)
    series[any_blank] = ""
    return ComposedKeys(series=series, blank=blanks, raw=texts)


def key_attributes(series: Iterable[str], columns: Sequence[str]) -> pd.DataFrame:
    """One row per distinct series id with its key parts as attribute columns.

    >>> key_attributes(["tea/north", "tea/south"], ["sku", "store"])
          series  sku  store
    0  tea/north  tea  north
    1  tea/south  tea  south
    """
    cols = check_key_columns(columns)
    ids = list(dict.fromkeys(str(s) for s in series))
    if len(cols) == 1:
        parts = [(s,) for s in ids]
    else:
        parts = [split_key(s, len(cols)) for s in ids]
    out = pd.DataFrame(parts, columns=cols, dtype=object) if ids else pd.DataFrame(columns=cols)
    out.insert(0, "series", pd.Series(ids, dtype=object))
    return out
