"""Retracting runs (they stay in the warehouse, marked, and leave every summary) and undoing a
retraction, with the analyses each one touches."""
from __future__ import annotations

import time

from sqlalchemy import and_, func, insert, or_, select, update

from ..errors import InputError
from ..select.resolve import Dims, condition
from ..select.slices import Slice
from ..store import cells
from ..store import schema as S
from ..store.connect import Warehouse
from .kept import MAX_ID, from_row


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
            if wh.dialect == "postgresql":  # loads and retractions take turns (a load's keys stay as it proved them)
                conn.exec_driver_sql("LOCK TABLE runs IN SHARE ROW EXCLUSIVE MODE")
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
            st = from_row(row, True)
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
                from ..ingest.reload import retract_command

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
    from ..store.ranges import id_ranges

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
