"""Shared pieces of the scenario generators: the result type, time axes, truth tables, writers.

Every scenario returns a :class:`Simulation`, a 3-tuple ``(log, changes, path)``:

- ``log``: the observation log in the DESIGN.md format, columns ``series, ts, price, quantity``
  followed by the scenario's controls; ``ts`` is ISO 8601 UTC with a ``Z`` suffix. Rows are in
  arrival order: by time, then by series.
- ``changes``: the known change points, columns :data:`CHANGE_COLUMNS`. ``ts`` is the first
  affected row; for a stretch (drift, flat prices, stock-out, unit error, outage) ``end_ts`` is
  the last affected timestamp (inclusive). ``beta_before`` / ``beta_after`` are filled for
  ``elasticity_change`` and ``gradual_drift`` and empty otherwise.
- ``path``: the true model per log row, columns :data:`PATH_COLUMNS`, in the log's row order:

      E[log q_t] = intercept_t + beta_t * log p_t + c' z_t

  (for Poisson counts the same right-hand side is ``log E[q_t]``), with ``p_t`` the true price
  (a row logged in cents still has the true price in the model) and ``z_t`` the controls whose
  coefficients ``c`` are in ``Simulation.meta["coefficients"]``.
"""

from __future__ import annotations

import io
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from monitor.errors import ConfigError

CHANGE_KINDS = ("elasticity_change", "level_shift", "gradual_drift", "unit_error", "flat_price",
                "outage", "stockout")
CHANGE_COLUMNS = ("series", "ts", "kind", "end_ts", "beta_before", "beta_after", "note")
PATH_COLUMNS = ("series", "ts", "beta", "intercept")
BAD_COLUMNS = ("row", "reason_kind", "field", "value", "series", "ts", "note")

#: Length of one time step in nanoseconds, by the ``freq`` names the scenarios accept.
STEP_NS = {"D": 86_400 * 10**9, "h": 3_600 * 10**9}
NS_PER_DAY = 86_400 * 10**9


class Simulation(tuple):
    """A scenario's output: the tuple ``(log, changes, path)`` plus ``bad`` and ``meta``.

    Unpacks as three values (``log, changes, path = sim``). ``bad`` is the table of deliberately
    bad rows (columns :data:`BAD_COLUMNS`) or ``None``; ``meta`` is a plain dict with the
    scenario's name, seed, sizes, control names and their true coefficients.
    """

    def __new__(cls, log: pd.DataFrame, changes: pd.DataFrame, path: pd.DataFrame, *,
                bad: pd.DataFrame | None = None, meta: dict | None = None):
        self = super().__new__(cls, (log, changes, path))
        self.bad = bad
        self.meta = dict(meta or {})
        return self

    def __getnewargs_ex__(self):
        return tuple(self), {"bad": self.bad, "meta": self.meta}

    @property
    def log(self) -> pd.DataFrame:
        return self[0]

    @property
    def changes(self) -> pd.DataFrame:
        return self[1]

    @property
    def path(self) -> pd.DataFrame:
        return self[2]


# ---------------------------------------------------------------------------------- validation

def check_int(name: str, value, minimum: int = 1, maximum: int | None = None,
              why: str = "") -> int:
    """Return ``value`` as int or raise ConfigError naming the parameter and the range."""
    why = f" ({why})" if why else ""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise ConfigError(f"{name} = {value!r}: must be an integer >= {minimum}{why}")
    if value < minimum or (maximum is not None and value > maximum):
        upper = f" and <= {maximum}" if maximum is not None else ""
        raise ConfigError(f"{name} = {value!r}: must be >= {minimum}{upper}{why}")
    return int(value)


def check_float(name: str, value, low: float, high: float) -> float:
    """Return ``value`` as float or raise ConfigError naming the parameter and the range."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ConfigError(f"{name} = {value!r}: must be a number in [{low}, {high}]") from None
    if not (low <= v <= high):
        raise ConfigError(f"{name} = {value!r}: must be in [{low}, {high}]")
    return v


def check_choice(name: str, value, choices) -> str:
    if value not in choices:
        raise ConfigError(f"{name} = {value!r}: must be one of {', '.join(map(repr, choices))}")
    return value


# ---------------------------------------------------------------------------------- time axis

def time_axis(start: str, length: int, freq: str) -> np.ndarray:
    """Timestamps ``start + k * step`` for k = 0..length-1, as int64 nanoseconds since the epoch.

    >>> iso_z(time_axis("2024-01-01", 2, "h")).tolist()
    ['2024-01-01T00:00:00Z', '2024-01-01T01:00:00Z']
    """
    check_choice("freq", freq, tuple(STEP_NS))
    try:
        t0 = pd.Timestamp(start)
    except (TypeError, ValueError):
        raise ConfigError(f"start = {start!r}: not an ISO 8601 date or timestamp") from None
    t0 = t0.tz_localize("UTC") if t0.tzinfo is None else t0.tz_convert("UTC")
    return np.int64(t0.value) + np.arange(length, dtype=np.int64) * STEP_NS[freq]


def iso_z(ns: np.ndarray) -> np.ndarray:
    """int64 nanoseconds since the epoch -> ISO 8601 UTC strings with a ``Z`` suffix (seconds)."""
    return np.datetime_as_string(np.asarray(ns, dtype="datetime64[ns]"), unit="s",
                                 timezone="UTC")


def weekday(ns: np.ndarray) -> np.ndarray:
    """Day of week, Monday = 0 (1970-01-01 was a Thursday)."""
    return (np.asarray(ns) // NS_PER_DAY + 3) % 7


def slug(text: str) -> str:
    """``"Harbor St"`` -> ``"harbor-st"``."""
    return re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-")


def runs(start: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """Boolean (S, T) mask covering ``[t, t + lengths[s, t])`` wherever ``start[s, t]`` is true.

    >>> runs(np.array([[0, 1, 0, 0, 0]], bool), np.full((1, 5), 2)).astype(int).tolist()
    [[0, 1, 1, 0, 0]]
    """
    t = np.arange(start.shape[1])
    ends = np.where(start, t + lengths, 0)
    return np.maximum.accumulate(ends, axis=1) > t


# ---------------------------------------------------------------------------------- tables

def long_table(series: list[str], ts_ns: np.ndarray, columns: dict[str, np.ndarray],
               keep: np.ndarray | None = None) -> pd.DataFrame:
    """Stack (S, T) arrays into a long table ordered by time, then series.

    ``series`` must be sorted; ``keep`` (S, T) marks the rows that exist (a meter outage removes
    rows). Columns are emitted in the order given, after ``series`` and ``ts``.
    """
    S, T = len(series), len(ts_ns)
    if keep is None:
        keep = np.ones((S, T), dtype=bool)
    k = keep.T.ravel()
    s_idx = np.broadcast_to(np.arange(S), (T, S)).ravel()[k]
    t_idx = np.broadcast_to(np.arange(T)[:, None], (T, S)).ravel()[k]
    # strings go through arrow's take (an object array costs ~1 s per million rows)
    data = {"series": pa.array(list(series), pa.string()).take(pa.array(s_idx)),
            "ts": pa.array(iso_z(ts_ns), pa.string()).take(pa.array(t_idx))}
    for name, arr in columns.items():
        data[name] = np.ascontiguousarray(np.asarray(arr).T).ravel()[k]
    return pa.table(data).to_pandas()


def changes_frame(rows: list[dict]) -> pd.DataFrame:
    """The change-point table, sorted by ``ts`` then ``series``, with every CHANGE_COLUMN."""
    df = pd.DataFrame(rows, columns=list(CHANGE_COLUMNS))
    for kind in df["kind"]:
        check_choice("kind", kind, CHANGE_KINDS)
    df["beta_before"] = df["beta_before"].astype("float64")
    df["beta_after"] = df["beta_after"].astype("float64")
    for col in ("series", "ts", "kind", "end_ts", "note"):
        df[col] = df[col].astype(object).where(df[col].notna(), "").astype(str)
    return df.sort_values(["ts", "series"], kind="stable").reset_index(drop=True)


def change(series: str, ts_ns: int, kind: str, *, end_ns: int | None = None,
           beta_before: float = np.nan, beta_after: float = np.nan, note: str = "") -> dict:
    """One row of the change-point table (timestamps given in ns, written ISO 8601 Z)."""
    return {"series": series, "ts": str(iso_z(np.int64(ts_ns))), "kind": kind,
            "end_ts": "" if end_ns is None else str(iso_z(np.int64(end_ns))),
            "beta_before": round(float(beta_before), 6), "beta_after": round(float(beta_after), 6),
            "note": note}


# ---------------------------------------------------------------------------------- writers

def table_bytes(df: pd.DataFrame, header: bool = True) -> bytes:
    """CSV bytes of ``df`` (pyarrow writer, shortest round-trip floats, no quotes if possible).

    Missing values (NaN, None) are written as empty fields.
    """
    table = pa.Table.from_pandas(df, preserve_index=False)
    buf = io.BytesIO()
    if header:  # arrow quotes header names always; plain names are written plain
        names = [str(c) for c in df.columns]
        if any(ch in n for n in names for ch in ',"\r\n'):
            raise ConfigError(f"column names {names!r}: a name holds a comma, quote or line break")
        buf.write((",".join(names) + "\n").encode())
    try:  # plain fields, unless a value holds a comma, a quote or a line break
        pacsv.write_csv(table, buf, pacsv.WriteOptions(include_header=False,
                                                      quoting_style="none"))
    except pa.ArrowInvalid:  # some value needs quotes: quote just those (csv.QUOTE_MINIMAL)
        text = df.to_csv(index=False, header=header, lineterminator="\n", na_rep="")
        return text.encode()
    return buf.getvalue()


def write_table(df: pd.DataFrame, path: str | Path) -> Path:
    """Write ``df`` as CSV or Parquet, chosen by the suffix of ``path`` (.csv / .parquet)."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".csv", ".parquet"):
        raise ConfigError(f"output {str(path)!r}: suffix must be .csv or .parquet")
    path.parent.mkdir(parents=True, exist_ok=True)
    if suffix == ".csv":
        path.write_bytes(table_bytes(df))
    else:
        pq.write_table(pa.Table.from_pandas(df, preserve_index=False), path)
    return path


def truth_companions(truth: str | Path) -> tuple[Path, Path, Path]:
    """``TRUTH.csv`` -> (``TRUTH.csv``, ``TRUTH_path.csv``, ``TRUTH_bad.csv``)."""
    truth = Path(truth)
    return (truth, truth.with_name(f"{truth.stem}_path{truth.suffix}"),
            truth.with_name(f"{truth.stem}_bad{truth.suffix}"))


def write_outputs(sim: Simulation, out: str | Path, truth: str | Path | None = None
                  ) -> dict[str, Path]:
    """Write the log to ``out`` and, when ``truth`` is given, the truth files beside it.

    Returns the paths written, keyed ``log``, ``truth``, ``path`` and (scenarios with bad rows)
    ``bad``. The log's format follows the suffix of ``out``, the truth files' that of ``truth``.
    A scenario whose log holds text in numeric columns (``baddata``) can only be written as CSV.
    """
    out = Path(out)
    if sim.meta.get("csv_only") and out.suffix.lower() != ".csv":
        raise ConfigError(f"output {str(out)!r}: scenario {sim.meta.get('scenario')!r} writes "
                          "CSV only (its bad values cannot be stored in typed Parquet columns)")
    if truth is not None and Path(truth).resolve() == out.resolve():
        raise ConfigError(f"--truth {str(truth)!r} is the same file as --out")
    written = {"log": write_table(sim.log, out)}
    if truth is not None:
        written.update(write_truth(sim, truth))
    return written


def write_truth(sim: Simulation, truth: str | Path) -> dict[str, Path]:
    """Write the change points to ``truth`` and the true path (and bad rows) beside it."""
    t_changes, t_path, t_bad = truth_companions(truth)
    written = {"truth": write_table(sim.changes, t_changes),
               "path": write_table(sim.path, t_path)}
    if sim.bad is not None:
        written["bad"] = write_table(sim.bad, t_bad)
    return written
