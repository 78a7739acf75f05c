"""Work a `blockyard load` starts before its libraries are imported: the first pass over each
named file (scan.py) in a helper thread, then the first file's records parsed into a small queue,
exactly as `sources.read_delimited` would parse them (not with `--skip-bad`).

`cli.main` calls `start_early` with the raw arguments; the load takes a first pass with
`first_pass_of` (only for the same file, unchanged) and that pass's parse with `take_early_read`.
In-process callers (tests, the shell) never call `start_early` and read everything in place.

The registries below are module state on purpose: they hand work from the command line's first
line to the load later in the same process, and each entry is taken once.

Standard library only at the top (sources.py, which imports pyarrow, is imported in the helper
thread): the point is to start before the heavy imports. With the early parse, the writing
loop's waits for the reader fell from 0.6 s to 0.2 to 0.3 s of a 1M-run load (docs/performance.md).
"""
from __future__ import annotations

import os
import threading
from pathlib import Path

from ..errors import InputError
from .scan import SourceInfo, detect_format, first_pass

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


# numpy's and pyarrow's own switches, read when each is imported (their documentation's
# environment variables): no huge pages asked for large arrays, and the C library's allocator
SMALL_PAGES_ENV = {"NUMPY_MADVISE_HUGEPAGE": "0", "ARROW_DEFAULT_MEMORY_POOL": "system"}


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
    # work by spinning, on the cores the load's own threads use: 1 to 2 % of a load's processor
    # time in `perf`). Set before numpy is imported.
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    # and the load's arrays on ordinary pages, from the start (ingest/devices.SmallPages: the
    # kernel's zeroing of huge pages was a tenth of a PostgreSQL load's time)
    for name, value in SMALL_PAGES_ENV.items():
        os.environ.setdefault(name, value)
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
