"""A large first load's SQLite settings: the rollback journal instead of WAL, and a page cache
that holds every page the load writes; both set back when the load ends.

A store-level device: it changes how SQLite writes the pages of one transaction, never what the
transaction holds. The figures that justify each part are in the docstrings below and, with
their story, in docs/performance.md.
"""
from __future__ import annotations

import sqlite3

BULK_MIN_ROWS = 50_000  # below this, a load writes through WAL (the rollback journal gains nothing)
BULK_CACHE_KIB = 262_144  # SQLite's page cache while a large first load writes with the rollback journal
BULK_PAGE_BYTES_PER_RUN = 160  # cache a run takes: 94 bytes of file per run measured, with room for page overhead


class BulkJournal:
    """SQLite only: a load at least as large as the warehouse it goes into writes with the
    rollback journal, then the warehouse goes back to WAL.

    In WAL mode every page of a bulk load is written twice, once to the log and once more when
    the log is copied into the file (0.2 s per million runs, a tenth of the whole load); with
    the rollback journal, pages past the file's old end need no journal, so they are written
    once. Both modes are atomic: a load that dies leaves a journal that the next reader rolls
    back. The switch needs the warehouse to itself: when any other connection has it open (a
    shell, a resident process, another load), it is not made and the load writes through WAL as
    always. Readers that come during such a load wait for it (the busy timeout) instead of
    reading the old state; the switch is made only for the first large loads into a warehouse
    (runs already stored <= runs in the file), when there is little to read.
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
        self.cache = None
        if self.switched and self.total * BULK_PAGE_BYTES_PER_RUN <= BULK_CACHE_KIB * 1024:
            # A page cache that holds every page the load writes: with the rollback journal, a
            # full cache spills pages to the file one at a time and reads back the summaries'
            # index pages it spilled (0.4 s of a 1M-run load, measured in interleaved pairs).
            # Only for a load whose pages fit (up to about 1.7M runs): a larger one would spill
            # all the same, and its memory stays what it was.
            self.cache = raw.execute("PRAGMA cache_size").fetchone()[0]
            raw.execute(f"PRAGMA cache_size = -{BULK_CACHE_KIB}")
        return self

    def __exit__(self, *exc):
        if self.switched:
            if self.cache is not None:
                self.raw.execute(f"PRAGMA cache_size = {int(self.cache)}")
            self._back(self.raw)
        return False

    @staticmethod
    def _back(raw) -> None:
        try:
            raw.execute("PRAGMA journal_mode = WAL")
        except sqlite3.OperationalError:  # busy past the timeout: the next load tries again
            pass
