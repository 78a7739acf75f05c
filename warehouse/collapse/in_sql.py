"""The default collapse in SQL (mean of replicates and of instances, failures dropped): one
statement over the cell summaries, or the block summaries read as they stand where they give the
same observations. `tests/test_collapse_in_sql.py` holds it beside the pandas way (`in_pandas.py`):
a change to one is a change to both.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from sqlalchemy import and_, case, func, select

from ..errors import DesignError
from ..select.resolve import Dims, condition
from ..select.slices import Slice, brief
from ..store import schema as S
from ..store.blocks import W_MOD  # 2**31 - 1: weighted id terms and their sums stay exact in SQL
from .common import Collapsed, _fingerprint_of, _hash_conflicts, _holes, _sources, _treatment_key, _with_values


def collapse_in_sql(conn, sl: Slice, dims: Dims, metric: str, slot: int, sense: str, unit: str,
                     st: dict) -> Collapsed | None:
    """The default collapse in SQL: from the block summaries where they serve the slice, else as
    one statement over the cell summaries (see `observations.collapse`).

    Per treatment and block it returns the fingerprint's sums over every cell and, over the
    instances every treatment present in the block has a value for, the observation. None when
    the database cannot do it this way (the caller then collapses in pandas).
    """
    from sqlalchemy.exc import DBAPIError

    C = S.cell_stats
    where = and_(condition(sl, dims, conn, table=C), C.c.slot == slot)
    rows = _rows_from_blocks(conn, sl, dims, slot)
    if rows is None:
        try:
            rows = conn.execute(_cells_statement(where)).all()
        except DBAPIError:  # an integer sum past 64 bits, say: the pandas way has no such limit
            conn.rollback()
            return None
    if not rows:
        raise DesignError(f"no runs in slice '{brief(sl.text, 200) or '(everything)'}'; see blockyard inventory for what is stored")
    label = {int(sid): dims.treatment(int(sid)) for sid in {r.solver_id for r in rows}}
    if len(set(label.values())) != len(label):
        return None  # two solvers under one label: the pandas way groups them
    block = {int(g): dims.block(int(g)) for g in {r.group_id for r in rows}}
    conflicts = _hash_conflicts(conn, where, dims)
    notes: list[str] = []
    lost = sum(int(r.lost) for r in rows)
    if lost:
        notes.append(f"{lost} cells (treatment x instance) had no successful run and are missing")
    fingerprint = _fingerprint_of([(label[int(r.solver_id)], block[int(r.group_id)], r.n, r.n_ok, r.n_fail, r.id_sum,
                                    r.w_ids, r.cells, r.inst) for r in rows], st, metric, sl)
    got = [r for r in rows if r.value is not None]
    obs = pd.DataFrame({
        "treatment": [label[int(r.solver_id)] for r in got], "block": [block[int(r.group_id)] for r in got],
        "value": np.array([float(r.value) for r in got], dtype=float),
        "instances": np.array([int(r.instances) for r in got], dtype=np.int64),
        "runs": np.array([int(r.runs) for r in got], dtype=np.int64),
        "failed": np.array([int(r.failed) for r in got], dtype=np.int64),
        "ok": np.array([int(r.ok) for r in got], dtype=np.int64)})
    obs = obs.sort_values(["treatment", "block"], kind="stable").reset_index(drop=True)
    per_block = obs.groupby("block")["instances"].first()  # every treatment of a block has its common instances
    not_common = int(rows[0].valid_instances) - int(per_block.sum())
    if not_common:
        notes.append(f"{not_common} instances left out because not every treatment in their block has a value on them")
    treatments = _with_values(sorted(set(label.values()), key=_treatment_key), obs, notes, metric)
    obs, dropped = _holes(obs, sorted(set(block.values())), treatments, st)
    kept_blocks = sorted(obs["block"].unique())
    runs_used = int(obs["ok"].sum())
    instances_used = int(per_block.reindex(kept_blocks).sum()) if kept_blocks else 0
    obs = obs.drop(columns="ok")
    fail_runs = sum(int(r.n_fail) for r in rows)
    if fail_runs:
        notes.insert(0, f"{fail_runs} failed runs dropped")
    hosts, campaigns, sources, periods = _sources(conn, C, where, dims)
    return Collapsed(
        slice_text=sl.text, metric=metric, sense=sense, unit=unit, settings=st, obs=obs, _cells=None,
        treatments=treatments,
        blocks=kept_blocks, dropped_blocks=dropped, runs_in_slice=sum(int(r.n) for r in rows), runs_used=runs_used,
        instances_used=instances_used, notes=notes, hosts=hosts, campaigns=campaigns, sources=sources, periods=periods,
        fingerprint=fingerprint, max_run_id=max(int(r.id_max) for r in rows), hash_conflicts=conflicts)


def _cells_statement(where):
    """The collapse statement over the slice's cell summaries (`where`): per treatment and block,
    the fingerprint's sums over every cell and the observation over the instances every
    treatment present in the block has a value for."""
    C, I = S.cell_stats, S.instances
    c = (select(C.c.solver_id, C.c.instance_id, func.sum(C.c.n).label("n"), func.sum(C.c.n_ok).label("n_ok"),
                func.sum(C.c.sum_ok).label("sum_ok"), func.sum(C.c.n_fail).label("n_fail"),
                func.sum(C.c.id_sum).label("id_sum"), func.max(C.c.id_max).label("id_max"))
         .where(where).group_by(C.c.solver_id, C.c.instance_id)).cte("c")
    v = (select(c.c.solver_id, I.c.group_id, c.c.instance_id, c.c.n, c.c.n_ok, c.c.n_fail, c.c.id_sum, c.c.id_max,
                case((c.c.n_ok > 0, c.c.sum_ok * 1.0 / c.c.n_ok), else_=None).label("value"))
         .join_from(c, I, I.c.id == c.c.instance_id)).cte("v")
    has_value = v.c.value.is_not(None)
    # per instance, the treatments with a value on it; per block, the treatments with any value
    per_inst = (select(v.c.instance_id, v.c.group_id, func.count().label("k")).where(has_value)
                .group_by(v.c.instance_id, v.c.group_id)).cte("per_inst")
    present = (select(v.c.group_id, func.count(func.distinct(v.c.solver_id)).label("k")).where(has_value)
               .group_by(v.c.group_id)).cte("present")
    common = (select(per_inst.c.instance_id)
              .join_from(per_inst, present, and_(present.c.group_id == per_inst.c.group_id,
                                                 present.c.k == per_inst.c.k))).cte("common")
    m = common.alias("m")
    used = m.c.instance_id.is_not(None)

    def where_used(col):
        return case((used, col), else_=None)

    # one pass: the fingerprint's sums over every cell, the observation over the common instances
    query = (select(v.c.solver_id, v.c.group_id, func.sum(v.c.n).label("n"), func.sum(v.c.n_ok).label("n_ok"),
                    func.sum(v.c.n_fail).label("n_fail"), func.sum(v.c.id_sum).label("id_sum"),
                    func.sum((v.c.id_sum % W_MOD) * (v.c.instance_id % 9973 + 1) % W_MOD).label("w_ids"),
                    func.count().label("cells"), func.sum(v.c.instance_id).label("inst"),
                    func.max(v.c.id_max).label("id_max"),
                    func.sum(case(((v.c.n_ok == 0) & (v.c.n_fail > 0), 1), else_=0)).label("lost"),
                    func.avg(where_used(v.c.value)).label("value"), func.count(m.c.instance_id).label("instances"),
                    func.sum(where_used(v.c.n)).label("runs"), func.sum(where_used(v.c.n_fail)).label("failed"),
                    func.sum(where_used(v.c.n_ok)).label("ok"),
                    select(func.count()).select_from(per_inst).scalar_subquery().label("valid_instances"))
             .join_from(v, m, and_(m.c.instance_id == v.c.instance_id, has_value), isouter=True)
             .group_by(v.c.solver_id, v.c.group_id))
    return query


def _rows_from_blocks(conn, sl: Slice, dims: Dims, slot: int) -> list | None:
    """The rows of the collapse statement read from the block summaries (schema 0006), or None
    when they cannot give them exactly and the cells must be summed.

    They can when the slice takes whole campaigns, treatments and blocks, no treatment's block
    came from two imports (a cell split between imports sums across them), and in every block
    the treatments with a value came from one import and each has a value on every instance any
    solver of that import has one on: then the instances every treatment shares are all of them,
    and each block row is the observation as it stands.
    """
    from types import SimpleNamespace

    from ..select.resolve import blocks_can_answer

    if not blocks_can_answer(sl):
        return None
    B = S.block_stats
    got = conn.execute(select(B).where(condition(sl, dims, conn, table=B), B.c.slot == slot)).all()
    if not got:
        return None
    seen: set[tuple[int, int]] = set()
    source: dict[int, tuple[int, int]] = {}  # group -> (import, instances valued there)
    for r in got:
        key = (int(r.solver_id), int(r.group_id))
        if key in seen:
            return None
        seen.add(key)
        if r.vcells:
            if int(r.vcells) != int(r.group_valued):
                return None
            if source.setdefault(int(r.group_id), (int(r.import_id), int(r.group_valued)))[0] != int(r.import_id):
                return None
    valid = sum(k for _, k in source.values())
    return [SimpleNamespace(
        solver_id=r.solver_id, group_id=r.group_id, n=int(r.n), n_ok=int(r.n_ok), n_fail=int(r.n_fail),
        id_sum=int(r.id_sum), w_ids=int(r.w_ids), cells=int(r.cells), inst=int(r.inst), id_max=int(r.id_max),
        lost=int(r.lost), value=(float(r.vsum) / int(r.vcells)) if r.vcells else None, instances=int(r.vcells),
        runs=int(r.v_n), failed=int(r.v_fail), ok=int(r.v_ok), valid_instances=valid) for r in got]
