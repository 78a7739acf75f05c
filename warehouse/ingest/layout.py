"""Layout files: how one source's columns, constants, status words and metrics map to ours.

A layout is a small TOML file (see docs/loading.md):

    [columns]            # source column = our field, or a metric's name
    algo = "solver"
    [constants]          # a value for every row of the file
    host = "rack-b"
    [status]             # the source's own words = ok | timeout | failed | infeasible
    TLE = "timeout"
    [group]              # derive the group (and family) from the instance name
    pattern = '^(?P<family>[^/]+)/(?P<group>[^/]+)/'
    [metrics.pallets]    # sense (min or max) and unit of a metric
    sense = "min"
    unit = "pallets"
    [missing]            # words that mean "no value" in metric columns
    words = ["n/a", "-"]
    [ignore]
    columns = ["notes"]
"""
from __future__ import annotations

import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import InputError

NAME_LIMIT = 255
FIELDS = (
    "solver", "version", "build", "params", "family", "group", "instance", "seed", "replicate",
    "status", "finished_at", "host", "instance_hash",
)
STATUSES = ("ok", "timeout", "failed", "infeasible")
# words many tools write for our four statuses; a layout adds more
STATUS_WORDS = {
    "ok": "ok", "success": "ok", "solved": "ok", "optimal": "ok", "feasible": "ok", "done": "ok",
    "timeout": "timeout", "time_limit": "timeout", "timelimit": "timeout", "time-out": "timeout",
    "failed": "failed", "fail": "failed", "error": "failed", "crash": "failed", "crashed": "failed",
    "infeasible": "infeasible",
}
# Unicode general category Cc (C0, DEL and C1; from memory of the Unicode Character Database):
# a name holding one prints wrongly in every table and message (a tab or line break shifts
# columns and lines), so names are refused with them (values.CONTROL_RE is the same set, for Arrow)
CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f]")
REPLICATE_SPAN = 2**31  # runs.replicate is a 32-bit integer on PostgreSQL (INTEGER)
SECTIONS = {"columns", "constants", "status", "group", "metrics", "missing", "ignore", "attributes"}


@dataclass
class MetricSpec:
    sense: str = "min"
    unit: str = ""


@dataclass
class Layout:
    """What a layout file says; the empty layout maps canonical columns only."""

    source: str = ""
    columns: dict[str, str] = field(default_factory=dict)  # lower-cased source name -> target
    constants: dict[str, str] = field(default_factory=dict)
    status: dict[str, str] = field(default_factory=dict)  # lower-cased word -> status
    group_pattern: re.Pattern | None = None
    metrics: dict[str, MetricSpec] = field(default_factory=dict)
    missing: tuple[str, ...] = ()
    ignore: tuple[str, ...] = ()
    attributes: tuple[str, ...] = ()
    text: str = ""

    def status_words(self) -> dict[str, str]:
        words = dict(STATUS_WORDS)
        words.update(self.status)
        return words


def has_control(text: str) -> bool:
    return CONTROL.search(text) is not None


def control_message(value: str) -> str:
    """What is wrong with a name that holds a control character, with the value as Python shows
    it (so that a tab reads as \\t, not as white space)."""
    return (f"{value[:60]!r} holds a control character; names may not hold tabs, line breaks or "
            "other control characters")


def _plain_name(value: str, where: str, path: str) -> None:
    if has_control(value):
        raise _err(path, f"{where}: {control_message(value)}")


def _err(path: str, msg: str) -> InputError:
    return InputError(f"layout {path}: {msg}")


def _table(doc: dict, key: str, path: str) -> dict:
    value = doc.get(key, {})
    if not isinstance(value, dict):
        raise _err(path, f"[{key}] must be a table of name = value lines")
    return value


def _strings(table: dict, section: str, path: str) -> dict[str, str]:
    out = {}
    for k, v in table.items():
        if not isinstance(v, (str, int, float)) or isinstance(v, bool):
            raise _err(path, f"[{section}] {k} must be a text value, not {type(v).__name__}")
        out[str(k)] = str(v)
    return out


def _names(doc: dict, section: str, path: str) -> tuple[str, ...]:
    value = _table(doc, section, path)
    names = value.get("columns", value.get("words", []))
    if not isinstance(names, list) or not all(isinstance(n, str) for n in names):
        raise _err(path, f"[{section}] needs a list of names, e.g. columns = [\"notes\"]")
    extra = set(value) - {"columns", "words"}
    if extra:
        raise _err(path, f"[{section}] has unknown key '{sorted(extra)[0]}'")
    return tuple(names)


def read_layout(path: str | Path | None) -> Layout:
    if path is None:
        return Layout()
    p = Path(path)
    shown = str(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"layout {shown}: no such file") from None
    except IsADirectoryError:
        raise _err(shown, "is a folder, not a file; give the path of the layout's .toml file") from None
    except PermissionError:
        raise _err(shown, "cannot be read (permission denied); make it readable or copy it somewhere readable") from None
    except OSError as exc:  # a path through a file, a device that fails: the system's own reason
        raise _err(shown, f"cannot be read ({exc.strerror or type(exc).__name__})") from None
    except UnicodeDecodeError as exc:
        raise _err(shown, f"not UTF-8 text (byte {exc.start})") from None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise _err(shown, f"not valid TOML: {exc}") from None
    unknown = set(doc) - SECTIONS
    if unknown:
        raise _err(shown, f"unknown section [{sorted(unknown)[0]}]; known: {', '.join(sorted(SECTIONS))}")
    lay = Layout(source=shown, text=text)
    for src, target in _strings(_table(doc, "columns", shown), "columns", shown).items():
        target = target.strip()
        if not target:
            raise _err(shown, f"[columns] {src} = '': name a field ({', '.join(FIELDS)}) or a metric")
        if target.lower() not in FIELDS:
            _plain_name(target, f"[columns] {src}", shown)  # the name of a metric
        lay.columns[src.strip().lower()] = target.lower() if target.lower() in FIELDS else target
    constants = _strings(_table(doc, "constants", shown), "constants", shown)
    for k, v in constants.items():
        if k not in FIELDS:
            raise _err(shown, f"[constants] {k}: unknown field; known: {', '.join(FIELDS)}")
        v = v.strip()
        if k in ("seed", "replicate") and not re.fullmatch(r"[+-]?[0-9]{1,18}", v):
            raise _err(shown, f"[constants] {k} = '{v}': must be a whole number")
        if k in ("solver", "instance", "group") and not v:
            raise _err(shown, f"[constants] {k} is empty; every run needs a {k}")
        if k == "replicate" and not -REPLICATE_SPAN <= int(v) < REPLICATE_SPAN:
            raise _err(shown, f"[constants] {k} = '{v}' is out of range; a replicate is a whole number "
                              f"from {-REPLICATE_SPAN} to {REPLICATE_SPAN - 1}")
        if k != "params" and len(v) > NAME_LIMIT:
            raise _err(shown, f"[constants] {k} is {len(v)} characters long; names may have at most {NAME_LIMIT}")
        if k not in ("params", "seed", "replicate", "status", "finished_at"):
            _plain_name(v, f"[constants] {k}", shown)
        lay.constants[k] = v
    for word, status in _strings(_table(doc, "status", shown), "status", shown).items():
        if status not in STATUSES:
            raise _err(shown, f"[status] {word} = '{status}': must be one of {', '.join(STATUSES)}")
        lay.status[word.strip().lower()] = status
    grp = _table(doc, "group", shown)
    if grp:
        pattern = grp.get("pattern")
        if not isinstance(pattern, str) or set(grp) - {"pattern"}:
            raise _err(shown, "[group] takes one key, pattern = a regular expression with a named group (?P<group>...)")
        try:
            lay.group_pattern = re.compile(pattern)
        except re.error as exc:
            raise _err(shown, f"[group] pattern does not compile: {exc}") from None
        if "group" not in lay.group_pattern.groupindex:
            raise _err(shown, "[group] pattern needs a named group (?P<group>...)")
        extra = set(lay.group_pattern.groupindex) - {"family", "group", "instance"}
        if extra:
            raise _err(shown, f"[group] pattern has a named group '{sorted(extra)[0]}'; the names it may use are family, group and instance")
    for name, spec in _table(doc, "metrics", shown).items():
        _plain_name(name, "[metrics]", shown)
        if not isinstance(spec, dict):
            raise _err(shown, f"[metrics.{name}] must be a table with sense and unit")
        extra = set(spec) - {"sense", "unit"}
        if extra:
            raise _err(shown, f"[metrics.{name}] unknown key '{sorted(extra)[0]}' (known: sense, unit)")
        sense = str(spec.get("sense", "min")).lower()
        if sense not in ("min", "max"):
            raise _err(shown, f"[metrics.{name}] sense = '{sense}': must be min or max")
        lay.metrics[name] = MetricSpec(sense=sense, unit=str(spec.get("unit", "")))
    if "status" in lay.constants:
        word = lay.constants["status"].lower()
        if word and word not in lay.status_words():
            raise _err(shown, f"[constants] status = '{lay.constants['status']}' is not a status word; "
                              f"use one of {', '.join(STATUSES)} or map it in [status]")
    lay.missing = _names(doc, "missing", shown)
    lay.ignore = tuple(n.lower() for n in _names(doc, "ignore", shown))
    lay.attributes = tuple(n.lower() for n in _names(doc, "attributes", shown))
    return lay
