"""Reading CSV text in whole lines from a byte offset: the parsing half of the CSV sources.

A chunk is the bytes from a committed offset up to the last line break (a partial last line
waits for its newline, unless the file is known to be complete). Each line is one row: fields
are split by pyarrow (all columns as text, so :mod:`monitor.rows.validate` judges every value), and
when pyarrow refuses the chunk (bytes that are not UTF-8, for example) each line is split on
its own by the standard :mod:`csv` module. A line that cannot become a row (too few or too
many fields, not UTF-8) is returned as a reject naming its row number; blank lines count in
the numbering but are not rows. Row numbers are 1-based data rows (the header is not counted),
as in the replay's rejects.

Hostile bytes are judged here, before validation:

- a field holding a NUL byte or a byte-order mark (U+FEFF: left by a file concatenated onto
  another, or NUL padding after a crash) is rejected naming its row, field and value: kept, it
  would make an invisible second series;
- a line that repeats the header (its fields are the column names, in any order) is rejected,
  and the lines after it are read with that line's column order (a file appended to by a
  writer with other columns); :func:`read_csv_chunk` ends its chunk at such a line and returns
  the names now in effect;
- a header line longer than :data:`MAX_HEADER_BYTES` is a :class:`SourceError` (not a wait for
  a line break that never comes).
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import os

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv

from monitor.errors import SourceError
from monitor.ingest.base import empty_rejects
from monitor.ingest.logio import sniff_delimiter
from monitor.rows.validate import REJECT_COLUMNS


#: bytes of the start of a file whose hash identifies it (replacement check)
HEAD_BYTES = 4096
#: bytes read per step while looking for enough line breaks
READ_STEP = 1 << 22
#: a header line longer than this is refused (1 MiB holds thousands of column names)
MAX_HEADER_BYTES = 1 << 20
#: characters never accepted inside a field: NUL and the byte-order mark (zero width)
INVISIBLE = ("\x00", "\ufeff")
#: the dtype of the fields of a chunk read by Arrow: text, a missing field ``pd.NA``
TEXT_DTYPE = pd.StringDtype("pyarrow")

def file_delimiter(path, stated: str | None = None) -> str:
    """``stated`` when given, else the separator sniffed from the file's first line."""
    if stated:
        return stated
    with open(path, "rb") as fh:
        line = fh.readline(MAX_HEADER_BYTES + 1)
    return sniff_delimiter(line.decode("utf-8-sig", errors="replace").rstrip("\r\n"))


def parse_header(line: bytes, where: str, delimiter: str | None = None) -> list[str]:
    """Column names of a header line (UTF-8, separated by ``delimiter`` or the sniffed one,
    surrounding spaces removed)."""
    try:
        text = line.decode("utf-8-sig").rstrip("\r\n")
    except UnicodeDecodeError:
        raise SourceError(f"{where}: the header line is not UTF-8 text") from None
    names = [n.strip() for n in next(csv.reader([text], delimiter=delimiter or
                                                 sniff_delimiter(text)), [])]
    if not names or all(n == "" for n in names):
        raise SourceError(f"{where}: empty header line")
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise SourceError(f"{where}: the header names column(s) {dup} more than once")
    return names


def head_hash(path, length: int) -> str:
    """SHA-256 (hex) of the first ``length`` bytes of a file."""
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read(length)).hexdigest()


def _line_reject(row: int, text: str, why: str) -> dict:
    shown = text if len(text) <= 200 else text[:200] + "..."
    return {"row": int(row), "series": "", "ts": "", "field": "line", "value": shown,
            "reason": f"row {int(row)}: line {shown!r}: {why}", "raw": json.dumps({"line": text})}


def parse_lines(names: list[str], canon: list[str], body: bytes, first_row: int,
                delimiter: str = ",") -> tuple[pd.DataFrame, np.ndarray, pd.DataFrame, int]:
    """Split ``body`` (whole lines) into rows of text fields separated by ``delimiter``.

    Returns ``(frame, rows, rejects, n_lines)``: the rows that have one field per header
    column, their data row numbers, the lines that do not, and the number of lines.
    """
    if body and not body.endswith(b"\n"):
        body += b"\n"
    nl = np.flatnonzero(np.frombuffer(body, dtype=np.uint8) == 10)
    n_lines = int(nl.size)
    starts = np.concatenate([[0], nl[:-1] + 1]) if n_lines else np.zeros(0, dtype=np.int64)
    length = nl - starts
    last = np.frombuffer(body, dtype=np.uint8)[np.maximum(nl - 1, 0)] if n_lines else nl
    blank = (length == 0) | ((length == 1) & (last == 13))
    line_rows = first_row + np.arange(n_lines, dtype=np.int64)
    if n_lines == 0 or blank.all():
        return pd.DataFrame({c: pd.Series(dtype=object) for c in canon}), \
            np.zeros(0, dtype=np.int64), empty_rejects(), n_lines
    try:
        if not body.isascii():               # ASCII is UTF-8 (isascii: one fast pass)
            body.decode("utf-8")             # pyarrow's bad-line handler needs UTF-8 text
        frame, bad_lines = _parse_fast(names, body, delimiter)
        if len(frame) + len(bad_lines) != n_lines:   # a lone CR split a line: go line by line
            raise UnicodeDecodeError("utf-8", b"", 0, 1, "line count differs")
        bad = np.zeros(n_lines, dtype=bool)
        bad[bad_lines] = True
        keep_rows = ~bad
        rejects = [_line_reject(line_rows[i], _decode(body[starts[i]:nl[i]]),
                                _count_message(body[starts[i]:nl[i]], len(names), delimiter))
                   for i in bad_lines]
    except (pa.ArrowInvalid, pa.ArrowTypeError, UnicodeDecodeError):
        frame, keep_rows, rejects = _parse_slow(names, body, starts, nl, line_rows, blank,
                                                delimiter)
    frame.columns = canon
    # every line that is not a reject produced a row (blank lines an all-null one): drop those
    take = ~blank[keep_rows]
    frame = frame.loc[take].reset_index(drop=True)
    rows = line_rows[keep_rows][take]
    # NUL or a UTF-8 byte-order mark (a lone 0xEF byte first: a fast scan where none is)
    if b"\x00" in body or (b"\xef" in body and b"\xef\xbb\xbf" in body):
        frame, rows, hidden = _drop_invisible(frame, rows, names)
        rejects += hidden
    if rejects:
        rej = pd.DataFrame(rejects, columns=REJECT_COLUMNS).sort_values("row", kind="stable")
        rej = rej.reset_index(drop=True)
    else:
        rej = empty_rejects()
    return frame, rows, rej, n_lines


def _drop_invisible(frame: pd.DataFrame, rows: np.ndarray, names: list[str]
                    ) -> tuple[pd.DataFrame, np.ndarray, list[dict]]:
    """Rows with a NUL or a byte-order mark in a field become rejects naming that field."""
    bad = np.zeros(len(frame), dtype=bool)
    where: dict[int, int] = {}
    for j, col in enumerate(frame.columns):
        values = frame[col]
        hit = np.zeros(len(frame), dtype=bool)
        for ch in INVISIBLE:
            hit |= values.str.contains(ch, regex=False, na=False).to_numpy(dtype=bool)
        for i in np.flatnonzero(hit & ~bad):
            where[int(i)] = j
        bad |= hit
    if not bad.any():
        return frame, rows, []
    for i in list(where):                  # a header line after a BOM is judged as a header
        if header_row(frame.iloc[i:i + 1], names) == 0:
            bad[i] = False
            del where[i]
    cols = list(frame.columns)
    out = []
    for i, j in sorted(where.items()):
        rec = frame.iloc[i]
        value = str(rec.iloc[j])
        shown = ascii(value if len(value) <= 200 else value[:200] + "...")
        out.append({"row": int(rows[i]), "series": _text(rec.get("series")),
                    "ts": _text(rec.get("ts")), "field": names[j], "value": ascii(value)[1:-1],
                    "reason": f"row {int(rows[i])}: field {names[j]!r} = {shown}: holds a NUL "
                              f"byte or a byte-order mark (U+FEFF); rule: fields hold no "
                              f"invisible characters (the same id would become another series)",
                    "raw": json.dumps({names[k]: _field(rec.iloc[k]) for k in range(len(cols))})})
    keep = ~bad
    return frame.loc[keep].reset_index(drop=True), rows[keep], out


def _text(v) -> str:
    return "" if v is None or v is pd.NA else str(v)


def _field(v):
    """A field for a reject's ``raw`` JSON: a missing one (``pd.NA`` or None) is null."""
    return None if v is None or v is pd.NA else v


def _decode(line: bytes) -> str:
    return line.decode("utf-8", errors="replace").rstrip("\r")


def _count_message(line: bytes, n_fields: int, delimiter: str = ",") -> str:
    try:
        got = len(next(csv.reader([_decode(line)], delimiter=delimiter), []))
    except csv.Error:
        got = "an unreadable number of"
    return f"the line has {got} fields, the header has {n_fields}"


def _parse_fast(names: list[str], body: bytes, delimiter: str = ","
                ) -> tuple[pd.DataFrame, list[int]]:
    header = (delimiter.join(f'"{n}"' for n in names) + "\n").encode("utf-8")
    bad: list[int] = []

    def invalid(row) -> str:
        bad.append(row.number - 2)          # pyarrow numbers lines from 1, the header is line 1
        return "skip"

    table = pacsv.read_csv(
        io.BytesIO(header + body),
        read_options=pacsv.ReadOptions(use_threads=False, block_size=max(1 << 20, len(body) + 64)),
        parse_options=pacsv.ParseOptions(delimiter=delimiter, invalid_row_handler=invalid,
                                          ignore_empty_lines=False, newlines_in_values=False),
        convert_options=pacsv.ConvertOptions(column_types={n: pa.string() for n in names},
                                             null_values=[""], strings_can_be_null=True,
                                             quoted_strings_can_be_null=True))
    # Arrow-backed text (``string[pyarrow]``, an empty field is ``pd.NA``): validation reads
    # such columns in C (blank test, number cast, series codes) instead of one Python object per
    # field; the values, blanks and reject texts are those of object columns holding None
    # (tests/test_ingest_same.py)
    text = {pa.string(): TEXT_DTYPE}.get
    frame = pd.DataFrame({f"c{j}": table.column(j).to_pandas(types_mapper=text)
                          for j in range(table.num_columns)})
    return frame, sorted(bad)


def _parse_slow(names, body, starts, nl, line_rows, blank, delimiter=","):
    """One line at a time with the standard csv module (for chunks pyarrow refuses)."""
    records, keep, rejects = [], np.zeros(len(nl), dtype=bool), []
    n = len(names)
    for i in range(len(nl)):
        raw = body[starts[i]:nl[i]]
        if blank[i]:
            keep[i] = True
            records.append([None] * n)
            continue
        try:
            text = raw.decode("utf-8").rstrip("\r")
        except UnicodeDecodeError:
            rejects.append(_line_reject(line_rows[i], _decode(raw), "not valid UTF-8 text"))
            continue
        try:
            fields = next(csv.reader([text], delimiter=delimiter), [])
        except csv.Error as exc:
            rejects.append(_line_reject(line_rows[i], text, f"not a CSV line ({exc})"))
            continue
        if len(fields) != n:
            rejects.append(_line_reject(line_rows[i], text,
                                        f"the line has {len(fields)} fields, the header has {n}"))
            continue
        keep[i] = True
        records.append([f if f != "" else None for f in fields])
    frame = pd.DataFrame(records, columns=[f"c{j}" for j in range(n)], dtype=object)
    return frame, keep, rejects


def find_line_ends(fh, offset: int, size: int, max_rows: int) -> tuple[int, int]:
    """``(end, lines)``: the byte offset just past the ``max_rows``-th line break after
    ``offset`` (or past the last one before ``size``) and the number of lines up to it."""
    end, pos, found = offset, offset, 0
    fh.seek(offset)
    while pos < size and found < max_rows:
        block = fh.read(min(READ_STEP, size - pos))
        if not block:
            break
        nl = np.flatnonzero(np.frombuffer(block, dtype=np.uint8) == 10)
        need = max_rows - found
        if nl.size >= need:
            return pos + int(nl[need - 1]) + 1, max_rows
        if nl.size:
            end = pos + int(nl[-1]) + 1
        found += int(nl.size)
        pos += len(block)
    return end, found


def read_csv_chunk(path, names: list[str], canon: list[str], offset: int, rows_before: int,
                   max_rows: int, final: bool, delimiter: str = ","
                   ) -> tuple[pd.DataFrame, np.ndarray, pd.DataFrame, int, int, list[str]]:
    """Read up to ``max_rows`` whole lines from ``offset`` (fields separated by ``delimiter``).

    Returns ``(frame, rows, rejects, n_lines, new_offset, names)``. With ``final=True`` the end
    of the file also ends the last line (the file is complete); otherwise a partial last line
    is left for the next read. A line repeating the header ends the chunk: it is a reject,
    and ``names`` is the column order for the lines after it (``names`` as given otherwise;
    the caller renames them with :func:`monitor.ingest.base.canonical_names`).
    """
    size = os.stat(path).st_size
    with open(path, "rb") as fh:
        end, found = find_line_ends(fh, offset, size, max_rows)
        if final and found < max_rows and end < size:
            end = size
        if end <= offset:
            return (pd.DataFrame({c: pd.Series(dtype=object) for c in canon}),
                    np.zeros(0, dtype=np.int64), empty_rejects(), 0, offset, list(names))
        fh.seek(offset)
        body = fh.read(end - offset)
    k = header_line(body, names, delimiter)
    if k is None:
        frame, rows, rejects, n_lines = parse_lines(names, canon, body, rows_before + 1,
                                                    delimiter)
        return frame, rows, rejects, n_lines, end, list(names)
    # the chunk ends just after the header line; the lines after it follow its order
    start, cut, reject, after = header_split(body, k, names, rows_before, delimiter)
    frame, rows, rejects, _ = parse_lines(names, canon, body[:start], rows_before + 1,
                                          delimiter)
    rejects = pd.concat([rejects, pd.DataFrame([reject], columns=REJECT_COLUMNS)],
                        ignore_index=True)
    return frame, rows, rejects, k + 1, offset + cut, after


def header_split(body: bytes, k: int, names: list[str], rows_before: int,
                 delimiter: str = ","):
    """Line ``k`` of ``body`` repeats the header (:func:`header_line`): returns ``(start,
    cut, reject, names_after)``: the byte offsets of that line and just after it, its reject
    (field ``header``, row ``rows_before + k + 1``) and the column order of the lines after
    it (``names`` when the order is unchanged)."""
    nl = np.flatnonzero(np.frombuffer(body, dtype=np.uint8) == 10)
    start = int(nl[k - 1]) + 1 if k else 0
    cut = int(nl[k]) + 1 if k < nl.size else len(body)
    text = _decode(body[start:cut].rstrip(b"\n"))
    new = _fields(text, delimiter)
    same = new == [n.strip() for n in names]
    why = ("it repeats the header line (rule: the header is the first line only); the column "
           "order is unchanged" if same else
           f"it is a header line with another column order (rule: the header is the first "
           f"line only); the lines after it are read as {new}, not {list(names)}")
    reject = {**_line_reject(rows_before + k + 1, text, why), "field": "header"}
    return start, cut, reject, list(names) if same else new


def parse_lines_with_headers(names: list[str], columns, body: bytes, first_row: int,
                             delimiter: str = ","):
    """:func:`parse_lines` over a body that may repeat the header line (concatenated
    exports): each such line is a reject and the lines after it are read in its column
    order, exactly as :func:`read_csv_chunk` does chunk by chunk. ``columns`` maps names to
    the canonical ones (:func:`monitor.ingest.base.canonical_names`). Returns ``(frame, rows,
    rejects, n_lines, names_after)``."""
    from monitor.ingest.base import canonical_names

    frames, rows, rejects, n = [], [], [], 0
    names = list(names)
    while True:
        k = header_line(body, names, delimiter)
        if k is None:
            f, r, rej, m = parse_lines(names, canonical_names(names, columns), body,
                                       first_row + n, delimiter)
            frames.append(f), rows.append(r), rejects.append(rej)
            n += m
            break
        start, cut, reject, after = header_split(body, k, names, first_row + n - 1, delimiter)
        f, r, rej, _ = parse_lines(names, canonical_names(names, columns), body[:start],
                                   first_row + n, delimiter)
        frames.append(f), rows.append(r)
        rejects += [rej, pd.DataFrame([reject], columns=REJECT_COLUMNS)]
        n += k + 1
        names, body = after, body[cut:]
    frame = pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0]
    rej = [x for x in rejects if len(x)]
    return (frame, np.concatenate(rows), pd.concat(rej, ignore_index=True) if rej else
            rejects[0], n, names)


def _fields(text: str, delimiter: str = ",") -> list[str]:
    """The fields of one line, stripped of spaces (a leading byte-order mark dropped)."""
    try:
        return [f.strip() for f in next(csv.reader([text.lstrip("\ufeff")], delimiter=delimiter,
                                                   skipinitialspace=True), [])]
    except csv.Error:
        return []


def header_line(body: bytes, names: list[str], delimiter: str = ",") -> int | None:
    """Index of the first line of ``body`` whose fields are the column names in any order
    (spaces, quotes and a byte-order mark allowed), or None.

    Lines are first screened with numpy on their length and first bytes, so a chunk of a
    million data lines costs milliseconds; only the few lines that pass are split.
    """
    wanted = sorted(n.strip() for n in names)
    arr = np.frombuffer(body, dtype=np.uint8)
    if not arr.size:
        return None
    nl = np.flatnonzero(arr == 10)
    starts = np.concatenate([[0], nl + 1])
    stops = np.concatenate([nl, [arr.size]])
    keep = starts < arr.size
    starts, stops = starts[keep], stops[keep]
    base = len(delimiter.join(wanted).encode("utf-8"))
    length = stops - starts
    near = (length >= base) & (length <= base + 4 * len(wanted) + 5)
    if not near.any():
        return None
    width = 8
    padded = np.concatenate([arr, np.zeros(width, dtype=np.uint8)])
    head = padded[starts[near][:, None] + np.arange(width)]
    hit = np.zeros(head.shape[0], dtype=bool)
    for name in wanted:
        pre = np.frombuffer(name.encode("utf-8")[:2], dtype=np.uint8)
        for at in range(0, width - pre.size + 1):
            hit |= (head[:, at:at + pre.size] == pre).all(axis=1)
    for i in np.flatnonzero(near)[hit]:
        text = _decode(body[starts[i]:stops[i]])
        if sorted(_fields(text, delimiter)) == wanted:
            return int(i)
    return None


def header_row(frame: pd.DataFrame, names: list[str]) -> int | None:
    """Index of the first row whose fields are the column names (in any order), or None."""
    if not len(frame) or not len(frame.columns):
        return None
    wanted = sorted(n.strip() for n in names)
    first = frame.iloc[:, 0].astype("string").str.strip().str.lstrip("\ufeff")
    for i in np.flatnonzero(first.isin(wanted).to_numpy(dtype=bool)):
        values = [None if v is None or v is pd.NA else str(v).strip().lstrip("\ufeff")
                  for v in frame.iloc[i]]
        if None not in values and sorted(values) == wanted:
            return int(i)
    return None


def read_header(path, where: str, final: bool, delimiter: str | None = None
                ) -> tuple[list[str], int] | None:
    """Header names (separated by ``delimiter``, else the sniffed separator) and the byte
    offset after the header line (None: no complete line yet)."""
    with open(path, "rb") as fh:
        block = fh.readline(MAX_HEADER_BYTES + 1)
    cut = block.find(b"\n")
    if cut < 0:
        if len(block) > MAX_HEADER_BYTES:
            raise SourceError(f"{where}: the header line is longer than {MAX_HEADER_BYTES} bytes "
                              f"(no line break in its first {MAX_HEADER_BYTES} bytes); rule: a "
                              f"header of at most 1 MiB. Is this a CSV file with a header line?")
        if not block or not final:
            return None
        cut = len(block) - 1
    return parse_header(block[:cut + 1], where, delimiter), cut + 1
