"""Kept analyses: recording one with its exact inputs and digest, reading it back with its state
(fresh, stale after a retraction, tampered), claims on it, and finding analyses again."""
from __future__ import annotations

import hashlib
import json
import platform
import time
from dataclasses import dataclass, field

from sqlalchemy import func, insert, or_, select

from ..version import __version__
from ..errors import InputError
from ..select.resolve import Dims, condition
from ..select.slices import Slice
from ..store import schema as S
from ..store.connect import Warehouse


def software() -> dict:
    return {"blockyard": __version__, "python": platform.python_version(), "numpy": _version("numpy"),
            "pandas": _version("pandas"), "scipy": _version("scipy"), "statsmodels": _version("statsmodels"),
            "sqlalchemy": _version("sqlalchemy")}


def _version(name: str) -> str:
    """A library's version: its own __version__ when an analysis imported it already, else the
    installed package's metadata. Importing statsmodels only to read its version was 1.5 s of a
    cold blocktest that never used it (docs/performance.md)."""
    import sys

    mod = sys.modules.get(name)
    if mod is not None and getattr(mod, "__version__", None):
        return mod.__version__
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version(name)
    except PackageNotFoundError:
        import importlib

        return importlib.import_module(name).__version__


def canon(obj) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=_default, allow_nan=False)


def _default(o):
    import math

    if hasattr(o, "item"):
        o = o.item()
        if isinstance(o, float) and (math.isnan(o) or math.isinf(o)):
            return None
        return o
    return str(o)


_INF, _NINF = float("inf"), float("-inf")
_PLAIN = frozenset({str, int, float, bool, type(None)})


def clean(obj):
    """JSON-safe copy: NaN and infinities become None (strict JSON has neither)."""
    import math

    # the plain types first, by their exact type: an analysis document of 170 treatments holds
    # some 120,000 values, and the general tests below cost three times as much per value
    t = type(obj)
    if t is str or t is int or t is bool or obj is None:
        return obj
    if t is float:
        return None if obj != obj or obj == _INF or obj == _NINF else obj
    if t is dict:
        return {k if type(k) is str else str(k): clean(v) for k, v in obj.items()}
    if t is list:
        kinds = set(map(type, obj))  # (at C speed)
        if kinds <= _PLAIN:
            if float not in kinds:
                return list(obj)
            s = sum(v for v in obj if type(v) is float)
            if s - s == 0:  # a finite sum: no NaN and no infinity among the floats
                return list(obj)
        return [clean(v) for v in obj]
    if isinstance(obj, dict):
        return {str(k): clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [clean(v) for v in obj]
    if hasattr(obj, "item") and not isinstance(obj, (str, bytes)):
        obj = obj.item()
    if isinstance(obj, float) and (math.isnan(obj) or math.isinf(obj)):
        return None
    return obj


def records(df) -> list[dict]:
    """`clean(df.to_dict("records"))` for the observation table, built column by column in one
    walk: the same values (tests/test_ledger.py holds the two side by side) in a tenth of the
    time at 17,000 rows."""
    import numpy as np
    import pandas as pd

    cols = [str(c) for c in df.columns]
    values = []
    for i in range(df.shape[1]):
        col = df.iloc[:, i]
        if isinstance(col.dtype, np.dtype) and col.dtype.kind == "f":
            arr = col.to_numpy()
            out = arr.tolist()  # numpy's own Python floats; NaN and infinities become None
            for j in np.flatnonzero(~np.isfinite(arr)).tolist():
                out[j] = None
            values.append(out)
        elif isinstance(col.dtype, np.dtype) and col.dtype.kind in "iub":
            values.append(col.to_numpy().tolist())
        elif isinstance(col.dtype, pd.StringDtype) and _is_nan(col.dtype.na_value):
            values.append([v if type(v) is str else clean(v) for v in col.tolist()])
        else:
            return clean(df.to_dict("records"))  # any other kind of column: pandas' own boxing
    return [dict(zip(cols, row)) for row in zip(*values)] if cols else [{} for _ in range(len(df))]


def canon_records(df) -> str:
    """`canon(records(df))`, the same text written straight from the columns: each column's values
    encoded once (floats and whole numbers by their repr, text by json's own C encoder, as
    `json.dumps` writes them), then one format per row with the keys in sorted order. At 17,000
    observations (170 treatments) a third of the time of building the dicts and encoding them,
    which was most of recording an analysis (docs/performance.md). Any column of another kind:
    the general way."""
    import numpy as np
    import pandas as pd
    from json.encoder import encode_basestring_ascii as text

    cols = [str(c) for c in df.columns]
    if not cols or len(set(cols)) != len(cols):
        return canon(records(df))
    encoded = {}
    for name, i in zip(cols, range(df.shape[1])):
        col = df.iloc[:, i]
        if isinstance(col.dtype, np.dtype) and col.dtype.kind == "f":
            arr = col.to_numpy(dtype=np.float64)
            out = list(map(float.__repr__, arr.tolist()))
            for j in np.flatnonzero(~np.isfinite(arr)).tolist():
                out[j] = "null"
        elif isinstance(col.dtype, np.dtype) and col.dtype.kind in "iu":
            out = list(map(int.__repr__, col.to_numpy().tolist()))
        elif isinstance(col.dtype, np.dtype) and col.dtype.kind == "b":
            out = ["true" if v else "false" for v in col.to_numpy().tolist()]
        elif isinstance(col.dtype, pd.StringDtype) and _is_nan(col.dtype.na_value):
            out = [text(v) if type(v) is str else "null" for v in col.tolist()]
        else:
            return canon(records(df))
        encoded[name] = out
    order = sorted(cols)
    row = "{" + ",".join(text(k).replace("%", "%%") + ":%s" for k in order) + "}"
    return "[" + ",".join(map(row.__mod__, zip(*(encoded[k] for k in order)))) + "]"


def _is_nan(x) -> bool:
    return isinstance(x, float) and x != x


def digest(kind: str, slice_text: str, settings: str, observations: str, fingerprint: str, result: str) -> str:
    h = hashlib.sha256()
    for part in (kind, slice_text, settings, observations, fingerprint, result):
        h.update(part.encode("utf-8"))
        h.update(b"\x1e")
    return h.hexdigest()


def record(wh: Warehouse, result, sl: Slice, settings: dict, now: float | None = None) -> int:
    """Store an analysis result (blocktest, versus, plan) with everything needed to re-run it."""
    with wh.write() as conn:
        with conn.begin():
            return insert_analysis(conn, result, sl, settings, now)


def insert_analysis(conn, result, sl: Slice, settings: dict, now: float | None = None, renewed_from: int | None = None) -> int:
    """Write one analysis row on `conn`, inside the caller's transaction (a renewal moves claims in
    the same one). The retractions it stands after are read on the same connection, so that a
    retraction committed meanwhile cannot slip between that count and the row."""
    now = time.time() if now is None else now
    settings = dict(settings, retractions_before=int(conn.execute(select(func.coalesce(func.max(S.retractions.c.id), 0))).scalar()))
    c = getattr(result, "collapsed", None)
    doc = clean(result.to_dict())
    doc.pop("analysis_id", None)
    result_text = canon(doc)
    settings_text = canon(clean(settings))
    if c is not None:
        obs_text = canon_records(c.obs)
        fingerprint, max_run, metric = c.fingerprint, c.max_run_id, c.metric
    else:
        obs_text, fingerprint, max_run, metric = "[]", hashlib.sha256(settings_text.encode()).hexdigest(), 0, ""
    sl_text = sl.text
    values = dict(kind=result.kind, slice_text=sl_text, slice_parsed=sl.to_json(), metric=metric,
                  settings=settings_text, observations=obs_text, max_run_id=max_run, fingerprint=fingerprint,
                  result=result_text, software=canon(software()), created_at=int(now),
                  result_digest=digest(result.kind, sl_text, settings_text, obs_text, fingerprint, result_text),
                  renewed_from_id=renewed_from)
    # the values as parameters, not in the statement: its compiled form is cached, and no cache key
    # is made over a megabyte of text
    return conn.execute(insert(S.analyses), values).inserted_primary_key[0]


@dataclass
class Stored:
    id: int
    kind: str
    slice_text: str
    slice: Slice
    metric: str
    settings: dict
    observations: list
    max_run_id: int
    fingerprint: str
    result: dict
    software: dict
    created_at: int
    intact: bool
    claims: list[dict] = field(default_factory=list)
    stale_runs: int = 0
    renewed_from: int | None = None  # the stale analysis this one re-ran (recheck --renew)
    renewed_as: int | None = None  # the analysis that re-ran this one and took its claims

    @property
    def state(self) -> str:
        if not self.intact:
            return "tampered"
        return "stale" if self.stale_runs else "fresh"

    def when(self) -> str:
        return time.strftime("%Y-%m-%d %H:%M", time.gmtime(self.created_at))


def from_row(row, intact: bool) -> Stored:
    def load(text, fallback):
        try:
            return json.loads(text)
        except (TypeError, ValueError):
            return fallback

    try:
        sl = Slice.from_dict(json.loads(row.slice_parsed))
    except (TypeError, ValueError, KeyError):
        sl, intact = Slice(), False
    return Stored(row.id, row.kind, row.slice_text, sl, row.metric, load(row.settings, {}),
                  load(row.observations, []), row.max_run_id, row.fingerprint, load(row.result, {}),
                  load(row.software, {}), row.created_at, intact, renewed_from=row.renewed_from_id)


def _intact(row) -> bool:
    if digest(row.kind, row.slice_text, row.settings, row.observations, row.fingerprint, row.result) != row.result_digest:
        return False
    # a recheck re-runs from the parsed slice and the metric column, which the digest does not cover:
    # they must agree with the slice text and the result, which it does
    try:
        sl = Slice.from_dict(json.loads(row.slice_parsed))
        doc = json.loads(row.result)
    except (TypeError, ValueError, KeyError):
        return False
    if sl.text != row.slice_text:
        from ..errors import SliceError
        from ..select.slices import parse

        try:
            if parse(row.slice_text) != sl:
                return False
        except SliceError:
            return False
    return row.kind == "plan" or (isinstance(doc, dict) and doc.get("metric", "") == row.metric)


def stale_runs(conn, st: Stored, dims: Dims | None = None) -> int:
    """How many runs this analysis stood on are now retracted."""
    if st.kind == "plan" and not st.observations:
        return 0
    dims = dims or Dims.load(conn)
    try:
        cond = condition(st.slice, dims, conn, retracted="yes")
    except Exception:  # the names it used may be gone from a changed warehouse; judged by recheck
        return 0
    q = select(func.count()).select_from(S.runs).where(
        cond, S.runs.c.id <= st.max_run_id, S.runs.c.retraction_id > int(st.settings.get("retractions_before", 0)))
    if st.metric in dims.metrics:
        v = S.runs.c[f"v{dims.metrics[st.metric][1]}"]
        q = q.where(or_(v.is_not(None), S.runs.c.status != 0))
    blocks = {o.get("block") for o in st.observations}
    if blocks and len(blocks) < len(dims.groups):
        gids = [g for g in dims.groups if dims.block(g) in blocks]
        q = q.where(S.runs.c.instance_id.in_(select(S.instances.c.id).where(S.instances.c.group_id.in_(gids))))
    return int(conn.execute(q).scalar() or 0)


# Ids come from people: the largest one any warehouse can hold is PostgreSQL's INTEGER (32 bits;
# SQLite's are 64). A number beyond it names no analysis, and is answered so before the database
# is asked, which would refuse to bind it.
MAX_ID = 2 ** 31 - 1


def parse_id(value, where: str) -> int:
    """An analysis id as a person typed it (`where` names the argument, for the message)."""
    import re

    text = str(value).strip()
    if not re.fullmatch(r"[0-9]+", text):
        shown = text if len(text) <= 24 else text[:20] + "…"
        raise InputError(f"{where} '{shown}': an analysis id is a whole number such as 17 (blockyard recall lists them)")
    if len(text) > 4000:  # int() refuses digits past 4300; no id comes near
        raise InputError(f"no analysis {text[:20]}… (blockyard recall lists them)")
    return int(text)


def _no_analysis(conn, analysis_id) -> InputError:
    shown = str(analysis_id)
    shown = shown if len(shown) <= 24 else shown[:20] + "…"
    last = conn.execute(select(func.max(S.analyses.c.id))).scalar()
    hint = f"; the latest is {last}" if last else "; none is stored yet"
    return InputError(f"no analysis {shown}{hint} (blockyard recall lists them)")


def renewed_as(conn, analysis_id: int) -> int | None:
    return conn.execute(select(func.min(S.analyses.c.id)).where(S.analyses.c.renewed_from_id == analysis_id)).scalar()


def get(wh: Warehouse, analysis_id: int, with_state: bool = True) -> Stored:
    with wh.engine.connect() as conn:
        row = None
        if 1 <= analysis_id <= MAX_ID:
            row = conn.execute(select(S.analyses).where(S.analyses.c.id == analysis_id)).first()
        if row is None:
            raise _no_analysis(conn, analysis_id)
        st = from_row(row, _intact(row))
        st.renewed_as = renewed_as(conn, st.id)
        st.claims = [dict(id=c.id, text=c.text, tags=[t for t in c.tags.split(",") if t], created_at=c.created_at)
                     for c in conn.execute(select(S.claims).where(S.claims.c.analysis_id == analysis_id).order_by(S.claims.c.id))]
        if with_state and st.intact:
            st.stale_runs = stale_runs(conn, st)
    return st


def last_id(wh: Warehouse) -> int | None:
    with wh.engine.connect() as conn:
        return conn.execute(select(func.max(S.analyses.c.id))).scalar()


def keep(wh: Warehouse, text: str, analysis_id: int | None, tags: list[str], now: float | None = None) -> dict:
    text = (text or "").strip()
    if not text:
        raise InputError('keep needs the claim itself: blockyard keep "1.6 uses fewer pallets than 1.4"')
    for t in tags:
        if "," in t or not t.strip():
            raise InputError(f"tag '{t}': a tag is one word or phrase without commas")
    if analysis_id is None:
        analysis_id = last_id(wh)
        if analysis_id is None:
            raise InputError("no analysis to keep the claim with; run blocktest or versus first, or give --analysis ID")
    get(wh, analysis_id, with_state=False)  # exists, or a clear error
    now = time.time() if now is None else now
    with wh.write() as conn:
        with conn.begin():
            cid = conn.execute(insert(S.claims).values(analysis_id=analysis_id, text=text,
                                                       tags=",".join(t.strip() for t in tags),
                                                       created_at=int(now))).inserted_primary_key[0]
    return {"claim_id": cid, "analysis_id": analysis_id, "text": text, "tags": tags}


# --- recall ------------------------------------------------------------------------------------

def treatments_of(doc: dict) -> list[str]:
    names = list(doc.get("treatment_names") or [])
    if doc.get("baseline"):
        names.append(doc["baseline"])
    rows = doc.get("comparisons")
    if isinstance(rows, list):  # a plan's "comparisons" is a count, not rows
        names += [r.get("treatment") for r in rows if isinstance(r, dict) and r.get("treatment")]
    rows = doc.get("verdicts")  # a guard's
    if isinstance(rows, list):
        names += [r.get("treatment") for r in rows if isinstance(r, dict) and r.get("treatment")]
    return sorted(set(names))


def recall(wh: Warehouse, text: str | None = None, tags: list[str] | None = None, solver: str | None = None,
           since: str | None = None, stale: bool = False, limit: int | None = None) -> list[Stored]:
    """Stored analyses matching every filter given, newest first, each with its state and claims."""
    from ..select.slices import parse_when

    since_epoch = parse_when(since, "since") if since else None
    tags = [t.lower() for t in (tags or [])]
    needle = (text or "").lower().strip()
    out: list[Stored] = []
    with wh.engine.connect() as conn:
        claims: dict[int, list[dict]] = {}
        later: dict[int, int] = {}
        for new_id, old_id in conn.execute(select(S.analyses.c.id, S.analyses.c.renewed_from_id)
                                           .where(S.analyses.c.renewed_from_id.is_not(None))
                                           .order_by(S.analyses.c.id.desc())):
            later[old_id] = new_id  # the first renewal wins, as in renewed_as()
        for c in conn.execute(select(S.claims).order_by(S.claims.c.id)):
            claims.setdefault(c.analysis_id, []).append(
                dict(id=c.id, text=c.text, tags=[t for t in c.tags.split(",") if t], created_at=c.created_at))
        dims = None
        q = select(S.analyses).order_by(S.analyses.c.id.desc())
        if since_epoch is not None:
            q = q.where(S.analyses.c.created_at >= since_epoch)
        for row in conn.execute(q).all():
            st = from_row(row, _intact(row))
            st.claims = claims.get(st.id, [])
            st.renewed_as = later.get(st.id)
            if tags and not all(any(t == x.lower() for c in st.claims for x in c["tags"]) for t in tags):
                continue
            if solver:
                names = treatments_of(st.result)
                if not any(n == solver or n.split("@")[0] == solver for n in names):
                    continue
            if needle:
                hay = " ".join([st.slice_text, st.metric, st.kind, *(c["text"] for c in st.claims),
                                *(t for c in st.claims for t in c["tags"]), *treatments_of(st.result)]).lower()
                if needle not in hay:
                    continue
            if st.intact:
                dims = dims or Dims.load(conn)
                st.stale_runs = stale_runs(conn, st, dims)
            if stale and st.state == "fresh":
                continue
            out.append(st)
            if limit and len(out) >= limit:
                break
    return out
