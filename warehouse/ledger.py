"""The ledger: every analysis kept with its exact inputs, claims tied to analyses, and the checks
that tell whether a kept analysis still holds (fresh, stale after a retraction, or tampered)."""
from __future__ import annotations

import hashlib
import json
import platform
import time
from dataclasses import dataclass, field

from sqlalchemy import func, insert, or_, select, update

from . import __version__
from .errors import InputError
from .select.resolve import Dims, condition
from .select.slices import Slice
from .store import schema as S
from .store.connect import Warehouse


def software() -> dict:
    import numpy
    import pandas
    import scipy
    import sqlalchemy
    import statsmodels

    return {"blockyard": __version__, "python": platform.python_version(), "numpy": numpy.__version__,
            "pandas": pandas.__version__, "scipy": scipy.__version__, "statsmodels": statsmodels.__version__,
            "sqlalchemy": sqlalchemy.__version__}


def _canon(obj) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=_default, allow_nan=False)


def _default(o):
    import math

    if hasattr(o, "item"):
        o = o.item()
        if isinstance(o, float) and (math.isnan(o) or math.isinf(o)):
            return None
        return o
    return str(o)


def _clean(obj):
    """JSON-safe copy: NaN and infinities become None (strict JSON has neither)."""
    import math

    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if hasattr(obj, "item") and not isinstance(obj, (str, bytes)):
        obj = obj.item()
    if isinstance(obj, float) and (math.isnan(obj) or math.isinf(obj)):
        return None
    return obj


def digest(kind: str, slice_text: str, settings: str, observations: str, fingerprint: str, result: str) -> str:
    h = hashlib.sha256()
    for part in (kind, slice_text, settings, observations, fingerprint, result):
        h.update(part.encode("utf-8"))
        h.update(b"\x1e")
    return h.hexdigest()


def record(wh: Warehouse, result, sl: Slice, settings: dict, now: float | None = None) -> int:
    """Store an analysis result (blocktest, versus, plan) with everything needed to re-run it."""
    now = time.time() if now is None else now
    c = getattr(result, "collapsed", None)
    doc = _clean(result.to_dict())
    doc.pop("analysis_id", None)
    result_text = _canon(doc)
    settings_text = _canon(_clean(settings))
    if c is not None:
        obs = c.obs.copy()
        obs_text = _canon(_clean(obs.to_dict("records")))
        fingerprint, max_run, metric = c.fingerprint, c.max_run_id, c.metric
    else:
        obs_text, fingerprint, max_run, metric = "[]", hashlib.sha256(settings_text.encode()).hexdigest(), 0, ""
    sl_text = sl.text
    values = dict(kind=result.kind, slice_text=sl_text, slice_parsed=sl.to_json(), metric=metric,
                  settings=settings_text, observations=obs_text, max_run_id=max_run, fingerprint=fingerprint,
                  result=result_text, software=_canon(software()), created_at=int(now),
                  result_digest=digest(result.kind, sl_text, settings_text, obs_text, fingerprint, result_text))
    with wh.write() as conn:
        with conn.begin():
            return conn.execute(insert(S.analyses).values(**values)).inserted_primary_key[0]


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

    @property
    def state(self) -> str:
        if not self.intact:
            return "tampered"
        return "stale" if self.stale_runs else "fresh"

    def when(self) -> str:
        return time.strftime("%Y-%m-%d %H:%M", time.gmtime(self.created_at))


def _stored(row, intact: bool) -> Stored:
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
                  load(row.software, {}), row.created_at, intact)


def _intact(row) -> bool:
    return digest(row.kind, row.slice_text, row.settings, row.observations, row.fingerprint, row.result) == row.result_digest


def stale_runs(conn, st: Stored, dims: Dims | None = None) -> int:
    """How many runs this analysis stood on are now retracted."""
    if st.kind == "plan" and not st.observations:
        return 0
    dims = dims or Dims.load(conn)
    try:
        cond = condition(st.slice, dims, conn, retracted="yes")
    except Exception:  # the names it used may be gone from a changed warehouse; judged by recheck
        return 0
    q = select(func.count()).select_from(S.runs).where(cond, S.runs.c.id <= st.max_run_id)
    if st.metric in dims.metrics:
        v = S.runs.c[f"v{dims.metrics[st.metric][1]}"]
        q = q.where(or_(v.is_not(None), S.runs.c.status != 0))
    blocks = {o.get("block") for o in st.observations}
    if blocks and len(blocks) < len(dims.groups):
        gids = [g for g in dims.groups if dims.block(g) in blocks]
        q = q.where(S.runs.c.instance_id.in_(select(S.instances.c.id).where(S.instances.c.group_id.in_(gids))))
    return int(conn.execute(q).scalar() or 0)


def get(wh: Warehouse, analysis_id: int, with_state: bool = True) -> Stored:
    with wh.engine.connect() as conn:
        row = conn.execute(select(S.analyses).where(S.analyses.c.id == analysis_id)).first()
        if row is None:
            last = conn.execute(select(func.max(S.analyses.c.id))).scalar()
            hint = f"; the latest is {last}" if last else "; none is stored yet"
            raise InputError(f"no analysis {analysis_id}{hint} (blockyard recall lists them)")
        st = _stored(row, _intact(row))
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
