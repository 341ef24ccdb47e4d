"""Write-ahead-log checkpoints run beside the writer instead of inside its commits.

SQLite's automatic checkpoint runs inside the ``COMMIT`` that pushes the log past 1,000 pages
(about 4 MB): that one commit copies every page of the log into the store and syncs both
files, so one call in every 60-100 of ``Monitor.observe`` took milliseconds instead of a
fraction of one (93 of its 100 slowest calls, measured for issue 15). :class:`WalCheckpointer`
turns the automatic checkpoint off on the writer connection (``PRAGMA wal_autocheckpoint = 0``)
and runs ``PRAGMA wal_checkpoint(PASSIVE)`` on a connection of its own, in a thread of its own,
after every ``every_commits`` commits or ``every_rows`` rows (whichever comes first). A
passive checkpoint takes no write lock, so the writer keeps committing meanwhile. The log
starts again from its beginning only when a write begins with every frame copied, and a
writer that committed during the copy prevents that; so a second, short pass copies the few
frames committed meanwhile while holding the store's connection lock (a call arriving then
waits for it, without spending CPU time), and the log's file stays near one budget's pages
when no reader holds an old snapshot.

Durability does not change: a committed transaction is in the log (``synchronous = NORMAL``)
whether or not a checkpoint has copied it yet, and a process killed during a checkpoint
leaves a log SQLite replays at the next open. :meth:`monitor.store.Store.bound_wal` still
truncates a log that readers let grow past ``[store] wal_max_mb``.
"""

from __future__ import annotations

import sqlite3
import threading

#: commits between two background checkpoints (one observation per commit writes 10-20 pages
#: of 4 KiB, so 64 commits stay below SQLite's own 1,000-page trigger)
EVERY_COMMITS = 64
#: rows between two background checkpoints (large batches)
EVERY_ROWS = 20_000
#: SQLite's default ``wal_autocheckpoint``, put back on a shared connection when done
SQLITE_DEFAULT_PAGES = 1000


class WalCheckpointer:
    """Background passive checkpoints of one writer's store (module docstring).

    Parameters
    ----------
    store : monitor.store.Store
        The writer's store; its connection stops checkpointing on commit until :meth:`close`.
    every_commits, every_rows : int
        The budget: a checkpoint is asked for when either count since the last one is reached.

    Notes
    -----
    :meth:`committed` costs a few additions and, once per budget, an ``Event.set``; the
    checkpoint itself runs in the thread (the sqlite3 module releases the GIL while SQLite
    copies pages). ``checkpoints`` counts the checkpoints run by the thread, ``last`` is
    SQLite's ``(busy, log pages, pages checkpointed)`` of the latest one.
    """

    def __init__(self, store, every_commits: int = EVERY_COMMITS, every_rows: int = EVERY_ROWS):
        self.store = store
        self.every_commits, self.every_rows = int(every_commits), int(every_rows)
        self._commits = self._rows = 0
        self.checkpoints = 0
        self.last: tuple | None = None
        self._wake = threading.Event()
        self._stop = False
        self._conn = sqlite3.connect(str(store.path), timeout=store.busy_timeout,
                                     isolation_level=None, check_same_thread=False)
        store.execute("PRAGMA wal_autocheckpoint = 0")
        self._thread = threading.Thread(target=self._loop, name="elmon-wal-checkpoint",
                                        daemon=True)
        self._thread.start()

    def committed(self, rows: int = 1) -> bool:
        """Count one committed transaction of ``rows`` rows; returns whether the budget was
        reached (a checkpoint is then asked of the thread and the counts start again)."""
        self._commits += 1
        self._rows += rows
        if self._commits < self.every_commits and self._rows < self.every_rows:
            return False
        self._commits = self._rows = 0
        self._wake.set()
        return True

    def _loop(self) -> None:
        while True:
            self._wake.wait()
            self._wake.clear()
            if self._stop:
                return
            try:
                # the first pass copies the budget's pages while the writer goes on; the log
                # starts again only when a write begins with every frame copied, which a
                # commit during the pass prevents, so a last pass copies those few frames
                # while holding the store's lock (no writer transaction runs meanwhile)
                self.last = self._conn.execute("PRAGMA wal_checkpoint(PASSIVE)").fetchone()
                if self.last[0] == 0 and not self._stop:
                    with self.store.lock:
                        self.last = self._conn.execute(
                            "PRAGMA wal_checkpoint(PASSIVE)").fetchone()
                self.checkpoints += 1
            except sqlite3.Error:    # busy or closing: the next budget tries again
                pass

    def close(self) -> None:
        """Stop the thread, close its connection and give the writer connection SQLite's
        automatic checkpoint back (when it is still open)."""
        if self._stop:
            return
        self._stop = True
        self._wake.set()
        self._thread.join(timeout=30.0)
        self._conn.close()
        try:
            self.store.execute(f"PRAGMA wal_autocheckpoint = {SQLITE_DEFAULT_PAGES}")
        except sqlite3.ProgrammingError:             # the store was closed first
            pass
