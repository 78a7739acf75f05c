"""A large first load writes with SQLite's rollback journal instead of WAL, and puts the warehouse
back in WAL when it ends.

A store-level device: it changes how SQLite writes the pages of one transaction, never what the
transaction holds. Measured (docs/performance.md, the redesign step): a 1,000,000-run
first load writes 63 MiB instead of 126 MiB, and takes 1.05 times as long without the switch
(median of nine interleaved rounds).
"""
from __future__ import annotations

import sqlite3

BULK_MIN_ROWS = 50_000  # below this, a load writes through WAL (the rollback journal gains nothing)


class BulkJournal:
    """SQLite only: a load at least as large as the warehouse it goes into writes with the
    rollback journal, then the warehouse goes back to WAL.

    In WAL mode every page of a bulk load is written twice, once to the log and once more when
    the log is copied into the file; with the rollback journal, pages past the file's old end
    need no journal, so they are written once. Both modes are atomic: a load that dies leaves a
    journal that the next reader rolls back. The switch needs the warehouse to itself: when any
    other connection has it open (a shell, a resident process, another load), it is not made and
    the load writes through WAL as always. Readers that come during such a load wait for it (the
    busy timeout) instead of reading the old state; the switch is made only for the first large
    loads into a warehouse (runs already stored <= runs in the file), when there is little to read.
    """

    def __init__(self, conn, sqlite: bool, wanted: bool, total: int):
        self.raw = conn.connection.driver_connection if sqlite else None
        self.wanted, self.total = wanted, total
        self.switched = False

    def __enter__(self):
        raw = self.raw
        if raw is None:
            return self
        mode = raw.execute("PRAGMA journal_mode").fetchone()[0].lower()
        if mode != "wal":  # a bulk load that died before switching back: back to WAL first
            self._back(raw)
        if not self.wanted:
            return self
        stored = raw.execute("SELECT max(id) FROM runs").fetchone()[0] or 0
        if stored > self.total:
            return self
        timeout = raw.execute("PRAGMA busy_timeout").fetchone()[0]
        raw.execute("PRAGMA busy_timeout = 0")
        try:
            self.switched = raw.execute("PRAGMA journal_mode = DELETE").fetchone()[0].lower() == "delete"
        except sqlite3.OperationalError:  # another connection has it open: write through WAL
            self.switched = False
        finally:
            raw.execute(f"PRAGMA busy_timeout = {int(timeout)}")
        return self

    def __exit__(self, *exc):
        if self.switched:
            self._back(self.raw)
        return False

    @staticmethod
    def _back(raw) -> None:
        try:
            raw.execute("PRAGMA journal_mode = WAL")
        except sqlite3.OperationalError:  # busy past the timeout: the next load tries again
            pass
