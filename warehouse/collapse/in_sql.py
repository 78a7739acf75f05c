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
            rows = _columns(conn.execute(_cells_statement(where)), ROWS)
        except DBAPIError:  # an integer sum past 64 bits, say: the pandas way has no such limit
            conn.rollback()
            return None
    if rows is None:
        raise DesignError(f"no runs in slice '{brief(sl.text, 200) or '(everything)'}'; see blockyard inventory for what is stored")
    solvers, s_code = np.unique(rows["solver_id"], return_inverse=True)
    groups, g_code = np.unique(rows["group_id"], return_inverse=True)
    labels = np.array([dims.treatment(int(s)) for s in solvers], dtype=object)
    if len(set(labels)) != len(labels):
        return None  # two solvers under one label: the pandas way groups them
    blocks = np.array([dims.block(int(g)) for g in groups], dtype=object)
    t_of, b_of = labels[s_code], blocks[g_code]
    conflicts = _hash_conflicts(conn, where, dims)
    notes: list[str] = []
    lost = int(rows["lost"].sum())
    if lost:
        notes.append(f"{lost} cells (treatment x instance) had no successful run and are missing")
    fingerprint = _fingerprint_of(list(zip(t_of.tolist(), b_of.tolist(), *(rows[k].tolist() for k in (
        "n", "n_ok", "n_fail", "id_sum", "w_ids", "cells", "inst")))), st, metric, sl)
    got = ~np.isnan(rows["value"])
    obs = pd.DataFrame({
        "treatment": t_of[got].tolist(), "block": b_of[got].tolist(), "value": rows["value"][got],
        "instances": rows["instances"][got], "runs": rows["runs"][got], "failed": rows["failed"][got],
        "ok": rows["ok"][got]})
    obs = obs.sort_values(["treatment", "block"], kind="stable").reset_index(drop=True)
    per_block = obs.groupby("block")["instances"].first()  # every treatment of a block has its common instances
    not_common = int(rows["valid_instances"][0]) - int(per_block.sum())
    if not_common:
        notes.append(f"{not_common} instances left out because not every treatment in their block has a value on them")
    treatments = _with_values(sorted(labels.tolist(), key=_treatment_key), obs, notes, metric)
    obs, dropped = _holes(obs, sorted(set(blocks.tolist())), treatments, st)
    kept_blocks = sorted(obs["block"].unique())
    runs_used = int(obs["ok"].sum())
    instances_used = int(per_block.reindex(kept_blocks).sum()) if kept_blocks else 0
    obs = obs.drop(columns="ok")
    fail_runs = int(rows["n_fail"].sum())
    if fail_runs:
        notes.insert(0, f"{fail_runs} failed runs dropped")
    hosts, campaigns, sources, periods = _sources(conn, C, where, dims)
    return Collapsed(
        slice_text=sl.text, metric=metric, sense=sense, unit=unit, settings=st, obs=obs, _cells=None,
        treatments=treatments,
        blocks=kept_blocks, dropped_blocks=dropped, runs_in_slice=int(rows["n"].sum()), runs_used=runs_used,
        instances_used=instances_used, notes=notes, hosts=hosts, campaigns=campaigns, sources=sources, periods=periods,
        fingerprint=fingerprint, max_run_id=int(rows["id_max"].max()), hash_conflicts=conflicts)


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


def _rows_from_blocks(conn, sl: Slice, dims: Dims, slot: int) -> dict | None:
    """The rows of the collapse statement read from the block summaries (schema 0006), as
    `_columns` gives them, or None when they cannot give them exactly and the cells must be summed.

    They can when the slice takes whole campaigns, treatments and blocks, no treatment's block
    came from two imports (a cell split between imports sums across them), and in every block
    the treatments with a value came from one import and each has a value on every instance any
    solver of that import has one on: then the instances every treatment shares are all of them,
    and each block row is the observation as it stands.
    """
    from ..select.resolve import blocks_can_answer

    if not blocks_can_answer(sl):
        return None
    B = S.block_stats
    names = ["solver_id", "group_id", "import_id", "n", "n_ok", "n_fail", "id_sum", "w_ids", "cells", "inst", "id_max",
             "lost", "vcells", "vsum", "v_n", "v_fail", "v_ok", "group_valued"]
    got = _columns(conn.execute(select(*(B.c[k] for k in names)).where(condition(sl, dims, conn, table=B),
                                                                       B.c.slot == slot)),
                   {k: (float if k == "vsum" else int) for k in names})
    if got is None:
        return None
    key = got["solver_id"] * (int(got["group_id"].max()) + 1) + got["group_id"]
    if len(np.unique(key)) != len(key):
        return None
    valued = got["vcells"] > 0
    if (got["vcells"][valued] != got["group_valued"][valued]).any():
        return None
    per_group = pd.DataFrame({"group": got["group_id"][valued], "import": got["import_id"][valued],
                              "valued": got["group_valued"][valued]}).drop_duplicates()
    if per_group["group"].duplicated().any():  # the valued treatments of a block came from two imports
        return None
    out = {k: got[k] for k in ("solver_id", "group_id", "n", "n_ok", "n_fail", "id_sum", "w_ids", "cells", "inst",
                               "id_max", "lost")}
    with np.errstate(invalid="ignore", divide="ignore"):
        out["value"] = np.where(valued, got["vsum"] / np.where(valued, got["vcells"], 1), np.nan)
    out.update(instances=got["vcells"], runs=got["v_n"], failed=got["v_fail"], ok=got["v_ok"],
               valid_instances=np.full(len(key), int(per_group["valued"].sum()), dtype=np.int64))
    return out


#: the collapse statement's columns and their kinds
ROWS = {"solver_id": int, "group_id": int, "n": int, "n_ok": int, "n_fail": int, "id_sum": int, "w_ids": int,
        "cells": int, "inst": int, "id_max": int, "lost": int, "value": float, "instances": int, "runs": int,
        "failed": int, "ok": int, "valid_instances": int}


def _columns(result, kinds: dict) -> dict | None:
    """A result's rows as one numpy array per column (None when there are none): whole numbers
    exactly as int64 (PostgreSQL's sums come as Decimals; a sum over no row, NULL, as 0), the
    rest as float64 with NaN for NULL. One numpy call takes the rows apart, not a loop over them."""
    rows = result.cursor.fetchall() if getattr(result, "cursor", None) is not None else [tuple(r) for r in result]
    result.close()
    if not rows:
        return None
    grid = np.empty((len(rows), len(kinds)), dtype=object)
    grid[:] = rows
    out = {}
    for i, (k, kind) in enumerate(kinds.items()):
        col = grid[:, i]
        empty = col == None  # noqa: E711 (element-wise)
        if kind is int:
            out[k] = np.where(empty, 0, col).astype(np.int64) if empty.any() else col.astype(np.int64)
        else:
            out[k] = np.where(empty, np.nan, col).astype(np.float64)
    return out
