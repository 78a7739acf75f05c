"""The slice language: which runs an analysis stands on.

    solver=stacker version>=1.5 family=mixed-sku,fragile-top since=2026-10-01 host!=lab-3
    stacker@1.6 since=7d | stacker@1.4 campaign=oct-baseline

Terms joined by spaces mean AND; a comma inside a term means OR; `|` joins arms (their union).
Operators: = != < <= > >= ~ (glob). `NAME@VERSION` names one treatment. Values are always data:
they reach the database only as bound parameters, and quotes ('...' or "...") keep spaces,
commas and bars inside a value.
"""
from __future__ import annotations

import json
import re
import time
from dataclasses import dataclass
from datetime import datetime, timezone

from ..errors import SliceError

KEYS = ("solver", "version", "campaign", "family", "group", "instance", "host", "status", "seed",
        "since", "until", "retracted")
OPS = ("!=", "<=", ">=", "=", "<", ">", "~")
ORDERED = {"version", "seed"}  # keys where < <= > >= make sense
EQ_ONLY = {"since", "until", "retracted"}
STATUSES = ("ok", "timeout", "failed", "infeasible")
_KEY = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_RELATIVE = re.compile(r"^(\d+)([hdw])$")
SHOWN_CHARS = 60  # of a term or value quoted in an error message


def brief(text: str, limit: int | None = SHOWN_CHARS) -> str:
    """User text as a one-line message shows it: what would break the line or hide itself
    (newlines, tabs, control and format characters, lone surrogates) escaped as Python writes it,
    and cut after `limit` characters with '...'."""
    out, size = [], 0
    for ch in text:
        piece = ch if ch.isprintable() else ch.encode("unicode_escape").decode("ascii")  # \n, \x1b, \u2028
        if limit is not None and size + len(piece) > limit:
            out.append("...")
            break
        out.append(piece)
        size += len(piece)
    return "".join(out)


@dataclass(frozen=True)
class Term:
    key: str  # one of KEYS, or "treatment" for NAME@VERSION
    op: str
    values: tuple[str, ...]

    def text(self) -> str:
        if self.key == "treatment":  # a name with operator characters must be quoted to read back
            vals = ",".join(_quote(v) if not re.search(r"[=<>!~]", v) or v[:1] in "'\"" else
                            ('"' + v + '"' if '"' not in v else _quote(v)) for v in self.values)
        else:
            vals = ",".join(_quote(v) for v in self.values)
        return vals if self.key == "treatment" else f"{self.key}{self.op}{vals}"

    def to_dict(self) -> dict:
        return {"key": self.key, "op": self.op, "values": list(self.values)}


@dataclass(frozen=True)
class Slice:
    arms: tuple[tuple[Term, ...], ...] = ((),)

    @property
    def text(self) -> str:
        """The normalized text: one space between terms, ' | ' between arms."""
        return " | ".join(" ".join(t.text() for t in arm) for arm in self.arms).strip()

    def to_dict(self) -> dict:
        return {"arms": [[t.to_dict() for t in arm] for arm in self.arms]}

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), sort_keys=True)

    @staticmethod
    def from_dict(d: dict) -> "Slice":
        return Slice(tuple(tuple(Term(t["key"], t["op"], tuple(t["values"])) for t in arm) for arm in d["arms"]))

    def absolute(self, now: float | None = None) -> "Slice":
        """Relative dates (since=7d) replaced by absolute UTC times, so the slice means the same forever."""
        now = time.time() if now is None else now
        arms = []
        for arm in self.arms:
            terms = []
            for t in arm:
                if t.key in ("since", "until") and _RELATIVE.match(t.values[0]):
                    stamp = datetime.fromtimestamp(parse_when(t.values[0], t.key, now), tz=timezone.utc)
                    t = Term(t.key, t.op, (stamp.strftime("%Y-%m-%dT%H:%M:%SZ"),))
                terms.append(t)
            arms.append(tuple(terms))
        return Slice(tuple(arms))

    def is_empty(self) -> bool:
        return all(not arm for arm in self.arms)


def _quote(v: str) -> str:
    # quote what would otherwise split the term, or read as part of the operator
    if v == "" or re.search(r"[\s,|'\"]", v) or v[0] in "=<>!~":
        if '"' not in v:
            return '"' + v + '"'
        if "'" not in v:
            return "'" + v + "'"
        # both kinds of quote: runs of double quotes go inside single quotes, the rest inside double
        return "".join("'" + part + "'" if part[0] == '"' else '"' + part + '"' for part in re.findall(r'"+|[^"]+', v))
    return v


def _split(text: str) -> list[list[str]]:
    """Arms of raw terms; spaces and bars inside quotes do not split."""
    arms: list[list[str]] = [[]]
    buf, quote = [], None
    for ch in text:
        if quote:
            buf.append(ch)
            if ch == quote:
                quote = None
            continue
        if ch in "'\"":
            quote = ch
            buf.append(ch)
        elif ch.isspace() or ch == "|":
            if buf:
                arms[-1].append("".join(buf))
                buf = []
            if ch == "|":
                arms.append([])
        else:
            buf.append(ch)
    if quote:
        raise SliceError(f"slice: a quote {quote} is never closed")
    if buf:
        arms[-1].append("".join(buf))
    return arms


def _values(raw: str, where: str) -> tuple[str, ...]:
    vals, buf, quote, quoted = [], [], None, False
    empty_unquoted = False  # an alternative with no characters and no quotes (a=,b)
    for ch in raw:
        if quote:
            if ch == quote:
                quote = None
            else:
                buf.append(ch)
            continue
        if ch in "'\"":
            quote, quoted = ch, True
        elif ch == ",":
            empty_unquoted = empty_unquoted or (not buf and not quoted)
            vals.append("".join(buf))
            buf, quoted = [], False
        else:
            buf.append(ch)
    empty_unquoted = empty_unquoted or (not buf and not quoted)
    vals.append("".join(buf))
    if empty_unquoted:
        raise SliceError(f"{where}: a value is empty; write key=value (commas separate alternatives)")
    return tuple(vals)


def _suggest(word: str, options) -> str:
    from difflib import get_close_matches

    near = get_close_matches(word, list(options), n=3, cutoff=0.6)
    return f" (did you mean {' or '.join(repr(n) for n in near)}?)" if near else ""


def parse_when(value: str, key: str, now: float | None = None) -> int:
    """Epoch seconds for a since/until value: ISO date or date-time, or relative (7d, 4w, 12h)."""
    now = time.time() if now is None else now
    m = _RELATIVE.match(value)
    if m:
        n, unit = int(m.group(1)), m.group(2)
        epoch = int(now - n * {"h": 3600, "d": 86400, "w": 7 * 86400}[unit])
        try:  # it must name a real moment, so that it can be stored as one
            datetime.fromtimestamp(epoch, tz=timezone.utc)
        except (OverflowError, OSError, ValueError):
            raise SliceError(f"{key}={brief(value)}: that reaches back before any calendar date; use a smaller count") from None
        return epoch
    try:
        dt = datetime.fromisoformat(value.replace("Z", "+00:00"))
        if dt.tzinfo is None:
            dt = dt.replace(tzinfo=timezone.utc)
        epoch = int(dt.timestamp())
    except (ValueError, OverflowError):
        raise SliceError(f"{key}={brief(value)}: not a date; use an ISO date (2026-10-01), a date and time, or 7d / 4w / 12h") from None
    if key == "until" and _date_only(value):  # a whole day: up to its end
        epoch += 86400
    return epoch


def _date_only(value: str) -> bool:
    from datetime import date

    try:
        date.fromisoformat(value)
    except ValueError:
        return False
    return True


def parse(text: str | None) -> Slice:
    """Parse slice text into a Slice; raise SliceError pointing at the term that is wrong."""
    if text is None or not text.strip():
        return Slice()
    arms = []
    n = 0
    raw_arms = _split(text)
    for raw_arm in raw_arms:
        if not raw_arm and len(raw_arms) > 1:
            raise SliceError("slice: an arm between '|' is empty; write terms on both sides of each '|'")
        terms = []
        for raw in raw_arm:
            n += 1
            terms.append(_term(raw, n))
        arms.append(tuple(terms))
    return Slice(tuple(arms))


def _term(raw: str, n: int) -> Term:
    where = f"slice term {n} '{brief(raw)}'"
    if raw[:1] in ("'", '"'):  # a quoted treatment: its name may hold operator characters
        vals = _values(raw, where)
        if all("@" in v and v.split("@")[0] and v.rpartition("@")[2] for v in vals):
            return Term("treatment", "=", tuple(vals))
    m = _KEY.match(raw)
    rest = raw[m.end():] if m else raw
    op = next((o for o in OPS if rest.startswith(o)), None) if m else None
    if op is None:
        if "@" in raw and not any(o in raw.split("@")[0] for o in OPS):
            vals = _values(raw, where)
            for v in vals:
                name, _, version = v.partition("@")
                if not name or not version:
                    raise SliceError(f"{where}: write a treatment as NAME@VERSION, e.g. stacker@1.6")
            return Term("treatment", "=", vals)
        raise SliceError(f"{where}: expected KEY=VALUE (keys: {', '.join(KEYS)}) or NAME@VERSION")
    key = m.group(0).lower()
    if key not in KEYS:
        raise SliceError(f"{where}: unknown key '{brief(m.group(0))}'{_suggest(key, KEYS)}")
    value_text = rest[len(op):]
    if value_text == "":
        raise SliceError(f"{where}: no value after '{op}'")
    vals = _values(value_text, where)
    if key in EQ_ONLY and op != "=":
        raise SliceError(f"{where}: {key} takes '=' only")
    if op in ("<", "<=", ">", ">=") and key not in ORDERED:
        raise SliceError(f"{where}: '{op}' does not apply to {key}; use = != or ~")
    if op in ("<", "<=", ">", ">=") and len(vals) > 1:
        raise SliceError(f"{where}: '{op}' takes one value")
    if key in ("since", "until"):
        if len(vals) > 1:
            raise SliceError(f"{where}: {key} takes one date")
        try:
            parse_when(vals[0], key)
        except SliceError as exc:
            raise SliceError(f"{where}: {str(exc).removeprefix(f'{key}={brief(vals[0])}: ')}") from None
    if key == "seed" and op != "~":
        for v in vals:
            if not re.fullmatch(r"-?\d+", v):
                raise SliceError(f"{where}: seed '{brief(v)}' is not a whole number")
            # (the length first: Python refuses to read a number of more than 4300 digits, and
            # a 64-bit seed takes at most 20 characters)
            if len(v) > 40 or not -2**63 <= int(v) < 2**63:
                raise SliceError(f"{where}: seed '{brief(v)}' is out of range (seeds are stored as 64-bit whole numbers)")
    if key == "status" and op != "~":
        for v in vals:
            if v not in STATUSES:
                raise SliceError(f"{where}: status '{brief(v)}' is not one of {', '.join(STATUSES)}{_suggest(v, STATUSES)}")
    if key == "retracted" and (len(vals) > 1 or vals[0] not in ("yes", "no", "any")):
        raise SliceError(f"{where}: retracted takes one of yes, no or any")
    return Term(key, op, vals)
