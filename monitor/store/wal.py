"""Write-ahead-log checkpoints run beside the writer instead of inside its commits.

SQLite's automatic checkpoint runs inside the ``COMMIT`` that pushes the log past 1,000 pages
(about 4 MB): that one commit copies every page of the log into the store and syncs both
files, so one call in every 60-100 of ``Monitor.observe`` took milliseconds instead of a
fraction of one (93 of its 100 slowest calls, measured for issue 15). :class:`WalCheckpointer`
turns the automatic checkpoint off on the writer connection (``PRAGMA wal_autocheckpoint = 0``)
and runs ``PRAGMA wal_checkpoint(PASSIVE)`` on a connection of its own, in a thread of its own,
after every ``every_commits`` commits or ``every_rows`` rows (whichever comes first). A
passive checkpoint takes no write lock, so the writer keeps committing meanwhile.

Keeping the log's file small. The log starts again from its beginning only when a write
begins with every frame copied (and no reader inside the log); a commit that lands while a
pass copies leaves its frames uncopied, so under a steady stream of commits the log would
only grow. After each pass the thread compares ``PRAGMA data_version`` (which changes when
another connection commits) with its value before the pass:

- unchanged, and the whole log copied: the next write starts the log again by itself;
- changed, and the log below ``restart_pages`` frames: nothing more; the log grows by about
  one budget until the next pass;
- changed, and the log at ``restart_pages`` frames or more: a second pass copies the frames
  committed meanwhile while holding the store's connection lock (:attr:`Store.lock`), so no
  transaction begins before the copy and the sync of the store file end, and the next write
  starts the log again. A call arriving then waits for that pass (a sync of the store file,
  1-10 ms on a shared disk) without spending CPU time.

The second pass used to run after every pass (issue 15: on a loaded machine 1 call in 64 waited
for its ~8 ms sync, which was the observe p99); it now runs about once every
``restart_pages`` / (pages per budget) budgets of a writer that never pauses, and not at all
for one that pauses between commits. The log's file stays near ``restart_pages`` frames plus
about two budgets (:func:`restart_pages_for`: ``RESTART_PAGES``, 16 MB at 4 KiB pages, or half
of ``[store] wal_max_mb`` when that is smaller). :meth:`monitor.store.Store.bound_wal` still
truncates a log that readers let grow past ``wal_max_mb`` (no pass can copy past a reader's
snapshot, so the locked pass is not tried then).

Durability does not change: a committed transaction is in the log (``synchronous = NORMAL``)
whether or not a checkpoint has copied it yet, every pass syncs the log before copying and the
store after, and a process killed during a checkpoint leaves a log SQLite replays at the next
open.
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
#: log frames from which a pass that saw commits land during its copy is followed by the
#: locked pass (a few budgets of one-observation commits: 4,000 frames of 4 KiB = 16 MB)
RESTART_PAGES = 4 * SQLITE_DEFAULT_PAGES


def restart_pages_for(max_bytes: float, page_size: int) -> int:
    """``restart_pages`` for a log limit of ``max_bytes`` (``[store] wal_max_mb``): at most
    :data:`RESTART_PAGES`, and at most half the limit's frames, so the locked pass starts the log
    again before :meth:`~monitor.store.Store.bound_wal`'s truncation (which waits for every
    page) is needed.

    >>> restart_pages_for(64e6, 4096), restart_pages_for(4e6, 4096)
    (4000, 485)
    """
    frame = int(page_size) + 24                  # a frame is a page and its 24-byte header
    return max(1, min(RESTART_PAGES, int(max_bytes // (2 * frame))))


class WalCheckpointer:
    """Background passive checkpoints of one writer's store (module docstring).

    Parameters
    ----------
    store : monitor.store.Store
        The writer's store; its connection stops checkpointing on commit until :meth:`close`.
    every_commits, every_rows : int
        The budget: a checkpoint is asked for when either count since the last one is reached.
    restart_pages : int
        Log frames from which commits landing during a pass are followed by the locked pass.

    Notes
    -----
    :meth:`committed` costs a few additions and, once per budget, an ``Event.set``; the
    checkpoint itself runs in the thread (the sqlite3 module releases the GIL while SQLite
    copies pages). ``checkpoints`` counts the checkpoints run (:meth:`checkpoint`),
    ``locked_passes`` those of them that ended with the locked pass, ``last`` is SQLite's
    ``(busy, log frames, frames checkpointed)`` of the latest pass.
    """

    def __init__(self, store, every_commits: int = EVERY_COMMITS, every_rows: int = EVERY_ROWS,
                 restart_pages: int = RESTART_PAGES):
        self.store = store
        self.every_commits, self.every_rows = int(every_commits), int(every_rows)
        self.restart_pages = int(restart_pages)
        self._commits = self._rows = 0
        self.checkpoints = 0
        self.locked_passes = 0
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

    def _pass(self, locked: bool) -> tuple:
        """One ``PRAGMA wal_checkpoint(PASSIVE)``; ``locked`` tells whether the store's lock is
        held meanwhile (tests override this to commit while an unlocked pass copies)."""
        return self._conn.execute("PRAGMA wal_checkpoint(PASSIVE)").fetchone()

    def _version(self) -> int:
        return self._conn.execute("PRAGMA data_version").fetchone()[0]

    def checkpoint(self) -> str:
        """One checkpoint (what the thread runs once per budget); returns what it did:
        ``"pinned"`` (busy, or a reader's snapshot stopped the copy), ``"copied"`` (the whole
        log copied and nothing committed meanwhile: the next write starts it again),
        ``"grows"`` (commits landed, the log is below ``restart_pages``) or ``"locked"`` (the
        locked pass ran: the next write starts the log again)."""
        before = self._version()
        self.last = self._pass(False)
        try:
            busy, log, done = self.last
            if busy or done < log:
                return "pinned"
            if self._version() == before:
                return "copied"
            if log < self.restart_pages or self._stop:
                return "grows"
            with self.store.lock:                # no transaction of the writer meanwhile
                self.last = self._pass(True)
            self.locked_passes += 1
            return "locked"
        finally:
            self.checkpoints += 1

    def _loop(self) -> None:
        while True:
            self._wake.wait()
            self._wake.clear()
            if self._stop:
                return
            try:
                self.checkpoint()
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
