"""The :class:`Store` connection, transactions, migrations and timestamp helpers.

Everything public here is re-exported by :mod:`monitor.store`, which documents the whole store.

Connections
-----------
A writer connection (``Store.open(path)``) sets ``journal_mode=WAL`` (kept in the file),
``synchronous=NORMAL`` (in WAL mode a committed transaction survives a killed process; only a
power cut can lose the last commits), ``foreign_keys=ON`` and a busy timeout (10 s by default),
then applies pending migrations. A reader (``open_store(path, readonly=True)``) opens the file
through a ``file:...?mode=ro`` URI with the same busy timeout: in WAL mode readers and the
writer do not block each other. Both connections run in autocommit mode
(``isolation_level=None``); :meth:`Store.atomic` is the only way to group writes.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import functools
import json
import math
import re
import sqlite3
import threading
from pathlib import Path
from typing import Any, Iterator, Sequence

import numpy as np
import pandas as pd
import sqlite_utils

from monitor.errors import StoreError, ValidationError
from monitor.store_schema import MIGRATIONS, MIGRATIONS_TABLE, SCHEMA_VERSION

#: Seconds a connection waits for a lock held by another writer before giving up.
DEFAULT_BUSY_TIMEOUT = 10.0

#: Columns that query frames always return as float64 (NULL -> NaN), even when all NULL.
FLOAT_COLUMNS = frozenset({"beta", "beta_se", "beta_lo", "beta_hi", "n_eff", "intercept",
                           "resid_sd", "innovation", "z", "price", "quantity", "low", "high",
                           "forgetting", "lag_seconds"})

_WHOLE_SECOND = re.compile(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ$")


# ---------------------------------------------------------------- timestamps and JSON

def _to_timestamp(value: Any) -> pd.Timestamp:
    """Parse one timestamp to a UTC :class:`pandas.Timestamp` (naive means UTC)."""
    if isinstance(value, (bool, np.bool_)):
        raise ValidationError(f"timestamp {value!r} is not a time", field="ts", value=value)
    try:
        if isinstance(value, (int, float, np.integer, np.floating)):
            stamp = pd.Timestamp(float(value), unit="s", tz="UTC")
        else:
            stamp = pd.Timestamp(value)
    except (ValueError, TypeError, OverflowError) as exc:
        raise ValidationError(f"timestamp {value!r} is not ISO 8601 or epoch seconds ({exc})",
                              field="ts", value=value) from None
    if stamp is pd.NaT:
        raise ValidationError(f"timestamp {value!r} is empty", field="ts", value=value)
    return stamp.tz_localize("UTC") if stamp.tzinfo is None else stamp.tz_convert("UTC")


def format_ts(value: Any) -> str:
    """Canonical data timestamp: ISO 8601 UTC, ``Z`` suffix, microseconds only when present.

    Accepts ISO strings (with an offset, ``Z`` or naive = UTC), datetimes, pandas/numpy
    timestamps and epoch seconds.

    >>> format_ts("2024-03-01 12:00:00+01:00")
    '2024-03-01T11:00:00Z'
    >>> format_ts(1709294400.25)
    '2024-03-01T12:00:00.250000Z'
    """
    if isinstance(value, str) and _WHOLE_SECOND.match(value):
        return value
    stamp = _to_timestamp(value)
    if stamp.microsecond or stamp.nanosecond:
        return stamp.strftime("%Y-%m-%dT%H:%M:%S.%fZ")
    return stamp.strftime("%Y-%m-%dT%H:%M:%SZ")


def format_ts_array(values: Any, field: str = "ts") -> np.ndarray:
    """Vectorized :func:`format_ts` over a column; returns an object array of strings.

    Raises :class:`ValidationError` naming the first value that is empty or does not parse.
    """
    col = values if isinstance(values, pd.Series) else pd.Series(values)
    col = col.reset_index(drop=True)
    if pd.api.types.is_datetime64_any_dtype(col.dtype):
        stamps = col
    elif pd.api.types.is_numeric_dtype(col.dtype) and not pd.api.types.is_bool_dtype(col.dtype):
        stamps = pd.to_datetime(col.astype("float64"), unit="s", utc=True)
    else:
        text = col.astype(object)
        is_str = np.fromiter((isinstance(v, str) for v in text), bool, len(text))
        if is_str.all() and col.astype(str).str.match(_WHOLE_SECOND.pattern).all():
            return text.to_numpy(object)
        try:
            if is_str.all():
                stamps = pd.to_datetime(text, utc=True, format="ISO8601", errors="coerce")
            else:   # datetimes, Timestamps or a mixture: one at a time, each message exact
                stamps = pd.Series([_to_timestamp(v) for v in text], dtype="datetime64[ns, UTC]")
        except (ValueError, TypeError):
            stamps = pd.Series([_to_timestamp(v) for v in text], dtype="datetime64[ns, UTC]")
        bad = stamps.isna().to_numpy()
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise ValidationError(f"{field} {text[i]!r} at position {i} is not an ISO 8601 "
                                  f"timestamp", field=field, value=text[i], row=i)
    if stamps.dt.tz is not None:
        stamps = stamps.dt.tz_convert("UTC").dt.tz_localize(None)
    arr = stamps.to_numpy("datetime64[ns]")
    bad = np.isnat(arr)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise ValidationError(f"{field} at position {i} is empty (NaT)", field=field, row=i)
    # batches repeat timestamps (every series at the same hour): format each distinct one once
    uniq, inverse = np.unique(arr, return_inverse=True)
    secs = uniq.astype("datetime64[s]")
    whole = secs == uniq
    text = np.char.add(np.datetime_as_string(secs, unit="s"), "Z").astype(object)
    if not whole.all():
        frac = uniq[~whole].astype("datetime64[us]")
        text[~whole] = np.char.add(np.datetime_as_string(frac, unit="us"), "Z")
    return text[inverse.reshape(-1)]


def wall_ts(value: Any = None) -> str:
    """Wall-clock timestamp, fixed width ``YYYY-MM-DDTHH:MM:SS.ffffffZ``; now when ``None``.

    Wall times are compared as text in SQL (``next_attempt_at <= ?``), so they always carry
    six fractional digits.

    >>> wall_ts("2024-05-01T08:30:00Z")
    '2024-05-01T08:30:00.000000Z'
    """
    stamp = pd.Timestamp.now(tz="UTC") if value is None else _to_timestamp(value)
    return stamp.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def utc_now() -> str:
    """The current wall-clock time as :func:`wall_ts` text."""
    return wall_ts(None)


def parse_ts(value: Any) -> pd.Timestamp:
    """Parse a stored (or any accepted) timestamp into a UTC :class:`pandas.Timestamp`."""
    return _to_timestamp(value)


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, (pd.Timestamp, dt.datetime, np.datetime64)):
        return format_ts(obj)
    raise TypeError(f"{type(obj).__name__} is not JSON serializable")


def to_json(obj: Any, *, finite: bool = False) -> str | None:
    """Compact JSON text (sorted keys); ``None`` stays ``None``.

    With ``finite=True`` every NaN or infinity becomes ``null`` (for payloads sent out);
    otherwise they are written as ``NaN``/``Infinity``, which Python reads back bit for bit
    (estimator checkpoints).
    """
    if obj is None:
        return None
    if finite:
        obj = finite_or_none(json.loads(json.dumps(obj, default=_json_default)))
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=_json_default,
                      allow_nan=not finite)


def finite_or_none(obj: Any) -> Any:
    """Replace non-finite floats by ``None``, recursively through dicts and lists."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: finite_or_none(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [finite_or_none(v) for v in obj]
    return obj


def from_json(text: str | None) -> Any:
    """Inverse of :func:`to_json` (``None`` and empty text give ``None``)."""
    return json.loads(text) if text else None


# ---------------------------------------------------------------- the store

class Store:
    """One SQLite store file, through a sqlite-utils :class:`~sqlite_utils.Database`.

    Use :meth:`open` (or :func:`open_store`) rather than the constructor. The connection may be
    shared between threads; an internal lock serializes transactions and queries on it.

    Attributes
    ----------
    path : Path
        The database file.
    readonly : bool
        Opened through a ``mode=ro`` URI; writes raise :class:`StoreError`.
    db : sqlite_utils.Database
        The wrapped database (for table introspection; write through :meth:`atomic`).
    sinks : tuple of str
        Names of the configured alert sinks; every alert event that notifies enqueues one
        outbox row per name (the service sets this from its config).
    notify_events : tuple of str
        Alert events that are delivered through the outbox.
    applied_on_open : list of int
        Migration ids applied when this writer opened the file (empty when it was current).
    """

    def __init__(self, conn: sqlite3.Connection, path: Path, readonly: bool):
        self.conn = conn
        self.path = path
        self.readonly = readonly
        self.db = sqlite_utils.Database(conn, execute_plugins=False, recursive_triggers=False)
        self.sinks: tuple[str, ...] = ()
        self.notify_events: tuple[str, ...] = ("opened", "acknowledged", "resolved", "reminded")
        self.applied_on_open: list[int] = []
        self._lock = threading.RLock()

    @classmethod
    def open(cls, path: str | Path, create: bool = True, readonly: bool = False,
             busy_timeout: float = DEFAULT_BUSY_TIMEOUT) -> "Store":
        """Open (and with ``create``, create or migrate) the store at ``path``.

        Parameters
        ----------
        path : str or Path
            The SQLite file.
        create : bool
            Create the file when missing (writer only). Without it a missing file raises
            :class:`StoreError` naming the path and the ``elmon init`` command.
        readonly : bool
            Open read-only (``mode=ro`` URI, no migration; the schema must be current).
        busy_timeout : float
            Seconds to wait for another writer's lock.
        """
        path = Path(path)
        if not path.exists() and (readonly or not create):
            raise StoreError(f"store {str(path)!r} does not exist; create it with: "
                             f"elmon init --db {path}")
        if not readonly and not path.parent.exists():
            raise StoreError(f"cannot create store {str(path)!r}: directory "
                             f"{str(path.parent)!r} does not exist")
        target = path.resolve().as_uri() + "?mode=ro" if readonly else str(path)
        try:
            conn = sqlite3.connect(target, uri=readonly, timeout=busy_timeout,
                                   isolation_level=None, check_same_thread=False)
            conn.execute(f"PRAGMA busy_timeout = {int(busy_timeout * 1000)}")
            if not readonly:
                mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
                if mode.lower() != "wal":
                    raise StoreError(f"store {str(path)!r}: WAL mode unavailable (got {mode})")
                conn.execute("PRAGMA synchronous = NORMAL")
                conn.execute("PRAGMA foreign_keys = ON")
                conn.execute("PRAGMA cache_size = -65536")   # KiB: 64 MiB for index inserts
        except sqlite3.DatabaseError as exc:
            raise StoreError(f"cannot open store {str(path)!r}: {exc}") from None
        store = cls(conn, path, readonly)
        try:
            if readonly:
                check_schema(store)
            else:
                store.applied_on_open = migrate(store)
        except BaseException:
            conn.close()
            raise
        return store

    # -- transactions ---------------------------------------------------------------

    @contextlib.contextmanager
    def atomic(self) -> Iterator["Store"]:
        """One transaction: ``BEGIN IMMEDIATE`` ... ``COMMIT``, rolled back on any exception.

        Nested blocks become savepoints of the outer transaction. ``IMMEDIATE`` takes the write
        lock at the start, so a transaction never fails half-way for want of the lock.
        """
        if self.readonly:
            raise StoreError(f"store {str(self.path)!r} is open read-only")
        with self._lock:
            if self.conn.in_transaction:
                self.conn.execute("SAVEPOINT elmon_nested")
                try:
                    yield self
                except BaseException:
                    if self.conn.in_transaction:
                        self.conn.execute("ROLLBACK TO SAVEPOINT elmon_nested")
                        self.conn.execute("RELEASE SAVEPOINT elmon_nested")
                    raise
                self.conn.execute("RELEASE SAVEPOINT elmon_nested")
                return
            try:
                self.conn.execute("BEGIN IMMEDIATE")
            except sqlite3.OperationalError as exc:
                raise StoreError(f"store {str(self.path)!r}: cannot start a write "
                                 f"transaction: {exc}") from None
            try:
                yield self
                self.conn.execute("COMMIT")
            except BaseException as exc:
                if self.conn.in_transaction:
                    self.conn.execute("ROLLBACK")
                if isinstance(exc, sqlite3.OperationalError):
                    raise StoreError(f"store {str(self.path)!r}: {exc}") from exc
                raise

    # -- statements -----------------------------------------------------------------

    def execute(self, sql: str, params: Sequence | dict = ()) -> sqlite3.Cursor:
        """Run one parameterized statement (autocommits outside :meth:`atomic`)."""
        with self._lock:
            return self.conn.execute(sql, params)

    def rows(self, sql: str, params: Sequence | dict = ()) -> list[dict]:
        """All rows of a query as dicts."""
        with self._lock:
            cur = self.conn.execute(sql, params)
            names = [d[0] for d in cur.description]
            return [dict(zip(names, r)) for r in cur.fetchall()]

    def scalar(self, sql: str, params: Sequence | dict = ()) -> Any:
        """The first column of the first row, or ``None``."""
        with self._lock:
            row = self.conn.execute(sql, params).fetchone()
        return None if row is None else row[0]

    def frame(self, sql: str, params: Sequence | dict = (),
              ts_columns: Sequence[str] = ()) -> pd.DataFrame:
        """A query as a DataFrame; ``ts_columns`` become tz-aware UTC datetimes."""
        with self._lock:
            cur = self.conn.execute(sql, params)
            names = [d[0] for d in cur.description]
            data = cur.fetchall()
        df = pd.DataFrame.from_records(data, columns=names)
        for col in FLOAT_COLUMNS.intersection(df.columns):
            df[col] = df[col].astype("float64")
        for col in ts_columns:
            if col in df.columns:
                df[col] = pd.to_datetime(df[col], utc=True, format="ISO8601")
        return df

    def schema_version(self) -> int:
        """The id of the last applied migration (0 for an empty file)."""
        if not self.db["migrations"].exists():
            return 0
        return int(self.scalar("SELECT coalesce(max(id), 0) FROM migrations"))

    def close(self) -> None:
        """Close the connection (the WAL is checkpointed by SQLite when the last one closes)."""
        with self._lock:
            self.conn.close()

    def __enter__(self) -> "Store":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        mode = "read-only" if self.readonly else "read-write"
        return f"<Store {str(self.path)!r} {mode}>"


def open_store(path: str | Path, readonly: bool = False, *, create: bool = False,
               busy_timeout: float = DEFAULT_BUSY_TIMEOUT) -> Store:
    """Open an existing store (``create=True`` to create it); see :meth:`Store.open`."""
    return Store.open(path, create=create, readonly=readonly, busy_timeout=busy_timeout)


def accepts_path(readonly: bool):
    """Decorator: let a store function take a path instead of a :class:`Store`.

    With a path the file is opened (read-only for queries), used for the one call and closed.
    """
    def decorate(fn):
        @functools.wraps(fn)
        def wrapper(store, *args, **kwargs):
            if isinstance(store, Store):
                return fn(store, *args, **kwargs)
            opened = open_store(store, readonly=readonly)
            try:
                return fn(opened, *args, **kwargs)
            finally:
                opened.close()
        return wrapper
    return decorate


# ---------------------------------------------------------------- migrations

def migrate(store: Store) -> list[int]:
    """Apply pending migrations in id order; returns the ids applied (empty when current).

    Each migration runs in its own ``BEGIN IMMEDIATE`` transaction with its ``migrations`` row,
    re-checked inside the transaction, so two processes opening a new file at once are safe.
    """
    applied: list[int] = []
    with store.atomic():
        store.execute(MIGRATIONS_TABLE)
    version = store.schema_version()
    if version > SCHEMA_VERSION:
        raise StoreError(f"store {str(store.path)!r} has schema version {version}, newer than "
                         f"this elmon ({SCHEMA_VERSION}); upgrade elmon")
    for mig_id, name, statements in MIGRATIONS:
        with store.atomic():
            if store.scalar("SELECT 1 FROM migrations WHERE id = ?", (mig_id,)):
                continue
            for sql in statements:
                store.execute(sql)
            store.execute("INSERT INTO migrations (id, name, applied_at) VALUES (?, ?, ?)",
                          (mig_id, name, utc_now()))
        applied.append(mig_id)
    return applied


def check_schema(store: Store) -> None:
    """Raise :class:`StoreError` unless the store's schema is the one this code expects."""
    try:
        version = store.schema_version()
    except sqlite3.DatabaseError as exc:
        raise StoreError(f"cannot read store {str(store.path)!r}: {exc}") from None
    if version == 0:
        raise StoreError(f"{str(store.path)!r} is not an elmon store (no migrations); "
                         f"create one with: elmon init --db {store.path}")
    if version != SCHEMA_VERSION:
        hint = "run: elmon init --db " + str(store.path) if version < SCHEMA_VERSION \
            else "upgrade elmon"
        raise StoreError(f"store {str(store.path)!r} has schema version {version}, this elmon "
                         f"expects {SCHEMA_VERSION}; {hint}")


def applied_migrations(store: Store) -> pd.DataFrame:
    """The ``migrations`` table: id, name, applied_at."""
    return store.frame("SELECT id, name, applied_at FROM migrations ORDER BY id")
