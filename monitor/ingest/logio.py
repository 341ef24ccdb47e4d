"""Reading observation logs (CSV or Parquet) with pyarrow, and writing result tables.

The fast path lets pyarrow type the columns (float64 numbers, timestamps parsed in C++). When a
file holds values that do not fit those types (a word in a number column, a malformed
timestamp), it is read again with every column as text and :mod:`monitor.rows.validate` reports each
bad field; the two paths give the same validation results.

A column that pyarrow reads as integers but whose text has a leading zero in some row
(``007``, a store or SKU code) is an identifier: it is kept as text, so ``007`` stays ``007``
(a series key column read as the number 7 would merge ``007`` and ``7``).
"""

from __future__ import annotations

import csv
import os
from pathlib import Path
from typing import Iterator, Mapping

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from monitor.errors import ConfigError, SourceError


DEFAULT_COLUMNS = {"series": "series", "ts": "ts", "price": "price", "quantity": "quantity"}
#: ``[columns]``: the log's column name of each field, and how its text is written:
#: ``ts_format`` (a strftime format of the timestamps, e.g. ``"%d/%m/%Y"``; empty = ISO 8601 or
#: epoch seconds) and ``delimiter`` (the field separator; empty = sniffed from the header line:
#: the comma unless ``;``, tab or ``|`` splits it into more fields); the schema
#: :mod:`monitor.settings` composes
COLUMNS_KEYS = {**{name: (str, column) for name, column in DEFAULT_COLUMNS.items()},
                "ts_format": (str, ""), "delimiter": (str, "")}
SECTIONS = {"columns": COLUMNS_KEYS}


#: field separators a header line is sniffed for; the comma unless another splits it into more
DELIMITERS = (",", ";", "\t", "|")


def sniff_delimiter(line: str) -> str:
    r"""The field separator of a header line: the one of :data:`DELIMITERS` that splits it into
    the most fields (quotes respected); the comma on a tie or when none splits it.

    >>> sniff_delimiter("series;ts;price;quantity"), sniff_delimiter("series,ts,price,quantity")
    (';', ',')
    >>> sniff_delimiter("series\tts\tprice\tquantity"), sniff_delimiter("single")
    ('\t', ',')
    """
    best, most = ",", 1
    for d in DELIMITERS:
        try:
            n = len(next(csv.reader([line], delimiter=d), []))
        except csv.Error:
            continue
        if n > most:
            best, most = d, n
    return best


def check_delimiter(value: str) -> str:
    r"""A one-character field separator (``tab`` or ``\t`` for a tab), else ConfigError.

    >>> check_delimiter(";"), check_delimiter("tab"), check_delimiter("\\t")
    (';', '\t', '\t')
    """
    value = {"tab": "\t", "\\t": "\t"}.get(str(value).lower(), value)
    if not isinstance(value, str) or len(value) != 1 or value in "\"\r\n" or value.isalnum():
        raise ConfigError(f"delimiter = {value!r}: must be one character that is not a letter, "
                          f"digit, quote or line break, e.g. ',' ';' '|' or 'tab'")
    return value


class LogLayout(dict):
    """The log's column names (``{field: column}``, a plain mapping for renames) and its stated
    field separator ``delimiter`` (``None``: sniffed from each file's header line)."""

    def __init__(self, names, delimiter: str | None = None):
        super().__init__(names)
        self.delimiter = delimiter or None


def column_names(config) -> LogLayout:
    """The column names of ``[columns]`` of a :class:`monitor.sections.Config`, defaults filled,
    with its ``delimiter`` (checked) as :attr:`LogLayout.delimiter`."""
    sec = config.section("columns")
    stated = sec.get("delimiter") or ""
    return LogLayout({name: sec.get(name, column) for name, column in DEFAULT_COLUMNS.items()},
                     check_delimiter(stated) if stated else None)


def stated_delimiter(columns) -> str | None:
    """The stated separator of a columns mapping (a :class:`LogLayout`), else None."""
    return getattr(columns, "delimiter", None)


def log_format(path: str | os.PathLike) -> str:
    suffix = Path(path).suffix.lower()
    if suffix in (".parquet", ".pq"):
        return "parquet"
    if suffix in (".csv", ".txt", ".gz") or suffix == "":
        return "csv"
    raise SourceError(f"{path}: unknown log format '{suffix}' (expected .csv or .parquet)")


def check_file(path) -> Path:
    p = Path(path)
    if not p.exists():
        raise SourceError(f"{p}: no such file")
    if not p.is_file():
        raise SourceError(f"{p}: not a file")
    if not os.access(p, os.R_OK):
        raise SourceError(f"{p}: cannot be read (permission denied)")
    return p


def column_renames(table_cols: list[str], mapping: Mapping[str, str]) -> dict[str, str]:
    """Map the file's column names onto series/ts/price/quantity."""
    inv = {}
    for canon, actual in mapping.items():
        if actual != canon and actual in table_cols:
            inv[actual] = canon
    return inv


def _text_types(names: list[str]) -> dict:
    return {c: pa.string() for c in names}


def read_log(path, columns: Mapping[str, str] | None = None,
             text: bool = False) -> pd.DataFrame:
    """Read a whole log into a DataFrame with canonical column names (see module docstring)."""
    p = check_file(path)
    mapping = {**DEFAULT_COLUMNS, **(columns or {})}
    fmt = log_format(p)
    try:
        if fmt == "parquet":
            table = pq.read_table(p)
        else:
            table = _read_csv(p, text, stated_delimiter(columns))
    except SourceError:
        raise
    except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
        if fmt == "csv" and not text:
            return read_log(path, columns, text=True)
        raise SourceError(f"{p}: unreadable {fmt} file: {exc}") from None
    except OSError as exc:
        raise SourceError(f"{p}: unreadable {fmt} file: {exc}") from None
    frame = table_to_frame(table)
    frame = frame.rename(columns=column_renames(list(frame.columns), mapping))
    return frame


def table_to_frame(table: pa.Table) -> pd.DataFrame:
    """Arrow table to pandas, keeping an empty field distinguishable from a literal NaN.

    pandas turns both a null and a NaN of a float column into NaN; a float column with nulls is
    therefore converted to objects with None for the empty fields (rare, so the cost is rare).
    """
    frame = table.to_pandas()
    for name, col in zip(table.column_names, table.columns):
        if pa.types.is_floating(col.type) and col.null_count > 0:
            frame[name] = pd.Series(col.to_pylist(), dtype=object, index=frame.index)
    return frame


def _read_csv(p: Path, text: bool, delimiter: str | None = None) -> pa.Table:
    with open(p, "rb") as fh:
        first = fh.readline().decode("utf-8", errors="replace").strip()
    if not first:
        raise SourceError(f"{p}: empty file (no header line)")
    delimiter = delimiter or sniff_delimiter(first)
    names = [c.strip() for c in first.split(delimiter)]
    conv = pacsv.ConvertOptions(null_values=[""], strings_can_be_null=True,
                                column_types=_text_types(names) if text else {"series": pa.string()})
    parse = pacsv.ParseOptions(delimiter=delimiter)
    table = pacsv.read_csv(p, parse_options=parse, convert_options=conv)
    return table if text else keep_leading_zeros(table, lambda cols: pacsv.read_csv(
        p, parse_options=parse, convert_options=pacsv.ConvertOptions(
            null_values=[""], strings_can_be_null=True, include_columns=cols,
            column_types={c: pa.string() for c in cols})))


#: text of an integer with a leading zero: ``007``, ``-01`` (not ``0`` alone)
LEADING_ZERO = r"^\s*[+-]?0[0-9]"


def keep_leading_zeros(table: pa.Table, as_text) -> pa.Table:
    """``table`` with each integer column whose text has a leading zero replaced by its text.

    ``as_text(columns)`` reads those columns of the same input again as strings.
    """
    ints = [n for n, t in zip(table.column_names, table.schema.types) if pa.types.is_integer(t)]
    if not ints:
        return table
    text = as_text(ints)
    for name in ints:
        col = text.column(name)
        if pc.any(pc.match_substring_regex(col, LEADING_ZERO)).as_py():
            table = table.set_column(table.column_names.index(name), name, col)
    return table


def iter_log_batches(path, columns: Mapping[str, str] | None = None,
                     batch_rows: int = 1_000_000) -> Iterator[pd.DataFrame]:
    """Yield the log in chunks of about ``batch_rows`` rows, every column as text.

    Bounded memory for large logs; the text path makes every chunk's types the same.
    """
    p = check_file(path)
    mapping = {**DEFAULT_COLUMNS, **(columns or {})}
    if log_format(p) == "parquet":
        pf = pq.ParquetFile(p)
        for batch in pf.iter_batches(batch_size=batch_rows):
            df = table_to_frame(pa.Table.from_batches([batch]))
            yield df.rename(columns=column_renames(list(df.columns), mapping))
        return
    with open(p, "rb") as fh:
        first = fh.readline().decode("utf-8", errors="replace").strip()
    delimiter = stated_delimiter(columns) or sniff_delimiter(first)
    names = [c.strip() for c in first.split(delimiter)]
    conv = pacsv.ConvertOptions(null_values=[""], strings_can_be_null=True,
                                column_types=_text_types(names))
    reader = pacsv.open_csv(p, read_options=pacsv.ReadOptions(block_size=1 << 24),
                            parse_options=pacsv.ParseOptions(delimiter=delimiter),
                            convert_options=conv)
    for batch in reader:
        df = batch.to_pandas()
        yield df.rename(columns=column_renames(list(df.columns), mapping))


def write_table(frame: pd.DataFrame, path) -> None:
    """Write a result table as CSV (NaN written as an empty field), or Parquet by suffix."""
    table = pa.Table.from_pandas(frame, preserve_index=False)
    if str(path).endswith(".parquet"):
        pq.write_table(table, path)
    else:
        pacsv.write_csv(table, path)


def nan_to_null(values: np.ndarray) -> pa.Array:
    return pa.array(values, from_pandas=True)
