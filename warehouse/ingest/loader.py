"""Loading result files into the warehouse: one file, one transaction, all or nothing.

The hot path stays vectorized: each chunk is checked by Arrow compute kernels and numpy, only the
distinct names touch the dimension tables, and runs are written with executemany (SQLite) or COPY
(PostgreSQL). A large load into a SQLite warehouse that holds fewer runs than the file sets the
runs table's secondary indexes aside inside the transaction and builds them again at the end
(much cheaper than keeping them up to date row by row); if the rebuilt unique key finds a run
twice, the load starts over the ordinary way so that the duplicates are reported one by one.
Parsing and checking run in a helper thread (pyarrow and numpy let go of Python's lock), starting
before the write transaction opens, while the main thread writes; each chunk is also summed by
cell there, and a second helper merges those sums into the cell summaries while the runs go in
and the indexes are rebuilt.
"""
from __future__ import annotations

import csv
import os
import sqlite3
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from sqlalchemy import func, insert, literal, select, update
from sqlalchemy.exc import IntegrityError, OperationalError

from .. import __version__
from ..errors import InputError, StorageError
from ..store import schema as S
from ..store import value_columns
from ..store.connect import Warehouse
from . import values as V
from .cellsums import Summing, constant_columns, put_unless_stopped, reduce_chunk, run_statements
from .layout import FIELDS, NAME_LIMIT, REPLICATE_SPAN, Layout, control_message, has_control
from .scan import first_pass_of, take_early_read
from .sources import (BLOCK_BYTES, MAX_BLOCK_BYTES, LongRecord, SourceInfo, longest_record, read_delimited,
                      read_header, read_jsonl, read_parquet)

DEFAULTS = {"version": "", "build": "", "params": "", "family": "default", "seed": "0",
            "replicate": "0", "status": "ok", "finished_at": "", "host": "", "instance_hash": ""}
NAME_FIELDS = ("solver", "version", "build", "family", "group", "instance", "host", "instance_hash")
TEXT_FIELDS = NAME_FIELDS + ("params",)
BULK_MIN_ROWS = 50_000  # below this, a load writes through WAL (the rollback journal gains nothing)
BULK_CACHE_KIB = 262_144  # SQLite's page cache while a large first load writes with the rollback journal
BULK_PAGE_BYTES_PER_RUN = 160  # cache a run takes: 94 bytes of file per run measured, with room for page overhead
QUICK_MAX_RUNS = 20_000_000  # above this a SQLite load checks its runs with a key index (hashes: 8 bytes a run)
SEED_SPAN = 2**63  # runs.seed is a signed 64-bit integer


@dataclass
class FileReport:
    file: str
    status: str  # loaded | duplicate | refused | checked (dry run)
    rows_read: int = 0
    rows_loaded: int = 0
    rows_rejected: int = 0
    rows_skipped: int = 0
    campaign: str = ""
    import_id: int | None = None
    message: str = ""
    warnings: list[str] = field(default_factory=list)
    rejects_file: str | None = None
    mapping: dict[str, str] = field(default_factory=dict)
    metrics: dict[str, str] = field(default_factory=dict)
    ignored: list[str] = field(default_factory=list)
    preview: list[dict] = field(default_factory=list)
    replaces: int | None = None  # the wholly retracted import this load replaced (--again)

    def to_dict(self) -> dict:
        d = {"file": self.file, "status": self.status, "rows_read": self.rows_read,
             "rows_loaded": self.rows_loaded, "rows_rejected": self.rows_rejected,
             "rows_skipped": self.rows_skipped, "campaign": self.campaign,
             "import_id": self.import_id, "message": self.message, "warnings": self.warnings}
        if self.rejects_file:
            d["rejects_file"] = self.rejects_file
        if self.replaces is not None:
            d["replaces"] = self.replaces
        if self.status == "checked":
            d.update(mapping=self.mapping, metrics=self.metrics, ignored=self.ignored, preview=self.preview)
        return d


class _StartOver(Exception):
    """Internal: a quick load could not prove its runs new (`_StoredCells`, `_RunHashes`); load the
    file again the exact way, with the campaign's key index (`_campaign_key`)."""


# --- dimension tables --------------------------------------------------------------------------

class Dimensions:
    """Name -> id caches for the small tables, filled from the warehouse and kept in step."""

    def __init__(self, conn):
        self.conn = conn
        self.solvers = {(r.name, r.version, r.build, r.params): r.id for r in conn.execute(select(S.solvers))}
        self.families = {r.name: r.id for r in conn.execute(select(S.families))}
        self.groups = {(r.family_id, r.name): r.id for r in conn.execute(select(S.groups))}
        self.instances: dict[tuple, int] = {}
        self.hashes: dict[tuple, set] = {}
        for r in conn.execute(select(S.instances.c.id, S.instances.c.group_id, S.instances.c.name, S.instances.c.content_hash)):
            self.instances[(r.group_id, r.name, r.content_hash)] = r.id
            self.hashes.setdefault((r.group_id, r.name), set()).add(r.content_hash)
        self.named: dict[tuple, int] = {}  # (family, group, instance, hash) as the file names them -> id
        self.hosts = {r.name: r.id for r in conn.execute(select(S.hosts))}
        self.metrics = {r.name: (r.id, r.slot, r.sense, r.unit) for r in conn.execute(select(S.metrics))}
        self.columns: set[int] | None = None  # the value columns the runs table has (read when needed)

    def _add(self, table, **values) -> int:
        if self.conn.dialect.name == "sqlite":  # the driver's own cursor: a tenth of the time per row
            cur = self.conn.connection.driver_connection.cursor()
            cur.execute(f"INSERT INTO {table.name} ({', '.join(values)}) VALUES ({', '.join('?' * len(values))})",
                        tuple(values.values()))
            return cur.lastrowid
        return self.conn.execute(insert(table).values(**values)).inserted_primary_key[0]

    def solver_ids(self, keys: list[tuple]) -> list[int]:
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

        The ids are ours to give: the load holds the write lock from BEGIN, so nobody else adds
        instances meanwhile, and the next id is one past the largest.
        """
        if self.conn.dialect.name != "sqlite":
            return [self._add(S.instances, group_id=g, name=n, content_hash=h) for g, n, h in rows]
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


# --- one chunk after the checks ----------------------------------------------------------------

@dataclass
class Rows:
    """Checked runs of one chunk: names as Arrow text (or one str for every row), numbers as numpy."""

    lines: np.ndarray
    src: np.ndarray  # row positions in the source chunk
    names: dict[str, pa.Array | str]
    seed: np.ndarray
    replicate: np.ndarray
    status: np.ndarray
    finished: np.ndarray
    has_finished: np.ndarray
    metrics: dict[str, np.ndarray]
    keys: dict[str, tuple[np.ndarray, list[tuple]]] = field(default_factory=dict)
    cells: object = None  # the chunk summed by cell (cellsums.Reduced), keyed by the codes above

    def __len__(self) -> int:
        return len(self.lines)

    def take(self, keep: np.ndarray) -> "Rows":
        idx = pa.array(np.flatnonzero(keep))
        return Rows(
            self.lines[keep], self.src[keep],
            {k: v if isinstance(v, str) else v.take(idx) for k, v in self.names.items()},
            self.seed[keep], self.replicate[keep], self.status[keep], self.finished[keep],
            self.has_finished[keep], {k: v[keep] for k, v in self.metrics.items()},
        )

    def factorize(self) -> None:
        """Codes per row and the distinct keys for solvers, instances and hosts (no database)."""
        m = len(self)
        for what, cols in (("solver", ("solver", "version", "build", "params")),
                           ("instance", ("family", "group", "instance", "instance_hash")), ("host", ("host",))):
            self.keys[what] = V.factorize([self.names[f] for f in cols], m)
        if m:
            codes = np.stack([self.keys[w][0].astype(np.int64) for w in ("solver", "instance", "host")], axis=1)
            self.cells = reduce_chunk(codes, np.arange(m, dtype=np.int64), self.status, self.metrics)

    def name(self, f: str, j: int) -> str:
        v = self.names[f]
        return v if isinstance(v, str) else v[j].as_py()

    def describe(self, j: int) -> str:
        solver, version = self.name("solver", j), self.name("version", j)
        who = f"{solver}@{version}" if version else solver
        return f"{who}, instance {self.name('instance', j)}, seed {self.seed[j]}, replicate {self.replicate[j]}"

    def preview(self, k: int = 5) -> list[dict]:
        out = []
        for j in range(min(k, len(self))):
            rec = {f: self.name(f, j) for f in ("solver", "version", "family", "group", "instance")}
            rec.update(seed=int(self.seed[j]), replicate=int(self.replicate[j]),
                       status=S.STATUS_NAMES[int(self.status[j])],
                       finished_at=time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(int(self.finished[j])))
                       if self.has_finished[j] else "",
                       host=self.name("host", j))
            for m, vals in self.metrics.items():
                v = float(vals[j])
                rec[m] = None if np.isnan(v) else v
            out.append(rec)
        return out


def _status_table(words: dict[str, str]) -> tuple[pa.Array, np.ndarray]:
    keys = sorted(words)
    return pa.array(keys, type=pa.string()), np.array([S.STATUS_CODES[words[k]] for k in keys], dtype=np.int16)


# --- per-file state ----------------------------------------------------------------------------

class _FileLoad:
    def __init__(self, wh: Warehouse, info: SourceInfo, layout: Layout, skip_bad: bool, again: bool = False,
                 block_bytes: int = BLOCK_BYTES):
        self.wh, self.info, self.layout, self.skip_bad = wh, info, layout, skip_bad
        self.again = again  # a reload (--again)
        self.block_bytes = block_bytes  # the CSV reader's block (larger for a file with long records)
        self.campaign = ""
        self.replaces: int | None = None  # the import this load replaces (--again)
        # that import and those it replaced in turn: their retracted runs hold no keys for this
        # load, whose runs go in beside them (set inside the write transaction)
        self.chain: tuple[int, ...] = ()
        self.name = info.name
        self.mapping: dict[str, str] = {}  # source column -> target (field or metric)
        self.ignored: list[str] = []
        self.metric_cols: dict[str, str] = {}  # source column -> metric name
        self.undecided: set[str] = set()
        self.header: list[str] | None = None
        self.header_line = 1
        self.rejects: list[dict] = []
        self.ragged = 0
        self.warnings: list[str] = []
        self.status_words = layout.status_words()
        self.status_keys, self.status_codes = _status_table(self.status_words)
        self.missing_words = tuple(layout.missing)
        self.known_metrics: set[str] = set()  # metrics the warehouse holds already: no guessing for them
        self.guessed_text: list[str] = []  # columns left out because their values were mostly not numbers

    @property
    def unit(self) -> str:
        return "row" if self.info.fmt == "parquet" else "line"

    def where(self, line: int, fieldname: str | None = None) -> str:
        place = f"{self.name} {self.unit} {line}"
        return f"{place}, field {fieldname}" if fieldname else place

    def advice(self, text: str) -> str:
        return "" if self.skip_bad else text

    # column mapping
    def map_columns(self, columns: list[str], chunk: pa.Table) -> None:
        lay = self.layout
        for col in columns:
            if col in self.mapping or col in self.ignored or col in self.undecided:
                continue
            low = col.strip().lower()
            if low in lay.columns:
                target = lay.columns[low]
            elif low in FIELDS:
                target = low
            elif low in lay.ignore or low in lay.attributes:
                self.ignored.append(col)
                continue
            else:
                target = col.strip()
            if target in FIELDS:
                clash = [c for c, t in self.mapping.items() if t == target]
                if clash:
                    raise InputError(f"{self._header_place()}columns '{clash[0]}' and '{col}' both give field {target}; keep one or rename it in a layout")
                self.mapping[col] = target
            elif target in lay.metrics or low in lay.columns or target in self.known_metrics:
                self._metric(col, target)
            else:
                self.undecided.add(col)
        for col in [c for c in chunk.column_names if c in self.undecided]:  # in the file's order
            _, empty, notnum, _, _ = V.numbers(chunk.column(col), self.missing_words)
            filled = ~empty
            if not filled.any():
                continue
            self.undecided.discard(col)
            if (~notnum[filled]).mean() >= 0.5:
                self._metric(col, col.strip())
            else:
                self.ignored.append(col)
                self.guessed_text.append(col)

    def _metric(self, col: str, metric: str) -> None:
        if has_control(metric):
            raise InputError(f"{self._header_place()}metric name {control_message(metric)}; rename the column "
                             "or map it in a layout's [columns]")
        clash = [c for c, m in self.metric_cols.items() if m == metric]
        if clash:
            raise InputError(f"{self._header_place()}columns '{clash[0]}' and '{col}' both give metric {metric}; keep one or rename it in a layout")
        self.mapping[col] = metric
        self.metric_cols[col] = metric

    def _header_place(self) -> str:
        return f"{self.name} line {self.header_line}: " if self.info.delimited else f"{self.name}: "

    def check_header(self, columns: list[str]) -> None:
        lowered: dict[str, str] = {}
        for i, c in enumerate(columns, start=1):
            low = c.strip().lower()
            if not low:
                raise InputError(f"{self._header_place()}column {i} has no name; name every column in the header")
            if low in lowered:
                raise InputError(f"{self._header_place()}column '{c}' appears twice (also as '{lowered[low]}'); column names must be unique")
            lowered[low] = c

    def check_required(self) -> None:
        have = set(self.mapping.values()) | set(self.layout.constants)
        found = ", ".join(self.header) if self.header else ", ".join(self.mapping) or "none"
        for need in ("solver", "instance"):
            if need not in have:
                raise InputError(
                    f"{self._header_place()}missing required column '{need}' (columns: {found}); "
                    "add it, or map a column to it in a layout's [columns]"
                )
        if "group" not in have and self.layout.group_pattern is None:
            raise InputError(
                f"{self._header_place()}missing required column 'group' (columns: {found}); add it, or derive "
                "it from the instance name with a [group] pattern in a layout"
            )

    # one chunk
    def drop_blank(self, raw: pa.Table, lines: np.ndarray) -> tuple[pa.Table, np.ndarray]:
        """Leave out records whose every field is empty: blank lines, or ',,,' rows from a spreadsheet."""
        if not self.info.delimited or raw.num_rows == 0:
            return raw, lines
        blank = None
        for col in raw.columns:
            empty = V.mask(pc.equal(pc.binary_length(V.combined(col)), 0))
            blank = empty if blank is None else blank & empty
            if not blank.any():
                return raw, lines
        keep = ~blank
        return raw.filter(pa.array(keep)), lines[keep]

    def normalize(self, raw: pa.Table, lines: np.ndarray) -> Rows:
        lay = self.layout
        n = raw.num_rows
        reason = np.full(n, None, dtype=object)
        fieldof = np.full(n, None, dtype=object)
        flagged = np.zeros(n, dtype=bool)

        def flag(bad: np.ndarray, fieldname: str, texts) -> None:
            bad = bad & ~flagged  # a row keeps its first reason
            if bad.any():
                idx = np.flatnonzero(bad)
                if callable(texts):
                    texts = texts(idx)
                reason[idx] = texts if isinstance(texts, str) else np.asarray(texts, dtype=object)
                fieldof[idx] = fieldname
                flagged[idx] = True

        def shown(text: pa.Array, idx: np.ndarray) -> list[str]:
            return [repr(v)[:80] for v in text.take(pa.array(idx)).to_pylist()]

        by_target = {t: c for c, t in self.mapping.items() if t in FIELDS}
        # a line that repeats the header
        if self.header and len(self.header) > 1:
            first, second = self.header[0], self.header[1]
            rep = V.mask(pc.and_(pc.equal(V.as_text(raw.column(first)), first.strip()),
                                 pc.equal(V.as_text(raw.column(second)), second.strip())))
            flag(rep, first, "this line repeats the header")

        names: dict[str, pa.Array | str] = {}
        for f in TEXT_FIELDS:
            if f in lay.constants:
                names[f] = lay.constants[f].strip()
            elif f in by_target:
                names[f] = V.as_text(raw.column(by_target[f]))
            else:
                names[f] = "" if f == "group" else DEFAULTS.get(f, "")
        if lay.group_pattern is not None:
            self._apply_pattern(names, by_target, n, flag)
        for f in ("solver", "instance", "group"):
            v = names[f]
            if not isinstance(v, str):
                flag(V.mask(pc.equal(v, "")), f, f"is empty; every run needs a {f}")
        fam = names["family"]
        if isinstance(fam, str):
            names["family"] = fam or "default"
        else:
            names["family"] = pc.if_else(pc.equal(fam, ""), pa.scalar("default"), fam)
        for f in NAME_FIELDS:
            v = names[f]
            if isinstance(v, str):
                continue
            if V.has_controls(v):  # (the bytes first: the full test is for the rare column that needs it)
                flag(V.controls(v), f, lambda i, t=v: [control_message(x) for x in t.take(pa.array(i)).to_pylist()])
            if len(v) == 0 or V.byte_lengths(v).max() <= NAME_LIMIT:  # no more characters than bytes
                continue
            lengths = pc.utf8_length(v).to_numpy(zero_copy_only=False)
            long_ = lengths > NAME_LIMIT
            if long_.any():
                flag(long_, f, lambda i, L=lengths: [f"is {L[j]} characters long; names may have at most {NAME_LIMIT}" for j in i])
        # seed and replicate: whole numbers
        whole = {}
        for f in ("seed", "replicate"):
            if f in by_target:
                vals, bad, text, big = V.wholes(raw.column(by_target[f]))
                span = SEED_SPAN if f == "seed" else REPLICATE_SPAN
                if f == "replicate":  # a 32-bit column on PostgreSQL: the same bound on both databases
                    wide = ~bad & ((vals < -span) | (vals >= span))
                    big, bad = big | wide, bad | wide
                flag(big, f, lambda i, t=text, f=f, span=span: [
                    f"{v} is out of range; a {f} is a whole number from {-span} to {span - 1}" for v in shown(t, i)])
                flag(bad, f, lambda i, t=text: [f"{v} is not a whole number" for v in shown(t, i)])
                whole[f] = vals
            else:
                whole[f] = np.full(n, int(lay.constants.get(f, DEFAULTS[f]) or 0), dtype=np.int64)
        # status words
        if "status" in by_target:
            # the few distinct words are lowered and looked up, not every row's
            enc = V.as_text(raw.column(by_target["status"])).dictionary_encode()
            distinct = pc.utf8_lower(enc.dictionary)
            distinct = pc.if_else(pc.equal(distinct, ""), pa.scalar("ok"), distinct)
            pos = pc.index_in(distinct, value_set=self.status_keys).take(enc.indices)
            unknown = V.mask(pos.is_null())
            if unknown.any():
                words = distinct.take(enc.indices)
                known = ", ".join(sorted(set(self.status_words)))
                flag(unknown, "status", lambda i, t=words: [
                    f"unknown status {v} (known: {known}); map more words to ok, timeout, failed or infeasible "
                    "in a layout's [status] section" for v in shown(t, i)])
            status = self.status_codes[pc.fill_null(pos, 0).to_numpy(zero_copy_only=False)]
        else:
            word = lay.constants.get("status", "ok").strip().lower() or "ok"
            if word not in self.status_words:
                raise InputError(f"layout {lay.source}: [constants] status = '{word}' is not a known status word")
            status = np.full(n, S.STATUS_CODES[self.status_words[word]], dtype=np.int16)
        # finished_at: ISO 8601, times without a zone read as UTC
        if "finished_at" in by_target or lay.constants.get("finished_at"):
            col = raw.column(by_target["finished_at"]) if "finished_at" in by_target else \
                pa.array([lay.constants["finished_at"]] * n, type=pa.string())
            finished, has_fin, bad, text = V.instants(col)
            flag(bad, "finished_at", lambda i, t=text: [
                f"{v} is not an ISO 8601 date and time (e.g. 2026-11-09T14:05:00Z)" for v in shown(t, i)])
        else:
            finished, has_fin = np.zeros(n, dtype=np.int64), np.zeros(n, dtype=bool)
        # metrics
        ok = status == S.STATUS_CODES["ok"]
        metrics: dict[str, np.ndarray] = {}
        for col, metric in self.metric_cols.items():
            if col not in raw.column_names:
                vals = np.full(n, np.nan)
                empty, notnum, nonfinite = np.ones(n, dtype=bool), np.zeros(n, dtype=bool), np.zeros(n, dtype=bool)
                text = None
            else:
                vals, empty, notnum, nonfinite, text = V.numbers(raw.column(col), self.missing_words)
            hint = self.advice("; map it in a layout ([missing] words) or use --skip-bad")
            flag(notnum, metric, lambda i, t=text: [f"{v} is not a number{hint}" for v in shown(t, i)])
            flag(nonfinite, metric, lambda i, t=text: [f"{v} is not a finite number" for v in shown(t, i)])
            flag(empty & ok, metric, "is empty on an ok run; give the value, or give the run a failure status")
            metrics[metric] = np.where(np.isfinite(vals), vals, np.nan)
        rows = Rows(lines, np.arange(n), names, whole["seed"], whole["replicate"], status, finished, has_fin, metrics)
        bad_rows = flagged
        if bad_rows.any():
            if not self.skip_bad:
                j = int(np.flatnonzero(bad_rows)[np.argmin(lines[bad_rows])])
                raise InputError(f"{self.where(int(lines[j]), fieldof[j])}: {reason[j]}")
            idx = np.flatnonzero(bad_rows)
            records = raw.take(pa.array(idx)).to_pylist()
            for j, rec in zip(idx.tolist(), records):
                rec = {k: ("" if v is None else v) for k, v in rec.items()}
                rec["line"] = int(lines[j])
                rec["reason"] = f"field {fieldof[j]}: {reason[j]}"
                self.rejects.append(rec)
            rows = rows.take(~bad_rows)
        return rows

    def _apply_pattern(self, names: dict, by_target: dict, n: int, flag) -> None:
        """Group (and family, and the instance's own name) from the instance name, by the layout's pattern."""
        pattern = self.layout.group_pattern
        group, inst = names["group"], names["instance"]
        if isinstance(group, str) and group:
            return
        need = np.ones(n, dtype=bool) if isinstance(group, str) else V.mask(pc.equal(group, ""))
        if not need.any():
            return
        inst_arr = inst if not isinstance(inst, str) else pa.array([inst] * n, type=pa.string())
        enc = inst_arr.dictionary_encode()
        found = [pattern.search(u) for u in enc.dictionary.to_pylist()]  # distinct names only
        idx = enc.indices

        def part(key: str, fallback: list[str]) -> pa.Array:
            vals = [(m.group(key) if m is not None and m.group(key) is not None else fb) for m, fb in zip(found, fallback)]
            return pa.array(vals, type=pa.string()).take(idx)

        uniq = enc.dictionary.to_pylist()
        matched = np.array([m is not None for m in found], dtype=bool)[idx.to_numpy(zero_copy_only=False)]
        flag(need & ~matched, "instance", lambda i: [f"{v!r} does not match the layout's [group] pattern"
                                                     for v in inst_arr.take(pa.array(i)).to_pylist()])
        use = pa.array(need & matched)
        base_group = group if not isinstance(group, str) else pa.array([group] * n, type=pa.string())
        names["group"] = pc.if_else(use, part("group", [""] * len(uniq)), base_group)
        groups = pattern.groupindex
        if "family" in groups and "family" not in by_target and "family" not in self.layout.constants:
            fam = names["family"]
            base_fam = fam if not isinstance(fam, str) else pa.array([fam] * n, type=pa.string())
            names["family"] = pc.if_else(use, part("family", ["default"] * len(uniq)), base_fam)
        if "instance" in groups:
            names["instance"] = pc.if_else(use, part("instance", uniq), inst_arr)

    def bad_row(self, line: int, text_: str, expected: int, actual: int) -> InputError | None:
        """Told by the CSV reader of a row with the wrong number of fields."""
        what = "too many" if actual > expected else "too few"
        msg = f"has {actual} fields where the header has {expected} ({what})"
        if not self.skip_bad:
            return InputError(f"{self.name} line {line}: {msg}; check the quoting and the delimiter on that line")
        self.ragged += 1
        self.rejects.append({"line": line, "raw": text_, "reason": msg})
        return None


# --- writing -----------------------------------------------------------------------------------

# run columns that hold whole numbers (a chunk-wide constant among them is written as a literal)
_WHOLE_COLUMNS = frozenset({"id", "solver_id", "instance_id", "seed", "replicate", "status", "finished_at",
                            "host_id", "source_line"})
RUN_COLS = ["id", "campaign_id", "import_id", "solver_id", "instance_id", "seed", "replicate",
            "status", "finished_at", "host_id", "source_line"]


def _with_nulls(values: np.ndarray, present: np.ndarray) -> list:
    if present.all():
        return values.tolist()
    out = values.astype(object)
    out[~present] = None
    return out.tolist()


class _Writer:
    """Writes run rows; the dialect decides executemany (SQLite) or COPY (PostgreSQL)."""

    def __init__(self, conn, dialect: str, slots: list[int], campaign_id: int, import_id: int,
                 numbered: bool = False, chain: tuple[int, ...] = ()):
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
            # made again for each writer: a metric new in this file may have added a column to runs
            self.conn.exec_driver_sql("DROP TABLE IF EXISTS blockyard_stage")
            self.conn.exec_driver_sql(
                "CREATE TEMP TABLE blockyard_stage (LIKE runs INCLUDING DEFAULTS) ON COMMIT DROP"
            )
            self.copy_sql = f"COPY blockyard_stage ({names}) FROM STDIN (FORMAT csv)"
            self.move_sql = _move_sql(conn, names, campaign_id, chain)

    def _marks(self, same: dict[str, str]) -> str:
        """One row's VALUES group: the import's two ids and the chunk's constants as literals."""
        return "(" + ", ".join(self.fixed.get(c) or same.get(c, "?") for c in self.cols) + ")"

    def write(self, ids: np.ndarray, rows: Rows, solver: np.ndarray, instance: np.ndarray,
              host: np.ndarray, has_host: np.ndarray, metric_of_slot: dict[int, str]) -> None:
        if self.dialect == "sqlite":
            self._write_sqlite(ids, rows, solver, instance, host, has_host, metric_of_slot)
            return
        import io

        import pyarrow.csv as pacsv

        m = len(ids)
        data = {
            "id": pa.array(ids), "campaign_id": pa.array(np.full(m, self.campaign_id, dtype=np.int64)),
            "import_id": pa.array(np.full(m, self.import_id, dtype=np.int64)),
            "solver_id": pa.array(solver), "instance_id": pa.array(instance), "seed": pa.array(rows.seed),
            "replicate": pa.array(rows.replicate), "status": pa.array(rows.status),
            "finished_at": pa.array(rows.finished, mask=~rows.has_finished),
            "host_id": pa.array(host, mask=~has_host), "source_line": pa.array(rows.lines),
        }
        for s in self.slots:
            vals = rows.metrics[metric_of_slot[s]]
            data[f"v{s}"] = pa.array(vals, mask=np.isnan(vals))
        buf = io.BytesIO()
        pacsv.write_csv(pa.table(data), buf, pacsv.WriteOptions(include_header=False))
        cur = self.raw.cursor()
        cur.execute("TRUNCATE blockyard_stage")
        with cur.copy(self.copy_sql) as cp:
            cp.write(buf.getvalue())
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


def _move_sql(conn, names: str, campaign_id: int, chain: tuple[int, ...]) -> str:
    """PostgreSQL: the statement that moves the staged rows into runs, past every run whose key
    is taken. The unique run key holds the live runs (ON CONFLICT names it, WHERE and all, so
    that the partial index is the one inferred); the campaign's retracted runs outside the chain
    a reload replaces hold theirs through an anti-join. Most campaigns hold no such run (the
    runs table is locked for the load, so that stays true while it writes): then the join is
    left out, and each chunk's insert reads nothing but the key index."""
    other = f" AND r.import_id NOT IN ({', '.join(str(int(i)) for i in chain)})" if chain else ""
    retracted = f"r.retraction_id IS NOT NULL AND r.campaign_id = {int(campaign_id)}{other}"
    held = conn.exec_driver_sql(f"SELECT 1 FROM runs r WHERE {retracted} LIMIT 1").first() is not None
    where = ""
    if held:
        # (retracted runs are few: ix_runs_withdrawn finds them, and the join hashes them)
        where = (" WHERE NOT EXISTS (SELECT 1 FROM runs r WHERE " + retracted + " AND r.solver_id = s.solver_id "
                 "AND r.instance_id = s.instance_id AND r.seed = s.seed AND r.replicate = s.replicate)")
    return (f"INSERT INTO runs ({names}) SELECT {names} FROM blockyard_stage s{where} ORDER BY id "
            "ON CONFLICT (campaign_id, solver_id, instance_id, seed, replicate) WHERE retraction_id IS NULL "
            "DO NOTHING")


@dataclass
class _Holder:
    import_id: int
    source_line: int
    retraction_id: int | None = None


def _report_conflicts(conn, fl: _FileLoad, rows: Rows, raw: pa.Table, ids: np.ndarray, solver: np.ndarray,
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
    # the campaign as a literal: SQLite takes the load's own key index (`_campaign_key`) only
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


def _shell_word(text: str) -> str:
    """A value as it is typed in a shell command that a message suggests: in double quotes when
    nothing in it means something to a POSIX shell there, else as shlex quotes it."""
    import re
    import shlex

    if re.fullmatch(r'[^"$`\\!]*', text):
        return f'"{text}"'
    return shlex.quote(text)


def check_campaign(name: str) -> None:
    """The --campaign name, checked before any file is read or any warehouse is touched."""
    if not name.strip():
        raise InputError("--campaign needs a name")
    if len(name) > NAME_LIMIT:
        raise InputError(f"campaign name is {len(name)} characters long; names may have at most {NAME_LIMIT}")
    if has_control(name):
        raise InputError(f"--campaign {control_message(name)}")


def _campaign_id(conn, name: str) -> int:
    check_campaign(name)
    found = conn.execute(select(S.campaigns.c.id).where(S.campaigns.c.name == name)).scalar()
    if found is not None:
        return found
    return conn.execute(insert(S.campaigns).values(name=name, created_at=int(time.time()))).inserted_primary_key[0]


def _replaced_chain(conn, replaces: int | None) -> tuple[int, ...]:
    """The import a reload replaces and those that one replaced in turn (imports.replaces_import_id):
    all wholly retracted (`--again` loads no file with live runs), and none of their retracted
    runs holds a key against the reload."""
    chain: list[int] = []
    while replaces is not None and replaces not in chain:
        chain.append(int(replaces))
        replaces = conn.execute(select(S.imports.c.replaces_import_id).where(S.imports.c.id == replaces)).scalar()
    return tuple(chain)


def _checked(fl: _FileLoad, chunks):
    """Source chunks -> (source table, checked rows, records read). No database work in here."""
    first = True
    for raw, lines in chunks:
        raw, lines = fl.drop_blank(raw, lines)
        if raw.num_rows == 0:
            continue
        if first and not fl.info.delimited:
            fl.check_header(raw.column_names)
        fl.map_columns(raw.column_names, raw)
        if first:
            fl.check_required()
            first = False
        rows = fl.normalize(raw, lines)
        rows.factorize()
        # the source table is kept only where a rejected duplicate would be written out with it
        yield (raw if fl.skip_bad else None), rows, raw.num_rows


def _readers(fl: _FileLoad):
    info = fl.info
    if info.delimited:
        early = take_early_read(info)  # parsed while the command started (scan.start_early)
        if early is not None and not fl.skip_bad and fl.block_bytes == BLOCK_BYTES:
            early.ready.wait()
            if early.error is not None:
                raise early.error
            fl.header, fl.header_line = early.header, early.header_line
            fl.check_header(fl.header)
            return early.chunks(fl.bad_row)
        fl.header, fl.header_line = read_header(info)
        fl.check_header(fl.header)
        return read_delimited(info, fl.header, fl.header_line, fl.bad_row, fl.block_bytes)
    if info.fmt == "jsonl":
        return read_jsonl(info)
    return read_parquet(info)


LOAD_KEY = "blockyard_load_key"


def _campaign_key(conn, campaign_id: int, create: bool) -> None:
    """SQLite, an exact load: a unique index on the live run keys of this one campaign, made when
    the load starts and dropped before it commits (a partial index: the campaign's live runs
    only, so its cost follows the campaign, not the warehouse). INSERT OR IGNORE then leaves out
    each run the campaign holds already, and `_report_conflicts` names them. Live runs only: a
    reload into its own campaign shares keys with its retracted runs (`load --again`), so the
    retracted runs could not be under a unique index; the load keeps their keys with
    `_RetractedKeys` instead. Made and dropped inside the load's transaction: a load that fails
    or dies leaves no trace of it."""
    if create:
        conn.exec_driver_sql(f'CREATE UNIQUE INDEX "{LOAD_KEY}" ON runs (campaign_id, solver_id, instance_id, seed, '
                             f'replicate) WHERE campaign_id = {int(campaign_id)} AND retraction_id IS NULL')
    else:
        conn.exec_driver_sql(f'DROP INDEX "{LOAD_KEY}"')


class _StoredCells:
    """The cells (solver, instance) of a campaign that hold runs already, live or retracted: a
    run of the file in one of them may be stored already, and the load then starts over exactly.
    The retracted runs of `chain` (the imports a reload replaces, all wholly retracted) hold no
    keys for the load and are left out. A campaign new to the warehouse holds none, and costs
    one query."""

    def __init__(self, conn, campaign_id: int, chain: tuple[int, ...] = ()):
        C, R = S.cell_stats, S.runs
        codes: list[np.ndarray] = []
        live = conn.execute(select(C.c.solver_id, C.c.instance_id).where(C.c.campaign_id == campaign_id).distinct()).all()
        gone = conn.execute(select(R.c.solver_id, R.c.instance_id)
                            .where(R.c.retraction_id.is_not(None), R.c.campaign_id == campaign_id,
                                   *([R.c.import_id.not_in(chain)] if chain else [])).distinct()).all()
        for rows in (live, gone):
            if rows:
                a = np.asarray(rows, dtype=np.int64)
                codes.append(self._code(a[:, 0], a[:, 1]))
        self.codes = np.unique(np.concatenate(codes)) if codes else None

    @staticmethod
    def _code(solver: np.ndarray, instance: np.ndarray) -> np.ndarray:
        return (solver.astype(np.int64) << 32) | instance.astype(np.int64)

    def overlaps(self, solver: np.ndarray, instance: np.ndarray) -> bool:
        if self.codes is None:
            return False
        return bool(np.isin(self._code(solver, instance), self.codes).any())


class _RunHashes:
    """A 64-bit hash of each run's key (solver, instance, seed, replicate) as the file goes by;
    at its end, two equal hashes mean the same run may appear twice (or, once in a few billion
    billion pairs, two runs share a hash). Either way the exact load decides."""

    def __init__(self, expected: int = 0):
        # one array, filled as the file goes by and sorted in place at its end: 8 bytes a run
        # (the file's line count is known from the first pass; it grows if a file holds more)
        self.h = np.empty(max(int(expected), 1024), dtype=np.uint64)
        self.n = 0

    @staticmethod
    def _mix(z: np.ndarray) -> np.ndarray:
        # splitmix64's finalizer (constants from memory of Steele, Lea and Flood 2014; the tests only need
        # it to spread keys): each input bit moves every output bit
        z = z + np.uint64(0x9E3779B97F4A7C15)
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        return z ^ (z >> np.uint64(31))

    @classmethod
    def of(cls, solver: np.ndarray, instance: np.ndarray, seed: np.ndarray, replicate: np.ndarray) -> np.ndarray:
        """Each run's key hash."""
        with np.errstate(over="ignore"):
            h = cls._mix(np.asarray(solver).astype(np.uint64))
            for part in (instance, seed, replicate):
                h = cls._mix(h ^ np.asarray(part).astype(np.int64).view(np.uint64))
        return h

    def add(self, solver: np.ndarray, instance: np.ndarray, seed: np.ndarray, replicate: np.ndarray) -> None:
        h = self.of(solver, instance, seed, replicate)
        if self.n + len(h) > len(self.h):
            self.h = np.resize(self.h, max(2 * len(self.h), self.n + len(h)))
        self.h[self.n:self.n + len(h)] = h
        self.n += len(h)

    def repeated(self) -> bool:
        h = self.h[:self.n]
        h.sort()
        return bool((h[1:] == h[:-1]).any())


class _RetractedKeys:
    """SQLite, an exact load: the keys the campaign's retracted runs hold (the runs of `chain`,
    the imports a reload replaces, hold none). The load's key index covers live runs only
    (`_campaign_key`), so a run of the file under one of these keys is kept out before it is
    written, and reported skipped as one the index refused. Retracted runs are few
    (ix_runs_withdrawn finds them); a campaign with none costs one query. The keys are kept as
    numbers sorted by their hash (40 bytes a run), not as Python tuples: a reload's campaign may
    hold a large import's retracted runs."""

    def __init__(self, conn, campaign_id: int, chain: tuple[int, ...] = ()):
        R = S.runs
        found = conn.execute(select(R.c.solver_id, R.c.instance_id, R.c.seed, R.c.replicate).where(
            R.c.retraction_id.is_not(None), R.c.campaign_id == campaign_id,
            *([R.c.import_id.not_in(chain)] if chain else []))).all()
        self.hashes = self.keys = None
        if found:
            keys = np.asarray(found, dtype=np.int64)
            h = _RunHashes.of(keys[:, 0], keys[:, 1], keys[:, 2], keys[:, 3])
            order = np.argsort(h, kind="stable")
            self.hashes, self.keys = h[order], keys[order]

    def free(self, solver: np.ndarray, instance: np.ndarray, seed: np.ndarray,
             replicate: np.ndarray) -> np.ndarray | None:
        """Which runs no retracted run holds the key of; None when that is all of them."""
        if self.hashes is None:
            return None
        h = _RunHashes.of(solver, instance, seed, replicate)
        lo = np.searchsorted(self.hashes, h, side="left")
        hi = np.searchsorted(self.hashes, h, side="right")
        maybe = np.flatnonzero(hi > lo)
        if not len(maybe):
            return None
        # a hash met is checked on the key itself (two keys may share a hash, once in 10^19)
        mine = np.stack([np.asarray(a, dtype=np.int64)[maybe] for a in (solver, instance, seed, replicate)], axis=1)
        taken = (self.keys[lo[maybe]] == mine).all(axis=1)
        for j in np.flatnonzero(~taken & (hi[maybe] - lo[maybe] > 1)).tolist():
            taken[j] = bool((self.keys[lo[maybe[j]]:hi[maybe[j]]] == mine[j]).all(axis=1).any())
        if not taken.any():
            return None
        free = np.ones(len(h), dtype=bool)
        free[maybe[taken]] = False
        return free


class _Prefetch:
    """Reads the next chunk in a helper thread while this one is written.

    Only for the readers whose parsing runs in pyarrow without Python's global lock (CSV, TSV,
    Parquet); the helper stops as soon as the load does, on success or failure.
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


class _ForeignKeysOff:
    """SQLite only: skip the per-row foreign key lookups while the runs go in.

    Every id written comes from the dimension tables in the same transaction, so the lookups
    would only repeat what the loader knows. The pragma is set outside the transaction (SQLite
    ignores it inside one) and always set back before the connection goes back to the pool.
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


class _CollectorPaused:
    """Python's cycle collector paused while a file loads. A load makes millions of short-lived
    lists (the rows handed to the driver) and no reference cycles of its own; each few hundred
    lists would start a collection that walks the objects the libraries keep (0.1 to 0.2 s of
    a 1M-run load's 3.6 s, in interleaved pairs). The collector runs again, as before, after."""

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


class _PandasNotForArrow:
    """While a file loads: pyarrow's first conversion of a Python value imports pandas (0.2 s of a
    command's start) only to learn whether the value is a pandas object; the loader hands it
    numpy arrays and plain values only. The import fails fast instead, and pyarrow goes on
    without pandas. Only in a process that has not imported pandas yet (a `blockyard load`), and
    taken out as soon as the load returns, so that nothing else is kept from pandas.
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


class _BulkJournal:
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


def load_file(wh: Warehouse, path: str | Path, campaign: str, layout: Layout | None = None, *,
              skip_bad: bool = False, dry_run: bool = False, rejects: str | Path | None = None,
              progress: Callable[[int, int], None] | None = None, again: bool = False) -> FileReport:
    """Load one result file into `campaign`; refuse it whole, with one line saying why, on bad input.

    `again`: load bytes loaded before, when every earlier import of them is wholly retracted, as
    a new import that names the one it replaces (`load --again`)."""
    with _PandasNotForArrow(), _CollectorPaused():
        return _load_file(wh, path, campaign, layout, skip_bad=skip_bad, dry_run=dry_run, rejects=rejects,
                          progress=progress, again=again)


def _load_file(wh: Warehouse, path: str | Path, campaign: str, layout: Layout | None, *,
               skip_bad: bool, dry_run: bool, rejects: str | Path | None,
               progress: Callable[[int, int], None] | None, again: bool) -> FileReport:
    layout = layout or Layout()
    check_campaign(campaign)  # every option is checked before the file is compared with the stored ones
    shown = str(path)
    p = Path(path)
    info = first_pass_of(p, shown)  # started early by the command line when it could
    earlier = _earlier_imports(wh, info.sha256)
    replaces = None
    if earlier:
        live = [e for e in earlier if e.live]
        if not again:
            head = earlier[-1]
            return FileReport(file=shown, status="duplicate", campaign=head.campaign, import_id=head.id,
                              message=_duplicate_message(earlier))
        if live:
            raise InputError(_still_live_message(wh, shown, live[-1]))
        # the head of the chain: each import is replaced at most once (imports.ux_imports_reload)
        replaces = earlier[-1].id
    block = BLOCK_BYTES
    try:
        while True:
            try:
                report = _attempts(wh, info, p, campaign, layout, skip_bad, dry_run, rejects, progress,
                                   again=again, replaces=replaces, block=block)
                break
            except LongRecord as exc:  # nothing was stored: read it all again in a larger block
                block = _block_for(info, exc.block)
    except OperationalError as exc:
        raise StorageError(f"cannot write to warehouse {wh.display}: {_db_reason(exc)}; nothing from {shown} was stored") from None
    except IntegrityError as exc:
        if "sha256" in str(exc.orig) or "imports" in str(exc.orig):
            what = "loaded these bytes again" if replaces is not None else "loaded the same bytes"
            return FileReport(file=shown, status="duplicate", campaign=campaign,
                              message=f"another process {what} just now; nothing to do")
        raise StorageError(f"warehouse {wh.display} refused a write: {_db_reason(exc)}; nothing from {shown} was stored") from None
    except Exception as exc:  # the driver's own cursor (bulk writes) raises its errors unwrapped
        if not _is_driver_error(exc):
            raise
        raise StorageError(f"cannot write to warehouse {wh.display}: {_db_reason(exc)}; nothing from {shown} was stored") from None
    if again and not earlier:
        report.warnings.append("--again: these bytes were not loaded before; loaded as any new file")
    # No ANALYZE after a load: statistics sampled from the first rows of an index (analysis_limit)
    # told the planner a campaign holds a thousand runs and sent date slices through the campaign
    # index instead of their id ranges, and full statistics cost a pass over every index on each
    # nightly load. The planner's own estimates serve every slice the benchmarks time.
    return report


def _attempts(wh: Warehouse, info: SourceInfo, p: Path, campaign: str, layout: Layout, skip_bad: bool,
              dry_run: bool, rejects, progress, **how) -> FileReport:
    try:
        return _load(wh, info, p, campaign, layout, skip_bad, dry_run, rejects, progress, allow_bulk=True, **how)
    except _StartOver:
        return _load(wh, info, p, campaign, layout, skip_bad, dry_run, rejects, progress, allow_bulk=False, **how)


def _block_for(info: SourceInfo, tried: int) -> int:
    """The CSV reader's block for a file with a record longer than `tried` bytes: room for two
    of its longest record; or, past the largest block, a refusal that names that record."""
    length, line, column = longest_record(info)
    if length > MAX_BLOCK_BYTES // 2 or tried >= MAX_BLOCK_BYTES:
        header, _ = read_header(info)
        name = header[column] if column < len(header) else f"{column + 1} (past the header's columns)"
        raise InputError(
            f"{info.name} line {line}, field {name}: the record is {length / 2**20:.0f} MB long; a record may "
            f"hold at most {MAX_BLOCK_BYTES // 2 // 2**20} MB; shorten that field, or leave its column out of the file")
    return min(max(2 * length + BLOCK_BYTES, 4 * tried), MAX_BLOCK_BYTES)


# --- loads of bytes loaded before ---------------------------------------------------------------

@dataclass
class _Earlier:
    """An earlier import of the same bytes, and how much of it is retracted."""

    id: int
    campaign: str
    campaign_id: int
    loaded_at: int
    loaded: int  # runs it stored
    retracted: int  # of those, retracted
    first_run_id: int | None
    last_run_id: int | None
    first_finished: int | None
    last_finished: int | None

    @property
    def live(self) -> int:
        return max(self.loaded - self.retracted, 0)

    @property
    def when(self) -> str:
        return time.strftime("%Y-%m-%d %H:%M", time.gmtime(self.loaded_at))

    @property
    def state(self) -> str:
        if not self.loaded:
            return "holds no runs"
        if not self.retracted:
            return "not retracted"
        if not self.live:
            return "wholly retracted"
        return f"partly retracted ({self.retracted} of {self.loaded} runs)"


def _earlier_imports(wh: Warehouse, sha256: str) -> list[_Earlier]:
    """The imports of these bytes, oldest first. Retracted runs are counted in each import's own id
    range (revision 0004), so the count costs no more than that import's runs."""
    I, R = S.imports, S.runs
    out = []
    with wh.engine.connect() as conn:
        rows = conn.execute(
            select(I.c.id, I.c.campaign_id, S.campaigns.c.name, I.c.loaded_at, I.c.rows_loaded, I.c.first_run_id,
                   I.c.last_run_id, I.c.first_finished, I.c.last_finished)
            .join(S.campaigns, S.campaigns.c.id == I.c.campaign_id)
            .where(I.c.sha256 == sha256).order_by(I.c.id)).all()
        for r in rows:
            retracted = 0
            if r.first_run_id is not None:
                retracted = conn.execute(select(func.count()).select_from(R).where(
                    R.c.id.between(r.first_run_id, r.last_run_id), R.c.import_id == r.id,
                    R.c.retraction_id.is_not(None))).scalar() or 0
            out.append(_Earlier(r.id, r.name, r.campaign_id, r.loaded_at, r.rows_loaded or 0, int(retracted),
                                r.first_run_id, r.last_run_id, r.first_finished, r.last_finished))
    return out


def _duplicate_message(earlier: list[_Earlier]) -> str:
    head = earlier[-1]
    text = f"already loaded into campaign {head.campaign} on {head.when} UTC (import {head.id}); {head.state}"
    live = [e for e in earlier if e.live]
    if not live:
        return text + "; to load it again (with a corrected layout, say), add --again"
    if live[-1] is not head:
        e = live[-1]
        return text + f", but import {e.id} of the same bytes (campaign {e.campaign}) still has {e.live} live runs; nothing to do"
    if head.retracted:
        return text + "; nothing to do (to load it again, retract the rest of its runs first, then add --again)"
    return text + "; nothing to do"


def _still_live_message(wh: Warehouse, shown: str, e: _Earlier) -> str:
    with wh.engine.connect() as conn:
        how = _retract_command(conn, e)
    return (f"{shown}: --again loads a file whose earlier imports are wholly retracted, but import {e.id} "
            f"(campaign {e.campaign}, loaded {e.when} UTC) is {e.state}, with {e.live} live "
            f"{'run' if e.live == 1 else 'runs'}; retract them first: {how}")


def retract_command(conn, import_id: int) -> str:
    """The retract command that takes an import's live runs, as a one-line message gives it
    (also `ledger.undo_retraction`, naming the import that holds the keys it would restore)."""
    I = S.imports
    r = conn.execute(select(I.c.id, I.c.campaign_id, S.campaigns.c.name, I.c.loaded_at, I.c.rows_loaded,
                            I.c.first_run_id, I.c.last_run_id, I.c.first_finished, I.c.last_finished)
                     .join(S.campaigns, S.campaigns.c.id == I.c.campaign_id).where(I.c.id == import_id)).one()
    return _retract_command(conn, _Earlier(r.id, r.name, r.campaign_id, r.loaded_at, r.rows_loaded or 0, 0,
                                           r.first_run_id, r.last_run_id, r.first_finished, r.last_finished))


def _retract_command(conn, e: _Earlier) -> str:
    sl, exact = _slice_of_import(conn, e)
    how = f"blockyard retract --slice {_shell_word(sl)} --reason \"...\""
    if not exact:
        how += (f" (that slice also takes the live runs of campaign {e.campaign}'s other imports: narrow it "
                "with solver= or family= terms)")
    return how


def _slice_of_import(conn, e: _Earlier) -> tuple[str, bool]:
    """Slice text that takes an import's live runs, and whether it takes no other live runs. The
    slice language has no term for an import: its campaign does when no other import of the
    campaign has live runs (the cell summaries hold live runs only); else its campaign and time
    range, when that range meets no other import's and every live run of it has a time."""
    C, I, R = S.cell_stats, S.imports, S.runs
    base = f"campaign={_slice_value(e.campaign)}"
    others = [r[0] for r in conn.execute(select(C.c.import_id).where(
        C.c.campaign_id == e.campaign_id, C.c.import_id != e.id).distinct())]
    if not others:
        return base, True
    if e.first_finished is None or e.first_run_id is None:
        return base, False
    untimed = conn.execute(select(func.count()).select_from(R).where(
        R.c.id.between(e.first_run_id, e.last_run_id), R.c.import_id == e.id, R.c.retraction_id.is_(None),
        R.c.finished_at.is_(None))).scalar()
    meets = conn.execute(select(func.count()).select_from(I).where(
        I.c.id.in_(others), I.c.first_finished <= e.last_finished, I.c.last_finished >= e.first_finished)).scalar()
    if untimed or meets:
        return base, False

    def iso(t: int) -> str:
        return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t))

    # until is exclusive (a run finished before it): one second past the last
    return f"{base} since={iso(e.first_finished)} until={iso(e.last_finished + 1)}", True


def _slice_value(v: str) -> str:
    """A name as a slice term's value: quoted where a space, comma, bar, quote or operator would
    otherwise end or split it (the slice language's own rules, docs/analysis.md)."""
    import re

    if v and not re.search(r"[\s,|'\"=<>!~]", v):
        return v
    if '"' not in v:
        return f'"{v}"'
    if "'" not in v:
        return f"'{v}'"
    return "".join(f"'{part}'" if part[0] == '"' else f'"{part}"' for part in re.findall(r'"+|[^"]+', v))


def _load(wh: Warehouse, info: SourceInfo, p: Path, campaign: str, layout: Layout, skip_bad: bool,
          dry_run: bool, rejects, progress, allow_bulk: bool, again: bool = False, replaces: int | None = None,
          block: int = BLOCK_BYTES) -> FileReport:
    shown = info.name
    report = FileReport(file=shown, status="loaded", campaign=campaign, replaces=replaces)
    fl = _FileLoad(wh, info, layout, skip_bad, again, block)
    fl.campaign, fl.replaces = campaign, replaces
    total = max(info.lines - (1 if info.delimited else 0), 1)
    with wh.engine.connect() as conn:  # the metrics known already (they are not guessed at)
        fl.known_metrics = {r[0] for r in conn.execute(select(S.metrics.c.name))}
    # The reading starts now, in a helper thread where it can, while the write transaction opens
    chunks = _checked(fl, _readers(fl))
    if info.fmt != "jsonl":  # pyarrow parses without Python's lock: read ahead in a helper thread
        chunks = _Prefetch(chunks)
    summing = Summing()
    try:
        return _write(wh, info, p, campaign, layout, fl, total, chunks, summing, report, dry_run, rejects,
                      progress, allow_bulk)
    finally:
        summing.close()
        if isinstance(chunks, _Prefetch):
            chunks.close()


def _write(wh: Warehouse, info: SourceInfo, p: Path, campaign: str, layout: Layout, fl: "_FileLoad", total: int,
           chunks, summing: "Summing", report: FileReport, dry_run: bool, rejects, progress,
           allow_bulk: bool) -> FileReport:
    shown = info.name
    writes_sqlite = wh.is_sqlite and not dry_run
    bulk_wanted = allow_bulk and writes_sqlite and total >= BULK_MIN_ROWS
    with wh.write() as conn, _ForeignKeysOff(conn, wh.is_sqlite), _BulkJournal(conn, writes_sqlite, bulk_wanted, total):
        with conn.begin() as trans:
            if wh.dialect == "postgresql":
                conn.exec_driver_sql("LOCK TABLE runs IN SHARE ROW EXCLUSIVE MODE")
            campaign_id = _campaign_id(conn, campaign)
            fl.chain = _replaced_chain(conn, fl.replaces)
            import_id = conn.execute(insert(S.imports).values(
                campaign_id=campaign_id, file_name=p.name, sha256=info.sha256, layout=layout.text,
                replaces_import_id=fl.replaces,
                rows_read=0, rows_loaded=0, rows_rejected=0, rows_skipped=0,
                loaded_at=int(time.time()), tool_version=__version__)).inserted_primary_key[0]
            dims = Dimensions(conn)
            next_id = (conn.execute(select(func.max(S.runs.c.id))).scalar() or 0) + 1
            # SQLite keeps no index on the run key (schema 0007). A load proves instead that its
            # runs are new: none of its cells already holds runs of the campaign (`_StoredCells`),
            # and no run appears twice in the file (`_RunHashes`). Then SQLite numbers the rows
            # itself, as they come. If either proof fails, the load starts over `exact`: a unique
            # index on this campaign's live run keys for the length of the transaction finds each
            # repeated run, to be named or skipped one by one, and the keys of its retracted runs
            # (`_RetractedKeys`) keep those runs out before they are written. The retracted runs
            # of the import chain a reload replaces hold no keys in either proof.
            quick = wh.is_sqlite and allow_bulk and not dry_run and total <= QUICK_MAX_RUNS
            exact_key = wh.is_sqlite and not quick
            if exact_key:
                _campaign_key(conn, campaign_id, create=True)
            stored = _StoredCells(conn, campaign_id, fl.chain) if quick else None
            hashes = _RunHashes(total) if quick else None
            held = _RetractedKeys(conn, campaign_id, fl.chain) if wh.is_sqlite and not quick else None
            writer = None
            read = loaded = skipped = 0
            first_id = next_id
            first_fin = last_fin = None  # the import's time range (imports.first_finished, last_finished)
            for raw, rows, n_read in chunks:
                read += n_read
                if not report.preview:
                    report.preview = rows.preview()
                if len(rows) == 0:
                    continue
                metric_slots = {}
                for metric in rows.metrics:
                    spec = layout.metrics.get(metric)
                    _, slot, sense = dims.metric(metric, spec.sense if spec else None, spec.unit if spec else "", shown)
                    metric_slots[metric] = slot
                    report.metrics[metric] = sense
                slots = sorted(metric_slots.values())
                if writer is None or writer.slots != slots:
                    writer = _Writer(conn, wh.dialect, slots, campaign_id, import_id, numbered=quick, chain=fl.chain)
                m = len(rows)
                codes, keys = rows.keys["solver"]
                solver_of = np.asarray(dims.solver_ids(keys), dtype=np.int64)
                solver = solver_of[codes]
                codes, keys = rows.keys["instance"]
                instance_of = np.asarray(dims.instance_ids(keys, fl.warnings), dtype=np.int64)
                instance = instance_of[codes]
                codes, keys = rows.keys["host"]
                host_of = np.asarray([-1 if h is None else h for h in dims.host_ids([k[0] for k in keys])], dtype=np.int64)
                host = host_of[codes]
                has_host = host >= 0
                ids = np.arange(next_id, next_id + m, dtype=np.int64)
                next_id += m
                if quick:
                    if stored.overlaps(solver, instance):
                        raise _StartOver()  # runs of this campaign already sit in some of these cells
                    summing.add_keys(hashes, solver, instance, rows.seed, rows.replicate)  # hashed in the helper
                if rows.has_finished.any():
                    times = rows.finished[rows.has_finished]
                    lo, hi = int(times.min()), int(times.max())
                    first_fin = lo if first_fin is None else min(first_fin, lo)
                    last_fin = hi if last_fin is None else max(last_fin, hi)
                metric_of_slot = {s: k for k, s in metric_slots.items()}
                free = None if held is None else held.free(solver, instance, rows.seed, rows.replicate)
                if free is None:
                    writer.write(ids, rows, solver, instance, host, has_host, metric_of_slot)
                elif free.any():  # the rows a retracted run holds the key of stay out (counted below)
                    writer.write(ids[free], rows.take(free), solver[free], instance[free], host[free], has_host[free],
                                 metric_of_slot)
                summing.add_reduced(rows.cells, base=int(ids[0]), key_maps=(solver_of, instance_of, host_of),
                                    slot_of=metric_slots)
                if quick:
                    loaded += m  # no key to collide on: the file's runs are checked at its end
                else:
                    count = conn.execute(select(func.count()).select_from(S.runs).where(
                        S.runs.c.id.between(int(ids[0]), int(ids[-1])))).scalar()
                    if count != m:
                        got, sk = _report_conflicts(conn, fl, rows, raw, ids, solver, instance, campaign_id, import_id)
                        loaded += got
                        skipped += sk
                    else:
                        loaded += m
                if progress:
                    progress(min(read, total), total)
            if read == 0 and not fl.rejects:
                if info.delimited:
                    raise InputError(f"{shown}: the file has a header but no data rows")
                raise InputError(f"{shown}: the file holds no records")
            if not fl.metric_cols and read:
                texty = [c for c in fl.guessed_text]
                why = (f"; {', '.join(texty)} {'holds' if len(texty) == 1 else 'hold'} text, not numbers "
                       "(name a metric under [metrics] in a layout to have its values checked)") if texty else ""
                raise InputError(
                    f"{shown}: no metric columns found (columns: {', '.join(fl.header or list(fl.mapping) + fl.ignored)}){why}; "
                    "a metric is a numeric column other than the run fields"
                )
            # the helper merges the cell sums and checks the run hashes while this thread checks the numbering
            if wh.is_sqlite and not skipped:
                summing.finish(campaign_id, import_id)
            else:
                summing.finish()
            if quick and loaded:
                last = conn.execute(select(func.max(S.runs.c.id))).scalar()
                if last != next_id - 1:  # SQLite numbered the rows otherwise than the load did
                    raise StorageError(f"warehouse {wh.display} numbered the runs of {shown} up to {last}, "
                                       f"not {next_id - 1}; nothing from {shown} was stored")
            rejected = len(fl.rejects)
            read += fl.ragged
            if skipped > 3:
                fl.warnings.append(f"{skipped} runs in all were already in the campaign and were skipped")
            # the id and time range may be wider than the runs that went in (skipped ones), never narrower
            conn.execute(update(S.imports).where(S.imports.c.id == import_id).values(
                rows_read=read, rows_loaded=loaded, rows_rejected=rejected, rows_skipped=skipped,
                first_run_id=first_id if loaded else None, last_run_id=next_id - 1 if loaded else None,
                first_finished=first_fin if loaded else None, last_finished=last_fin if loaded else None))
            from ..store import blocks

            if skipped:  # some rows did not go in: sum the cells from what was stored
                from ..store import cells

                summing.result()
                cells.from_runs(conn, import_id, first_id, next_id - 1)
                blocks.rebuild(conn, [import_id])
            else:
                if wh.is_sqlite:
                    # the helper merges each slot's sums as its cell rows are wanted, then checks
                    # the run hashes while the last parts are written
                    run_statements(conn.connection.driver_connection, summing.parts())
                    if quick and summing.repeated:  # (known once the parts are all handed over)
                        raise _StartOver()  # a run may appear twice in the file: find it exactly
                    summaries = summing.result()
                else:
                    from ..store import cells

                    summaries = summing.result()
                    cells.write_rows(conn, wh.dialect, summaries.rows(campaign_id, import_id))
                group_of = {iid: key[0] for key, iid in dims.instances.items()}
                blocks.write(conn, blocks.from_sums(summaries, campaign_id, import_id, group_of))
            report.rows_read, report.rows_loaded = read, loaded
            report.rows_rejected, report.rows_skipped = rejected, skipped
            report.import_id = import_id
            report.mapping = dict(fl.mapping)
            report.ignored = list(fl.ignored)
            report.warnings = fl.warnings
            if fl.undecided:
                report.warnings.append(f"columns with no values were not read: {', '.join(sorted(fl.undecided))}")
            if dry_run:
                report.status = "checked"
                report.import_id = None
                trans.rollback()
                instead = f", in place of import {fl.replaces}" if fl.replaces is not None else ""
                report.message = (f"would load {loaded} {'run' if loaded == 1 else 'runs'} into campaign {campaign}"
                                  f"{instead}; nothing was stored")
                return report
            if exact_key:
                _campaign_key(conn, campaign_id, create=False)
            if fl.rejects:
                target = Path(rejects) if rejects else p.with_name(p.name + ".rejects.csv")
                _write_rejects(target, fl.rejects, shown, fl.header)
                report.rejects_file = str(target)
    parts = [f"{loaded} {'run' if loaded == 1 else 'runs'} loaded into campaign {campaign}"]
    if fl.replaces is not None:
        parts.append(f"in place of import {fl.replaces} (wholly retracted)")
    if report.rows_rejected:
        parts.append(f"{report.rows_rejected} rejected (see {report.rejects_file})")
    if skipped:
        parts.append(f"{skipped} already stored, skipped")
    report.message = ", ".join(parts)
    return report


def _is_driver_error(exc: BaseException) -> bool:
    """sqlite3's errors, and psycopg's once a server was used (psycopg is not imported for this)."""
    import sys

    psycopg = sys.modules.get("psycopg")
    return isinstance(exc, sqlite3.Error) or (psycopg is not None and isinstance(exc, psycopg.Error))


def _db_reason(exc: Exception) -> str:
    orig = getattr(exc, "orig", exc)
    return str(orig).strip().splitlines()[0]


def _write_rejects(target: Path, rejects: list[dict], shown: str, header: list[str] | None) -> None:
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
