"""Turning a column of source values into numbers, whole numbers, instants and names, vectorized.

Each function takes one pyarrow array (text, or already typed when it came from Parquet) and
returns numpy arrays plus masks of the values it could not read. The work is done by Arrow's
compute kernels; where a cast fails somewhere in a chunk, the failing values are found by halving
the chunk (a few casts per bad value), never by a Python loop over the good ones.
"""
from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

# what a number looks like (common practice: decimal point, optional exponent, optional sign)
NUMBER_RE = r"^[+-]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?$|^[+-]?(?i:inf|infinity|nan)$"
WHOLE_RE = r"^[+-]?[0-9]{1,19}$"
# ISO 8601 (extended format): a calendar date, optionally a time, optionally a zone designator
DATE_START_RE = r"^[0-9]{4}-[0-9]{2}-[0-9]{2}"
ZONED_RE = r"[T ][0-9]{2}(:?[0-9]{2}(:?[0-9]{2}([.,][0-9]+)?)?)?(Z|[+-][0-9]{2}(:?[0-9]{2})?)$"
WHOLE_LIMIT = 2**53  # whole numbers written as decimals are exact up to here
DIGITS_RE = r"^[+-]?[0-9]+$"
INT64_SPAN = 2.0**63  # a stored seed is a signed 64-bit integer: its magnitude stays below this


def combined(arr) -> pa.Array:
    if isinstance(arr, pa.ChunkedArray):
        return arr.combine_chunks() if arr.num_chunks != 1 else arr.chunk(0)
    return arr


def _is_text(t: pa.DataType) -> bool:
    return pa.types.is_string(t) or pa.types.is_large_string(t)


def as_text(arr) -> pa.Array:
    """Text with surrounding white space removed; a missing value is ''."""
    arr = combined(arr)
    if pa.types.is_large_string(arr.type):
        arr = arr.cast(pa.string())
    elif not _is_text(arr.type):
        arr = pc.cast(arr, pa.string())
    if arr.null_count:
        arr = pc.fill_null(arr, "")
    if not _may_need_trim(arr):
        return arr
    return pc.utf8_trim_whitespace(arr)


# bytes a value may start or end with when it has white space there: ASCII white space, and any
# byte of a multi-byte character (some of those are white space, e.g. U+00A0 and U+3000)
_EDGE = np.zeros(256, dtype=bool)
_EDGE[[9, 10, 11, 12, 13, 28, 29, 30, 31, 32]] = True
_EDGE[128:] = True
_DIGITS = np.zeros(256, dtype=bool)  # what a plain whole number is made of: digits and a minus sign
_DIGITS[list(b"0123456789-")] = True


def _bytes_of(arr: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """A string array's offsets and the bytes its values span, as numpy views (no copies)."""
    _, offsets, data = arr.buffers()
    width = np.int64 if pa.types.is_large_string(arr.type) else np.int32
    off = np.frombuffer(offsets, dtype=width, count=len(arr) + 1, offset=arr.offset * np.dtype(width).itemsize)
    if data is None or len(arr) == 0:
        return off, np.zeros(0, dtype=np.uint8)
    return off, np.frombuffer(data, dtype=np.uint8)[int(off[0]):int(off[-1])]


def _may_need_trim(arr: pa.Array) -> bool:
    """False when no value starts or ends with a byte of white space (or of a non-ASCII
    character): then trimming would change nothing. Looks at two bytes a value, not at every
    character, which is most of the cost of trimming a column that needs none."""
    off, data = _bytes_of(arr)
    if len(data) == 0:
        return False
    starts, ends = off[:-1] - off[0], off[1:] - off[0]
    full = ends > starts
    if not full.all():
        starts, ends = starts[full], ends[full]
    return bool(_EDGE[data[starts]].any() or _EDGE[data[ends - 1]].any())


# control characters (Unicode general category Cc): C0 U+0000..U+001F, DEL U+007F and C1
# U+0080..U+009F (from memory of the Unicode Character Database); RE2 syntax, for Arrow's kernels
CONTROL_RE = r"[\x{00}-\x{1f}\x{7f}-\x{9f}]"


def has_controls(arr: pa.Array) -> bool:
    """Whether some value holds a control character. Looks at the bytes (a few vectorized passes,
    no regular expression per value): UTF-8 writes C0 and DEL as those very bytes, and C1 as 0xC2
    followed by 0x80..0x9F (0xC2 only ever leads a character), so no other character can match."""
    _, data = _bytes_of(arr)
    if len(data) == 0:
        return False
    if data.min() < 0x20:
        return True
    if data.max() < 0x7F:  # ASCII without DEL, the common case: two reductions and done
        return False
    if (data == 0x7F).any():
        return True
    lead = np.flatnonzero(data[:-1] == 0xC2)
    return bool(lead.size) and bool((data[lead + 1] <= 0x9F).any())  # (a continuation byte is >= 0x80)


def controls(arr: pa.Array) -> np.ndarray:
    """The values that hold a control character (the full test, once `has_controls` says some do)."""
    return mask(pc.match_substring_regex(arr, CONTROL_RE))


def byte_lengths(arr: pa.Array) -> np.ndarray:
    """Each value's length in bytes (at least its length in characters)."""
    off, _ = _bytes_of(arr)
    return np.diff(off)


def mask(arr) -> np.ndarray:
    """A boolean array as numpy, null counting as False."""
    arr = combined(arr)
    if arr.null_count:
        arr = pc.fill_null(arr, False)
    return arr.to_numpy(zero_copy_only=False).astype(bool, copy=False)


def _null_where(arr: pa.Array, bad: np.ndarray) -> pa.Array:
    if not bad.any():
        return arr
    return pc.if_else(pa.array(bad), pa.scalar(None, type=arr.type), arr)


def _keep_where(arr: pa.Array, keep: np.ndarray) -> pa.Array:
    return _null_where(arr, ~keep)


def cast_masked(arr: pa.Array, typ: pa.DataType) -> tuple[pa.Array, np.ndarray]:
    """Cast, with nulls where a value does not cast; also the mask of those values."""
    n = len(arr)
    try:
        return pc.cast(arr, typ), np.zeros(n, dtype=bool)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        pass
    bad = np.zeros(n, dtype=bool)
    stack = [(0, n)]
    while stack:
        lo, hi = stack.pop()
        try:
            pc.cast(arr.slice(lo, hi - lo), typ)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            if hi - lo == 1:
                bad[lo] = True
            else:
                mid = (lo + hi) // 2
                stack.append((mid, hi))
                stack.append((lo, mid))
    return pc.cast(_null_where(arr, bad), typ), bad


def _ints(arr: pa.Array) -> np.ndarray:
    """int64 values exactly (nulls as 0; through float they could round)."""
    if arr.type != pa.int64():
        arr = pc.cast(arr, pa.int64())
    if arr.null_count:
        arr = pc.fill_null(arr, 0)
    return arr.to_numpy(zero_copy_only=False)


def _floats(arr: pa.Array) -> np.ndarray:
    return arr.to_numpy(zero_copy_only=False).astype(np.float64, copy=False)


def numbers(arr, missing: tuple[str, ...] = ()) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, pa.Array]:
    """(values with NaN where empty, empty, not a number, not finite, the text) for a metric column."""
    arr = combined(arr)
    n = len(arr)
    if pa.types.is_integer(arr.type) or pa.types.is_floating(arr.type) or pa.types.is_decimal(arr.type):
        empty = mask(arr.is_null())
        vals = _floats(pc.cast(arr, pa.float64()))
        nonfinite = ~empty & ~np.isfinite(vals)
        return vals, empty, np.zeros(n, dtype=bool), nonfinite, as_text(arr)
    text = as_text(arr)
    empty_m = pc.equal(text, "")
    if missing:
        empty_m = pc.or_(empty_m, pc.is_in(text, value_set=pa.array(list(missing), type=pa.string())))
    empty = mask(empty_m)
    sn = _null_where(text, empty)
    try:
        vals = _floats(pc.cast(sn, pa.float64()))
        bad = np.zeros(n, dtype=bool)
    except pa.ArrowInvalid:
        shaped = mask(pc.match_substring_regex(sn, NUMBER_RE))
        bad = ~empty & ~shaped
        cast, bad2 = cast_masked(_null_where(sn, bad), pa.float64())
        bad |= bad2
        vals = _floats(cast)
    nonfinite = ~empty & ~bad & ~np.isfinite(vals)
    return vals, empty, bad, nonfinite, text


def wholes(arr, default: int = 0) -> tuple[np.ndarray, np.ndarray, pa.Array, np.ndarray]:
    """(values, not read, the text, out of range) for seed or replicate; empty means `default`.

    "Out of range" marks the values among those not read that are whole numbers all the same,
    only past the 64-bit range (a message tells them apart from '2.5' or 'two').
    """
    arr = combined(arr)
    n = len(arr)
    if pa.types.is_integer(arr.type):
        filled = pc.fill_null(arr, default) if arr.null_count else arr
        cast, bad = cast_masked(filled, pa.int64())  # an unsigned value past the int64 range
        return _ints(cast), bad, as_text(arr), bad
    if pa.types.is_floating(arr.type):
        f = _floats(pc.fill_null(arr, float(default)) if arr.null_count else arr)
        whole = np.isfinite(f) & (np.floor(f) == f)
        bad = ~whole | (np.abs(f) >= WHOLE_LIMIT)
        return np.where(bad, 0, f).astype(np.int64), bad, as_text(arr), whole & (np.abs(f) >= INT64_SPAN)
    text = as_text(arr)
    off, data = _bytes_of(text)
    if len(text) and (np.diff(off) > 0).all() and _DIGITS[data].all():
        # only digits and minus signs, none empty: a cast that succeeds read each value as
        # WHOLE_RE would have (the cast alone would also read '0x10')
        try:
            return pc.cast(text, pa.int64()).to_numpy(), np.zeros(n, dtype=bool), text, np.zeros(n, dtype=bool)
        except pa.ArrowInvalid:
            pass
    empty = mask(pc.equal(text, ""))
    sd = pc.if_else(pa.array(empty), pa.scalar(str(default)), text) if empty.any() else text
    plain = mask(pc.match_substring_regex(sd, WHOLE_RE))
    out = np.zeros(n, dtype=np.int64)
    if plain.all():
        try:
            return pc.cast(sd, pa.int64()).to_numpy(), np.zeros(n, dtype=bool), text, np.zeros(n, dtype=bool)
        except pa.ArrowInvalid:  # a '+' sign, or more digits than fit
            pass
    # signs, '3.0', '1e3': read as a number, keep it if it is whole
    ints, toolong = cast_masked(pc.replace_substring_regex(_keep_where(sd, plain), r"^\+", ""), pa.int64())
    plain &= ~toolong
    out[plain] = _ints(ints)[plain]
    rest = ~plain
    shaped = rest & mask(pc.match_substring_regex(sd, NUMBER_RE))
    cast, castbad = cast_masked(_keep_where(sd, shaped), pa.float64())
    f = _floats(cast)
    integral = shaped & ~castbad & np.isfinite(f) & (np.floor(f) == f)
    whole = integral & (np.abs(f) < WHOLE_LIMIT)
    out[whole] = f[whole].astype(np.int64)
    bad = rest & ~whole
    # past the range: digits that did not fit (any count of them: a float of 400 digits is inf),
    # or a whole number written as a float beyond it ('1e19')
    digits = mask(pc.match_substring_regex(sd, DIGITS_RE))
    big = bad & (digits | (integral & (np.abs(f) >= INT64_SPAN)))
    return out, bad, text, big


_TS = {"s": 1, "ns": 10**9}


def _instants_of(text: pa.Array, todo: np.ndarray, zoned: bool, out: np.ndarray) -> np.ndarray:
    """Fill `out` (epoch seconds) where the text reads; return the mask of those that did not."""
    remaining = todo.copy()
    for unit, per in _TS.items():
        if not remaining.any():
            break
        typ = pa.timestamp(unit, tz="UTC") if zoned else pa.timestamp(unit)
        cast, bad = cast_masked(_keep_where(text, remaining), typ)
        ok = remaining & ~bad
        if ok.any():
            out[ok] = np.floor_divide(_ints(cast)[ok], per)
        remaining &= bad
    return remaining


def instants(arr) -> tuple[np.ndarray, np.ndarray, np.ndarray, pa.Array]:
    """(epoch seconds UTC, has a value, not readable, the text) for finished_at.

    ISO 8601 dates and times: a zone designator (Z or +hh:mm) is honoured; a time without one is
    read as UTC; a date alone is midnight UTC. Fractions of a second are dropped.
    """
    arr = combined(arr)
    n = len(arr)
    out = np.zeros(n, dtype=np.int64)
    if pa.types.is_timestamp(arr.type) or pa.types.is_date(arr.type):
        has = ~mask(arr.is_null())
        if pa.types.is_date(arr.type):
            arr = pc.cast(arr, pa.timestamp("s"))
        per = {"s": 1, "ms": 10**3, "us": 10**6, "ns": 10**9}[arr.type.unit]
        raw = _ints(arr)
        out[has] = np.floor_divide(raw[has], per)
        return out, has, np.zeros(n, dtype=bool), as_text(arr)
    text = as_text(arr)
    has = ~mask(pc.equal(text, ""))
    if not has.any():
        return out, has, np.zeros(n, dtype=bool), text
    upper = None
    for upper_case in (False, True):
        if upper_case:  # 't' and 'z' as RFC 3339 allows (a value that reads as it is reads the same)
            upper = pc.utf8_upper(text)
        some = _keep_where(upper if upper_case else text, has)
        for zoned in (True, False):  # the common case: every value in one form
            try:
                cast = pc.cast(some, pa.timestamp("s", tz="UTC") if zoned else pa.timestamp("s"))
            except pa.ArrowInvalid:
                continue
            out[has] = _ints(cast)[has]
            return out, has, np.zeros(n, dtype=bool), text
    dated = has & mask(pc.match_substring_regex(upper, DATE_START_RE))
    zoned_m = dated & mask(pc.match_substring_regex(upper, ZONED_RE))
    bad = has & ~dated
    bad |= _instants_of(upper, zoned_m, True, out)
    bad |= _instants_of(upper, dated & ~zoned_m, False, out)
    return out, has, bad, text


def factorize(columns: list, n: int) -> tuple[np.ndarray, list[tuple]]:
    """Codes per row and the distinct key tuples for one or more text columns.

    A column is a pyarrow string array or a plain str (the same value on every row). Only the
    distinct values ever become Python objects. The columns' codes are combined into one number
    per row and sorted once (column by column only where that number could overflow).
    """
    parts = []  # (codes, distinct values) of each text array; a str is the same on every row
    for col in columns:
        if isinstance(col, str):
            parts.append(col)
            continue
        enc = combined(col).dictionary_encode()
        parts.append((enc.indices.to_numpy(zero_copy_only=False).astype(np.int64), enc.dictionary.to_pylist()))
    arrays = [p for p in parts if not isinstance(p, str)]
    span = 1.0
    for _, values in arrays:
        span *= max(len(values), 1)
    if span < 2.0**62:
        code = np.zeros(n, dtype=np.int64)
        for idx, values in arrays:
            code = code * max(len(values), 1) + idx
        uniq, inverse = np.unique(code, return_inverse=True)
        digits = []  # each column's code of every distinct key, last column first
        rest = uniq
        for idx, values in reversed(arrays):
            rest, d = np.divmod(rest, max(len(values), 1))
            digits.append(d.tolist())
        digits.reverse()
        per_col = iter(digits)
        cols = []
        for p in parts:
            if isinstance(p, str):
                cols.append([p] * len(uniq))
            else:
                values = p[1]
                cols.append([values[i] for i in next(per_col)])
        keys = list(zip(*cols)) if cols else [()] * len(uniq)
        if not arrays:
            return np.zeros(n, dtype=np.int64), [tuple(p for p in parts)]
        return inverse.reshape(-1), keys
    codes = np.zeros(n, dtype=np.int64)
    keys: list[tuple] = [()]
    for p in parts:
        if isinstance(p, str):
            keys = [k + (p,) for k in keys]
            continue
        idx, values = p
        width = max(len(values), 1)
        uniq, codes = np.unique(codes * width + idx, return_inverse=True)
        keys = [keys[u // width] + (values[u % width],) for u in uniq.tolist()]
    return codes.reshape(-1), keys
