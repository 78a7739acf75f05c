"""The first pass over a result file: its format from its name, its hash, its lines and quotes,
and the bytes no text holds (NUL, a cut-short gzip stream).

Standard library only at the top (numpy is imported for the quote scan), so that `blockyard load`
can run this pass in a helper thread before the heavy libraries are imported (early.py):
hashing releases Python's lock, so the pass runs alongside the imports instead of after them.
"""
from __future__ import annotations

import hashlib
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


def line_of_offset(data: bytes, offset: int) -> int:
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
                line = lines + line_of_offset(data, nul)
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
