"""Reading result files: format detection, a byte-level first pass, and chunked readers.

Every reader yields pandas DataFrames of text (one column per source column, '' for an empty
field) plus a `_line` column with the line (or row) each record came from, so that every error
can name its place. Parsing is done by pyarrow's CSV reader (strict about the number of fields,
RFC 4180 quoting) and the json module for JSON Lines.
"""
from __future__ import annotations

import codecs
import csv
import gzip
import hashlib
import io
import json
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import pandas as pd

from ..errors import InputError

CHUNK_ROWS = 100_000
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
    """Hash the file's bytes and check the text decodes: UTF-8, no NUL byte, complete gzip."""
    fmt, gz = detect_format(path, shown)
    try:
        size = path.stat().st_size
    except FileNotFoundError:
        raise InputError(f"{shown}: no such file") from None
    if path.is_dir():
        raise InputError(f"{shown}: is a folder, not a file")
    sha = hashlib.sha256()
    lines = 0
    quotes = 0
    decoder = codecs.getincrementaldecoder("utf-8")("strict")
    inflate = zlib.decompressobj(wbits=47) if gz else None  # 47: gzip or zlib header, auto
    consumed = 0  # decoded-text bytes seen so far, for error offsets
    last_byte = b""
    with open(path, "rb") as fh:
        while True:
            raw = fh.read(1 << 20)
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
                        inflate = zlib.decompressobj(wbits=47)
                        data += inflate.decompress(rest)
                except zlib.error as exc:
                    raise InputError(f"{shown}: not readable as gzip ({exc})") from None
            _check_text(data, decoder, shown, lines)
            lines += data.count(b"\n")
            quotes += data.count(b'"')
            consumed += len(data)
            if data:
                last_byte = data[-1:]
    if fmt != "parquet":
        if inflate is not None and not inflate.eof:
            raise InputError(f"{shown}: the compressed data is cut short (truncated gzip file)")
        try:
            decoder.decode(b"", final=True)
        except UnicodeDecodeError:
            raise InputError(f"{shown} line {lines + 1}: the file ends inside a UTF-8 character") from None
        if consumed and last_byte != b"\n":
            lines += 1
    return SourceInfo(path, shown, fmt, gz, sha.hexdigest(), size, lines, quotes)


def _check_text(data: bytes, decoder, shown: str, lines_before: int) -> None:
    nul = data.find(b"\x00")
    if nul >= 0:
        line = lines_before + _line_of_offset(data, nul)
        raise InputError(f"{shown} line {line}: contains a NUL byte; this is not a text file or it is damaged")
    try:
        decoder.decode(data)
    except UnicodeDecodeError as exc:
        line = lines_before + _line_of_offset(data, exc.start)
        bad = data[exc.start:exc.start + 4]
        raise InputError(
            f"{shown} line {line}: bytes {bad!r} are not UTF-8; re-save the file as UTF-8"
        ) from None


def open_text(info: SourceInfo) -> io.TextIOBase:
    if info.gzipped:
        return gzip.open(info.path, "rt", encoding="utf-8-sig", newline="")
    return open(info.path, "r", encoding="utf-8-sig", newline="")


# --- CSV and TSV ------------------------------------------------------------------------------

def read_header(info: SourceInfo) -> list[str]:
    delim = "\t" if info.fmt == "tsv" else ","
    with open_text(info) as fh:
        reader = csv.reader(fh, delimiter=delim, quoting=csv.QUOTE_NONE if info.fmt == "tsv" else csv.QUOTE_MINIMAL)
        for row in reader:
            if any(c.strip() for c in row):
                return [c.strip() for c in row]
    raise InputError(f"{info.name}: the file is empty (no header and no data rows)")


def find_open_quote(info: SourceInfo) -> int:
    """The line on which a never-closed quote opens (the quote count is odd)."""
    opened_at, inside = 0, False
    with open_text(info) as fh:
        for n, line in enumerate(fh, start=1):
            if line.count('"') % 2:
                inside = not inside
                if inside:
                    opened_at = n
    return opened_at


class CsvLineMap:
    """Maps record ordinals to physical lines, for messages only (it re-reads the file)."""

    def __init__(self, info: SourceInfo, width: int):
        self.info, self.width, self._map = info, width, None

    def line(self, approx: int) -> int:
        if self.info.lines == 0:
            return approx
        if self._map is None:
            self._map = []
            delim = "\t" if self.info.fmt == "tsv" else ","
            with open_text(self.info) as fh:
                reader = csv.reader(fh, delimiter=delim)
                start = 1
                header_seen = False
                for row in reader:
                    if row and any(row):
                        if not header_seen:
                            header_seen = True
                        elif len(row) == self.width:
                            self._map.append(start)
                    start = reader.line_num + 1
        ordinal = approx - 2
        if 0 <= ordinal < len(self._map):
            return self._map[ordinal]
        return approx


def read_delimited(info: SourceInfo, header: list[str], on_bad_row) -> Iterator[pd.DataFrame]:
    import pyarrow as pa
    import pyarrow.csv as pacsv

    if info.fmt == "csv" and info.quote_count % 2:
        line = find_open_quote(info)
        raise InputError(f"{info.name} line {line}: a quote opens here and is never closed")
    names = [f"c{i}" for i in range(len(header))]  # positional names; duplicates checked by caller

    def handler(row):
        on_bad_row(row.text, row.expected_columns, row.actual_columns)
        return "skip"

    read_opts = pacsv.ReadOptions(column_names=names, skip_rows=1, block_size=8 << 20, use_threads=True)
    parse_opts = pacsv.ParseOptions(
        delimiter="\t" if info.fmt == "tsv" else ",",
        quote_char=False if info.fmt == "tsv" else '"',
        newlines_in_values=info.fmt == "csv",
        invalid_row_handler=handler,
    )
    conv_opts = pacsv.ConvertOptions(
        column_types={n: pa.string() for n in names}, strings_can_be_null=False,
        quoted_strings_can_be_null=False,
    )
    source = pa.input_stream(str(info.path), compression="gzip" if info.gzipped else None)
    # skip_rows=1 skips the first physical row; a file that starts with blank lines is rare enough
    # that the header reader above is the one that tolerates them.
    try:
        reader = pacsv.open_csv(source, read_options=read_opts, parse_options=parse_opts, convert_options=conv_opts)
    except pa.ArrowInvalid as exc:
        if "Empty CSV file" in str(exc):
            return
        raise InputError(f"{info.name}: cannot be read as {info.fmt.upper()}: {_arrow_msg(exc)}") from None
    ordinal = 0
    buffer: list[pd.DataFrame] = []
    buffered = 0
    while True:
        try:
            batch = reader.read_next_batch()
        except StopIteration:
            break
        except pa.ArrowInvalid as exc:
            raise InputError(f"{info.name}: cannot be read as {info.fmt.upper()}: {_arrow_msg(exc)}") from None
        df = batch.to_pandas()
        df.columns = header
        n = len(df)
        df["_line"] = range(ordinal + 2, ordinal + 2 + n)
        ordinal += n
        buffer.append(df)
        buffered += n
        if buffered >= CHUNK_ROWS:
            yield pd.concat(buffer, ignore_index=True) if len(buffer) > 1 else buffer[0]
            buffer, buffered = [], 0
    if buffer:
        yield pd.concat(buffer, ignore_index=True) if len(buffer) > 1 else buffer[0]


def _arrow_msg(exc: Exception) -> str:
    return str(exc).strip().splitlines()[0][:200]


# --- JSON Lines -------------------------------------------------------------------------------

def read_jsonl(info: SourceInfo) -> Iterator[pd.DataFrame]:
    rows: list[dict] = []
    lines: list[int] = []
    with open_text(info) as fh:
        for n, text in enumerate(fh, start=1):
            text = text.strip()
            if not text:
                continue
            try:
                obj = json.loads(text)
            except json.JSONDecodeError as exc:
                raise InputError(f"{info.name} line {n}: broken JSON ({exc.msg} at column {exc.colno})") from None
            if not isinstance(obj, dict):
                kind = "an array" if isinstance(obj, list) else f"a {type(obj).__name__}"
                raise InputError(f"{info.name} line {n}: is {kind}; each line must be one JSON object")
            for key, value in obj.items():
                if isinstance(value, (dict, list)):
                    raise InputError(f"{info.name} line {n}, field {key}: nested {type(value).__name__} values are not supported; flatten it")
            rows.append(obj)
            lines.append(n)
            if len(rows) >= CHUNK_ROWS:
                yield _frame(rows, lines)
                rows, lines = [], []
    if rows:
        yield _frame(rows, lines)


def _to_text(v) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v)
    return str(v)


def _frame(rows: list[dict], lines: list[int]) -> pd.DataFrame:
    keys: dict[str, None] = {}
    for r in rows:
        for k in r:
            keys.setdefault(k, None)
    data = {k: [_to_text(r.get(k)) for r in rows] for k in keys}
    df = pd.DataFrame(data)
    df["_line"] = lines
    return df


# --- Parquet ----------------------------------------------------------------------------------

def read_parquet(info: SourceInfo) -> Iterator[pd.DataFrame]:
    try:
        import pyarrow.parquet as pq
    except ImportError:  # pragma: no cover - pyarrow is a dependency
        raise InputError(f"{info.name}: reading Parquet needs pyarrow: pip install 'blockyard[parquet]'") from None
    try:
        pf = pq.ParquetFile(str(info.path))
    except Exception as exc:  # pyarrow raises several kinds for a damaged file
        raise InputError(f"{info.name}: not a readable Parquet file ({_arrow_msg(exc)})") from None
    start = 1
    for batch in pf.iter_batches(batch_size=CHUNK_ROWS):
        df = batch.to_pandas()
        df = df.astype(object).where(df.notna(), "")
        df = df.map(_to_text) if hasattr(df, "map") else df.applymap(_to_text)
        df["_line"] = range(start, start + len(df))
        start += len(df)
        yield df
