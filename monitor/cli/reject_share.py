"""A run whose input is mostly rejected fails loudly (issue 16, item 3).

Before, day-first dates (``13/01/2023``) gave "0 processed, 800 rejected" and exit status 0 for
``elmon replay`` and ``elmon ingest``. Now, when the share of rejected rows exceeds
``--max-reject-share`` (default 0.5), the command still writes everything (outputs, rejects with
their reasons) but ends with one line naming the count, the first rejected row (row, field,
value, reason), a hint for the common causes, and exit status 2.
"""

from __future__ import annotations

import argparse
import re

from monitor.errors import ValidationError

#: Default largest share of rejected rows a run may have and still exit 0.
DEFAULT_MAX_REJECT_SHARE = 0.5

_DAY_FIRST = re.compile(r"^\s*\d{1,2}[./-]\d{1,2}[./-]\d{2,4}(\s|$)")


def share(text: str) -> float:
    """argparse type: a share in [0, 1].

    >>> share("0.25")
    0.25
    >>> share("2")
    Traceback (most recent call last):
    ...
    argparse.ArgumentTypeError: 2 is not a share between 0 and 1
    """
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text} is not a number") from None
    if not 0.0 <= v <= 1.0:
        raise argparse.ArgumentTypeError(f"{text} is not a share between 0 and 1")
    return v


def add_option(p: argparse.ArgumentParser) -> None:
    p.add_argument("--max-reject-share", type=share, default=DEFAULT_MAX_REJECT_SHARE,
                   metavar="SHARE",
                   help="exit with status 2 and a one-line summary when more than this share "
                        f"of the rows is rejected (default {DEFAULT_MAX_REJECT_SHARE}; 1 "
                        "turns the check off); outputs are written either way")


def hint(field: str | None, value: str | None) -> str:
    """Advice for the first rejected value's common causes ('' when none applies).

    >>> hint("ts", "13/01/2023")
    " Day-first or slashed dates are not read as ISO 8601: state their format with --ts-format '%d/%m/%Y' (or [columns] ts_format), or write ts as ISO 8601 (2023-01-13 or 2023-01-13T00:00:00Z) or epoch seconds."
    >>> "--ts-format '%d.%m.%y %H:%M' " in hint("ts", "21.02.23 10:30")
    True
    >>> hint("price", "3,40")
    ' A decimal comma is not read: write 3.40.'
    """
    v = "" if value is None else str(value)
    if field == "ts" and _DAY_FIRST.match(v):
        return (f" Day-first or slashed dates are not read as ISO 8601: state their format with "
                f"--ts-format {guess_format(v)} (or [columns] ts_format), or write ts as ISO 8601 "
                f"(2023-01-13 or 2023-01-13T00:00:00Z) or epoch seconds.")
    if field in ("price", "quantity") and re.fullmatch(r"\s*-?\d+,\d+\s*", v):
        return f" A decimal comma is not read: write {v.strip().replace(',', '.')}."
    return ""


def guess_format(value: str) -> str:
    """The ``--ts-format`` a dotted, slashed or dashed date most likely has, quoted for a shell
    (day first unless the second number cannot be a month; both when either could be).

    >>> guess_format("13/01/2023"), guess_format("01/13/2023"), guess_format("01-02-2023")
    ("'%d/%m/%Y'", "'%m/%d/%Y'", "'%d-%m-%Y' (day first) or '%m-%d-%Y' (month first)")
    """
    m = re.match(r"^\s*(\d{1,2})([./-])(\d{1,2})[./-](\d{2,4})(?:[ T](\d{1,2}:\d{2}(:\d{2})?))?",
                 value)
    if m is None:
        return "'%d/%m/%Y'"
    a, sep, b, year, clock, secs = m.groups()
    tail = (" %H:%M:%S" if secs else " %H:%M") if clock else ""
    y = "%Y" if len(year) == 4 else "%y"
    day_first, month_first = f"'%d{sep}%m{sep}{y}{tail}'", f"'%m{sep}%d{sep}{y}{tail}'"
    if int(b) > 12:
        return month_first
    if int(a) > 12:
        return day_first
    return f"{day_first} (day first) or {month_first} (month first)"


def renamed(args) -> dict[str, str]:
    """The log's own names of the fields mapped with ``--ts-col`` etc. (``{field: column}``)."""
    out = {}
    for field in ("ts", "price", "quantity"):
        col = getattr(args, f"{field}_col", None)
        if col and col != field:
            out[field] = col
    series = getattr(args, "series_col", None) or []
    if len(series) == 1 and series[0] != "series":
        out["series"] = series[0]
    return out


def check(command: str, rows: int, rejected: int, first: dict | None, limit: float,
          where: str, columns: dict[str, str] | None = None) -> None:
    """Raise :class:`ValidationError` when ``rejected / rows > limit``.

    ``first`` is the first rejected row (``row, field, value, reason``), ``where`` says where
    all rejects can be read, ``columns`` the log's own name of a renamed field (named beside it).

    >>> check("replay", 800, 800, {"row": 2, "field": "ts", "value": "13/01/2023",
    ...       "reason": "not a time"}, 0.5, "out/rejects.csv")
    Traceback (most recent call last):
    ...
    monitor.errors.ValidationError: 800 of 800 rows rejected (100%), more than --max-reject-share 0.5; first: row 2, field 'ts' = '13/01/2023': not a time. Day-first ...
    >>> check("replay", 800, 10, None, 0.5, "out/rejects.csv")    # 1%: fine
    """
    if rows <= 0 or rejected / rows <= limit:
        return
    msg = (f"{rejected:,} of {rows:,} rows rejected ({rejected / rows:.0%}), more than "
           f"--max-reject-share {limit:g}")
    if first:
        reason = str(first.get("reason") or "")
        reason = re.sub(r"^row \d+: field '[^']*' = '[^']*': ", "", reason)
        field = first.get("field")
        own = (columns or {}).get(field)
        named = f"field {field!r}" + (f" (column {own!r} of the log)" if own else "")
        msg += f"; first: row {first.get('row')}, {named} = {str(first.get('value'))!r}: {reason}."
        msg += hint(first.get("field"), first.get("value"))
    msg += f" All rejects with reasons: {where}."
    raise ValidationError(msg, field=(first or {}).get("field"), value=(first or {}).get("value"))


def first_from_csv(path) -> dict | None:
    """The first data row of a replay's ``rejects.csv`` (lowest row number), or ``None``."""
    import pandas as pd

    try:
        df = pd.read_csv(path, dtype=str, keep_default_na=False)
    except (OSError, pd.errors.EmptyDataError):
        return None
    if not len(df):
        return None
    if "row" in df:
        df = df.assign(_r=pd.to_numeric(df["row"], errors="coerce")).sort_values("_r")
    return df.iloc[0].to_dict()


def first_from_store(db, source: str) -> dict | None:
    """The first rejected row of ``source`` in the store (lowest row number), or ``None``."""
    import pandas as pd

    from monitor import store as mstore

    with mstore.open_store(db, readonly=True) as store:
        df = mstore.list_rejects(store, source=source)
    if not len(df):
        return None
    df = df.assign(_r=pd.to_numeric(df["row"], errors="coerce")).sort_values("_r")
    return {k: (None if v is None else str(v)) for k, v in df.iloc[0].to_dict().items()}
