"""Re-running a kept analysis on today's runs: what changed, said in words, and the renewal that
keeps the re-run as a new analysis and moves the claims to it."""
from __future__ import annotations

from dataclasses import dataclass, field

from sqlalchemy import func, select, update

from ..errors import InputError
from ..select.resolve import Dims, condition
from ..store import schema as S
from ..store.connect import Warehouse
from .kept import Stored, canon, clean, get, insert_analysis, renewed_as


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
    if kind == "guard":
        return {r["treatment"]: r.get("verdict") for r in doc.get("verdicts", [])}
    if kind == "plan":
        if isinstance(doc.get("allocation"), dict):
            a = doc["allocation"]
            return {"allocation": [a.get("groups"), a.get("instances_per_group"), a.get("seeds_per_instance")]}
        if isinstance(doc.get("more"), list):
            return {f"more blocks for {r.get('treatment')}": r.get("more_blocks") for r in doc["more"]}
        return {"blocks_needed": doc.get("blocks_needed")}
    if kind == "noise":
        from ..analyses.noise import verdicts

        return verdicts(doc)
    return {}


def rerun(wh: Warehouse, st: Stored):
    """Run a stored analysis again on today's data, with its stored slice and settings."""
    from ..analyses import run_blocktest, run_guard, run_noise, run_plan, run_versus
    from ..collapse.settings import Collapse

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
        if st.kind == "guard":
            return run_guard(conn, st.slice, st.metric, col, opts["baseline"], opts["margin"],
                             opts.get("confidence", 0.95), quick=False)
        if st.kind == "noise":
            return run_noise(conn, st.slice, st.metric, opts.get("confidence", 0.95), opts.get("method", "auto"),
                             opts.get("time_metric"))
    if st.kind == "plan":
        source = src = None
        noise = more = None
        # the analysis a plan stood on, re-run on today's data: --from, --noise or --more
        for key in ("from", "noise", "more"):
            if opts.get(key) is not None:
                src = get(wh, int(opts[key]), with_state=False)
                doc = dict(rerun(wh, src).to_dict())
                doc["analysis_id"], doc["kind"] = src.id, src.kind
                source, noise, more = (doc if key == "from" else None, doc if key == "noise" else None,
                                       doc if key == "more" else None)
        if noise is not None:
            res = run_plan(effect=opts.get("effect"), noise=noise, power=opts.get("power", 0.8),
                           budget_hours=opts.get("budget_hours"), alpha=opts.get("alpha", 0.05),
                           comparisons=opts.get("comparisons", 1), run_seconds=opts.get("run_seconds"),
                           group_seconds=opts.get("group_seconds") or 0.0,
                           instance_seconds=opts.get("instance_seconds") or 0.0, max_groups=opts.get("max_groups"),
                           max_instances=opts.get("max_instances"))
        elif more is not None:
            res = run_plan(more=more, power=opts.get("power", 0.8))
        else:
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
    from ..analyze.planning import more_blocks

    src = res.source
    if not src:
        return
    src.update(state=state, stale=state == "stale", stale_runs=int(stale))
    held = doc.get("blocks") if kind in ("blocktest", "versus", "guard") else None
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
    from ..errors import BlockyardError

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
    new_doc = clean(new.to_dict())
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
            new_fp is None and canon(_as_kept(new_doc, st.result)) != canon(st.result)) or moved:
        status = "data-changed"
    else:
        status = "unchanged"
    rc = Recheck(st, status, new_doc, new_fp, arrived, withdrawn, changes, rerun=new, renew=renew, moved=moved)
    return _renew(wh, rc, now) if renew else rc


def _renew(wh: Warehouse, rc: Recheck, now: float | None) -> Recheck:
    from ..errors import DesignError

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
            new_id = insert_analysis(conn, rc.rerun, st.slice, settings, now, renewed_from=st.id)
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
