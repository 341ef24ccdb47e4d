"""The :class:`Store` connection, transactions and migrations.

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
import functools
import os
import sqlite3
import threading
from pathlib import Path
from typing import Any, Iterator, Sequence

import pandas as pd

from monitor.errors import StoreError
from monitor.store.codec import parse_ts_column, utc_now
from monitor.store.schema import MIGRATIONS, MIGRATIONS_TABLE, SCHEMA_VERSION


#: Seconds a connection waits for a lock held by another writer before giving up.
DEFAULT_BUSY_TIMEOUT = 10.0

#: Columns that query frames always return as float64 (NULL -> NaN), even when all NULL.
FLOAT_COLUMNS = frozenset({"beta", "beta_se", "beta_lo", "beta_hi", "n_eff", "intercept",
                           "resid_sd", "innovation", "z", "price", "quantity", "low", "high",
                           "forgetting", "lag_seconds", "exposure"})

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
        self.sinks: tuple[str, ...] = ()
        self.notify_events: tuple[str, ...] = ("opened", "acknowledged", "resolved", "reminded")
        #: optional ``(alert, event) -> seconds``: delay of that event's outbox rows (group
        #: alerts hold member notifications, :func:`monitor.store.groups.member_hold`)
        self.notify_hold = None
        self.applied_on_open: list[int] = []
        #: count of writes of per-series bounds (``low`` / ``high``) through this connection
        #: (:func:`monitor.store.write_batch`); caches of bounds compare it
        self.bounds_version = 0
        self.busy_timeout = DEFAULT_BUSY_TIMEOUT
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
        store.busy_timeout = busy_timeout
        try:
            if readonly:
                check_schema(store)
            else:
                store.applied_on_open = migrate(store)
        except BaseException:
            conn.close()
            raise
        return store

    @property
    def lock(self) -> threading.RLock:
        """The lock held through every transaction and query on this connection (another
        thread holding it knows no transaction of this connection is running)."""
        return self._lock

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
                df[col] = parse_ts_column(df[col])
        return df

    @functools.cached_property
    def db(self):
        """The wrapped :class:`sqlite_utils.Database`, made on first use (importing sqlite-utils
        was about 60 ms of every command's start, ``elmon ingest`` among them)."""
        import sqlite_utils
        return sqlite_utils.Database(self.conn, execute_plugins=False, recursive_triggers=False)

    def schema_version(self) -> int:
        """The id of the last applied migration (0 for an empty file)."""
        if self.scalar("SELECT count(*) FROM sqlite_master WHERE type = 'table' AND "
                       "name = 'migrations'") == 0:
            return 0
        return int(self.scalar("SELECT coalesce(max(id), 0) FROM migrations"))

    def bound_wal(self, max_bytes: int, wait_s: float = 0.5) -> bool:
        """Keep the write-ahead log near ``max_bytes``: when ``<store>-wal`` is larger, copy it
        into the store and truncate it (``PRAGMA wal_checkpoint(TRUNCATE)``).

        SQLite's automatic checkpoint (every 1000 pages) is passive: while readers keep
        snapshots open (a dashboard, ``elmon status``) it cannot reach the end of the log, the
        log is never restarted, and its file only grows; a restarted log also keeps its size
        on disk. Here the writer waits at most ``wait_s`` for readers (not its normal busy
        timeout) and tries again after a later batch when they are still busy. Returns
        whether the log was truncated. A read-only store does nothing.
        """
        if self.readonly or max_bytes <= 0:
            return False
        try:
            size = os.path.getsize(str(self.path) + "-wal")
        except OSError:
            return False
        if size <= max_bytes:
            return False
        with self._lock:
            self.conn.execute(f"PRAGMA busy_timeout = {int(wait_s * 1000)}")
            try:
                busy, _log, _done = self.conn.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchone()
            except sqlite3.OperationalError:
                busy = 1
            finally:
                self.conn.execute(f"PRAGMA busy_timeout = {int(self.busy_timeout * 1000)}")
        return busy == 0

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

def migrate(store: Store, until: int | None = None) -> list[int]:
    """Apply pending migrations in id order (up to id ``until``); returns the ids applied.

    Each migration runs in its own ``BEGIN IMMEDIATE`` transaction with its ``migrations`` row,
    re-checked inside the transaction, so two processes opening a new file at once are safe
    and a failing migration leaves the store at the previous version.
    """
    applied: list[int] = []
    with store.atomic():
        store.execute(MIGRATIONS_TABLE)
    version = store.schema_version()
    if version > SCHEMA_VERSION:
        raise StoreError(f"store {str(store.path)!r} has schema version {version}, newer than "
                         f"this elmon ({SCHEMA_VERSION}); upgrade elmon")
    for mig_id, name, steps in MIGRATIONS:
        if until is not None and mig_id > until:
            break
        with store.atomic():
            if store.scalar("SELECT 1 FROM migrations WHERE id = ?", (mig_id,)):
                continue
            for step in steps:
                if callable(step):
                    step(store.conn)
                else:
                    store.execute(step)
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
