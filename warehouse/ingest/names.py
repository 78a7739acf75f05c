"""Names to ids: the small dimension tables (solvers, families, groups, instances, hosts,
metrics, campaigns) read once per load and kept in step as a file brings new names.

Only the distinct names of a chunk touch the database (`Dimensions.resolve`); each row gets its
ids by numpy indexing of the chunk's codes (checks.Rows.factorize).
"""
from __future__ import annotations

import sqlite3
import time
from dataclasses import dataclass

import numpy as np
from sqlalchemy import insert, select

from ..errors import InputError, StorageError
from ..store import schema as S
from ..store import value_columns
from ..store.connect import NAMES_LOCK_CLASS
from .layout import NAME_LIMIT, Layout, control_message, has_control


# The names lock (PostgreSQL): held by a load that adds a name, until it commits
NAMES_LOCK = f"SELECT pg_advisory_xact_lock({NAMES_LOCK_CLASS}, hashtext(current_schema()))"


class _NamesLockNeeded(Exception):
    """Internal: a load about to add a name does not hold the names lock yet."""


@dataclass
class ChunkIds:
    """One chunk's rows as ids, and the id of each distinct key (the cell sums are keyed by the
    chunk's codes and mapped to ids with these)."""

    solver: np.ndarray
    instance: np.ndarray
    host: np.ndarray  # -1 where the run names no host
    has_host: np.ndarray
    maps: tuple[np.ndarray, np.ndarray, np.ndarray]  # solver, instance and host id of each code


class Dimensions:
    """Name -> id caches for the small tables, filled from the warehouse and kept in step."""

    def __init__(self, conn):
        self.conn = conn
        # a server: loads of different campaigns run side by side, and one that must add a name
        # first takes the names lock (held until it commits) and reads the names again
        self.server = conn.dialect.name != "sqlite"
        self.locked = not self.server
        self.named: dict[tuple, int] = {}  # (family, group, instance, hash) as the file names them -> id
        self.columns: set[int] | None = None  # the value columns the runs table has (read when needed)
        # called before this class uses the connection again once the load has begun writing
        # (a server's runs writer may be sending a chunk from its helper thread: write.Sender)
        self.before_sql = lambda: None
        self._read()

    def _read(self) -> None:
        conn = self.conn
        self.solvers = {(r.name, r.version, r.build, r.params): r.id for r in conn.execute(select(S.solvers))}
        self.families = {r.name: r.id for r in conn.execute(select(S.families))}
        self.groups = {(r.family_id, r.name): r.id for r in conn.execute(select(S.groups))}
        self.instances: dict[tuple, int] = {}
        self.hashes: dict[tuple, set] = {}
        for r in conn.execute(select(S.instances.c.id, S.instances.c.group_id, S.instances.c.name, S.instances.c.content_hash)):
            self.instances[(r.group_id, r.name, r.content_hash)] = r.id
            self.hashes.setdefault((r.group_id, r.name), set()).add(r.content_hash)
        self.hosts = {r.name: r.id for r in conn.execute(select(S.hosts))}
        self.metrics = {r.name: (r.id, r.slot, r.sense, r.unit) for r in conn.execute(select(S.metrics))}

    def _lock(self) -> None:
        """A server, before this load adds its first name: the names lock, then the names again
        (another load may have added some since they were read). Held until the load commits, so
        nobody else adds names meanwhile; loads that bring no new name never take it."""
        self.before_sql()
        self.conn.exec_driver_sql(NAMES_LOCK)
        self.locked = True
        self._read()
        self.columns = None

    def _may_add(self) -> None:
        if not self.locked:
            raise _NamesLockNeeded()
        self.before_sql()

    def _add(self, table, **values) -> int:
        self._may_add()
        if self.conn.dialect.name == "sqlite":  # the driver's own cursor: a tenth of the time per row
            cur = self.conn.connection.driver_connection.cursor()
            cur.execute(f"INSERT INTO {table.name} ({', '.join(values)}) VALUES ({', '.join('?' * len(values))})",
                        tuple(values.values()))
            return cur.lastrowid
        return self.conn.execute(insert(table).values(**values)).inserted_primary_key[0]

    def _add_server(self, table, columns: tuple[str, ...], rows: list[tuple]) -> list[int]:
        """A server: many new rows in two round trips (their ids from the table's sequence, then
        one COPY), not one INSERT each: on a first load of 600 instances and 85 solvers the
        single-row inserts were a third of a second of round trips (docs/performance.md)."""
        self._may_add()
        seq = self.conn.exec_driver_sql(f"SELECT pg_get_serial_sequence('{table.name}', 'id')").scalar()
        ids = [r[0] for r in self.conn.exec_driver_sql(
            f"SELECT nextval('{seq}') FROM generate_series(1, {len(rows)})")]
        cur = self.conn.connection.driver_connection.cursor()
        with cur.copy(f"COPY {table.name} (id, {', '.join(columns)}) FROM STDIN") as cp:
            for i, row in zip(ids, rows):
                cp.write_row((i, *row))
        return ids

    def solver_ids(self, keys: list[tuple]) -> list[int]:
        new = [k for k in dict.fromkeys(keys) if k not in self.solvers]
        if len(new) > 1 and self.conn.dialect.name != "sqlite":
            for k, sid in zip(new, self._add_server(S.solvers, ("name", "version", "build", "params"), new)):
                self.solvers[k] = sid
        out = []
        for k in keys:
            sid = self.solvers.get(k)
            if sid is None:
                sid = self.solvers[k] = self._add(S.solvers, name=k[0], version=k[1], build=k[2], params=k[3])
            out.append(sid)
        return out

    def instance_ids(self, keys: list[tuple], warnings: list[str]) -> list[int]:
        # the file's own (family, group, instance, hash) keys seen already: one lookup each, as
        # most chunks of a file hold instances an earlier chunk brought
        seen = self.named
        out = [seen.get(k) for k in keys]
        if None not in out:
            return out
        missing = [k for k, i in zip(keys, out) if i is None]
        for k, iid in zip(missing, self._instance_ids(missing, warnings)):
            seen[k] = iid
        return [seen[k] for k in keys]

    def _instance_ids(self, keys: list[tuple], warnings: list[str]) -> list[int]:
        # the few (family, group) pairs first, in the order the keys bring them (ids follow it)
        gid_of = {}
        for family, group in dict.fromkeys((k[0], k[1]) for k in keys):
            fid = self.families.get(family)
            if fid is None:
                fid = self.families[family] = self._add(S.families, name=family)
            gid = self.groups.get((fid, group))
            if gid is None:
                gid = self.groups[(fid, group)] = self._add(S.groups, family_id=fid, name=group)
            gid_of[(family, group)] = gid
        triples = [(gid_of[(f, g)], inst, chash) for f, g, inst, chash in keys]
        get = self.instances.get
        out: list[int | None] = [get(t) for t in triples]
        new: list[int] = []  # positions of the keys not stored yet (distinct: each is added once)
        hashes = self.hashes
        for j, iid in enumerate(out):
            if iid is not None:
                continue
            gid, inst, chash = triples[j]
            known = hashes.get((gid, inst))
            if known is None:
                hashes[(gid, inst)] = {chash}
            else:
                if known:
                    family, group = keys[j][0], keys[j][1]
                    warnings.append(
                        f"instance {family}/{group}/{inst} has content hash '{chash or '(none)'}' here but "
                        f"'{sorted(known)[0] or '(none)'}' elsewhere: kept as a different instance"
                    )
                known.add(chash)
            new.append(j)
        if new:
            for j, iid in zip(new, self._add_instances([triples[j] for j in new])):
                self.instances[triples[j]] = out[j] = iid
        return out

    def _add_instances(self, rows: list[tuple[int, str, str]]) -> list[int]:
        """New instances, many rows per statement on SQLite (a first load may bring tens of thousands).

        The ids are ours to give on SQLite: the load holds the write lock from BEGIN, so nobody
        else adds instances meanwhile, and the next id is one past the largest. A server gives
        them from the table's sequence (`_add_server`).
        """
        if self.server:
            return self._add_server(S.instances, ("group_id", "name", "content_hash"), rows)
        raw = self.conn.connection.driver_connection
        first = (raw.execute("SELECT max(id) FROM instances").fetchone()[0] or 0) + 1
        ids = list(range(first, first + len(rows)))
        flat = [v for i, row in zip(ids, rows) for v in (i, *row)]
        limit = raw.getlimit(sqlite3.SQLITE_LIMIT_VARIABLE_NUMBER) if hasattr(raw, "getlimit") else 999
        per = max(1, min(500, limit // 4))  # rows per statement, four values each
        head = "INSERT INTO instances (id, group_id, name, content_hash) VALUES "
        full = len(rows) // per * per
        if full:
            raw.executemany(head + ", ".join(["(?, ?, ?, ?)"] * per),
                            [flat[a:a + 4 * per] for a in range(0, 4 * full, 4 * per)])
        if len(rows) > full:
            raw.execute(head + ", ".join(["(?, ?, ?, ?)"] * (len(rows) - full)), flat[4 * full:])
        return ids

    def host_ids(self, names: list[str]) -> list[int | None]:
        out = []
        for h in names:
            if not h:
                out.append(None)
                continue
            hid = self.hosts.get(h)
            if hid is None:
                hid = self.hosts[h] = self._add(S.hosts, name=h)
            out.append(hid)
        return out

    def metric(self, name: str, sense: str | None, unit: str, shown: str) -> tuple[int, int, str]:
        found = self.metrics.get(name)
        if found is None:  # the connection is wanted: under the names lock on a server
            if self.locked:
                self.before_sql()
            else:
                self._lock()
                found = self.metrics.get(name)
        if found is not None:
            mid, slot, old_sense, _ = found
            if sense is not None and sense != old_sense:
                raise InputError(
                    f"{shown}: the layout says metric '{name}' is {sense} but the warehouse holds it as "
                    f"{old_sense}; a metric keeps one sense"
                )
            return mid, slot, old_sense
        if len(name) > NAME_LIMIT:
            raise InputError(f"{shown}: metric name '{name[:40]}...' is {len(name)} characters long; names may have at most {NAME_LIMIT}")
        used = {v[1] for v in self.metrics.values()}
        free = [s for s in range(1, S.METRIC_SLOTS + 1) if s not in used]
        if not free:
            raise StorageError(
                f"{shown}: metric '{name}' would be the warehouse's {S.METRIC_SLOTS + 1}th; a warehouse holds at "
                f"most {S.METRIC_SLOTS} metrics (list them with: blockyard inventory metrics); leave columns out "
                "with a layout's [ignore]")
        sense = sense or "min"
        if self.columns is None:
            self.columns = value_columns.present(self.conn)
        value_columns.ensure(self.conn, free[0], self.columns)
        mid = self._add(S.metrics, name=name, unit=unit, sense=sense, slot=free[0])
        self.metrics[name] = (mid, free[0], sense, unit)
        return mid, free[0], sense


    def resolve(self, keys: dict, warnings: list[str]) -> ChunkIds:
        """A chunk's ids from its distinct keys (`Rows.keys`: codes per row, the keys in code order)."""
        if self.locked:
            return self._resolve(keys, warnings)
        said = len(warnings)
        try:
            return self._resolve(keys, warnings)
        except _NamesLockNeeded:  # a name new to the warehouse: again, under the names lock
            del warnings[said:]
            self._lock()
            return self._resolve(keys, warnings)

    def _resolve(self, keys: dict, warnings: list[str]) -> ChunkIds:
        codes, distinct = keys["solver"]
        solver_of = np.asarray(self.solver_ids(distinct), dtype=np.int64)
        solver = solver_of[codes]
        codes, distinct = keys["instance"]
        instance_of = np.asarray(self.instance_ids(distinct, warnings), dtype=np.int64)
        instance = instance_of[codes]
        codes, distinct = keys["host"]
        host_of = np.asarray([-1 if h is None else h for h in self.host_ids([k[0] for k in distinct])], dtype=np.int64)
        host = host_of[codes]
        return ChunkIds(solver, instance, host, host >= 0, (solver_of, instance_of, host_of))

    def metric_slots(self, metrics, layout: Layout, shown: str, senses: dict[str, str]) -> dict[str, int]:
        """Each metric of a chunk -> its value column's slot (a new metric takes a free one); the
        sense of each is noted in `senses` (the report's metrics)."""
        slots = {}
        for metric in metrics:
            spec = layout.metrics.get(metric)
            _, slot, sense = self.metric(metric, spec.sense if spec else None, spec.unit if spec else "", shown)
            slots[metric] = slot
            senses[metric] = sense
        return slots


def check_campaign(name: str) -> None:
    """The --campaign name, checked before any file is read or any warehouse is touched."""
    if not name.strip():
        raise InputError("--campaign needs a name")
    if len(name) > NAME_LIMIT:
        raise InputError(f"campaign name is {len(name)} characters long; names may have at most {NAME_LIMIT}")
    if has_control(name):
        raise InputError(f"--campaign {control_message(name)}")


def campaign_id(conn, name: str) -> int:
    """The campaign's id; a campaign new to the warehouse is added."""
    check_campaign(name)
    found = conn.execute(select(S.campaigns.c.id).where(S.campaigns.c.name == name)).scalar()
    if found is not None:
        return found
    return conn.execute(insert(S.campaigns).values(name=name, created_at=int(time.time()))).inserted_primary_key[0]
