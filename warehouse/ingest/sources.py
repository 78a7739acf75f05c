"""Reading result files in chunks, after the first pass (scan.py) has checked their bytes.

Every reader yields `(table, lines)` pairs: a pyarrow Table with one column per source column and
a numpy array with the line (or, for Parquet, the row) each record starts on, so that every error
can name its place. CSV and TSV are parsed by pyarrow's CSV reader (RFC 4180 quoting, strict about
the number of fields), JSON Lines by the json module, Parquet by pyarrow. Text columns stay Arrow
strings all the way to the checks: no Python object per value on the hot path.
"""
from __future__ import annotations

import codecs
import csv
import gzip
import io
import json
from array import array
from typing import Callable, Iterator

import numpy as np
import pyarrow as pa

from ..errors import InputError
from .scan import SourceInfo, line_of_offset

CHUNK_ROWS = 100_000  # rows per chunk handed to the checks and the writer; memory stays flat
FIRST_CHUNK_ROWS = 5_000  # the first chunk is smaller, so that the writer starts sooner (then they double)
BLOCK_BYTES = 1 << 20  # bytes of text the CSV parser reads at a time (it reads a few blocks ahead)
MAX_BLOCK_BYTES = 1 << 28  # the largest block a file with long records is read in (records up to ~128 MB)
CSV_FIELD_LIMIT = 2**31 - 1  # the csv module's field limit raised to (the largest a C long holds everywhere)


class LongRecord(InputError):
    """A record longer than the CSV parser's block (pyarrow parses a record within one block).
    The loader catches it and reads the file again in a block that holds the longest record
    (`longest_record`); the message is what a user sees only if that cannot be done."""

    def __init__(self, message: str, block: int):
        super().__init__(message)
        self.block = block


def locate_bad_text(info: SourceInfo) -> InputError | None:
    """The first place where the text is not UTF-8, as an error naming the line; None if it all is."""
    decoder = codecs.getincrementaldecoder("utf-8")("strict")
    opener = gzip.open if info.gzipped else open
    lines = 0
    with opener(info.path, "rb") as fh:
        while True:
            data = fh.read(1 << 20)
            if not data:
                break
            try:
                _check_text(data, decoder, info.name, lines)
            except InputError as exc:
                return exc
            lines += data.count(b"\n")
    try:
        decoder.decode(b"", final=True)
    except UnicodeDecodeError:
        return InputError(f"{info.name} line {lines + 1}: the file ends inside a UTF-8 character; re-save the file as UTF-8")
    return None


def _check_text(data: bytes, decoder, shown: str, lines_before: int) -> None:
    pending = len(decoder.getstate()[0])  # bytes of a character begun in the previous block
    try:
        decoder.decode(data)
    except UnicodeDecodeError as exc:
        at = max(exc.start - pending, 0)
        line = lines_before + line_of_offset(data, at)
        bad = data[at:at + 4]
        raise InputError(
            f"{shown} line {line}: bytes {bad!r} are not UTF-8; re-save the file as UTF-8"
        ) from None


def open_text(info: SourceInfo) -> io.TextIOBase:
    if info.gzipped:
        return gzip.open(info.path, "rt", encoding="utf-8-sig", newline="")
    return open(info.path, "r", encoding="utf-8-sig", newline="")


# --- CSV and TSV ------------------------------------------------------------------------------

def _csv_reader(info: SourceInfo, fh):
    # The csv module refuses a field past 128 KiB (its default limit); pyarrow reads any field
    # its block holds, and the header and line-number readers must read what it does. The limit
    # is the module's one process-wide setting; it is only ever raised, and nothing relies on it.
    if csv.field_size_limit() < CSV_FIELD_LIMIT:
        csv.field_size_limit(CSV_FIELD_LIMIT)
    if info.fmt == "tsv":
        return csv.reader(fh, delimiter="\t", quoting=csv.QUOTE_NONE)
    return csv.reader(fh, delimiter=",", quotechar='"', doublequote=True)


def read_header(info: SourceInfo) -> tuple[list[str], int]:
    """The header's column names and the physical line it is on (blank lines before it are allowed)."""
    try:
        with open_text(info) as fh:
            reader = _csv_reader(info, fh)
            for row in reader:
                if any(c.strip() for c in row):
                    return [c.strip() for c in row], reader.line_num
    except UnicodeDecodeError:
        raise _bad_text(info) from None
    raise InputError(f"{info.name}: the file is empty (no header and no data rows)")


def _bad_text(info: SourceInfo) -> InputError:
    return locate_bad_text(info) or InputError(f"{info.name}: the text is not UTF-8; re-save the file as UTF-8")


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


class RecordLines:
    """Data record number (0 = first record after the header) -> physical line it starts on.

    Needed only where records and lines part ways: line breaks inside quoted fields. (A blank line
    is a record of empty fields to the parser too, so it keeps the count.) Built on first use by
    reading the text once more with the csv module.
    """

    def __init__(self, info: SourceInfo):
        self.info = info
        self._starts: np.ndarray | None = None

    def _build(self) -> np.ndarray:
        starts = array("q")
        with open_text(self.info) as fh:
            reader = _csv_reader(self.info, fh)
            header_seen = False
            prev = 0
            for row in reader:
                if header_seen:
                    starts.append(prev + 1)
                elif any(c.strip() for c in row):
                    header_seen = True
                prev = reader.line_num
        return np.frombuffer(starts, dtype=np.int64) if len(starts) else np.zeros(0, dtype=np.int64)

    def of(self, records: np.ndarray) -> np.ndarray:
        if self._starts is None:
            self._starts = self._build()
        starts = self._starts
        records = np.asarray(records, dtype=np.int64)
        inside = (records >= 0) & (records < len(starts))
        out = records + 2  # fallback: one record per line after a one-line header
        out[inside] = starts[records[inside]]
        return out


def read_delimited(info: SourceInfo, header: list[str], header_line: int,
                   on_bad_row: Callable[[int, str, int, int], InputError | None],
                   block_bytes: int = BLOCK_BYTES) -> Iterator[tuple[pa.Table, np.ndarray]]:
    """Chunks of text columns named as in the header, and each record's physical line.

    `on_bad_row(line, text, expected, actual)` is told of every row with the wrong number of
    fields; it returns an error to stop the read, or None to skip the row. A record longer than
    `block_bytes` raises `LongRecord`.
    """
    import pyarrow.csv as pacsv

    if info.fmt == "csv" and info.quote_count % 2:
        line = find_open_quote(info)
        raise InputError(f"{info.name} line {line}: a quote opens here and is never closed")
    names = [f"c{i}" for i in range(len(header))]  # positional; duplicate names are refused earlier
    exact = info.fmt == "csv" and info.spans_lines  # a quoted field holds a line break somewhere
    records = RecordLines(info)
    ragged: list[int] = []  # data record numbers of rows skipped for their field count
    stop: list[InputError] = []

    def to_lines(recs: np.ndarray) -> np.ndarray:
        return records.of(recs) if exact else recs + header_line + 1

    def handler(row) -> str:
        # pyarrow ignores what a handler raises, so errors are kept and raised after the read
        try:
            rec = (row.number - header_line - 1) if row.number is not None else -1
            ragged.append(rec)
            line = int(to_lines(np.array([rec]))[0]) if rec >= 0 else 0
            err = on_bad_row(line, row.text, row.expected_columns, row.actual_columns)
        except Exception as exc:  # noqa: BLE001 - handed on below
            err = exc
        if err is not None:
            stop.append(err)
            return "error"
        return "skip"

    read_opts = pacsv.ReadOptions(column_names=names, skip_rows=header_line, block_size=block_bytes,
                                  use_threads=False)  # one thread: in order, and row numbers for ragged rows
    parse_opts = pacsv.ParseOptions(
        delimiter="\t" if info.fmt == "tsv" else ",",
        quote_char=False if info.fmt == "tsv" else '"',
        double_quote=True,
        newlines_in_values=info.fmt == "csv",
        ignore_empty_lines=False,  # a blank line stays a (blank) record, so records keep counting lines
        invalid_row_handler=handler,
    )
    conv_opts = pacsv.ConvertOptions(
        column_types={n: pa.string() for n in names}, strings_can_be_null=False,
        quoted_strings_can_be_null=False,
    )
    source = pa.input_stream(str(info.path), compression="gzip" if info.gzipped else None)

    def failed(exc: Exception) -> Exception:
        if stop and not isinstance(stop[0], UnicodeDecodeError):
            return stop[0]
        if "straddl" in str(exc):  # pyarrow: "straddling object straddles two block boundaries"
            return LongRecord(f"{info.name}: a record is longer than the {block_bytes} bytes the reader "
                              "takes at a time", block_bytes)
        if stop or "UTF8" in str(exc) or "UTF-8" in str(exc):
            found = locate_bad_text(info)
            if found is not None:
                return found
        return InputError(f"{info.name}: cannot be read as {info.fmt.upper()}: {_arrow_msg(exc)}")

    try:
        reader = pacsv.open_csv(source, read_options=read_opts, parse_options=parse_opts, convert_options=conv_opts)
    except pa.ArrowInvalid as exc:
        if "Empty CSV file" in str(exc) or "Could not skip initial" in str(exc):
            return  # a header and nothing else (with or without a final newline)
        raise failed(exc) from None
    good = 0  # good records so far
    # The chunks grow from FIRST_CHUNK_ROWS to CHUNK_ROWS, doubling: the writer starts on a small
    # chunk, and each next one is checked while the one before it (half its size) is written
    limit = min(FIRST_CHUNK_ROWS, CHUNK_ROWS)
    buffer: list[pa.RecordBatch] = []
    buffered = 0

    def flush() -> tuple[pa.Table, np.ndarray]:
        nonlocal good, buffer, buffered
        table = pa.Table.from_batches(buffer).rename_columns(header)
        ordinals = np.arange(good, good + buffered, dtype=np.int64)
        if ragged:
            # the k-th good record is record k + (ragged records before it)
            r = np.sort(np.asarray([x for x in ragged if x >= 0], dtype=np.int64))
            q = r - np.arange(len(r))
            ordinals = ordinals + np.searchsorted(q, ordinals, side="right")
        good += buffered
        buffer, buffered = [], 0
        return table, to_lines(ordinals)

    while True:
        try:
            batch = reader.read_next_batch()
        except StopIteration:
            break
        except pa.ArrowInvalid as exc:
            raise failed(exc) from None
        if batch.num_rows == 0:
            continue
        buffer.append(batch)
        buffered += batch.num_rows
        if buffered >= limit:
            yield flush()
            limit = min(CHUNK_ROWS, limit * 2)
    if buffer:
        yield flush()


def block_for(info: SourceInfo, tried: int) -> int:
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


def _text_chunks(info: SourceInfo, size: int = 1 << 22) -> Iterator[bytes]:
    """The file's text as bytes (gzip undone), a few MB at a time."""
    opener = gzip.open if info.gzipped else open
    with opener(info.path, "rb") as fh:
        while True:
            data = fh.read(size)
            if not data:
                return
            yield data


def longest_record(info: SourceInfo) -> tuple[int, int, int]:
    """(bytes, line, column) of the longest record of a CSV or TSV file: its length, the physical
    line it starts on, and the position (from 0) of its longest field. Only for a file whose
    records outgrow the reader's block, which is rare: two passes over the text, vectorized, with
    the quotes of a CSV file followed (RFC 4180: a line break or comma inside quotes is data)."""
    quoted = info.fmt == "csv"
    parity = 0  # inside quotes at the end of the text so far
    offset = newlines = 0  # bytes and line breaks before this chunk
    prev, prev_line = -1, 0  # where the last record ended (its line break), and the line breaks up to it
    best_len, best_start, best_line = -1, 0, 1
    for data in _text_chunks(info):
        b = np.frombuffer(data, dtype=np.uint8)
        nl = b == 10
        ends = nl
        if quoted:
            inside = (np.cumsum(b == 34, dtype=np.int64) + parity) & 1
            parity = int(inside[-1])
            ends = nl & (inside == 0)
        pos = np.flatnonzero(ends)
        if len(pos):
            starts = np.concatenate(([prev + 1 - offset], pos[:-1] + 1))
            lengths = pos - starts
            k = int(np.argmax(lengths))
            if lengths[k] > best_len:
                best_len, best_start = int(lengths[k]), offset + int(starts[k])
                best_line = prev_line + 1 if k == 0 else newlines + int(np.count_nonzero(nl[:pos[k - 1] + 1])) + 1
            prev = offset + int(pos[-1])
            prev_line = newlines + int(np.count_nonzero(nl[:pos[-1] + 1]))
        newlines += int(np.count_nonzero(nl))
        offset += len(b)
    if offset - (prev + 1) > best_len:  # the last record, when no line break ends it
        best_len, best_start, best_line = offset - (prev + 1), prev + 1, prev_line + 1
    # the record's own bytes, and its widest field
    parts, at = [], 0
    for data in _text_chunks(info):
        lo, hi = max(best_start - at, 0), min(best_start + best_len - at, len(data))
        if lo < hi:
            parts.append(data[lo:hi])
        at += len(data)
        if at >= best_start + best_len:
            break
    b = np.frombuffer(b"".join(parts), dtype=np.uint8)
    seps = b == (44 if quoted else 9)
    if quoted:
        seps &= (np.cumsum(b == 34, dtype=np.int64) & 1) == 0
    cuts = np.concatenate(([-1], np.flatnonzero(seps), [len(b)]))
    return max(best_len, 0), best_line, int(np.argmax(np.diff(cuts)))


def _arrow_msg(exc: Exception) -> str:
    return str(exc).strip().splitlines()[0][:200]


# --- JSON Lines -------------------------------------------------------------------------------

def read_jsonl(info: SourceInfo) -> Iterator[tuple[pa.Table, np.ndarray]]:
    try:
        yield from _read_jsonl(info)
    except UnicodeDecodeError:
        raise _bad_text(info) from None


def _read_jsonl(info: SourceInfo) -> Iterator[tuple[pa.Table, np.ndarray]]:
    texts: list[str] = []
    lines: list[int] = []
    with open_text(info) as fh:
        for n, text in enumerate(fh, start=1):
            text = text.strip()
            if not text:
                continue
            texts.append(text)
            lines.append(n)
            if len(texts) >= CHUNK_ROWS:
                yield _json_table(info, _decode_lines(info, texts, lines), lines), np.asarray(lines, dtype=np.int64)
                texts, lines = [], []
    if texts:
        yield _json_table(info, _decode_lines(info, texts, lines), lines), np.asarray(lines, dtype=np.int64)


def _decode_lines(info: SourceInfo, texts: list[str], lines: list[int]) -> list[dict]:
    """The objects of a chunk of lines, each line decoded on its own by the decoder's C scanner
    (the line must be one whole object); a line that is not goes through `decode` to be told."""
    scan = _DECODER.scan_once
    out = []
    for text, n in zip(texts, lines):
        try:
            obj, end = scan(text, 0)
        except (StopIteration, json.JSONDecodeError, _SameKeyTwice):
            obj, end = None, -1
        if end != len(text) or type(obj) is not dict:
            obj = _one_line(info, text, n)
        out.append(obj)
    return out


def _one_line(info: SourceInfo, text: str, n: int) -> dict:
    try:
        obj = _DECODER.decode(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"{info.name} line {n}: broken JSON ({exc.msg} at column {exc.colno})") from None
    except _SameKeyTwice as exc:
        raise InputError(
            f"{info.name} line {n}, field {exc.key}: the name appears twice in this object; "
            "which value is meant cannot be told, keep one") from None
    if not isinstance(obj, dict):
        kind = "an array" if isinstance(obj, list) else f"a {type(obj).__name__}"
        raise InputError(f"{info.name} line {n}: is {kind}; each line must be one JSON object")
    return obj


class _SameKeyTwice(Exception):
    def __init__(self, key: str):
        self.key = key


def _one_value_per_key(pairs: list) -> dict:
    # RFC 8259 section 4: names within an object SHOULD be unique; readers differ on which value
    # wins when they are not, so such an object is refused rather than guessed at
    obj = dict(pairs)
    if len(obj) != len(pairs):
        seen: set = set()
        for k, _ in pairs:
            if k in seen:
                raise _SameKeyTwice(k)
            seen.add(k)
    return obj


_DECODER = json.JSONDecoder(object_pairs_hook=_one_value_per_key)


def _to_text(v) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v)
    return str(v)


def _json_table(info: SourceInfo, rows: list[dict], lines: list[int]) -> pa.Table:
    from itertools import chain, repeat

    keys = dict.fromkeys(chain.from_iterable(rows))  # every name, in the order first seen
    data = {}
    for k in keys:
        values = list(map(dict.get, rows, repeat(k, len(rows))))
        kinds = set(map(type, values))
        if dict in kinds or list in kinds:
            for j, v in enumerate(values):
                if isinstance(v, (dict, list)):
                    raise InputError(
                        f"{info.name} line {lines[j]}, field {k}: nested {'object' if isinstance(v, dict) else 'list'} "
                        "values are not supported; flatten it")
        data[k] = pa.array(_texts(values, kinds), type=pa.string())
    return pa.table(data)


def _texts(values: list, kinds: set) -> list[str]:
    """`_to_text` of every value, by the quickest way the value types allow (the same text)."""
    if kinds <= {str}:
        return values
    if kinds <= {str, type(None)}:
        return ["" if v is None else v for v in values]
    if kinds <= {int}:  # (bool is another type: True is not written 1)
        return list(map(str, values))
    if kinds <= {float}:
        return list(map(repr, values))
    if kinds <= {int, type(None)}:
        return ["" if v is None else str(v) for v in values]
    if kinds <= {float, type(None)}:
        return ["" if v is None else repr(v) for v in values]
    return [v if type(v) is str else _to_text(v) for v in values]


# --- Parquet ----------------------------------------------------------------------------------

def read_parquet(info: SourceInfo) -> Iterator[tuple[pa.Table, np.ndarray]]:
    """Parquet columns keep their types (numbers, timestamps); the checks accept them as they are."""
    import pyarrow.parquet as pq

    try:
        pf = pq.ParquetFile(str(info.path))
    except Exception as exc:  # pyarrow raises several kinds for a damaged file
        raise InputError(f"{info.name}: not a readable Parquet file ({_arrow_msg(exc)})") from None
    start = 1
    try:
        for batch in pf.iter_batches(batch_size=CHUNK_ROWS):
            table = pa.Table.from_batches([batch])
            for i, f in enumerate(table.schema):
                if pa.types.is_dictionary(f.type):
                    table = table.set_column(i, f.name, table.column(i).cast(f.type.value_type))
            n = table.num_rows
            yield table, np.arange(start, start + n, dtype=np.int64)
            start += n
    except (OSError, pa.ArrowException) as exc:
        raise InputError(f"{info.name}: not a readable Parquet file ({_arrow_msg(exc)})") from None
