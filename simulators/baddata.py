"""Bad data: a clean retail log with every kind of bad row mixed in, for ingest tests.

The good rows come from :func:`simulators.retail.retail` without anomalies. Then, at seeded
random positions, rows are spoiled in place or added:

==================== =================================================================
reason_kind          what the row holds
==================== =================================================================
empty_field          an empty ``price``, ``quantity``, ``series`` or ``ts``
unparsable_number    a decimal comma (``4,49``) or words (``about 40``) in a number
non_positive_price   price ``0`` or negative
negative_quantity    a negative quantity
zero_quantity        quantity ``0`` (allowed by the log format, but it has no logarithm)
nan_value            ``nan`` / ``NaN`` in price or quantity
inf_value            ``inf`` / ``Infinity`` in price or quantity
bad_timestamp        no such date (``2024-02-30...``, month 13) or not a date at all
future_timestamp     a timestamp in 2099
duplicate_key        a second row with an existing ``series`` + ``ts`` (other quantity)
late_row             a valid row that arrives after a week of later rows of its series
unit_error           a price logged in cents (x100)
==================== =================================================================

Each bad row is listed in ``Simulation.bad`` (written as ``TRUTH_bad.csv``) with its 0-based
data row index in the output file (the header is not a data row), the field and the value.
Every other row is clean. All log columns are text, so the log is written as CSV only.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from monitor.errors import ConfigError
from simulators.base import BAD_COLUMNS, Simulation, changes_frame, check_int
from simulators.retail import retail

IN_PLACE = ("empty_field", "unparsable_number", "non_positive_price", "negative_quantity",
            "zero_quantity", "nan_value", "inf_value", "bad_timestamp", "future_timestamp",
            "unit_error")
BAD_KINDS = IN_PLACE + ("duplicate_key", "late_row")


def _spoil(kind: str, i: int, row: dict) -> tuple[str, str]:
    """Spoil ``row`` in place for the i-th use of ``kind``; return (field, new value)."""
    pick = {
        "empty_field": [("price", ""), ("quantity", ""), ("series", ""), ("ts", "")],
        "unparsable_number": [("price", row["price"].replace(".", ",")),
                              ("quantity", "about " + row["quantity"].split(".")[0])],
        "non_positive_price": [("price", "0"), ("price", "-" + row["price"])],
        "negative_quantity": [("quantity", "-" + row["quantity"])],
        "zero_quantity": [("quantity", "0")],
        "nan_value": [("price", "nan"), ("quantity", "NaN")],
        "inf_value": [("price", "inf"), ("quantity", "Infinity")],
        "bad_timestamp": [("ts", "2024-02-30" + row["ts"][10:]), ("ts", "yesterday"),
                          ("ts", row["ts"][:5] + "13" + row["ts"][7:])],
        "future_timestamp": [("ts", "2099" + row["ts"][4:])],
        "unit_error": [("price", f"{round(float(row['price']) * 100.0, 2):g}")],
    }[kind]
    field, value = pick[i % len(pick)]
    row[field] = value
    return field, value


def baddata(seed: int = 0, n_series: int = 2, length: int = 120, *, start: str = "2024-01-01",
            per_kind: int = 2) -> Simulation:
    """A clean daily retail log with ``per_kind`` bad rows of each kind in :data:`BAD_KINDS`.

    Parameters
    ----------
    seed : int
        Seed of numpy's ``default_rng`` (the good rows use the same seed).
    n_series : int
        Number of series (default 2).
    length : int
        Days per series before bad rows are added (default 120).
    start : str
        First timestamp (UTC).
    per_kind : int
        Bad rows of each kind (default 2).

    Returns
    -------
    Simulation
        ``(log, changes, path)`` with every log column as text, an empty change table, and
        ``bad`` with columns ``row, reason_kind, field, value, series, ts, note``.
    """
    n_series = check_int("n_series", n_series)
    length = check_int("length", length, minimum=40)
    per_kind = check_int("per_kind", per_kind, minimum=0, maximum=length // 4)
    good_sim = retail(seed, n_series, length, start=start, anomalies=False)
    good, good_path = good_sim.log, good_sim.path
    S, n = n_series, len(good)
    rng = np.random.default_rng([seed, 7])
    text = good.astype({c: str for c in good.columns}).to_dict("records")

    n_bad = per_kind * len(BAD_KINDS)
    lo, hi = 2 * S, n - 8 * S  # late rows move a week ahead; keep room at both ends
    if hi - lo < 3 * n_bad:
        raise ConfigError(f"length = {length}: too short for {n_bad} bad rows; use a longer log")
    picks = rng.choice(np.arange(lo, hi), size=n_bad, replace=False)
    order = [(float(j), j, j) for j in range(n)]  # (sort key, text row, path row)
    bad, k = {}, 0
    for kind in BAD_KINDS:
        for i in range(per_kind):
            j = int(picks[k])
            k += 1
            if kind in IN_PLACE:
                series, ts = text[j]["series"], text[j]["ts"]
                field, value = _spoil(kind, i, text[j])
                bad[j] = (kind, field, value, series, ts, _NOTES.get(kind, ""))
            elif kind == "duplicate_key":
                dup = dict(text[j], quantity=f"{round(float(text[j]['quantity']) * 1.1, 3)}")
                text.append(dup)
                order.append((j + 2 * S + 0.5, len(text) - 1, j))  # path of the copied row
                bad[len(text) - 1] = (kind, "ts", dup["ts"], dup["series"], dup["ts"],
                                      "same series and ts as an earlier row; other quantity")
            else:  # late_row: the valid row moves a week (7 * S rows) later
                order[j] = (j + 7 * S + 0.25, j, j)
                bad[j] = (kind, "ts", text[j]["ts"], text[j]["series"], text[j]["ts"],
                          "valid values; arrives after a week of later rows of its series")
    order.sort(key=lambda x: x[0])
    src = np.array([o[1] for o in order])
    path_src = np.array([o[2] for o in order])
    log = pd.DataFrame([text[j] for j in src], columns=list(good.columns), dtype=str)
    path = pd.DataFrame({"series": log["series"], "ts": log["ts"],
                         "beta": good_path["beta"].to_numpy()[path_src],
                         "intercept": good_path["intercept"].to_numpy()[path_src]})
    rows = [(pos,) + bad[j] for pos, j in enumerate(src) if j in bad]
    bad_df = pd.DataFrame(rows, columns=list(BAD_COLUMNS))
    meta = dict(good_sim.meta, scenario="baddata", csv_only=True, bad_kinds=list(BAD_KINDS),
                per_kind=per_kind)
    return Simulation(log, changes_frame([]), path, bad=bad_df, meta=meta)


_NOTES = {"zero_quantity": "quantity 0 is allowed by the log format but has no logarithm",
          "unit_error": "price logged in cents (x100); the series' other prices are in units",
          "future_timestamp": "timestamp in 2099: after any plausible clock",
          "bad_timestamp": "not a valid ISO 8601 timestamp"}
