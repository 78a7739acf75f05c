"""The checks of a file's values, chunk by chunk, and the chunk that comes out of them.

`FileLoad` holds what one file's load learns as it reads (the column mapping, the header, the
rows set aside) and checks each chunk: blank records, the header's names, required fields, then
every value (names, seeds and replicates, status words, times, metrics) by Arrow kernels and
numpy, never a Python loop over good rows. `checked` runs the checks over the reader's chunks
(in the read-ahead thread when there is one: no database work in here). `Rows` is a checked
chunk: names as Arrow text, numbers as numpy, and the chunk summed by cell.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import InputError
from ..store import schema as S
from . import values as V
from .cellsums import reduce_chunk
from .layout import FIELDS, NAME_LIMIT, REPLICATE_SPAN, Layout, control_message, has_control
from .scan import SourceInfo
from .sources import BLOCK_BYTES

DEFAULTS = {"version": "", "build": "", "params": "", "family": "default", "seed": "0",
            "replicate": "0", "status": "ok", "finished_at": "", "host": "", "instance_hash": ""}
NAME_FIELDS = ("solver", "version", "build", "family", "group", "instance", "host", "instance_hash")
TEXT_FIELDS = NAME_FIELDS + ("params",)
SEED_SPAN = 2**63  # runs.seed is a signed 64-bit integer


@dataclass
class Rows:
    """Checked runs of one chunk: names as Arrow text (or one str for every row), numbers as numpy."""

    lines: np.ndarray
    src: np.ndarray  # row positions in the source chunk
    names: dict[str, pa.Array | str]
    seed: np.ndarray
    replicate: np.ndarray
    status: np.ndarray
    finished: np.ndarray
    has_finished: np.ndarray
    metrics: dict[str, np.ndarray]
    keys: dict[str, tuple[np.ndarray, list[tuple]]] = field(default_factory=dict)
    cells: object = None  # the chunk summed by cell (cellsums.Reduced), keyed by the codes above

    def __len__(self) -> int:
        return len(self.lines)

    def take(self, keep: np.ndarray) -> "Rows":
        idx = pa.array(np.flatnonzero(keep))
        return Rows(
            self.lines[keep], self.src[keep],
            {k: v if isinstance(v, str) else v.take(idx) for k, v in self.names.items()},
            self.seed[keep], self.replicate[keep], self.status[keep], self.finished[keep],
            self.has_finished[keep], {k: v[keep] for k, v in self.metrics.items()},
        )

    def factorize(self) -> None:
        """Codes per row and the distinct keys for solvers, instances and hosts (no database)."""
        m = len(self)
        for what, cols in (("solver", ("solver", "version", "build", "params")),
                           ("instance", ("family", "group", "instance", "instance_hash")), ("host", ("host",))):
            self.keys[what] = V.factorize([self.names[f] for f in cols], m)
        if m:
            codes = np.stack([self.keys[w][0].astype(np.int64) for w in ("solver", "instance", "host")], axis=1)
            self.cells = reduce_chunk(codes, np.arange(m, dtype=np.int64), self.status, self.metrics)

    def name(self, f: str, j: int) -> str:
        v = self.names[f]
        return v if isinstance(v, str) else v[j].as_py()

    def describe(self, j: int) -> str:
        solver, version = self.name("solver", j), self.name("version", j)
        who = f"{solver}@{version}" if version else solver
        return f"{who}, instance {self.name('instance', j)}, seed {self.seed[j]}, replicate {self.replicate[j]}"

    def preview(self, k: int = 5) -> list[dict]:
        out = []
        for j in range(min(k, len(self))):
            rec = {f: self.name(f, j) for f in ("solver", "version", "family", "group", "instance")}
            rec.update(seed=int(self.seed[j]), replicate=int(self.replicate[j]),
                       status=S.STATUS_NAMES[int(self.status[j])],
                       finished_at=time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(int(self.finished[j])))
                       if self.has_finished[j] else "",
                       host=self.name("host", j))
            for m, vals in self.metrics.items():
                v = float(vals[j])
                rec[m] = None if np.isnan(v) else v
            out.append(rec)
        return out


def _status_table(words: dict[str, str]) -> tuple[pa.Array, np.ndarray]:
    keys = sorted(words)
    return pa.array(keys, type=pa.string()), np.array([S.STATUS_CODES[words[k]] for k in keys], dtype=np.int16)


class FileLoad:
    """One file's load as it reads: what it has learnt of the file, and the checks of each chunk."""

    def __init__(self, info: SourceInfo, layout: Layout, skip_bad: bool, block_bytes: int = BLOCK_BYTES):
        self.info, self.layout, self.skip_bad = info, layout, skip_bad
        self.block_bytes = block_bytes  # the CSV reader's block (larger for a file with long records)
        self.replaces: int | None = None  # the import this load replaces (--again)
        # that import and those it replaced in turn: their retracted runs hold no keys for this
        # load, whose runs go in beside them (set inside the write transaction)
        self.chain: tuple[int, ...] = ()
        self.name = info.name
        self.mapping: dict[str, str] = {}  # source column -> target (field or metric)
        self.ignored: list[str] = []
        self.metric_cols: dict[str, str] = {}  # source column -> metric name
        self.undecided: set[str] = set()
        self.header: list[str] | None = None
        self.header_line = 1
        self.rejects: list[dict] = []
        self.ragged = 0
        self.warnings: list[str] = []
        self.status_words = layout.status_words()
        self.status_keys, self.status_codes = _status_table(self.status_words)
        self.missing_words = tuple(layout.missing)
        self.known_metrics: set[str] = set()  # metrics the warehouse holds already: no guessing for them
        self.guessed_text: list[str] = []  # columns left out because their values were mostly not numbers

    @property
    def unit(self) -> str:
        return "row" if self.info.fmt == "parquet" else "line"

    def where(self, line: int, fieldname: str | None = None) -> str:
        place = f"{self.name} {self.unit} {line}"
        return f"{place}, field {fieldname}" if fieldname else place

    def advice(self, text: str) -> str:
        return "" if self.skip_bad else text

    # column mapping
    def map_columns(self, columns: list[str], chunk: pa.Table) -> None:
        lay = self.layout
        for col in columns:
            if col in self.mapping or col in self.ignored or col in self.undecided:
                continue
            low = col.strip().lower()
            if low in lay.columns:
                target = lay.columns[low]
            elif low in FIELDS:
                target = low
            elif low in lay.ignore or low in lay.attributes:
                self.ignored.append(col)
                continue
            else:
                target = col.strip()
            if target in FIELDS:
                clash = [c for c, t in self.mapping.items() if t == target]
                if clash:
                    raise InputError(f"{self._header_place()}columns '{clash[0]}' and '{col}' both give field {target}; keep one or rename it in a layout")
                self.mapping[col] = target
            elif target in lay.metrics or low in lay.columns or target in self.known_metrics:
                self._metric(col, target)
            else:
                self.undecided.add(col)
        for col in [c for c in chunk.column_names if c in self.undecided]:  # in the file's order
            _, empty, notnum, _, _ = V.numbers(chunk.column(col), self.missing_words)
            filled = ~empty
            if not filled.any():
                continue
            self.undecided.discard(col)
            if (~notnum[filled]).mean() >= 0.5:
                self._metric(col, col.strip())
            else:
                self.ignored.append(col)
                self.guessed_text.append(col)

    def _metric(self, col: str, metric: str) -> None:
        if has_control(metric):
            raise InputError(f"{self._header_place()}metric name {control_message(metric)}; rename the column "
                             "or map it in a layout's [columns]")
        clash = [c for c, m in self.metric_cols.items() if m == metric]
        if clash:
            raise InputError(f"{self._header_place()}columns '{clash[0]}' and '{col}' both give metric {metric}; keep one or rename it in a layout")
        self.mapping[col] = metric
        self.metric_cols[col] = metric

    def _header_place(self) -> str:
        return f"{self.name} line {self.header_line}: " if self.info.delimited else f"{self.name}: "

    def check_header(self, columns: list[str]) -> None:
        lowered: dict[str, str] = {}
        for i, c in enumerate(columns, start=1):
            low = c.strip().lower()
            if not low:
                raise InputError(f"{self._header_place()}column {i} has no name; name every column in the header")
            if low in lowered:
                raise InputError(f"{self._header_place()}column '{c}' appears twice (also as '{lowered[low]}'); column names must be unique")
            lowered[low] = c

    def check_required(self) -> None:
        have = set(self.mapping.values()) | set(self.layout.constants)
        found = ", ".join(self.header) if self.header else ", ".join(self.mapping) or "none"
        for need in ("solver", "instance"):
            if need not in have:
                raise InputError(
                    f"{self._header_place()}missing required column '{need}' (columns: {found}); "
                    "add it, or map a column to it in a layout's [columns]"
                )
        if "group" not in have and self.layout.group_pattern is None:
            raise InputError(
                f"{self._header_place()}missing required column 'group' (columns: {found}); add it, or derive "
                "it from the instance name with a [group] pattern in a layout"
            )

    # one chunk
    def drop_blank(self, raw: pa.Table, lines: np.ndarray) -> tuple[pa.Table, np.ndarray]:
        """Leave out records whose every field is empty: blank lines, or ',,,' rows from a spreadsheet."""
        if not self.info.delimited or raw.num_rows == 0:
            return raw, lines
        blank = None
        for col in raw.columns:
            empty = V.mask(pc.equal(pc.binary_length(V.combined(col)), 0))
            blank = empty if blank is None else blank & empty
            if not blank.any():
                return raw, lines
        keep = ~blank
        return raw.filter(pa.array(keep)), lines[keep]

    def normalize(self, raw: pa.Table, lines: np.ndarray) -> Rows:
        lay = self.layout
        n = raw.num_rows
        reason = np.full(n, None, dtype=object)
        fieldof = np.full(n, None, dtype=object)
        flagged = np.zeros(n, dtype=bool)

        def flag(bad: np.ndarray, fieldname: str, texts) -> None:
            bad = bad & ~flagged  # a row keeps its first reason
            if bad.any():
                idx = np.flatnonzero(bad)
                if callable(texts):
                    texts = texts(idx)
                reason[idx] = texts if isinstance(texts, str) else np.asarray(texts, dtype=object)
                fieldof[idx] = fieldname
                flagged[idx] = True

        def shown(text: pa.Array, idx: np.ndarray) -> list[str]:
            return [repr(v)[:80] for v in text.take(pa.array(idx)).to_pylist()]

        by_target = {t: c for c, t in self.mapping.items() if t in FIELDS}
        # a line that repeats the header
        if self.header and len(self.header) > 1:
            first, second = self.header[0], self.header[1]
            rep = V.mask(pc.and_(pc.equal(V.as_text(raw.column(first)), first.strip()),
                                 pc.equal(V.as_text(raw.column(second)), second.strip())))
            flag(rep, first, "this line repeats the header")

        names: dict[str, pa.Array | str] = {}
        for f in TEXT_FIELDS:
            if f in lay.constants:
                names[f] = lay.constants[f].strip()
            elif f in by_target:
                names[f] = V.as_text(raw.column(by_target[f]))
            else:
                names[f] = "" if f == "group" else DEFAULTS.get(f, "")
        if lay.group_pattern is not None:
            self._apply_pattern(names, by_target, n, flag)
        for f in ("solver", "instance", "group"):
            v = names[f]
            if not isinstance(v, str):
                flag(V.mask(pc.equal(v, "")), f, f"is empty; every run needs a {f}")
        fam = names["family"]
        if isinstance(fam, str):
            names["family"] = fam or "default"
        else:
            names["family"] = pc.if_else(pc.equal(fam, ""), pa.scalar("default"), fam)
        for f in NAME_FIELDS:
            v = names[f]
            if isinstance(v, str):
                continue
            if V.has_controls(v):  # (the bytes first: the full test is for the rare column that needs it)
                flag(V.controls(v), f, lambda i, t=v: [control_message(x) for x in t.take(pa.array(i)).to_pylist()])
            if len(v) == 0 or V.byte_lengths(v).max() <= NAME_LIMIT:  # no more characters than bytes
                continue
            lengths = pc.utf8_length(v).to_numpy(zero_copy_only=False)
            long_ = lengths > NAME_LIMIT
            if long_.any():
                flag(long_, f, lambda i, L=lengths: [f"is {L[j]} characters long; names may have at most {NAME_LIMIT}" for j in i])
        # seed and replicate: whole numbers
        whole = {}
        for f in ("seed", "replicate"):
            if f in by_target:
                vals, bad, text, big = V.wholes(raw.column(by_target[f]))
                span = SEED_SPAN if f == "seed" else REPLICATE_SPAN
                if f == "replicate":  # a 32-bit column on PostgreSQL: the same bound on both databases
                    wide = ~bad & ((vals < -span) | (vals >= span))
                    big, bad = big | wide, bad | wide
                flag(big, f, lambda i, t=text, f=f, span=span: [
                    f"{v} is out of range; a {f} is a whole number from {-span} to {span - 1}" for v in shown(t, i)])
                flag(bad, f, lambda i, t=text: [f"{v} is not a whole number" for v in shown(t, i)])
                whole[f] = vals
            else:
                whole[f] = np.full(n, int(lay.constants.get(f, DEFAULTS[f]) or 0), dtype=np.int64)
        # status words
        if "status" in by_target:
            # the few distinct words are lowered and looked up, not every row's
            enc = V.as_text(raw.column(by_target["status"])).dictionary_encode()
            distinct = pc.utf8_lower(enc.dictionary)
            distinct = pc.if_else(pc.equal(distinct, ""), pa.scalar("ok"), distinct)
            pos = pc.index_in(distinct, value_set=self.status_keys).take(enc.indices)
            unknown = V.mask(pos.is_null())
            if unknown.any():
                words = distinct.take(enc.indices)
                known = ", ".join(sorted(set(self.status_words)))
                flag(unknown, "status", lambda i, t=words: [
                    f"unknown status {v} (known: {known}); map more words to ok, timeout, failed or infeasible "
                    "in a layout's [status] section" for v in shown(t, i)])
            status = self.status_codes[pc.fill_null(pos, 0).to_numpy(zero_copy_only=False)]
        else:
            word = lay.constants.get("status", "ok").strip().lower() or "ok"
            if word not in self.status_words:
                raise InputError(f"layout {lay.source}: [constants] status = '{word}' is not a known status word")
            status = np.full(n, S.STATUS_CODES[self.status_words[word]], dtype=np.int16)
        # finished_at: ISO 8601, times without a zone read as UTC
        if "finished_at" in by_target or lay.constants.get("finished_at"):
            col = raw.column(by_target["finished_at"]) if "finished_at" in by_target else \
                pa.array([lay.constants["finished_at"]] * n, type=pa.string())
            finished, has_fin, bad, text = V.instants(col)
            flag(bad, "finished_at", lambda i, t=text: [
                f"{v} is not an ISO 8601 date and time (e.g. 2026-11-09T14:05:00Z)" for v in shown(t, i)])
        else:
            finished, has_fin = np.zeros(n, dtype=np.int64), np.zeros(n, dtype=bool)
        # metrics
        ok = status == S.STATUS_CODES["ok"]
        metrics: dict[str, np.ndarray] = {}
        for col, metric in self.metric_cols.items():
            if col not in raw.column_names:
                vals = np.full(n, np.nan)
                empty, notnum, nonfinite = np.ones(n, dtype=bool), np.zeros(n, dtype=bool), np.zeros(n, dtype=bool)
                text = None
            else:
                vals, empty, notnum, nonfinite, text = V.numbers(raw.column(col), self.missing_words)
            hint = self.advice("; map it in a layout ([missing] words) or use --skip-bad")
            flag(notnum, metric, lambda i, t=text: [f"{v} is not a number{hint}" for v in shown(t, i)])
            flag(nonfinite, metric, lambda i, t=text: [f"{v} is not a finite number" for v in shown(t, i)])
            flag(empty & ok, metric, "is empty on an ok run; give the value, or give the run a failure status")
            metrics[metric] = np.where(np.isfinite(vals), vals, np.nan)
        rows = Rows(lines, np.arange(n), names, whole["seed"], whole["replicate"], status, finished, has_fin, metrics)
        bad_rows = flagged
        if bad_rows.any():
            if not self.skip_bad:
                j = int(np.flatnonzero(bad_rows)[np.argmin(lines[bad_rows])])
                raise InputError(f"{self.where(int(lines[j]), fieldof[j])}: {reason[j]}")
            idx = np.flatnonzero(bad_rows)
            records = raw.take(pa.array(idx)).to_pylist()
            for j, rec in zip(idx.tolist(), records):
                rec = {k: ("" if v is None else v) for k, v in rec.items()}
                rec["line"] = int(lines[j])
                rec["reason"] = f"field {fieldof[j]}: {reason[j]}"
                self.rejects.append(rec)
            rows = rows.take(~bad_rows)
        return rows

    def _apply_pattern(self, names: dict, by_target: dict, n: int, flag) -> None:
        """Group (and family, and the instance's own name) from the instance name, by the layout's pattern."""
        pattern = self.layout.group_pattern
        group, inst = names["group"], names["instance"]
        if isinstance(group, str) and group:
            return
        need = np.ones(n, dtype=bool) if isinstance(group, str) else V.mask(pc.equal(group, ""))
        if not need.any():
            return
        inst_arr = inst if not isinstance(inst, str) else pa.array([inst] * n, type=pa.string())
        enc = inst_arr.dictionary_encode()
        found = [pattern.search(u) for u in enc.dictionary.to_pylist()]  # distinct names only
        idx = enc.indices

        def part(key: str, fallback: list[str]) -> pa.Array:
            vals = [(m.group(key) if m is not None and m.group(key) is not None else fb) for m, fb in zip(found, fallback)]
            return pa.array(vals, type=pa.string()).take(idx)

        uniq = enc.dictionary.to_pylist()
        matched = np.array([m is not None for m in found], dtype=bool)[idx.to_numpy(zero_copy_only=False)]
        flag(need & ~matched, "instance", lambda i: [f"{v!r} does not match the layout's [group] pattern"
                                                     for v in inst_arr.take(pa.array(i)).to_pylist()])
        use = pa.array(need & matched)
        base_group = group if not isinstance(group, str) else pa.array([group] * n, type=pa.string())
        names["group"] = pc.if_else(use, part("group", [""] * len(uniq)), base_group)
        groups = pattern.groupindex
        if "family" in groups and "family" not in by_target and "family" not in self.layout.constants:
            fam = names["family"]
            base_fam = fam if not isinstance(fam, str) else pa.array([fam] * n, type=pa.string())
            names["family"] = pc.if_else(use, part("family", ["default"] * len(uniq)), base_fam)
        if "instance" in groups:
            names["instance"] = pc.if_else(use, part("instance", uniq), inst_arr)

    def bad_row(self, line: int, text_: str, expected: int, actual: int) -> InputError | None:
        """Told by the CSV reader of a row with the wrong number of fields."""
        what = "too many" if actual > expected else "too few"
        msg = f"has {actual} fields where the header has {expected} ({what})"
        if not self.skip_bad:
            return InputError(f"{self.name} line {line}: {msg}; check the quoting and the delimiter on that line")
        self.ragged += 1
        self.rejects.append({"line": line, "raw": text_, "reason": msg})
        return None


def checked(fl: FileLoad, chunks):
    """Source chunks -> (source table, checked rows, records read). No database work in here."""
    first = True
    for raw, lines in chunks:
        raw, lines = fl.drop_blank(raw, lines)
        if raw.num_rows == 0:
            continue
        if first and not fl.info.delimited:
            fl.check_header(raw.column_names)
        fl.map_columns(raw.column_names, raw)
        if first:
            fl.check_required()
            first = False
        rows = fl.normalize(raw, lines)
        rows.factorize()
        # the source table is kept only where a rejected duplicate would be written out with it
        yield (raw if fl.skip_bad else None), rows, raw.num_rows
