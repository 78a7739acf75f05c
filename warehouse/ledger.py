"""The ledger: every analysis kept with its exact inputs, claims tied to analyses, and the checks
that tell whether a kept analysis still holds (fresh, stale after a retraction, or tampered)."""
from __future__ import annotations

import hashlib
import json
import platform
import time
from dataclasses import dataclass, field

from sqlalchemy import and_, func, insert, or_, select, update

from . import __version__
from .errors import InputError
from .select.resolve import Dims, condition
from .select.slices import Slice
from .store import cells
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
    with wh.write() as conn:
        with conn.begin():
            return _insert(conn, result, sl, settings, now)


def _insert(conn, result, sl: Slice, settings: dict, now: float | None = None, renewed_from: int | None = None) -> int:
    """Write one analysis row on `conn`, inside the caller's transaction (a renewal moves claims in
    the same one). The retractions it stands after are read on the same connection, so that a
    retraction committed meanwhile cannot slip between that count and the row."""
    now = time.time() if now is None else now
    settings = dict(settings, retractions_before=int(conn.execute(select(func.coalesce(func.max(S.retractions.c.id), 0))).scalar()))
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
                  result_digest=digest(result.kind, sl_text, settings_text, obs_text, fingerprint, result_text),
                  renewed_from_id=renewed_from)
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
    renewed_from: int | None = None  # the stale analysis this one re-ran (recheck --renew)
    renewed_as: int | None = None  # the analysis that re-ran this one and took its claims

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
        from .errors import SliceError
        from .select.slices import parse

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
        st = _stored(row, _intact(row))
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
    return sorted(set(names))


def recall(wh: Warehouse, text: str | None = None, tags: list[str] | None = None, solver: str | None = None,
           since: str | None = None, stale: bool = False, limit: int | None = None) -> list[Stored]:
    """Stored analyses matching every filter given, newest first, each with its state and claims."""
    from .select.slices import parse_when

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
            st = _stored(row, _intact(row))
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


# --- retract -----------------------------------------------------------------------------------

def retract(wh: Warehouse, sl: Slice, reason: str, who: str | None = None, now: float | None = None) -> dict:
    """Mark the slice's runs withdrawn (never deleted) and name the stored analyses that used them."""
    import getpass

    if sl.is_empty():
        raise InputError("retract needs a slice that names the runs to withdraw, e.g. --slice \"campaign=nov host=rack-b\"")
    if not (reason or "").strip():
        raise InputError("retract needs --reason: say why these runs are withdrawn")
    try:
        who = who or getpass.getuser()
    except Exception:  # no user name on this system
        who = ""
    now = time.time() if now is None else now
    with wh.write() as conn:
        with conn.begin():
            dims = Dims.load(conn)
            # live runs only, whatever the slice says about retracted runs: a run belongs to one
            # retraction, so that the counts add up and an undo brings back what its retraction took
            cond = and_(condition(sl, dims, conn), S.runs.c.retraction_id.is_(None))
            rid = conn.execute(insert(S.retractions).values(slice=sl.text, reason=reason.strip(), who=who,
                                                            at=int(now), runs=0)).inserted_primary_key[0]
            n = conn.execute(update(S.runs).where(cond).values(retraction_id=rid)).rowcount
            if n == 0:
                conn.rollback()
                return {"retraction_id": None, "runs_retracted": 0, "stale_analyses": [],
                        "message": "no runs in that slice (or all already retracted); nothing changed"}
            conn.execute(update(S.retractions).where(S.retractions.c.id == rid).values(runs=n))
            cells.rebuild(conn, cells.touched(conn, S.runs.c.retraction_id == rid))
    stale = affected(wh, rid)
    return {"retraction_id": rid, "runs_retracted": int(n), "stale_analyses": stale, "reason": reason.strip(),
            "who": who, "slice": sl.text}


def affected(wh: Warehouse, retraction_id: int) -> list[int]:
    """Stored analyses that stood on runs of this retraction."""
    ids = []
    with wh.engine.connect() as conn:
        dims = Dims.load(conn)
        for row in conn.execute(select(S.analyses).order_by(S.analyses.c.id)).all():
            st = _stored(row, True)
            if st.kind == "plan" and not st.observations:
                continue
            try:
                cond = condition(st.slice, dims, conn, retracted="yes")
            except Exception:
                continue
            q = select(func.count()).select_from(S.runs).where(cond, S.runs.c.id <= st.max_run_id,
                                                               S.runs.c.retraction_id == retraction_id)
            if st.metric in dims.metrics:  # runs without its metric did not take part (as in stale_runs)
                v = S.runs.c[f"v{dims.metrics[st.metric][1]}"]
                q = q.where(or_(v.is_not(None), S.runs.c.status != 0))
            blocks = {o.get("block") for o in st.observations}
            if blocks:
                gids = [g for g in dims.groups if dims.block(g) in blocks]
                q = q.where(S.runs.c.instance_id.in_(select(S.instances.c.id).where(S.instances.c.group_id.in_(gids))))
            if conn.execute(q).scalar():
                ids.append(st.id)
    return ids


def undo_retraction(wh: Warehouse, retraction_id: int, now: float | None = None) -> dict:
    now = time.time() if now is None else now
    with wh.write() as conn:
        with conn.begin():
            row = None
            if 1 <= retraction_id <= MAX_ID:  # beyond any id: the database would refuse to bind it
                row = conn.execute(select(S.retractions).where(S.retractions.c.id == retraction_id)).first()
            if row is None:
                raise InputError(f"no retraction {retraction_id} (inventory lists none; retract prints its id)")
            if row.undone_at is not None:
                raise InputError(f"retraction {retraction_id} was already undone")
            if wh.dialect == "postgresql":  # no load puts a run on one of these keys meanwhile
                conn.exec_driver_sql("LOCK TABLE runs IN SHARE ROW EXCLUSIVE MODE")
            keys = cells.touched(conn, S.runs.c.retraction_id == retraction_id)
            taken = _keys_taken(conn, retraction_id, keys)
            if taken:
                from .ingest.reload import retract_command

                holder, count = min(taken.items())
                name = conn.execute(select(S.campaigns.c.name).join(S.imports, S.imports.c.campaign_id == S.campaigns.c.id)
                                    .where(S.imports.c.id == holder)).scalar()
                others = len(taken) - 1
                more = f" (and of {others} other import{'s' if others > 1 else ''})" if others else ""
                raise InputError(
                    f"retraction {retraction_id} cannot be undone: {count} of its runs would be live beside the "
                    f"live runs of import {holder}{more} under the same keys in campaign {name} (a campaign holds "
                    f"one live run per key); retract import {holder}'s runs first: {retract_command(conn, holder)}, "
                    f"then blockyard retract --undo {retraction_id}")
            n = conn.execute(update(S.runs).where(S.runs.c.retraction_id == retraction_id).values(retraction_id=None)).rowcount
            cells.rebuild(conn, keys)
            conn.execute(update(S.retractions).where(S.retractions.c.id == retraction_id).values(undone_at=int(now)))
    return {"retraction_id": retraction_id, "runs_restored": int(n), "slice": row.slice, "reason": row.reason}


def _keys_taken(conn, retraction_id: int, keys: list[tuple]) -> dict[int, int]:
    """The imports whose live runs hold keys of the retraction's runs in their campaigns, with
    how many each (after a file was loaded again into its own campaign, `load --again`, its
    reload holds the keys of its retracted runs). Only the cells the retraction touched can meet
    them: the cell summaries (live runs) name the imports to read, usually none; then only those
    imports' runs in those cells are read, through their id ranges (SQLite has no run key)."""
    from .store.ranges import id_ranges

    R, C = S.runs, S.cell_stats
    cellset = {(k[3], k[1], k[2]) for k in keys}  # (campaign, solver, instance)
    if not cellset:
        return {}
    campaigns = sorted({c[0] for c in cellset})
    solvers = sorted({c[1] for c in cellset})
    instances = sorted({c[2] for c in cellset})
    holders: set[int] = set()
    for i in range(0, len(instances), 5000):
        for imp, camp, sol, inst in conn.execute(
                select(C.c.import_id, C.c.campaign_id, C.c.solver_id, C.c.instance_id).where(
                    C.c.campaign_id.in_(campaigns), C.c.solver_id.in_(solvers),
                    C.c.instance_id.in_(instances[i:i + 5000])).distinct()):
            if (camp, sol, inst) in cellset:
                holders.add(int(imp))
    if not holders:
        return {}
    key = (R.c.campaign_id, R.c.solver_id, R.c.instance_id, R.c.seed, R.c.replicate)
    restored = set(conn.execute(select(*key).where(R.c.retraction_id == retraction_id)).all())
    spans = id_ranges(conn, S.imports.c.id.in_(sorted(holders)))
    taken: dict[int, int] = {}
    for i in range(0, len(instances), 5000):
        for row in conn.execute(select(R.c.import_id, *key).where(
                spans, R.c.import_id.in_(sorted(holders)), R.c.retraction_id.is_(None),
                R.c.campaign_id.in_(campaigns), R.c.solver_id.in_(solvers), R.c.instance_id.in_(instances[i:i + 5000]))):
            if tuple(row[1:]) in restored:
                taken[int(row[0])] = taken.get(int(row[0]), 0) + 1
    return taken


# --- recheck -----------------------------------------------------------------------------------

def verdicts_of(kind: str, doc: dict) -> dict:
    """The conclusions a stored result draws: what a recheck compares."""
    if kind == "blocktest":
        row = next((r for r in doc.get("anova", []) if r.get("source") == "treatment"), {})
        p = row.get("p")
        return {"treatment effect": p is not None and p < 0.05}
    if kind == "versus":
        level = 1 - float(doc.get("confidence", 0.95))
        out = {}
        for r in doc.get("comparisons", []):
            p, d = r.get("p_adjusted"), r.get("diff") or 0.0
            out[r["treatment"]] = {"significant": p is not None and p < level, "sign": (d > 0) - (d < 0)}
        return out
    if kind == "plan":
        return {"blocks_needed": doc.get("blocks_needed")}
    return {}


def rerun(wh: Warehouse, st: Stored):
    """Run a stored analysis again on today's data, with its stored slice and settings."""
    from .analyses import run_blocktest, run_plan, run_versus
    from .collapse.settings import Collapse

    opts = st.settings.get("options", {})
    col = Collapse(**st.settings.get("collapse", {})) if st.settings.get("collapse") else Collapse()
    with wh.engine.connect() as conn:
        if st.kind == "blocktest":
            # quick=False: the pandas collapse, which also gives the 0.1 fingerprint of the same runs
            return run_blocktest(conn, st.slice, st.metric, col, opts.get("transform", "none"),
                                 opts.get("design", "auto"), opts.get("pairs", False), quick=False,
                                 cutoff=opts.get("cutoff"))
        if st.kind == "versus":
            return run_versus(conn, st.slice, st.metric, col, opts["baseline"], opts.get("method", "dunnett"),
                              opts.get("adjust", "holm"), opts.get("better"), opts.get("margin"),
                              opts.get("confidence", 0.95), quick=False, cutoff=opts.get("cutoff"))
    if st.kind == "plan":
        source = src = None
        if opts.get("from") is not None:
            src = get(wh, int(opts["from"]), with_state=False)
            source = dict(rerun(wh, src).to_dict())
            source["analysis_id"] = src.id
        res = run_plan(effect=opts.get("effect"), delta=opts.get("delta"), sd=opts.get("sd"), source=source,
                       power=opts.get("power", 0.8), alpha=opts.get("alpha", 0.05),
                       comparisons=opts.get("comparisons", 1), means=opts.get("means"), sigma=opts.get("sigma"),
                       blocks=opts.get("blocks"))
        if src is not None:
            # the source re-ran on today's data: no longer stale, whatever it was when the plan was made
            note_source(res, source, src.kind, "fresh" if src.intact else "tampered", 0)
        return res
    raise InputError(f"analysis {st.id} is of kind {st.kind}, which cannot be re-run")


def note_source(res, doc: dict, kind: str, state: str, stale: int) -> None:
    """What `plan --from` says of its source besides sigma: its state (a stale source's sigma stood
    on runs retracted since), and the blocks its slice holds against the blocks the plan needs."""
    from .analyze.planning import more_blocks

    src = res.source
    if not src:
        return
    src.update(state=state, stale=state == "stale", stale_runs=int(stale))
    held = doc.get("blocks") if kind in ("blocktest", "versus") else None
    need = getattr(res.plan, "blocks_needed", None)
    if isinstance(held, int) and not isinstance(held, bool):
        src["blocks_held"] = held
        if need is not None:
            src["blocks_more"] = more_blocks(need, held)
    aid = src.get("analysis_id")
    if state == "stale":
        res.plan.warnings.append(f"analysis {aid} is stale: {stale} of the runs behind its sigma were retracted "
                                 f"since; blockyard recheck {aid} --renew re-runs it, then plan from the new one")
    elif state == "tampered":
        res.plan.warnings.append(f"analysis {aid} is tampered: its record does not match its digest, so its sigma "
                                 "is not what was kept; do not rely on this plan")


def _as_kept(new: dict, old: dict) -> dict:
    """A plan's new document cut to the keys the stored one holds: a plan kept by an earlier
    version lacks the keys added since, and only what it holds can have changed."""
    out = {k: v for k, v in new.items() if k in old}
    if isinstance(out.get("from"), dict) and isinstance(old.get("from"), dict):
        out["from"] = {k: v for k, v in out["from"].items() if k in old["from"]}
    return out


@dataclass
class Recheck:
    stored: Stored
    status: str  # unchanged | data-changed | conclusion-changed | tampered
    new_doc: dict | None
    new_fingerprint: str | None
    runs_arrived: int
    runs_withdrawn: int
    changes: list[str]
    error: str | None = None
    rerun: object = None  # the re-run's own result: what a renewal stores
    renew: bool = False  # --renew was asked
    stored_analysis: int | None = None  # the analysis this renewal stored
    claims_moved: list[int] = field(default_factory=list)
    moved: list[str] = field(default_factory=list)  # what changed under the analysis, in words

    def to_dict(self) -> dict:
        return {"analysis_id": self.stored.id, "status": self.status, "kind": self.stored.kind,
                "slice": self.stored.slice_text, "metric": self.stored.metric,
                "stored_fingerprint": self.stored.fingerprint, "new_fingerprint": self.new_fingerprint,
                "runs_arrived": self.runs_arrived, "runs_withdrawn": self.runs_withdrawn, "changes": self.changes,
                "old": self.stored.result, "new": self.new_doc, "error": self.error,
                "renewed_from": self.stored.renewed_from, "renewed_as": self.stored.renewed_as,
                "renew": self.renew, "stored_analysis": self.stored_analysis, "claims_moved": self.claims_moved,
                "explained": self.moved}


SHOWN_MOVES = 6  # changed observations named one by one; the rest are counted


def explain(wh: Warehouse, st: Stored, new) -> list[str]:
    """What changed under a stored analysis, in words: the imports that brought runs into its slice
    since, the retractions that took runs out, and the treatments, blocks and observations that
    moved (the re-run reads the runs themselves, so an edit made outside Blockyard shows here)."""
    out: list[str] = []
    c = new.collapsed
    with wh.engine.connect() as conn:
        dims = Dims.load(conn)
        try:
            cond = condition(st.slice, dims, conn)
        except InputError:
            cond = None
        if cond is not None:
            R, I, X = S.runs, S.imports, S.retractions
            came = conn.execute(select(I.c.id, I.c.file_name, func.count()).select_from(R.join(I, I.c.id == R.c.import_id))
                                .where(cond, R.c.id > st.max_run_id, R.c.retraction_id.is_(None))
                                .group_by(I.c.id, I.c.file_name).order_by(I.c.id)).all()
            for iid, name, n in came:
                out.append(f"import {iid} ({name}) brought {n} runs into the slice")
            withdrawn = condition(st.slice, dims, conn, retracted="yes")  # (as stale_runs counts them)
            gone = conn.execute(select(X.c.id, X.c.reason, func.count()).select_from(R.join(X, X.c.id == R.c.retraction_id))
                                .where(withdrawn, R.c.id <= st.max_run_id,
                                       R.c.retraction_id > int(st.settings.get("retractions_before", 0)))
                                .group_by(X.c.id, X.c.reason).order_by(X.c.id)).all()
            for xid, reason, n in gone:
                out.append(f"retraction {xid} ({reason}) took {n} runs of its slice out")
    old = {(o["treatment"], o["block"]): o.get("value") for o in st.observations or [] if "treatment" in o}
    now = {(t, b): v for t, b, v in zip(c.obs["treatment"], c.obs["block"], c.obs["value"])}
    if not old:
        return out
    for word, names in (("treatments", lambda k: k[0]), ("blocks", lambda k: k[1])):
        before, after = {names(k) for k in old}, {names(k) for k in now}
        if after - before:
            out.append(f"{word} now in the analysis: {', '.join(sorted(after - before)[:8])}")
        if before - after:
            out.append(f"{word} no longer in the analysis: {', '.join(sorted(before - after)[:8])}")
    changed = []
    for key in sorted(set(old) & set(now)):
        a, b = old[key], now[key]
        if a is None or b is None or abs(float(a) - float(b)) > 1e-9 * max(1.0, abs(float(a)), abs(float(b))):
            changed.append((key, a, b))
    for (t, b), a, v in changed[:SHOWN_MOVES]:
        out.append(f"{t} on {b}: {_num(a)} then, {_num(v)} now")
    if len(changed) > SHOWN_MOVES:
        out.append(f"... and {len(changed) - SHOWN_MOVES} more observations moved")
    return out


def _num(v) -> str:
    return "-" if v is None else f"{float(v):.6g}"


def _renewed_already(analysis_id: int, later: int) -> InputError:
    return InputError(f"analysis {analysis_id} was already renewed as analysis {later}, which holds its claims; "
                      f"renew that one instead (blockyard recheck {later} --renew)")


def recheck(wh: Warehouse, analysis_id: int, renew: bool = False, now: float | None = None) -> Recheck:
    """Re-run a stored analysis on today's data and compare. With `renew`, a re-run that differs
    is stored as a new analysis renewing this one, and this one's claims move to it."""
    from .errors import BlockyardError

    st = get(wh, analysis_id)
    if renew and st.renewed_as is not None:  # before the re-run: the answer does not depend on it
        raise _renewed_already(st.id, st.renewed_as)
    withdrawn = st.stale_runs
    arrived = 0
    if st.kind != "plan":
        with wh.engine.connect() as conn:
            dims = Dims.load(conn)
            try:
                cond = condition(st.slice, dims, conn)
                arrived = int(conn.execute(select(func.count()).select_from(S.runs)
                                           .where(cond, S.runs.c.id > st.max_run_id)).scalar() or 0)
            except BlockyardError:
                arrived = 0
    try:
        new = rerun(wh, st)
    except BlockyardError as exc:
        status = "tampered" if not st.intact else "conclusion-changed"
        rc = Recheck(st, status, None, None, arrived, withdrawn,
                     [f"the analysis cannot be re-run on today's data: {exc}"], error=str(exc), renew=renew)
        return _renew(wh, rc, now) if renew else rc
    new_doc = _clean(new.to_dict())
    new_doc.pop("analysis_id", None)
    new_fp = new.collapsed.fingerprint if getattr(new, "collapsed", None) is not None else None
    changes = []
    old_v, new_v = verdicts_of(st.kind, st.result), verdicts_of(st.kind, new_doc)
    for key in sorted(set(old_v) | set(new_v)):
        if old_v.get(key) != new_v.get(key):
            changes.append(f"{key}: was {_say(old_v.get(key))}, now {_say(new_v.get(key))}")
    moved = explain(wh, st, new) if getattr(new, "collapsed", None) is not None else []
    if not st.intact:
        status = "tampered"
        changes.insert(0, "the stored result does not match its digest: it was edited after it was kept")
    elif changes:
        status = "conclusion-changed"
    elif (new_fp is not None and st.fingerprint not in (new_fp, new.collapsed.fingerprint_v1)) or (
            new_fp is None and _canon(_as_kept(new_doc, st.result)) != _canon(st.result)) or moved:
        status = "data-changed"
    else:
        status = "unchanged"
    rc = Recheck(st, status, new_doc, new_fp, arrived, withdrawn, changes, rerun=new, renew=renew, moved=moved)
    return _renew(wh, rc, now) if renew else rc


def _renew(wh: Warehouse, rc: Recheck, now: float | None) -> Recheck:
    from .errors import DesignError

    st = rc.stored
    if rc.status == "tampered":
        raise InputError(f"analysis {st.id} is tampered (its record does not match its digest), so it is not "
                         "renewed: its claims would move onto numbers nobody kept; run the analysis afresh instead")
    if rc.error is not None:
        raise DesignError(f"analysis {st.id} cannot be re-run on today's data ({rc.error}); nothing was stored")
    if rc.status == "unchanged":
        return rc  # nothing to renew: the stored analysis still stands as kept
    # the same settings it was run with; the retractions it stands after are counted anew
    settings = {k: v for k, v in st.settings.items() if k != "retractions_before"}
    with wh.write() as conn:
        with conn.begin():  # the new analysis and its claims together, or neither
            # PostgreSQL: hold the old row, so that two renewals of it cannot both pass the check
            # below (SQLite's write transaction already admits one writer at a time)
            conn.execute(select(S.analyses.c.id).where(S.analyses.c.id == st.id).with_for_update()).first()
            later = renewed_as(conn, st.id)
            if later is not None:
                raise _renewed_already(st.id, later)
            new_id = _insert(conn, rc.rerun, st.slice, settings, now, renewed_from=st.id)
            rc.claims_moved = _move_claims(conn, st.id, new_id)
    rc.stored_analysis = new_id
    st.renewed_as = new_id
    st.claims = []
    return rc


def _move_claims(conn, old_id: int, new_id: int) -> list[int]:
    """Claims follow the analysis that renews theirs; their text, tags and times stay as kept."""
    ids = [r.id for r in conn.execute(select(S.claims.c.id).where(S.claims.c.analysis_id == old_id)
                                      .order_by(S.claims.c.id))]
    if ids:
        conn.execute(update(S.claims).where(S.claims.c.analysis_id == old_id).values(analysis_id=new_id))
    return ids


def _say(v) -> str:
    if isinstance(v, dict):
        sig = "significant" if v.get("significant") else "not significant"
        sign = {1: "higher", -1: "lower", 0: "equal"}.get(v.get("sign"), "?")
        return f"{sig}, {sign} than the baseline"
    if isinstance(v, bool):
        return "significant" if v else "not significant"
    return "absent" if v is None else str(v)
