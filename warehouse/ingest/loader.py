"""Loading result files into the warehouse: one file, one transaction, all or nothing.

The hot path stays vectorized: each chunk's names are factorized once, only the distinct names
touch the dimension tables, and runs are written with executemany (SQLite) or COPY (PostgreSQL).
"""
from __future__ import annotations

import json
import math
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
from sqlalchemy import func, insert, select, text, update
from sqlalchemy.exc import IntegrityError, OperationalError

from .. import __version__
from ..errors import InputError, StorageError
from ..store import schema as S
from ..store.connect import Warehouse
from .layout import FIELDS, NAME_LIMIT, Layout, read_layout
from .sources import CsvLineMap, SourceInfo, first_pass, read_delimited, read_header, read_jsonl, read_parquet

DEFAULTS = {"version": "", "build": "", "params": "", "family": "default", "seed": "0",
            "replicate": "0", "status": "ok", "finished_at": "", "host": "", "instance_hash": ""}
NAME_FIELDS = ("solver", "version", "build", "family", "group", "instance", "host", "instance_hash")
INT64_MAX = 2**63 - 1


@dataclass
class FileReport:
    file: str
    status: str  # loaded | duplicate | refused | checked (dry run)
    rows_read: int = 0
    rows_loaded: int = 0
    rows_rejected: int = 0
    rows_skipped: int = 0
    campaign: str = ""
    import_id: int | None = None
    message: str = ""
    warnings: list[str] = field(default_factory=list)
    rejects_file: str | None = None
    mapping: dict[str, str] = field(default_factory=dict)
    metrics: dict[str, str] = field(default_factory=dict)
    ignored: list[str] = field(default_factory=list)
    preview: list[dict] = field(default_factory=list)

    def to_dict(self) -> dict:
        d = {"file": self.file, "status": self.status, "rows_read": self.rows_read,
             "rows_loaded": self.rows_loaded, "rows_rejected": self.rows_rejected,
             "rows_skipped": self.rows_skipped, "campaign": self.campaign,
             "import_id": self.import_id, "message": self.message, "warnings": self.warnings}
        if self.rejects_file:
            d["rejects_file"] = self.rejects_file
        if self.status == "checked":
            d.update(mapping=self.mapping, metrics=self.metrics, ignored=self.ignored, preview=self.preview)
        return d


class _Refused(Exception):
    """Internal: roll the transaction back (dry run) without it being an error."""


# --- dimension tables --------------------------------------------------------------------------

class Dimensions:
    """Name -> id caches for the small tables, filled from the warehouse and kept in step."""

    def __init__(self, conn):
        self.conn = conn
        self.solvers = {(r.name, r.version, r.build, r.params): r.id for r in conn.execute(select(S.solvers))}
        self.families = {r.name: r.id for r in conn.execute(select(S.families))}
        self.groups = {(r.family_id, r.name): r.id for r in conn.execute(select(S.groups))}
        self.instances: dict[tuple, int] = {}
        self.hashes: dict[tuple, set] = {}
        for r in conn.execute(select(S.instances.c.id, S.instances.c.group_id, S.instances.c.name, S.instances.c.content_hash)):
            self.instances[(r.group_id, r.name, r.content_hash)] = r.id
            self.hashes.setdefault((r.group_id, r.name), set()).add(r.content_hash)
        self.hosts = {r.name: r.id for r in conn.execute(select(S.hosts))}
        self.metrics = {r.name: (r.id, r.slot, r.sense, r.unit) for r in conn.execute(select(S.metrics))}

    def _add(self, table, **values) -> int:
        return self.conn.execute(insert(table).values(**values)).inserted_primary_key[0]

    def solver_ids(self, keys: list[tuple]) -> list[int]:
        out = []
        for k in keys:
            sid = self.solvers.get(k)
            if sid is None:
                sid = self.solvers[k] = self._add(S.solvers, name=k[0], version=k[1], build=k[2], params=k[3])
            out.append(sid)
        return out

    def instance_ids(self, keys: list[tuple], warnings: list[str]) -> list[int]:
        out = []
        for family, group, inst, chash in keys:
            fid = self.families.get(family)
            if fid is None:
                fid = self.families[family] = self._add(S.families, name=family)
            gid = self.groups.get((fid, group))
            if gid is None:
                gid = self.groups[(fid, group)] = self._add(S.groups, family_id=fid, name=group)
            iid = self.instances.get((gid, inst, chash))
            if iid is None:
                known = self.hashes.setdefault((gid, inst), set())
                if known:
                    warnings.append(
                        f"instance {family}/{group}/{inst} has content hash '{chash or '(none)'}' here but "
                        f"'{sorted(known)[0] or '(none)'}' in the warehouse: kept as a different instance"
                    )
                iid = self.instances[(gid, inst, chash)] = self._add(S.instances, group_id=gid, name=inst, content_hash=chash)
                known.add(chash)
            out.append(iid)
        return out

    def host_ids(self, names: list[str]) -> list[int | None]:
        out = []
        for h in names:
            if not h:
                out.append(None)
                continue
            hid = self.hosts.get(h)
            if hid is None:
                hid = self.hosts[h] = self._add(S.hosts, name=h)
            out.append(hid)
        return out

    def metric(self, name: str, sense: str | None, unit: str, shown: str) -> tuple[int, int, str]:
        found = self.metrics.get(name)
        if found is not None:
            mid, slot, old_sense, _ = found
            if sense is not None and sense != old_sense:
                raise InputError(
                    f"{shown}: the layout says metric '{name}' is {sense} but the warehouse holds it as "
                    f"{old_sense}; a metric keeps one sense"
                )
            return mid, slot, old_sense
        used = {v[1] for v in self.metrics.values()}
        free = [s for s in range(1, S.METRIC_SLOTS + 1) if s not in used]
        if not free:
            raise StorageError(f"{shown}: metric '{name}' would be the warehouse's {S.METRIC_SLOTS + 1}th; it holds at most {S.METRIC_SLOTS}")
        sense = sense or "min"
        mid = self._add(S.metrics, name=name, unit=unit, sense=sense, slot=free[0])
        self.metrics[name] = (mid, free[0], sense, unit)
        return mid, free[0], sense


def _factorize(frame: pd.DataFrame, cols: list[str]) -> tuple[np.ndarray, list[tuple]]:
    """Codes per row and the distinct key tuples, without a Python loop over the rows."""
    if len(cols) == 1:
        codes, uniq = pd.factorize(frame[cols[0]], sort=False)
        return codes, [(u,) for u in uniq]
    key = frame[cols[0]].astype(str)
    for c in cols[1:]:
        key = key + "\x1f" + frame[c].astype(str)
    codes, uniq = pd.factorize(key, sort=False)
    return codes, [tuple(u.split("\x1f")) for u in uniq]


# --- per-file state ----------------------------------------------------------------------------

class _FileLoad:
    def __init__(self, wh: Warehouse, info: SourceInfo, layout: Layout, skip_bad: bool):
        self.wh, self.info, self.layout, self.skip_bad = wh, info, layout, skip_bad
        self.name = info.name
        self.mapping: dict[str, str] = {}  # source column -> target (field or metric)
        self.ignored: list[str] = []
        self.metric_cols: dict[str, str] = {}  # source column -> metric name
        self.undecided: set[str] = set()
        self.header: list[str] | None = None
        self.line_map: CsvLineMap | None = None
        self.rejects: list[dict] = []
        self.warnings: list[str] = []
        self.status_words = layout.status_words()
        self.missing_words = set(layout.missing)

    # message helpers
    def line(self, approx: int) -> int:
        return self.line_map.line(approx) if self.line_map is not None else approx

    def where(self, approx: int, fieldname: str | None = None) -> str:
        unit = "row" if self.info.fmt == "parquet" else "line"
        place = f"{self.name} {unit} {self.line(approx)}"
        return f"{place}, field {fieldname}" if fieldname else place

    # column mapping
    def map_columns(self, columns: list[str], chunk: pd.DataFrame) -> None:
        lay = self.layout
        for col in columns:
            if col in self.mapping or col in self.ignored or col == "_line":
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
                    raise InputError(f"{self.name}: columns '{clash[0]}' and '{col}' both give field {target}; keep one or rename it in a layout")
                self.mapping[col] = target
            elif target in lay.metrics or low in lay.columns:
                self.mapping[col] = target
                self.metric_cols[col] = target
            else:
                self.undecided.add(col)
        for col in list(self.undecided):
            if col not in chunk.columns:
                continue
            values = chunk[col]
            values = values[(values != "") & ~values.isin(self.missing_words)]
            if values.empty:
                continue
            numeric = pd.to_numeric(values, errors="coerce").notna().mean()
            self.undecided.discard(col)
            if numeric >= 0.5:
                self.mapping[col] = col.strip()
                self.metric_cols[col] = col.strip()
            else:
                self.ignored.append(col)

    def check_header(self, columns: list[str]) -> None:
        lowered: dict[str, str] = {}
        for c in columns:
            if c == "_line":
                continue
            low = c.strip().lower()
            if not low:
                raise InputError(f"{self.name} line 1: a column has no name; name every column in the header")
            if low in lowered:
                raise InputError(f"{self.name} line 1: column '{c}' appears twice (also as '{lowered[low]}'); column names must be unique")
            lowered[low] = c

    def check_required(self) -> None:
        have = set(self.mapping.values()) | set(self.layout.constants)
        for need in ("solver", "instance"):
            if need not in have:
                raise InputError(
                    f"{self.name}: missing required column '{need}' (found: {', '.join(self.header or [])}); "
                    "add it, or map a column to it in a layout's [columns]"
                )
        if "group" not in have and self.layout.group_pattern is None:
            raise InputError(
                f"{self.name}: missing required column 'group'; add it, or derive it from the instance "
                "name with a [group] pattern in a layout"
            )

    # one chunk
    def normalize(self, raw: pd.DataFrame) -> pd.DataFrame:
        lay = self.layout
        n = len(raw)
        out = pd.DataFrame({"_line": raw["_line"].to_numpy()})
        reason = np.full(n, None, dtype=object)
        fieldof = np.full(n, None, dtype=object)

        def flag(mask, fieldname: str, texts) -> None:
            mask = np.asarray(mask, dtype=bool) & (reason == None)  # noqa: E711
            if mask.any():
                idx = np.flatnonzero(mask)
                if callable(texts):
                    texts = texts(idx)
                reason[idx] = texts if isinstance(texts, str) else np.asarray(texts, dtype=object)
                fieldof[idx] = fieldname

        # a line that repeats the header
        if self.header and len(self.header) > 1:
            first, second = self.header[0], self.header[1]
            if first in raw.columns and second in raw.columns:
                rep = (raw[first].str.strip() == first) & (raw[second].str.strip() == second)
                flag(rep.to_numpy(), first, "this line repeats the header")

        by_target = {t: c for c, t in self.mapping.items() if t in FIELDS}
        for f in FIELDS:
            if f in lay.constants:
                out[f] = lay.constants[f]
            elif f in by_target:
                out[f] = raw[by_target[f]].str.strip().to_numpy()
            else:
                out[f] = DEFAULTS.get(f, "")
        if "group" not in by_target and "group" not in lay.constants:
            out["group"] = ""
        if lay.group_pattern is not None:
            need = out["group"] == ""
            if need.any():
                ext = out.loc[need, "instance"].str.extract(lay.group_pattern)
                if "group" in ext:
                    nomatch = ext["group"].isna().to_numpy()
                    vals = ext["group"].fillna("")
                    out.loc[need, "group"] = vals.to_numpy()
                    if "family" in ext and "family" not in by_target and "family" not in lay.constants:
                        out.loc[need, "family"] = ext["family"].fillna("default").to_numpy()
                    if "instance" in ext:  # the pattern may also cut the instance's own name out
                        out.loc[need, "instance"] = ext["instance"].where(ext["instance"].notna(), out.loc[need, "instance"]).to_numpy()
                    bad = np.zeros(n, dtype=bool)
                    bad[np.flatnonzero(need.to_numpy())[nomatch]] = True
                    flag(bad, "instance", lambda i: [f"'{v}' does not match the layout's [group] pattern" for v in out["instance"].to_numpy()[i]])
        for f in ("solver", "instance", "group"):
            flag((out[f] == "").to_numpy(), f, f"is empty; every run needs a {f}")
        out.loc[out["family"] == "", "family"] = "default"
        for f in NAME_FIELDS:
            lengths = out[f].str.len().to_numpy()
            if (lengths > NAME_LIMIT).any():
                flag(lengths > NAME_LIMIT, f, lambda i, L=lengths: [f"is {L[j]} characters long; names may have at most {NAME_LIMIT}" for j in i])
        # seed and replicate: whole numbers
        for f in ("seed", "replicate"):
            s = out[f].replace("", "0")
            num = pd.to_numeric(s, errors="coerce")
            arr = num.to_numpy(dtype=float)
            bad = ~np.isfinite(arr) | (np.floor(arr) != arr) | (np.abs(arr) > 9.0e18)
            flag(bad, f, lambda i, v=s.to_numpy(): [f"'{v[j]}' is not a whole number" for j in i])
            good = np.where(bad, 0, arr)
            # exact integers: parse the text where the float path might round
            ints = pd.to_numeric(s.where(~bad, "0"), errors="coerce", downcast=None)
            out[f] = ints.astype("int64") if ints.dtype.kind in "iu" else good.astype("int64")
        # status words
        words = out["status"].str.lower()
        words = words.where(words != "", "ok")
        mapped = words.map(self.status_words)
        unknown = mapped.isna().to_numpy()
        if unknown.any():
            known = ", ".join(sorted(set(self.status_words)))
            flag(unknown, "status", lambda i, v=out["status"].to_numpy(): [
                f"unknown status '{v[j]}' (known: {known}); map it in a layout's [status] section" for j in i])
        out["status_code"] = mapped.map(S.STATUS_CODES).fillna(0).astype("int16").to_numpy()
        # finished_at: ISO 8601, times without a zone read as UTC
        fin = out["finished_at"]
        has = (fin != "").to_numpy()
        epoch = np.full(n, np.nan)
        if has.any():
            parsed = pd.to_datetime(fin[has], format="ISO8601", utc=True, errors="coerce")
            bad = np.zeros(n, dtype=bool)
            bad[np.flatnonzero(has)] = parsed.isna().to_numpy()
            flag(bad, "finished_at", lambda i, v=fin.to_numpy(): [f"'{v[j]}' is not an ISO 8601 date and time" for j in i])
            secs = (parsed - pd.Timestamp("1970-01-01", tz="UTC")) // pd.Timedelta(seconds=1)
            epoch[np.flatnonzero(has)] = secs.astype("float64").to_numpy()
        out["finished_epoch"] = epoch
        # metrics
        ok = out["status_code"].to_numpy() == 0
        for col, metric in self.metric_cols.items():
            if col not in raw.columns:
                vals = pd.Series([""] * n)
            else:
                vals = raw[col].str.strip()
            if self.missing_words:
                vals = vals.where(~vals.isin(self.missing_words), "")
            empty = (vals == "").to_numpy()
            num = pd.to_numeric(vals.where(~empty, None), errors="coerce").to_numpy(dtype=float)
            notnum = ~empty & np.isnan(num)
            flag(notnum, metric, lambda i, v=vals.to_numpy(): [
                f"'{v[j]}' is not a number; map it in a layout ([missing] words) or use --skip-bad" for j in i])
            infinite = ~empty & np.isinf(num)
            flag(infinite, metric, lambda i, v=vals.to_numpy(): [f"'{v[j]}' is not a finite number" for j in i])
            flag(empty & ok, metric, "is empty on an ok run; give the value, or give the run a failure status")
            out["m:" + metric] = np.where(np.isfinite(num), num, np.nan)
        bad_rows = reason != None  # noqa: E711
        if bad_rows.any():
            lines = out["_line"].to_numpy()
            if not self.skip_bad:
                j = int(np.flatnonzero(bad_rows)[np.argmin(lines[bad_rows])])
                raise InputError(f"{self.where(int(lines[j]), fieldof[j])}: {reason[j]}")
            raw_bad = raw.loc[bad_rows]
            for (k, row), why, fld in zip(raw_bad.iterrows(), reason[bad_rows], fieldof[bad_rows]):
                rec = {c: row[c] for c in raw.columns if c != "_line"}
                rec["line"] = self.line(int(row["_line"]))
                rec["reason"] = f"field {fld}: {why}"
                self.rejects.append(rec)
            out = out.loc[~bad_rows].reset_index(drop=True)
        return out

    def bad_row(self, text_: str, expected: int, actual: int) -> None:
        """Called by the CSV reader for a row with the wrong number of fields."""
        line = self._find_line(text_)
        msg = f"has {actual} fields where the header has {expected}"
        if not self.skip_bad:
            raise InputError(f"{self.name} line {line}: {msg}")
        self.rejects.append({"line": line, "raw": text_, "reason": msg})

    def _find_line(self, text_: str) -> int | str:
        from .sources import open_text

        first = text_.split("\n")[0].rstrip("\r")
        with open_text(self.info) as fh:
            for n, ln in enumerate(fh, start=1):
                if ln.rstrip("\r\n") == first:
                    return n
        return "?"


# --- writing -----------------------------------------------------------------------------------

RUN_COLS = ["id", "campaign_id", "import_id", "solver_id", "instance_id", "seed", "replicate",
            "status", "finished_at", "host_id", "source_line"]


def _nullable(values: np.ndarray, as_int: bool) -> list:
    if as_int:
        return [None if math.isnan(v) else int(v) for v in values.tolist()]
    return [None if math.isnan(v) else v for v in values.tolist()]


class _Writer:
    """Writes run rows; the dialect decides executemany (SQLite) or COPY (PostgreSQL)."""

    def __init__(self, conn, dialect: str, slots: list[int]):
        self.conn, self.dialect = conn, dialect
        self.cols = RUN_COLS + [f"v{s}" for s in slots]
        self.raw = conn.connection.driver_connection
        if dialect == "postgresql":
            self.conn.exec_driver_sql(
                "CREATE TEMP TABLE IF NOT EXISTS blockyard_stage (LIKE runs INCLUDING DEFAULTS) ON COMMIT DROP"
            )

    def write(self, rows: list[tuple]) -> None:
        cols = ", ".join(self.cols)
        if self.dialect == "sqlite":
            marks = ", ".join("?" * len(self.cols))
            self.raw.executemany(f"INSERT OR IGNORE INTO runs ({cols}) VALUES ({marks})", rows)
        else:
            cur = self.raw.cursor()
            cur.execute("TRUNCATE blockyard_stage")
            with cur.copy(f"COPY blockyard_stage ({cols}) FROM STDIN") as cp:
                for r in rows:
                    cp.write_row(r)
            cur.execute(f"INSERT INTO runs ({cols}) SELECT {cols} FROM blockyard_stage ON CONFLICT DO NOTHING")


def _import_report_conflicts(conn, fl: _FileLoad, frame: pd.DataFrame, ids: np.ndarray, campaign_id: int,
                             import_id: int) -> tuple[np.ndarray, int]:
    """After INSERT OR IGNORE: which rows did not go in, and why. Returns (kept mask, skipped)."""
    lo, hi = int(ids[0]), int(ids[-1])
    stored = {r[0] for r in conn.execute(select(S.runs.c.id).where(S.runs.c.id.between(lo, hi)))}
    kept = np.fromiter((int(i) in stored for i in ids), dtype=bool, count=len(ids))
    missing = np.flatnonzero(~kept)
    skipped = 0
    for j in missing:
        r = frame.iloc[j]
        other = conn.execute(
            select(S.runs.c.import_id, S.runs.c.source_line).where(
                S.runs.c.campaign_id == campaign_id, S.runs.c.solver_id == int(r["solver_id"]),
                S.runs.c.instance_id == int(r["instance_id"]), S.runs.c.seed == int(r["seed"]),
                S.runs.c.replicate == int(r["replicate"]))
        ).first()
        line = int(r["_line"])
        if other is not None and other.import_id == import_id:
            what = (f"{r['solver']}@{r['version']}" if r["version"] else r["solver"]) + \
                f", instance {r['instance']}, seed {r['seed']}, replicate {r['replicate']}"
            msg = f"lines {fl.line(other.source_line)} and {fl.line(line)} hold the same run ({what}); a run appears once per campaign"
            if not fl.skip_bad:
                raise InputError(f"{fl.name}: {msg}")
            fl.rejects.append({"line": fl.line(line), "reason": msg})
        else:
            skipped += 1
            if skipped <= 3:
                fl.warnings.append(f"{fl.where(line)}: this run is already in the warehouse (import {other.import_id if other else '?'}); skipped, not overwritten")
    return kept, skipped


def _campaign_id(conn, name: str) -> int:
    found = conn.execute(select(S.campaigns.c.id).where(S.campaigns.c.name == name)).scalar()
    if found is not None:
        return found
    return conn.execute(insert(S.campaigns).values(name=name, created_at=int(time.time()))).inserted_primary_key[0]


def _readers(fl: _FileLoad):
    info = fl.info
    if info.fmt in ("csv", "tsv"):
        fl.header = read_header(info)
        fl.check_header(fl.header)
        fl.line_map = CsvLineMap(info, len(fl.header))
        return read_delimited(info, fl.header, fl.bad_row)
    if info.fmt == "jsonl":
        return read_jsonl(info)
    return read_parquet(info)


def load_file(wh: Warehouse, path: str | Path, campaign: str, layout: Layout | None = None, *,
              skip_bad: bool = False, dry_run: bool = False, rejects: str | Path | None = None,
              progress: Callable[[int, int], None] | None = None) -> FileReport:
    """Load one result file into `campaign`; refuse it whole, with one line saying why, on bad input."""
    layout = layout or Layout()
    shown = str(path)
    p = Path(path)
    info = first_pass(p, shown)
    report = FileReport(file=shown, status="loaded", campaign=campaign)
    with wh.engine.connect() as conn:
        prior = conn.execute(
            select(S.imports.c.id, S.imports.c.loaded_at, S.campaigns.c.name)
            .join(S.campaigns, S.campaigns.c.id == S.imports.c.campaign_id)
            .where(S.imports.c.sha256 == info.sha256)
        ).first()
    if prior is not None:
        when = time.strftime("%Y-%m-%d %H:%M", time.gmtime(prior.loaded_at))
        report.status = "duplicate"
        report.campaign = prior.name
        report.import_id = prior.id
        report.message = f"already loaded into campaign {prior.name} on {when} UTC (import {prior.id}); nothing to do"
        return report
    fl = _FileLoad(wh, info, layout, skip_bad)
    total = max(info.lines - (1 if info.fmt in ("csv", "tsv") else 0), 1)
    try:
        with wh.write() as conn:
            with conn.begin() as trans:
                if wh.dialect == "postgresql":
                    conn.exec_driver_sql("LOCK TABLE runs IN SHARE ROW EXCLUSIVE MODE")
                campaign_id = _campaign_id(conn, campaign)
                import_id = conn.execute(insert(S.imports).values(
                    campaign_id=campaign_id, file_name=p.name, sha256=info.sha256, layout=layout.text,
                    rows_read=0, rows_loaded=0, rows_rejected=0, rows_skipped=0,
                    loaded_at=int(time.time()), tool_version=__version__)).inserted_primary_key[0]
                dims = Dimensions(conn)
                next_id = (conn.execute(select(func.max(S.runs.c.id))).scalar() or 0) + 1
                writer = None
                read = loaded = skipped = 0
                for raw in _readers(fl):
                    if not report.mapping and fl.header is None:
                        fl.check_header(list(raw.columns))
                    fl.map_columns(list(raw.columns), raw)
                    if read == 0:
                        fl.check_required()
                    read += len(raw)
                    frame = fl.normalize(raw)
                    if not report.preview:
                        report.preview = frame.drop(columns=["_line", "status_code", "finished_epoch"]).head(5).to_dict("records")
                    if frame.empty:
                        continue
                    metric_slots = {}
                    for col, metric in fl.metric_cols.items():
                        spec = layout.metrics.get(metric)
                        _, slot, sense = dims.metric(metric, spec.sense if spec else None, spec.unit if spec else "", shown)
                        metric_slots[metric] = slot
                        report.metrics[metric] = sense
                    if writer is None or set(writer.cols[len(RUN_COLS):]) != {f"v{s}" for s in metric_slots.values()}:
                        writer = _Writer(conn, wh.dialect, sorted(metric_slots.values()))
                    codes, keys = _factorize(frame, ["solver", "version", "build", "params"])
                    frame["solver_id"] = np.asarray(dims.solver_ids(keys), dtype=np.int64)[codes]
                    codes, keys = _factorize(frame, ["family", "group", "instance", "instance_hash"])
                    frame["instance_id"] = np.asarray(dims.instance_ids(keys, fl.warnings), dtype=np.int64)[codes]
                    codes, keys = _factorize(frame, ["host"])
                    hid = np.asarray([np.nan if h is None else h for h in dims.host_ids([k[0] for k in keys])], dtype=float)
                    host = hid[codes]
                    m = len(frame)
                    ids = np.arange(next_id, next_id + m, dtype=np.int64)
                    next_id += m
                    columns = [
                        ids.tolist(), [campaign_id] * m, [import_id] * m,
                        frame["solver_id"].tolist(), frame["instance_id"].tolist(),
                        frame["seed"].tolist(), frame["replicate"].tolist(),
                        frame["status_code"].astype(int).tolist(),
                        _nullable(frame["finished_epoch"].to_numpy(), True),
                        _nullable(host, True), frame["_line"].astype(int).tolist(),
                    ]
                    slot_to_metric = {s: name for name, s in metric_slots.items()}
                    for s in sorted(metric_slots.values()):
                        columns.append(_nullable(frame["m:" + slot_to_metric[s]].to_numpy(), False))
                    writer.write(list(zip(*columns)))
                    count = conn.execute(select(func.count()).select_from(S.runs).where(
                        S.runs.c.id.between(int(ids[0]), int(ids[-1])))).scalar()
                    if count != m:
                        kept, sk = _import_report_conflicts(conn, fl, frame, ids, campaign_id, import_id)
                        skipped += sk
                        loaded += int(kept.sum())
                    else:
                        loaded += m
                    if progress:
                        progress(min(read, total), total)
                if read == 0 and not fl.rejects:
                    raise InputError(f"{shown}: the file has a header but no data rows")
                if not fl.metric_cols and read:
                    raise InputError(
                        f"{shown}: no metric columns found (columns: {', '.join(c for c in (fl.header or fl.mapping) if c != '_line')}); "
                        "a metric is a numeric column other than the run fields"
                    )
                rejected = len(fl.rejects)
                read = max(read, loaded + rejected + skipped)
                if skipped > 3:
                    fl.warnings.append(f"{skipped} runs in all were already in the warehouse and were skipped")
                conn.execute(update(S.imports).where(S.imports.c.id == import_id).values(
                    rows_read=read, rows_loaded=loaded, rows_rejected=rejected, rows_skipped=skipped))
                report.rows_read, report.rows_loaded = read, loaded
                report.rows_rejected, report.rows_skipped = rejected, skipped
                report.import_id = import_id
                report.mapping = dict(fl.mapping)
                report.ignored = list(fl.ignored)
                report.warnings = fl.warnings
                if fl.undecided:
                    report.warnings.append(f"columns with no values were not read: {', '.join(sorted(fl.undecided))}")
                if dry_run:
                    report.status = "checked"
                    report.import_id = None
                    trans.rollback()
                    return report
                if fl.rejects:
                    target = Path(rejects) if rejects else p.with_name(p.name + ".rejects.csv")
                    _write_rejects(target, fl.rejects)
                    report.rejects_file = str(target)
        if wh.is_sqlite and loaded >= 10_000:
            with wh.write() as conn:
                conn.exec_driver_sql("PRAGMA analysis_limit = 1000")
                conn.exec_driver_sql("ANALYZE")
    except OperationalError as exc:
        raise StorageError(f"cannot write to warehouse {wh.display}: {_db_reason(exc)}; nothing from {shown} was stored") from None
    except IntegrityError as exc:
        if "sha256" in str(exc.orig) or "imports" in str(exc.orig):
            report.status = "duplicate"
            report.message = "the same bytes were loaded by another process just now; nothing to do"
            return report
        raise StorageError(f"warehouse {wh.display} refused a write: {_db_reason(exc)}; nothing from {shown} was stored") from None
    parts = [f"{loaded} runs loaded into campaign {campaign}"]
    if report.rows_rejected:
        parts.append(f"{report.rows_rejected} rejected (see {report.rejects_file})")
    if skipped:
        parts.append(f"{skipped} already stored, skipped")
    report.message = ", ".join(parts)
    return report


def _db_reason(exc: Exception) -> str:
    orig = getattr(exc, "orig", exc)
    return str(orig).strip().splitlines()[0]


def _write_rejects(target: Path, rejects: list[dict]) -> None:
    cols: dict[str, None] = {"line": None}
    for r in rejects:
        for k in r:
            cols.setdefault(k, None)
    cols.pop("reason", None)
    cols["reason"] = None
    frame = pd.DataFrame(rejects, columns=list(cols)).sort_values("line", key=lambda s: pd.to_numeric(s, errors="coerce"))
    tmp = target.with_name(target.name + ".part")
    frame.to_csv(tmp, index=False)
    os.replace(tmp, target)
