"""What a load writes: the runs (`Writer`: executemany on SQLite, COPY on PostgreSQL), the
report of the runs a key refused (`report_conflicts`), and the rejected rows' file.

The SQLite writer binds as little as it can, because binding is most of the Python side of an
insert: many rows per statement, the import's two ids and a chunk's constant whole numbers
written into the statement text, the values handed over as one reused float table. Those
choices and their figures are told where they are made, and in docs/performance.md.
"""
from __future__ import annotations

import csv
import os
import sqlite3
import threading
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
from sqlalchemy import literal, select

from ..errors import InputError
from ..store import schema as S
from ..store.pgcopy import Buffers, payload as copy_payload
from . import values as V
from .cellsums import constant_columns
from .checks import FileLoad, Rows

# run columns that hold whole numbers (a chunk-wide constant among them is written as a literal)
_WHOLE_COLUMNS = frozenset({"id", "solver_id", "instance_id", "seed", "replicate", "status", "finished_at",
                            "host_id", "source_line"})
RUN_COLS = ["id", "campaign_id", "import_id", "solver_id", "instance_id", "seed", "replicate",
            "status", "finished_at", "host_id", "source_line"]


class Sender:
    """PostgreSQL, a new campaign's partition: each chunk's COPY sent from a helper thread while
    the load reads, checks and sums the next chunk (the server parses one chunk's rows while the
    client works on the next; the helper waits on the socket, not on Python's lock), and at the
    end the attach, while the load finishes the summaries' rows. One statement at a time; the
    load calls `wait` before it uses the connection for anything else (a new name, the
    summaries), so the connection is never used by two threads at once."""

    def __init__(self, raw, statement: str = ""):
        self.raw, self.statement = raw, statement
        self.thread: threading.Thread | None = None
        self.error: BaseException | None = None

    def send(self, payload) -> None:
        self._start(self._copy, payload)

    def execute(self, sql: str) -> None:
        """One statement, sent from the helper thread (the attach at a load's end)."""
        self._start(self._execute, sql)

    def _start(self, work, arg) -> None:
        self.wait()
        self.thread = threading.Thread(target=self._run, args=(work, arg), name="blockyard-copy", daemon=True)
        self.thread.start()

    def _copy(self, payload) -> None:
        with self.raw.cursor() as cur, cur.copy(self.statement) as cp:
            cp.write(payload)

    def _execute(self, sql: str) -> None:
        with self.raw.cursor() as cur:
            cur.execute(sql)

    def _run(self, work, arg) -> None:
        try:
            work(arg)
        except BaseException as exc:  # handed to the load's own thread (wait)
            self.error = exc

    def wait(self) -> None:
        self.close()
        if self.error is not None:
            exc, self.error = self.error, None
            raise exc

    def close(self) -> None:
        if self.thread is not None:
            self.thread.join()
            self.thread = None


def _with_nulls(values: np.ndarray, present: np.ndarray) -> list:
    if present.all():
        return values.tolist()
    out = values.astype(object)
    out[~present] = None
    return out.tolist()


class Writer:
    """Writes run rows; the dialect decides executemany (SQLite) or COPY (PostgreSQL: straight into
    runs while no key is taken, else staged and moved past the taken keys)."""

    def __init__(self, conn, dialect: str, slots: list[int], campaign_id: int, import_id: int,
                 numbered: bool = False, chain: tuple[int, ...] = (), into: str | None = None):
        self.conn, self.dialect = conn, dialect
        self.slots = slots
        # `numbered` (SQLite, a bulk load with the keys set aside): SQLite numbers the rows itself.
        # A row given no id gets the largest id stored plus one, the very ids the load hands out
        # (its write transaction read that largest id); no key can refuse a row meanwhile, so
        # none is skipped and the numbering never drifts (the load checks the last id at the end).
        self.numbered = numbered and dialect == "sqlite"
        self.cols = RUN_COLS + [f"v{s}" for s in slots]
        self.raw = conn.connection.driver_connection
        if self.numbered:
            self.cols = self.cols[1:]
        names = ", ".join(self.cols)
        if dialect == "sqlite":
            # the two ids are the same on every row and are ours, not the file's: written in the statement
            self.fixed = {"campaign_id": str(int(campaign_id)), "import_id": str(int(import_id))}
            self.bound = [c for c in self.cols if c not in self.fixed]  # the table's columns, in order
            self.width = len(self.bound)
            self.limit = self.raw.getlimit(sqlite3.SQLITE_LIMIT_VARIABLE_NUMBER) if hasattr(self.raw, "getlimit") else 999
            self.head = f"INSERT OR IGNORE INTO runs ({names}) VALUES "
            self.sql_one = self.head + self._marks({})
            self._statements: dict[tuple, tuple[str, str, int]] = {}
            self._same: dict[str, str] | None = None  # the columns written as literals so far
            self._buf = np.empty(0, dtype=np.float64)  # the bound values of a chunk, reused
        else:
            self.campaign_id, self.import_id = campaign_id, import_id
            self.names = names
            self.move_sql, held = _move_sql(conn, names, campaign_id, chain)
            # Straight into runs while no key is taken (docs/performance.md: staging and moving
            # each chunk was a second write of every run). The run key refuses a taken key by
            # failing the COPY; the chunk is then undone to its savepoint and this writer moves
            # every chunk from then on past the taken keys (`_move`). A campaign whose retracted
            # runs hold keys (outside the chain a reload replaces) is moved that way from the start.
            self.direct = not held
            self.staged = False
            self.copy_runs = f"COPY runs ({names}) FROM STDIN (FORMAT binary)"
            self.types = [_PG_TYPES.get(c, ">f8") for c in RUN_COLS] + [">f8"] * len(slots)
            self.buffers = Buffers()
            # `into`: the campaign's new partition, not attached yet and with no index (the load
            # proved its runs new: runkey.RunKey, fresh); a metric new in this chunk may have
            # added a value column to runs since it was made
            self.into = into
            if into is not None:
                from ..store.partitions import same_columns

                same_columns(conn, into)
                self.copy_runs = f"COPY {into} ({names}) FROM STDIN (FORMAT binary)"
                self.sender = Sender(self.raw, self.copy_runs)

    def wait(self) -> None:
        """Before the connection is used for anything else: the chunk being sent is in (PostgreSQL,
        a new partition; raises what its COPY raised)."""
        if self.dialect != "sqlite" and self.into is not None:
            self.sender.wait()

    def close(self) -> None:
        """On the way out of a refused load: the chunk being sent has finished, whatever it did
        (the load's own error is the one to report)."""
        if self.dialect != "sqlite" and self.into is not None:
            self.sender.close()

    def _marks(self, same: dict[str, str]) -> str:
        """One row's VALUES group: the import's two ids and the chunk's constants as literals."""
        return "(" + ", ".join(self.fixed.get(c) or same.get(c, "?") for c in self.cols) + ")"

    def write(self, ids: np.ndarray, rows: Rows, solver: np.ndarray, instance: np.ndarray,
              host: np.ndarray, has_host: np.ndarray, metric_of_slot: dict[int, str]) -> None:
        if self.dialect == "sqlite":
            self._write_sqlite(ids, rows, solver, instance, host, has_host, metric_of_slot)
            return
        m = len(ids)
        # (values, the rows that are NULL or None) in RUN_COLS order, then the value columns
        data = [(ids, None), (np.full(m, self.campaign_id, dtype=np.int64), None),
                (np.full(m, self.import_id, dtype=np.int64), None), (solver, None), (instance, None),
                (rows.seed, None), (rows.replicate, None), (rows.status, None),
                (rows.finished, ~rows.has_finished), (host, ~has_host), (rows.lines, None)]
        for s in self.slots:
            vals = rows.metrics[metric_of_slot[s]]
            data.append((vals, np.isnan(vals)))
        payload = copy_payload(data, self.types, self.buffers)
        if self.into is not None:  # nothing to refuse a row: no savepoint, and no answer to wait for
            self.sender.send(payload)
            return
        cur = self.raw.cursor()
        if self.direct:
            import psycopg

            cur.execute("SAVEPOINT blockyard_chunk")
            try:
                with cur.copy(self.copy_runs) as cp:
                    cp.write(payload)
            except psycopg.errors.UniqueViolation:
                cur.execute("ROLLBACK TO SAVEPOINT blockyard_chunk")
                self.direct = False  # a key is taken: this chunk and the rest go past the taken keys
            else:
                cur.execute("RELEASE SAVEPOINT blockyard_chunk")
                return
        self._move(cur, payload)

    def _move(self, cur, payload) -> None:
        """PostgreSQL: the chunk staged in a temporary table, then moved into runs past the keys
        taken (`_move_sql`)."""
        if not self.staged:
            # made again for each writer: a metric new in this file may have added a column to runs
            cur.execute("DROP TABLE IF EXISTS blockyard_stage")
            cur.execute("CREATE TEMP TABLE blockyard_stage (LIKE runs INCLUDING DEFAULTS) ON COMMIT DROP")
            self.staged = True
        cur.execute("TRUNCATE blockyard_stage")
        with cur.copy(f"COPY blockyard_stage ({self.names}) FROM STDIN (FORMAT binary)") as cp:
            cp.write(payload)
        cur.execute(self.move_sql)

    def _write_sqlite(self, ids, rows: Rows, solver, instance, host, has_host, metric_of_slot) -> None:
        m = len(ids)
        ints = [ids, solver, instance, rows.seed, rows.replicate, rows.status, rows.finished, host, rows.lines]
        if self.numbered:
            ints = ints[1:]
        at = len(ints) - 3  # where finished_at sits; host_id follows it
        if all(int(np.abs(a).max(initial=0)) < V.WHOLE_LIMIT for a in (rows.seed, rows.finished)):
            # One float64 table, many rows per statement. SQLite stores a whole-valued REAL in an
            # INTEGER column as an INTEGER, and a NaN as NULL, so the stored values and types are
            # the same as when binding ints and None (the tests check both).
            # The table's columns in order, each with the rows where it is NULL (None: none are)
            sources: list[tuple[np.ndarray, np.ndarray | None]] = [(a, None) for a in ints]
            sources[at] = (rows.finished, ~rows.has_finished)
            sources[at + 1] = (host, ~has_host)
            sources += [(rows.metrics[metric_of_slot[s]], None) for s in self.slots]  # NaN where empty
            # A column with one value on every row of the chunk (one host per file, no replicate
            # column, a metric the file leaves empty) is written once in the statement instead of
            # bound on every row: binding is most of the Python side of an insert. Only whole
            # numbers and NULL become literals (a float's decimal text need not read back exactly).
            # The constants are those of the first chunk that still hold: each statement text is
            # a prepared statement SQLite keeps (a large one, for hundreds of rows), so a file
            # whose constants change chunk after chunk (a new night, the next treatment) makes a
            # few texts, not one per chunk.
            same = constant_columns(sources, self.bound, _WHOLE_COLUMNS)
            if self._same is not None:
                same = {c: v for c, v in self._same.items() if same.get(c) == v}
            self._same = same
            key = tuple(sorted(same.items()))
            if key not in self._statements:
                per = max(1, min(4000, self.limit // max(self.width - len(same), 1)))
                marks = self._marks(same)
                self._statements[key] = (self.head + ", ".join([marks] * per), self.head + marks, per)
            sql_many, sql_one, k = self._statements[key]
            # only the bound columns go into the table, which reuses one buffer from chunk to
            # chunk (fresh memory for each chunk costs the kernel's zeroing of it)
            kept = [sources[i] for i, c in enumerate(self.bound) if c not in same]
            if len(self._buf) < m * len(kept):
                self._buf = np.empty(m * len(kept), dtype=np.float64)
            table = self._buf[:m * len(kept)].reshape(m, len(kept))
            for j, (a, nulls) in enumerate(kept):
                table[:, j] = a
                if nulls is not None and nulls.any():
                    table[nulls, j] = np.nan
            width = table.shape[1]
            full = m // k * k
            if width == 0:  # every column the same: nothing to bind
                self.raw.executemany(sql_one, [()] * m)
                return
            if full:
                # each statement's row of values becomes Python floats as SQLite asks for it: the
                # whole chunk's floats at once took fresh memory that the kernel zeroed for every
                # chunk (a third of the load's page faults, measured by /usr/bin/time)
                self.raw.executemany(sql_many, map(np.ndarray.tolist, table[:full].reshape(-1, k * width)))
            if m > full:
                self.raw.executemany(sql_one, table[full:].tolist())
            return
        # a seed or time past 2**53 would not survive a float: bind Python ints one row at a time
        columns = [a.tolist() for a in ints[:at]] + [
            _with_nulls(rows.finished, rows.has_finished), _with_nulls(host, has_host), rows.lines.tolist()]
        for s in self.slots:
            vals = rows.metrics[metric_of_slot[s]]
            columns.append(_with_nulls(vals, ~np.isnan(vals)))
        self.raw.executemany(self.sql_one, zip(*columns))


# the runs columns' types on PostgreSQL, as numpy's big-endian codes (the value columns: >f8)
_PG_TYPES = {"id": ">i8", "campaign_id": ">i4", "import_id": ">i4", "solver_id": ">i4", "instance_id": ">i4",
             "seed": ">i8", "replicate": ">i4", "status": ">i2", "finished_at": ">i8", "host_id": ">i4",
             "source_line": ">i4"}
def _move_sql(conn, names: str, campaign_id: int, chain: tuple[int, ...]) -> tuple[str, bool]:
    """PostgreSQL: the statement that moves the staged rows into runs, past every run whose key
    is taken, and whether retracted runs of the campaign hold keys. The campaign partition's
    unique run key holds the live runs (store/partitions.keyed; ON CONFLICT names no key, as
    the partition's is its only unique index and the parent has none to name); the campaign's
    retracted runs outside the chain a reload replaces hold theirs through an anti-join. Most
    campaigns hold no such run (the runs table is locked for the load, so that stays true while
    it writes): then the join is left out, and each chunk's insert reads nothing but the key
    index."""
    other = f" AND r.import_id NOT IN ({', '.join(str(int(i)) for i in chain)})" if chain else ""
    retracted = f"r.retraction_id IS NOT NULL AND r.campaign_id = {int(campaign_id)}{other}"
    held = conn.exec_driver_sql(f"SELECT 1 FROM runs r WHERE {retracted} LIMIT 1").first() is not None
    where = ""
    if held:
        # (retracted runs are few: ix_runs_withdrawn finds them, and the join hashes them)
        where = (" WHERE NOT EXISTS (SELECT 1 FROM runs r WHERE " + retracted + " AND r.solver_id = s.solver_id "
                 "AND r.instance_id = s.instance_id AND r.seed = s.seed AND r.replicate = s.replicate)")
    return (f"INSERT INTO runs ({names}) SELECT {names} FROM blockyard_stage s{where} ORDER BY id "
            "ON CONFLICT DO NOTHING"), held


@dataclass
class _Holder:
    import_id: int
    source_line: int
    retraction_id: int | None = None


def report_conflicts(conn, fl: FileLoad, rows: Rows, raw: pa.Table, ids: np.ndarray, solver: np.ndarray,
                      instance: np.ndarray, campaign_id: int, import_id: int) -> tuple[int, int]:
    """After INSERT OR IGNORE: which rows did not go in, and why. Returns (loaded, skipped)."""
    lo, hi = int(ids[0]), int(ids[-1])
    stored = np.fromiter((r[0] for r in conn.execute(select(S.runs.c.id).where(S.runs.c.id.between(lo, hi)))), dtype=np.int64)
    kept = np.isin(ids, stored)
    missing = np.flatnonzero(~kept)
    # the stored run each missing one collides with: one query per batch of instances, not per run
    holders: dict[tuple, tuple[int, int]] = {}
    r = S.runs.c
    inst_ids = sorted({int(i) for i in instance[missing]})
    solver_ids = sorted({int(i) for i in solver[missing]})
    # the campaign as a literal: SQLite takes the load's own key index (`runkey.campaign_key`) only
    # for a condition that names its campaign, and the live runs, as the index does
    in_campaign = r.campaign_id == literal(int(campaign_id), literal_execute=True)
    # the retracted runs that hold keys (not those of the chain a reload replaces) through
    # ix_runs_withdrawn, then the live runs through the key index: a live holder, read last, is
    # the one named when a key has both
    holding = [r.retraction_id.is_not(None), in_campaign]
    if fl.chain:
        holding.append(r.import_id.not_in(fl.chain))
    for who in (holding, [in_campaign, r.retraction_id.is_(None)]):
        for k in range(0, len(inst_ids), 500):
            q = select(r.solver_id, r.instance_id, r.seed, r.replicate, r.import_id, r.source_line,
                       r.retraction_id).where(*who, r.instance_id.in_(inst_ids[k:k + 500]), r.solver_id.in_(solver_ids))
            for row in conn.execute(q):
                holders[(row.solver_id, row.instance_id, row.seed, row.replicate)] = (
                    row.import_id, row.source_line, row.retraction_id)
    skipped = 0
    for j in missing.tolist():  # only the runs that did not go in
        found = holders.get((int(solver[j]), int(instance[j]), int(rows.seed[j]), int(rows.replicate[j])))
        other = None if found is None else _Holder(*found)
        line = int(rows.lines[j])
        if other is not None and other.import_id == import_id:
            a, b = sorted((int(other.source_line), line))
            msg = f"{fl.unit}s {a} and {b} hold the same run ({rows.describe(j)}); a run appears once per campaign"
            if not fl.skip_bad:
                raise InputError(f"{fl.name}: {msg}")
            rec = {k: ("" if v is None else v) for k, v in raw.slice(int(rows.src[j]), 1).to_pylist()[0].items()}
            rec.update(line=line, reason=msg)
            fl.rejects.append(rec)
        else:
            skipped += 1
            if skipped <= 3:
                whose = f"import {other.import_id if other else '?'}"
                if other is not None and other.retraction_id is not None:
                    whose = f"a retracted run of {whose}"
                fl.warnings.append(
                    f"{fl.where(line)}: this run ({rows.describe(j)}) is already in this campaign "
                    f"({whose}); skipped, the stored values are kept")
    return int(kept.sum()), skipped


def write_rejects(target: Path, rejects: list[dict], shown: str, header: list[str] | None) -> None:
    """The rejected records, in file order: line, the source's own columns, raw text, reason."""
    cols: dict[str, None] = {"line": None}
    for c in header or []:
        cols[c] = None
    for r in rejects:
        for k in r:
            cols.setdefault(k, None)
    for last in ("raw", "reason"):
        if last in cols or last == "reason":
            cols.pop(last, None)
            cols[last] = None
    ordered = sorted(rejects, key=lambda r: r["line"] if isinstance(r["line"], int) else 0)
    tmp = target.with_name(target.name + ".part")
    try:
        with open(tmp, "w", newline="", encoding="utf-8") as fh:
            w = csv.DictWriter(fh, fieldnames=list(cols), restval="", extrasaction="ignore")
            w.writeheader()
            w.writerows(ordered)
        os.replace(tmp, target)
    except OSError as exc:
        raise InputError(f"cannot write the rejected rows of {shown} to {target}: {exc.strerror}; nothing was stored") from None
