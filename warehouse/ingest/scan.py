"""The first pass over a result file: its hash, its lines and quotes, and the bytes no text holds.

Standard library only at the top (numpy is imported for the quote scan), so that `blockyard load`
can start this pass in a helper thread before the heavy libraries are imported (`start_early`):
hashing releases Python's lock, so the pass runs alongside the imports instead of after them.
"""
from __future__ import annotations

import hashlib
import os
import threading
import zlib
from dataclasses import dataclass
from pathlib import Path

from ..errors import InputError

FORMATS = {".csv": "csv", ".tsv": "tsv", ".tab": "tsv", ".jsonl": "jsonl", ".ndjson": "jsonl",
           ".parquet": "parquet", ".pq": "parquet"}


@dataclass
class SourceInfo:
    path: Path
    name: str  # as the user gave it, for messages
    fmt: str
    gzipped: bool
    sha256: str
    size: int
    lines: int  # physical lines of decoded text (0 for parquet)
    quote_count: int
    # a line ends inside quotes somewhere (an odd number of quotes before it): then some record
    # holds a line break and records and lines part ways; quotes around whole fields alone (a
    # quoted header, say) leave them one to one
    spans_lines: bool = True

    @property
    def delimited(self) -> bool:
        return self.fmt in ("csv", "tsv")


def detect_format(path: Path, shown: str) -> tuple[str, bool]:
    suffixes = [s.lower() for s in path.suffixes]
    gz = bool(suffixes) and suffixes[-1] in (".gz", ".gzip")
    if gz:
        suffixes = suffixes[:-1]
    fmt = FORMATS.get(suffixes[-1]) if suffixes else None
    if fmt is None:
        raise InputError(
            f"{shown}: cannot tell the format from the name; use .csv, .tsv, .jsonl or .parquet "
            "(each may end in .gz)"
        )
    if fmt == "parquet" and gz:
        raise InputError(f"{shown}: Parquet files carry their own compression; do not gzip them")
    return fmt, gz


def _line_of_offset(data: bytes, offset: int) -> int:
    return data.count(b"\n", 0, offset) + 1


def first_pass(path: Path, shown: str) -> SourceInfo:
    """Hash the file's bytes; count lines and quotes; refuse NUL bytes and incomplete gzip data.

    Whether the text is UTF-8 is checked by the readers as they go (pyarrow checks every string);
    `locate_bad_text` finds the line when one is not.
    """
    if path.is_dir():  # before the name is looked at: a folder has no format to guess
        raise InputError(f"{shown}: is a folder, not a file; name the result files in it")
    fmt, gz = detect_format(path, shown)
    try:
        size = path.stat().st_size
    except FileNotFoundError:
        raise InputError(f"{shown}: no such file") from None
    import numpy as np

    sha = hashlib.sha256()
    lines = quotes = 0
    spans = False
    inflate = zlib.decompressobj(wbits=31) if gz else None  # 31: a gzip header and trailer
    consumed = 0  # decoded-text bytes seen so far
    last_byte = b""
    try:
        fh = open(path, "rb")
    except OSError as exc:
        raise InputError(f"{shown}: cannot be opened ({exc.strerror})") from None
    with fh:
        while True:
            raw = fh.read(1 << 22)
            if not raw:
                break
            sha.update(raw)
            if fmt == "parquet":
                continue
            data = raw
            if inflate is not None:
                try:
                    data = inflate.decompress(raw)
                    while inflate.eof and inflate.unused_data:  # concatenated gzip members
                        rest = inflate.unused_data
                        inflate = zlib.decompressobj(wbits=31)
                        data += inflate.decompress(rest)
                except zlib.error as exc:
                    raise InputError(f"{shown}: not readable as gzip ({exc})") from None
            if not data:
                continue
            nul = data.find(b"\x00")
            if nul >= 0:
                line = lines + _line_of_offset(data, nul)
                raise InputError(f"{shown} line {line}: contains a NUL byte; this is not a text file or it is damaged")
            # counted by numpy, which lets go of Python's lock (bytes.count holds it while the
            # command imports its libraries in the main thread)
            b = np.frombuffer(data, dtype=np.uint8)
            lines += int(np.count_nonzero(b == 10))
            if fmt == "csv":
                here = int(np.count_nonzero(b == 34))
                if here and not spans:
                    spans = _ends_inside_quotes(data, quotes)
                quotes += here
            consumed += len(data)
            last_byte = data[-1:]
    if fmt != "parquet":
        if inflate is not None and not inflate.eof:
            raise InputError(f"{shown}: the compressed data is cut short (truncated gzip file)")
        if consumed and last_byte != b"\n":
            lines += 1
    return SourceInfo(path, shown, fmt, gz, sha.hexdigest(), size, lines, quotes, spans)


def _ends_inside_quotes(data: bytes, quotes_before: int) -> bool:
    """True if some line break in `data` comes after an odd number of quotes in all (RFC 4180:
    a doubled quote inside a quoted field counts two, so it leaves the parity alone)."""
    import numpy as np

    b = np.frombuffer(data, dtype=np.uint8)
    parity = (np.cumsum(b == 34, dtype=np.int64) + quotes_before) & 1
    return bool(parity[b == 10].any())


# --- starting the first pass early -------------------------------------------------------------

_EARLY: dict[str, "_Early"] = {}
_EARLY_READS: dict[str, "_Early"] = {}  # first passes handed to a load, whose early parse it may take
_EARLY_LOCK = threading.Lock()


class _Early:
    def __init__(self, stamp, shown: str):
        self.stamp, self.shown = stamp, shown
        self.done = threading.Event()
        self.info: SourceInfo | None = None
        self.error: InputError | None = None
        self.read: "_EarlyRead | None" = None  # set (in the helper) once the first pass is done


def _stamp(path: Path):
    st = os.stat(path)
    return (st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns)


def start_early(argv: list[str]) -> None:
    """For `blockyard load FILE...`: run the first pass over each named data file in a helper thread.

    Only a guess from the raw arguments (the parser is not built yet): any later argument that
    names an existing file with a data extension is passed over. `first_pass_of` takes a result
    only when the file is still the same one, unchanged (device, inode, size, modification time).
    """
    command = None
    skip = False
    for i, tok in enumerate(argv):
        if skip:
            skip = False
            continue
        if tok in ("-w", "--warehouse"):
            skip = True
            continue
        if tok.startswith("-"):
            continue
        command = i
        break
    if command is None or argv[command] != "load":
        return
    # A load multiplies no matrices: numpy's BLAS starts no threads of its own (they wait for
    # work by spinning, on the cores the load's own threads use). Set before numpy is imported.
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    todo: list[tuple[Path, str, object]] = []
    for tok in argv[command + 1:]:
        if tok.startswith("-"):
            continue
        p = Path(tok)
        try:
            detect_format(p, tok)
            if not p.is_file():
                continue
            stamp = _stamp(p)
        except (InputError, OSError):  # not a data file: the load itself says so
            continue
        key = str(p.resolve())
        with _EARLY_LOCK:
            if key in _EARLY:
                continue
            _EARLY[key] = early = _Early(stamp, tok)
        todo.append((p, tok, early))
    if not todo:
        return
    # the first file's records are parsed early too, unless rows may be skipped (--skip-bad: the
    # parse must go on past a bad row, which only the load's own reader does)
    read_first = "--skip-bad" not in argv[command + 1:]

    def work():
        for k, (p, tok, early) in enumerate(todo):
            try:
                early.info = first_pass(p, tok)
                if k == 0 and read_first and early.info.delimited:
                    early.read = _EarlyRead(early.info)  # before `done`: the load looks for it then
            except InputError as exc:
                early.error = exc
            except Exception:  # noqa: BLE001 - the load runs the pass itself and reports it
                pass
            finally:
                early.done.set()
            if early.read is not None:
                early.read.run()

    threading.Thread(target=work, name="blockyard-scan", daemon=True).start()


class _BadRowSeen(InputError):
    """The early parse met a row with the wrong number of fields: it stops there, and the load
    asks its own handler what to say (`_EarlyRead.chunks`)."""


class _EarlyRead:
    """The first file's records parsed in the helper thread while the command imports its
    libraries: the header and the raw chunks, a few ahead (a bounded queue), exactly as
    `sources.read_delimited` yields them. `take_early_read` hands them to the load; a load that
    never asks leaves the helper waiting (it is a daemon thread)."""

    DEPTH = 3

    def __init__(self, info: SourceInfo):
        import queue

        self.info = info
        self.header: list[str] | None = None
        self.header_line = 0
        self.ready = threading.Event()  # the header is read (or reading failed)
        self.q: queue.Queue = queue.Queue(maxsize=self.DEPTH)
        self.error: BaseException | None = None

    def run(self) -> None:
        from .sources import read_delimited, read_header

        try:
            self.header, self.header_line = read_header(self.info)
        except BaseException as exc:  # noqa: BLE001 - the load raises it where it would have
            self.error = exc
            self.ready.set()
            return
        self.ready.set()
        bad: list[tuple] = []

        def on_bad_row(line: int, text: str, expected: int, actual: int):
            bad.append((line, text, expected, actual))
            return _BadRowSeen("stop")

        try:
            for item in read_delimited(self.info, self.header, self.header_line, on_bad_row):
                self.q.put(("chunk", item))
            self.q.put(("end", None))
        except _BadRowSeen:
            self.q.put(("bad", bad[0]))
        except BaseException as exc:  # noqa: BLE001 - handed to the load in order
            self.q.put(("error", exc))

    def chunks(self, on_bad_row):
        """The chunks, in order; a bad row is put to the load's own handler (`on_bad_row`), whose
        error is raised where the load's own reader would have raised it."""
        while True:
            kind, item = self.q.get()
            if kind == "chunk":
                yield item
            elif kind == "end":
                return
            elif kind == "bad":
                err = on_bad_row(*item)
                raise err if err is not None else InputError(
                    f"{self.info.name} line {item[0]}: has {item[3]} fields where the header has {item[2]}")
            else:
                raise item


def take_early_read(info: SourceInfo) -> "_EarlyRead | None":
    """The early parse of this very file (same first pass), once; None when there is none."""
    with _EARLY_LOCK:
        for key, early in list(_EARLY_READS.items()):
            if early.info is info:
                del _EARLY_READS[key]
                return early.read
    return None


def first_pass_of(path: Path, shown: str) -> SourceInfo:
    """The first pass of this file: the early one when it ran on the same file, else run now."""
    try:
        key = str(path.resolve())
    except OSError:
        key = None
    with _EARLY_LOCK:
        early = _EARLY.pop(key, None) if key else None
    if early is not None:
        early.done.wait()
        try:
            same = _stamp(path) == early.stamp
        except OSError:
            same = False
        if same and early.shown == shown:
            if early.error is not None:
                raise early.error
            if early.info is not None:
                with _EARLY_LOCK:
                    _EARLY_READS[key] = early  # its parse, if it has one, is the load's to take
                return early.info
    return first_pass(path, shown)
