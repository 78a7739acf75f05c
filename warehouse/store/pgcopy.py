"""PostgreSQL's binary COPY format, written by numpy a whole chunk at a time (the loads' runs and
cell summaries go to the server this way)."""
from __future__ import annotations

import numpy as np

from ..errors import InputError

_COPY_HEAD = b"PGCOPY\n\xff\r\n\x00" + bytes(8)  # signature, flags, no header extension
_COPY_TAIL = b"\xff\xff"


def binary_rows(columns: list[tuple[np.ndarray, np.ndarray | None]], types: list[str]) -> bytes:
    """Rows in PostgreSQL's binary COPY format, built by numpy a whole chunk at a time (`framed`
    makes them one COPY's payload; `payload` builds both at once, into a buffer it may reuse).

    Each row is a 16-bit field count and, per field, a 32-bit length (-1 for NULL) and the
    value's bytes, big-endian (PostgreSQL documentation, COPY, Binary Format). Rows with NULLs
    in the same columns share one layout, so each such set of rows is one numpy record array
    (a NULL's field is the length alone), filled a column at a time; the sets follow one another,
    each in file order (a COPY's row order is only the order rows land on disk: ids are given).
    The server reads these fields without parsing text, and the numbers go over exactly
    (docs/performance.md). A whole number out of its column's range is refused here, as the
    server refuses it in text."""
    return bytes(payload(columns, types)[len(_COPY_HEAD):-len(_COPY_TAIL)])


def framed(rows: bytes) -> bytes:
    """One COPY's whole payload: the signature and header, the rows, the trailer."""
    return _COPY_HEAD + rows + _COPY_TAIL


class Buffers:
    """Two buffers a load's writer fills in turn: the one chunk's payload is sent from a helper
    thread while the next is built (ingest/write.Sender, which starts a send only once the one
    before has ended, so a buffer is never refilled while it is sent). Fresh memory for each
    chunk's payload was zeroed by the kernel page by page: about a twelfth of a 510,000-run
    load's samples in the client (perf, docs/performance.md)."""

    def __init__(self):
        self._held = [np.empty(0, dtype=np.uint8), np.empty(0, dtype=np.uint8)]
        self._turn = 0

    def take(self, size: int) -> np.ndarray:
        self._turn ^= 1
        if len(self._held[self._turn]) < size:
            self._held[self._turn] = np.empty(size, dtype=np.uint8)
        return self._held[self._turn][:size]


def payload(columns: list[tuple[np.ndarray, np.ndarray | None]], types: list[str],
            buffers: Buffers | None = None) -> memoryview:
    """One COPY's whole payload (`binary_rows`' rows between the signature and the trailer),
    written in place into one buffer: from `buffers` when given, else a new one."""
    m = len(columns[0][0])
    dts = [np.dtype(code) for code in types]
    for (values, nulls), dt in zip(columns, dts):
        if dt.kind == "i" and dt.itemsize < 8 and len(values):
            info = np.iinfo(dt)
            live = values if nulls is None else values[~nulls]
            if len(live) and (live.min() < info.min or live.max() > info.max):
                bad = int(live.max()) if live.max() > info.max else int(live.min())
                raise InputError(f"a value of {bad} does not fit the warehouse's {8 * dt.itemsize}-bit column")
    nullable = [j for j, (_, nulls) in enumerate(columns) if nulls is not None and nulls.any()]
    pattern = np.zeros(m, dtype=np.int64)
    for k, j in enumerate(nullable):
        pattern |= columns[j][1].astype(np.int64) << k
    sets = []  # (the rows of one NULL layout or None for all, their count, the layout, its NULL columns)
    for p in (np.unique(pattern).tolist() if nullable else [0]):
        rows = None if not nullable else np.flatnonzero(pattern == p)
        absent = {j for k, j in enumerate(nullable) if p >> k & 1}
        fields = [("count", ">i2")]
        for j, dt in enumerate(dts):
            fields.append((f"n{j}", ">i4"))
            if j not in absent:
                fields.append((f"v{j}", dt))
        sets.append((rows, m if rows is None else len(rows), np.dtype(fields), absent))
    size = len(_COPY_HEAD) + sum(n * layout.itemsize for _, n, layout, _ in sets) + len(_COPY_TAIL)
    out = buffers.take(size) if buffers is not None else np.empty(size, dtype=np.uint8)
    out[:len(_COPY_HEAD)] = np.frombuffer(_COPY_HEAD, dtype=np.uint8)
    at = len(_COPY_HEAD)
    for rows, n, layout, absent in sets:
        rec = out[at:at + n * layout.itemsize].view(layout)
        at += n * layout.itemsize
        rec["count"] = len(columns)
        for j, ((values, _), dt) in enumerate(zip(columns, dts)):
            if j in absent:
                rec[f"n{j}"] = -1
                continue
            rec[f"n{j}"] = dt.itemsize
            rec[f"v{j}"] = values if rows is None else values[rows]
    out[at:] = np.frombuffer(_COPY_TAIL, dtype=np.uint8)
    return memoryview(out)
