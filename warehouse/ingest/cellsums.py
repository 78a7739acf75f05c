"""A file's cell summaries (schema.cell_stats rows), summed chunk by chunk with numpy.

A cell is one (solver, instance, host) of one import, per metric slot. Each chunk is reduced to
its cells at once (sorting by cell, then numpy's reduceat), and the reduced cells of successive
chunks are merged again whenever they pile up, so memory follows the number of cells, never the
number of runs. The rows are the ones store.cells.write_rows takes, column for column. (This
module leaves store.cells, and with it pandas, unimported: a plain load does not need them.)
"""
from __future__ import annotations

import numpy as np

from ..store import schema as S

# the cell_stats columns in table order (the order store.cells writes them in too)
COLUMNS = [c.name for c in S.cell_stats.columns]
# their types on PostgreSQL, as numpy's big-endian codes (the binary COPY of `copy_payload`)
COPY_TYPES = {"campaign_id": ">i4", "import_id": ">i4", "solver_id": ">i4", "instance_id": ">i4", "host_id": ">i4",
              "slot": ">i2", "n": ">i8", "n_ok": ">i8", "sum_ok": ">f8", "sq_ok": ">f8", "min_ok": ">f8",
              "max_ok": ">f8", "n_fail": ">i8", "n_fail_v": ">i8", "sum_fail_v": ">f8", "id_sum": ">i8",
              "id_max": ">i8"}
INTS = ("n", "n_ok", "n_fail", "n_fail_v", "id_sum", "id_max")
FLOATS = ("sum_ok", "sq_ok", "min_ok", "max_ok", "sum_fail_v")
MERGE_AT = 200_000  # reduced cell rows kept per slot before they are merged again


def _groups(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sort order, group starts and the distinct key rows of an (n, 3) int64 key table."""
    lo = keys.min(axis=0)
    span = keys.max(axis=0) - lo + 1
    if float(span[0]) * float(span[1]) * float(span[2]) < 2.0**62:  # one int64 key: one sort
        k = keys - lo
        code = (k[:, 0] * span[1] + k[:, 1]) * span[2] + k[:, 2]
        order = np.argsort(code, kind="stable")
        sc = code[order]
        change = np.ones(len(sc), dtype=bool)
        change[1:] = sc[1:] != sc[:-1]
    else:
        order = np.lexsort(keys.T[::-1])
        sk = keys[order]
        change = np.ones(len(sk), dtype=bool)
        change[1:] = np.any(sk[1:] != sk[:-1], axis=1)
    starts = np.flatnonzero(change)
    return order, starts, keys[order[starts]]


class Reduced:
    """One chunk summed by cell: the cells' keys, counts and id sums, and the sums per value."""

    __slots__ = ("keys", "common", "values")

    def __init__(self, keys: np.ndarray, common: dict, values: dict):
        self.keys, self.common, self.values = keys, common, values


@np.errstate(over="ignore")  # values near 1.8e308 sum to inf, which an analysis refuses in one line
def reduce_chunk(keys: np.ndarray, ordinals: np.ndarray, status: np.ndarray, values: dict) -> Reduced:
    """Sum one chunk by cell (needs no database: keys may be the chunk's own codes)."""
    order, starts, cell_keys = _groups(keys)
    ok_status = (status == 0)[order]
    bad = ~ok_status
    ords = ordinals.astype(np.int64)[order]
    common = {
        "n": np.diff(np.append(starts, len(order))).astype(np.int64),
        "n_fail": np.add.reduceat(bad.astype(np.int64), starts),
        "ord_sum": np.add.reduceat(ords, starts),
        "ord_max": np.maximum.reduceat(ords, starts),
    }
    per_value = {}
    for name, v in values.items():
        v = np.asarray(v, dtype=np.float64)[order]
        has = ~np.isnan(v)
        ok = ok_status & has
        failed_v = bad & has
        v0 = np.where(has, v, 0.0)
        per_value[name] = dict(
            n_ok=np.add.reduceat(ok.astype(np.int64), starts),
            n_fail_v=np.add.reduceat(failed_v.astype(np.int64), starts),
            sum_ok=np.add.reduceat(np.where(ok, v0, 0.0), starts),
            sq_ok=np.add.reduceat(np.where(ok, v0 * v0, 0.0), starts),
            min_ok=np.minimum.reduceat(np.where(ok, v0, np.inf), starts),
            max_ok=np.maximum.reduceat(np.where(ok, v0, -np.inf), starts),
            sum_fail_v=np.add.reduceat(np.where(failed_v, v0, 0.0), starts),
        )
    return Reduced(cell_keys, common, per_value)


class CellSums:
    def __init__(self):
        self.parts: dict[int, list[tuple[np.ndarray, dict[str, np.ndarray]]]] = {}
        self.sizes: dict[int, int] = {}

    def add(self, ids: np.ndarray, solver: np.ndarray, instance: np.ndarray, host: np.ndarray,
            status: np.ndarray, values: dict[int, np.ndarray]) -> None:
        """One chunk's written runs: ids, cell keys (host -1 for none), status codes, values per slot."""
        if len(ids) == 0:
            return
        keys = np.stack([solver.astype(np.int64), instance.astype(np.int64), host.astype(np.int64)], axis=1)
        self.add_reduced(reduce_chunk(keys, ids.astype(np.int64), status, values), base=0)

    def add_reduced(self, chunk: "Reduced", base: int, key_maps: tuple | None = None,
                    slot_of: dict | None = None) -> None:
        """A chunk reduced by `reduce_chunk`: its keys mapped to ids, its ordinals shifted by `base`.

        `key_maps` are three arrays taking the chunk's codes to solver, instance and host ids (-1
        for no host); `slot_of` takes the value names to metric slots.
        """
        keys = chunk.keys
        if key_maps is not None:
            keys = np.stack([np.asarray(m, dtype=np.int64)[keys[:, i]] for i, m in enumerate(key_maps)], axis=1)
        common = dict(chunk.common)
        ords_sum, ords_max = common.pop("ord_sum"), common.pop("ord_max")
        common["id_sum"] = ords_sum + common["n"] * np.int64(base)
        common["id_max"] = ords_max + np.int64(base)
        for name, stats in chunk.values.items():
            slot = slot_of[name] if slot_of is not None else name
            full = dict(common)
            full.update(stats)
            self.parts.setdefault(slot, []).append((keys, full))
            self.sizes[slot] = self.sizes.get(slot, 0) + len(keys)
            if self.sizes[slot] > MERGE_AT and len(self.parts[slot]) > 1:
                self._merge(slot)

    @np.errstate(over="ignore")  # (as in reduce_chunk)
    def _merge(self, slot: int) -> None:
        parts = self.parts[slot]
        if len(parts) == 1:  # one part is summed by cell already (every part is)
            return
        keys = np.concatenate([p[0] for p in parts])
        order, starts, cell_keys = _groups(keys)
        merged = {}
        for name in INTS + FLOATS:
            col = np.concatenate([p[1][name] for p in parts])[order]
            if name in ("min_ok",):
                merged[name] = np.minimum.reduceat(col, starts)
            elif name in ("max_ok", "id_max"):
                merged[name] = np.maximum.reduceat(col, starts)
            else:
                merged[name] = np.add.reduceat(col, starts)
        self.parts[slot] = [(cell_keys, merged)]
        self.sizes[slot] = len(cell_keys)

    def iter_statements(self, campaign_id: int, import_id: int):
        """(statement, parameter rows, cells) to write the cells with, built without the database,
        slot after slot.

        The rows stay a float table until they are written (Python floats take four times the room).

        As for runs: whole-valued REALs land as INTEGERs in the integer columns and NaN as NULL.
        """
        per = 200
        head = f"INSERT INTO cell_stats ({', '.join(COLUMNS)}) VALUES "
        for slot in sorted(self.parts):
            self._merge(slot)
            keys, s = self.parts[slot][0]
            m = len(keys)
            if max(int(np.abs(s["id_sum"]).max(initial=0)), int(s["id_max"].max(initial=0))) >= 2**53:
                one = "(" + ", ".join("?" * len(COLUMNS)) + ")"
                yield head + one, list(self._slot_rows(slot, campaign_id, import_id)), m
                continue
            # the import, its campaign and the slot are the same on every row: written in the statement
            fixed = {"campaign_id": int(campaign_id), "import_id": int(import_id), "slot": int(slot)}
            names = [c for c in COLUMNS if c not in fixed]
            width = len(names)
            one = "(" + ", ".join(str(fixed[c]) if c in fixed else "?" for c in COLUMNS) + ")"
            t = np.empty((m, width), dtype=np.float64)
            has_ok = s["n_ok"] > 0
            for i, name in enumerate(names):
                if name == "solver_id":
                    t[:, i] = keys[:, 0]
                elif name == "instance_id":
                    t[:, i] = keys[:, 1]
                elif name == "host_id":
                    t[:, i] = np.where(keys[:, 2] >= 0, keys[:, 2], np.nan)
                elif name in ("sum_ok", "sq_ok", "min_ok", "max_ok"):
                    t[:, i] = np.where(has_ok, s[name], np.nan)
                elif name == "sum_fail_v":
                    t[:, i] = np.where(s["n_fail_v"] > 0, s[name], np.nan)
                else:
                    t[:, i] = s[name]
            # columns with one value on every row (the host of a one-host file, the seeds per cell)
            # go into the statement as literals, as for runs
            same = constant_columns([(t[:, i], None) for i in range(width)], names, CELL_WHOLE)
            if same:
                fixed.update(same)
                t = np.ascontiguousarray(t[:, [i for i, c in enumerate(names) if c not in same]])
                width = t.shape[1]
                one = "(" + ", ".join(str(fixed[c]) if c in fixed else "?" for c in COLUMNS) + ")"
                if width == 0:
                    yield head + one, [()] * m, m
                    continue
            full = m // per * per
            if full:
                yield head + ", ".join([one] * per), t[:full].reshape(-1, per * width), full
            if m > full:
                yield head + one, t[full:], m - full

    def merge_all(self) -> None:
        for slot in list(self.parts):
            self._merge(slot)

    def count(self) -> int:
        """How many cell rows the sums make (the slots' parts merged first)."""
        self.merge_all()
        return sum(len(parts[0][0]) for parts in self.parts.values())

    def rows(self, campaign_id: int, import_id: int) -> list[tuple]:
        out: list[tuple] = []
        for slot in sorted(self.parts):
            out.extend(self._slot_rows(slot, campaign_id, import_id))
        return out

    def copy_payload(self, campaign_id: int, import_id: int) -> bytes | memoryview:
        """The cell rows in PostgreSQL's binary COPY format, in `COPY_TYPES` order: numpy writes
        them, with no Python object per value (a tuple per row was half a second at 100,000
        cells), and the sums go over exactly. Every slot's rows, one column at a time, go into
        one payload written in place (store/pgcopy.payload)."""
        from ..store.pgcopy import payload

        out = []
        for slot in sorted(self.parts):
            self._merge(slot)
            keys, s = self.parts[slot][0]
            m = len(keys)
            no_ok = s["n_ok"] == 0
            host = keys[:, 2]
            columns = {
                "campaign_id": (np.full(m, campaign_id), None), "import_id": (np.full(m, import_id), None),
                "solver_id": (keys[:, 0], None), "instance_id": (keys[:, 1], None), "host_id": (host, host < 0),
                "slot": (np.full(m, slot), None), "sum_ok": (s["sum_ok"], no_ok), "sq_ok": (s["sq_ok"], no_ok),
                "min_ok": (s["min_ok"], no_ok), "max_ok": (s["max_ok"], no_ok),
                "sum_fail_v": (s["sum_fail_v"], s["n_fail_v"] == 0),
            }
            for name in INTS:
                columns[name] = (s[name], None)
            out.append([columns[c] for c in COLUMNS])
        if not out:
            return b""
        joined = [(np.concatenate([part[j][0] for part in out]),
                   None if all(part[j][1] is None for part in out) else
                   np.concatenate([np.zeros(len(part[j][0]), dtype=bool) if part[j][1] is None else part[j][1]
                                   for part in out]))
                  for j in range(len(COLUMNS))]
        return payload(joined, [COPY_TYPES[c] for c in COLUMNS])

    def _slot_rows(self, slot: int, campaign_id: int, import_id: int) -> list[tuple]:
        self._merge(slot)
        keys, s = self.parts[slot][0]
        m = len(keys)

        def maybe(values: np.ndarray, present: np.ndarray) -> list:
            obj = values.astype(object)
            obj[~present] = None
            return obj.tolist()

        has_ok = s["n_ok"] > 0
        host = keys[:, 2]
        columns = {
            "campaign_id": [int(campaign_id)] * m, "import_id": [int(import_id)] * m,
            "solver_id": keys[:, 0].tolist(), "instance_id": keys[:, 1].tolist(),
            "host_id": maybe(host, host >= 0), "slot": [int(slot)] * m,
            "sum_ok": maybe(s["sum_ok"], has_ok), "sq_ok": maybe(s["sq_ok"], has_ok),
            "min_ok": maybe(s["min_ok"], has_ok), "max_ok": maybe(s["max_ok"], has_ok),
            "sum_fail_v": maybe(s["sum_fail_v"], s["n_fail_v"] > 0),
        }
        for name in INTS:
            columns[name] = s[name].tolist()
        return list(zip(*(columns[c] for c in COLUMNS)))


CELL_WHOLE = frozenset({"solver_id", "instance_id", "host_id"} | set(INTS))


def constant_columns(columns: list, names: list[str], whole: frozenset) -> dict[str, str]:
    """The columns with one value on every row, as SQL literals: NULL where every row is NULL,
    the number where a whole-number column holds one value. A float column's value stays bound
    (its decimal text need not read back as the same double).

    `columns` are (values, the rows that are NULL) pairs; with no mask (None), a NaN is NULL.
    """
    out: dict[str, str] = {}
    for (a, nulls), c in zip(columns, names):
        if len(a) == 0:
            return {}
        if nulls is not None:
            if nulls[0]:
                if nulls.all():
                    out[c] = "NULL"
                continue
            if nulls.any():
                continue
        elif a.dtype.kind == "f" and np.isnan(a[0]):
            if np.isnan(a).all():
                out[c] = "NULL"
            continue
        if c not in whole:
            continue
        v = a[0]
        # (a NaN further down makes min and max NaN, and the comparison false)
        if a.min() == v == a.max() and abs(v) < 2**53 and v == int(v):
            out[c] = str(int(v))
    return out


def run_statements(raw, parts) -> int:
    """Write the cells through a SQLite driver connection: (statement, rows, cells) parts, as
    `Summing.parts` hands them over (or `CellSums.iter_statements` gives them)."""
    written = 0
    for sql, params, cells in parts:
        raw.executemany(sql, params.tolist() if isinstance(params, np.ndarray) else params)
        written += cells
    return written


def put_unless_stopped(q, item, stop, wait: float) -> bool:
    """Put `item` on the bounded queue `q`, looking every `wait` seconds whether `stop` (an
    Event) is set meanwhile; False if it was, and the item was not put (a helper thread's
    hand-over to a loading thread that may have given up)."""
    import queue

    while not stop.is_set():
        try:
            q.put(item, timeout=wait)
            return True
        except queue.Full:
            continue
    return False


PART_ROWS = 20_000  # cell rows converted per part: the writer takes a part while the next is converted


def _pieces(statements):
    """The statements' float tables cut into parts of about PART_ROWS cell rows each."""
    for sql, params, cells in statements:
        if not isinstance(params, np.ndarray) or cells <= PART_ROWS:
            yield sql, params, cells
            continue
        per_row = cells / len(params)  # cell rows per parameter row (several rows per statement)
        step = max(1, int(PART_ROWS / per_row))
        for at in range(0, len(params), step):
            piece = params[at:at + step]
            yield sql, piece, int(round(len(piece) * per_row))


class Summing:
    """A CellSums filled in a helper thread, so the sums are made while the runs are written.

    The loading thread hands each chunk's reduced cells over with `add_reduced` and, after the
    last chunk, asks with `finish` for the statements that write them; `result` waits for the
    sums (with ids given to `finish`: until the parts are all handed over, so take the parts
    first) and raises whatever the helper raised. The helper then turns the statements' rows into
    Python objects part by part while the loading thread writes the parts before (`parts`):
    the conversion holds Python's lock, SQLite's work lets go of it, so the two overlap.
    """

    def __init__(self):
        import queue
        import threading

        self.sums = CellSums()
        self._keys = None
        self.repeated = False
        self._error: BaseException | None = None
        self._q: queue.Queue = queue.Queue()
        self._out: queue.Queue = queue.Queue(maxsize=4)  # converted parts waiting to be written
        self._ready = threading.Event()  # the sums are merged (and the statements built)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="blockyard-cells", daemon=True)
        self._thread.start()

    def add_reduced(self, chunk: Reduced, base: int, key_maps: tuple, slot_of: dict) -> None:
        self._q.put(("add", (chunk, base, key_maps, slot_of)))

    def add_keys(self, keys, *arrays) -> None:
        """Hand a chunk's run keys to `keys.add(*arrays)` in the helper (the loader's run hashes);
        `keys.repeated()` is then asked at `finish`, after the sums are merged, and its answer
        kept in `repeated`: read it once `parts` is exhausted (or after `result` and `parts`)."""
        self._keys = keys
        self._q.put(("keys", arrays))

    def finish(self, campaign_id: int | None = None, import_id: int | None = None) -> None:
        """No more chunks; with ids, also build the SQLite statements that write the cells."""
        self._q.put(("finish", (campaign_id, import_id)))

    def result(self) -> CellSums:
        self._ready.wait()
        if self._error is not None:
            raise self._error
        return self.sums

    def parts(self):
        """The statements' parts, converted, in order (after `finish` with ids)."""
        while True:
            item = self._out.get()
            if item is None:
                break
            yield item
        if self._error is not None:
            raise self._error

    def close(self) -> None:
        """Stop the helper (a load that failed part-way); harmless after the parts were written."""
        import queue

        self._stop.set()
        if self._thread.is_alive():
            self._q.put(("stop", None))
            while self._thread.is_alive():
                try:  # let a helper waiting to hand over a part go on to see the stop
                    self._out.get_nowait()
                except queue.Empty:
                    pass
                self._thread.join(0.01)

    def _hand(self, item) -> bool:
        return put_unless_stopped(self._out, item, self._stop, 0.05)

    def _run(self) -> None:
        while True:
            kind, arg = self._q.get()
            if kind == "stop":
                self._ready.set()
                return
            try:
                if kind == "add":
                    if self._error is None:
                        self.sums.add_reduced(*arg)
                    continue
                if kind == "keys":
                    if self._error is None:
                        self._keys.add(*arg)
                    continue
                campaign_id, import_id = arg
                statements = iter(())
                if self._error is None and campaign_id is not None:
                    # merged and built slot by slot as the parts are handed over: the loading
                    # thread writes the first slot's cells while the next slot is merged
                    statements = self.sums.iter_statements(campaign_id, import_id)
                for sql, params, cells in _pieces(statements):
                    rows = params.tolist() if isinstance(params, np.ndarray) else params
                    if not self._hand((sql, rows, cells)):
                        return
                if self._error is None:
                    self.sums.merge_all()
                self._ready.set()
                if self._error is None and self._keys is not None:
                    # while the loading thread writes the last parts; read by it once the
                    # parts are all handed over
                    self.repeated = self._keys.repeated()
                self._hand(None)
                return
            except BaseException as exc:  # noqa: BLE001 - raised again by result() or parts()
                self._error = exc
                if kind not in ("add", "keys"):
                    self._ready.set()
                    self._hand(None)
                    return
