"""The speed devices wrapped around a load: each changes how fast a file loads, never what it
stores. Each one's docstring gives the measurement that keeps it: a 1,000,000-run load with the
device against the same code without it, in interleaved rounds of `benchmarks/ingest.py
--against` (time without / time with, the median of nine rounds; the story in
docs/performance.md, the redesign step). The journal of a large first load is a store
device (store/bulk.py).
"""
from __future__ import annotations

from .cellsums import put_unless_stopped


class Prefetch:
    """Reads and checks the next chunk in a helper thread while this one is written.

    Only for the readers whose parsing runs in pyarrow without Python's global lock (CSV, TSV,
    Parquet); the helper stops as soon as the load does, on success or failure. Without it a
    `blockyard load` takes 1.09 times as long (the early parse, early.py, still reading ahead),
    a load in a running process (the shell, the resident) 1.16 times, a Parquet file 1.05 times.
    """

    def __init__(self, chunks, depth: int = 1):
        import queue
        import threading

        self._q: queue.Queue = queue.Queue(maxsize=depth)
        self._stop = threading.Event()
        self._chunks = chunks
        self._thread = threading.Thread(target=self._run, name="blockyard-read", daemon=True)
        self._thread.start()

    def _put(self, item) -> bool:
        return put_unless_stopped(self._q, item, self._stop, 0.1)

    def _run(self) -> None:
        try:
            for chunk in self._chunks:
                if not self._put(("chunk", chunk)):
                    return
            self._put(("end", None))
        except BaseException as exc:  # noqa: BLE001 - handed to the loading thread
            self._put(("error", exc))
        finally:
            close = getattr(self._chunks, "close", None)
            if close is not None and self._stop.is_set():
                try:
                    close()
                except Exception:  # noqa: BLE001
                    pass

    def close(self) -> None:
        """Stop the helper and wait for it (also when the chunks were never asked for)."""
        self._stop.set()
        self._thread.join()

    def __iter__(self):
        try:
            while True:
                kind, item = self._q.get()
                if kind == "chunk":
                    yield item
                elif kind == "end":
                    return
                else:
                    raise item
        finally:
            self._stop.set()
            self._thread.join()


class ForeignKeysOff:
    """SQLite only: skip the per-row foreign key lookups while the runs go in.

    Every id written comes from the dimension tables in the same transaction, so the lookups
    would only repeat what the load knows. The pragma is set outside the transaction (SQLite
    ignores it inside one) and always set back before the connection goes back to the pool.
    Without it a load takes 1.12 times as long and 1.18 times the processor time (a lookup in a
    parent table for each id a run holds).
    """

    def __init__(self, conn, active: bool):
        self.raw = conn.connection.driver_connection if active else None

    def __enter__(self):
        if self.raw is not None:
            self.raw.execute("PRAGMA foreign_keys = OFF")
        return self

    def __exit__(self, *exc):
        if self.raw is not None:
            self.raw.execute("PRAGMA foreign_keys = ON")
        return False


class CollectorPaused:
    """Python's cycle collector paused while a file loads. A load makes no reference cycles of
    its own, but its arrays and lists would still start collections, one of them over every
    object the libraries keep: 0.07 to 0.11 s of a 1M-run load (some 58 collections, timed by
    `gc.callbacks`), the main thread's time. The collector runs again, as before, after."""

    def __enter__(self):
        import gc

        self.was = gc.isenabled()
        gc.disable()
        return self

    def __exit__(self, *exc):
        import gc

        if self.was:
            gc.enable()
        return False


class PandasNotForArrow:
    """While a file loads: pyarrow's first conversion of a Python value imports pandas (0.25 to
    0.4 s of processor time after numpy, pyarrow and SQLAlchemy) only to learn whether the value
    is a pandas object; the load hands it numpy arrays and plain values only. The import fails
    fast instead, and pyarrow goes on without pandas. Only in a process that has not imported
    pandas yet (a `blockyard load`), and taken out as soon as the load returns, so that nothing
    else is kept from pandas. Without it a load takes 1.09 times as long.
    """

    def find_spec(self, name, path=None, target=None):
        if name == "pandas" or name.startswith("pandas."):
            raise ImportError("pandas is not imported while a file loads")
        return None

    def __enter__(self):
        import sys

        self.active = "pandas" not in sys.modules
        if self.active:
            sys.meta_path.insert(0, self)
        return self

    def __exit__(self, *exc):
        import sys

        if self.active and self in sys.meta_path:
            sys.meta_path.remove(self)
        return False


class SmallPages:
    """While a file loads: its arrays on the kernel's ordinary 4 KiB pages. numpy asks for huge
    pages (madvise) for every array of 4 MiB or more, and Arrow's default allocator (mimalloc)
    takes them too; the kernel then finds and zeroes 2 MiB at each first touch, compacting memory
    to find them when it must: about 130 huge pages a 510,000-run load, and its system time
    0.42 to 0.71 s against 0.21 to 0.31 s (`/usr/bin/time`, /proc/vmstat's thp_fault_alloc).
    Interleaved, four loads each of the 510,000-run file (benchmarks/postgres.py's): PostgreSQL
    1.61 to 1.72 s with huge pages, 1.42 to 1.47 s without either (numpy's alone: 1.44 to 1.53 s);
    SQLite 1.17 to 1.30 s against 1.13 to 1.22 s. A `blockyard load` sets both switches before
    numpy and pyarrow are imported (early.SMALL_PAGES_ENV); in a running process (the shell, the
    resident, a notebook) this switches them for the load and back after. Stored values are
    the same either way: only where the memory comes from changes."""

    def __enter__(self):
        self.numpy_was = self.pool_was = None
        try:
            from numpy._core import multiarray
        except ImportError:  # numpy 1.x
            from numpy.core import multiarray
        switch = getattr(multiarray, "_set_madvise_hugepage", None)
        if switch is not None:
            self.numpy_was = switch(False)
            self.switch = switch
        import pyarrow as pa

        pool = pa.default_memory_pool()
        if pool.backend_name != "system":
            self.pool_was = pool
            pa.set_memory_pool(pa.system_memory_pool())
        return self

    def __exit__(self, *exc):
        if self.numpy_was is not None:
            self.switch(self.numpy_was)
        if self.pool_was is not None:
            import pyarrow as pa

            pa.set_memory_pool(self.pool_was)
        return False
