"""Block summaries (schema.block_stats): per import, metric slot, treatment and block, the sums
the default collapse needs, made from that import's cell summaries.

A slice of whole campaigns, treatments, families or groups collapses from these rows (a few
hundred per import) instead of summing its cells again, whenever each block's treatments came
from one import and had a value on the same instances (`collapse._collapse_from_blocks` checks
both and otherwise collapses from the cells). Like the cell summaries they hold live runs only:
the loader writes them from the sums it has in memory; retraction, its undo and a load that
skipped runs make them again from the stored cells (`rebuild`).
"""
from __future__ import annotations

import numpy as np
from sqlalchemy import delete, insert, select

from . import schema as S

B = S.block_stats
C = S.cell_stats
W_MOD = 2147483647  # the fingerprint's modulus (2**31 - 1): each weighted id term stays below 2**31
COLUMNS = ["campaign_id", "import_id", "slot", "solver_id", "group_id", "n", "n_ok", "n_fail", "id_sum", "w_ids",
           "cells", "inst", "id_max", "lost", "vcells", "vsum", "v_n", "v_fail", "v_ok", "group_valued"]


def _runs_of(first: np.ndarray, second: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sort order and run starts of rows grouped by (first, second), two arrays of ids < 2**31."""
    if len(first) and max(int(first.max()), int(second.max())) >= 2**31:  # (ids that large: sort both)
        order = np.lexsort((second, first))
        a, b = first[order], second[order]
        change = np.ones(len(a), dtype=bool)
        change[1:] = (a[1:] != a[:-1]) | (b[1:] != b[:-1])
        return order, np.flatnonzero(change)
    code = (first.astype(np.int64) << 32) | second.astype(np.int64)
    if len(code) < 2 or bool((code[1:] >= code[:-1]).all()):  # the loader's cells come sorted
        order = np.arange(len(code))
    else:
        order = np.argsort(code, kind="stable")
    sc = code[order]
    change = np.ones(len(sc), dtype=bool)
    change[1:] = sc[1:] != sc[:-1]
    return order, np.flatnonzero(change)


def _lookup(group_of) -> np.ndarray:
    """Instance id -> group id as an array indexed by instance id (-1 where unknown)."""
    if isinstance(group_of, np.ndarray):
        return group_of
    table = np.full(max(group_of, default=0) + 1, -1, dtype=np.int64)
    table[np.fromiter(group_of.keys(), dtype=np.int64)] = np.fromiter(group_of.values(), dtype=np.int64)
    return table


def from_cells(campaign_id: int, import_id: int, slot: int, solver: np.ndarray, instance: np.ndarray,
               sums: dict[str, np.ndarray], group_of) -> list[tuple]:
    """The block rows of one import and slot from its cell rows (one per solver, instance and host).

    `sums` holds each cell row's n, n_ok, sum_ok, n_fail, id_sum and id_max; `group_of` takes an
    instance id to its group id. A cell is a solver and an instance (its hosts summed), as the
    collapse sees it; its value is the mean of its successful runs.
    """
    if len(solver) == 0:
        return []
    solver = np.asarray(solver, dtype=np.int64)
    instance = np.asarray(instance, dtype=np.int64)
    order, starts = _runs_of(solver, instance)
    cell_solver, cell_inst = solver[order[starts]], instance[order[starts]]

    def per_cell(name: str, how=np.add) -> np.ndarray:
        col = np.asarray(sums[name])[order]
        return how.reduceat(col, starts)

    n = per_cell("n").astype(np.int64)
    n_ok = per_cell("n_ok").astype(np.int64)
    n_fail = per_cell("n_fail").astype(np.int64)
    id_sum = per_cell("id_sum").astype(np.int64)
    id_max = per_cell("id_max", np.maximum).astype(np.int64)
    sum_ok = per_cell("sum_ok").astype(np.float64)
    has = n_ok > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        value = np.where(has, sum_ok / np.where(has, n_ok, 1), 0.0)
    w = (id_sum % W_MOD) * (cell_inst % 9973 + 1) % W_MOD
    group = _lookup(group_of)[cell_inst]
    lost = (~has) & (n_fail > 0)
    # per group: the instances some solver of this import has a value on
    vg, vi = group[has], cell_inst[has]
    if len(vi) and max(int(vg.max()), int(vi.max())) >= 2**31:
        valued_groups = np.unique(np.stack([vg, vi], axis=1), axis=0)[:, 0]
    else:
        valued_groups = np.unique((vg << 32) | vi) >> 32
    gv_groups, gv_counts = np.unique(valued_groups, return_counts=True)
    group_valued = dict(zip(gv_groups.tolist(), gv_counts.tolist()))
    border, bstarts = _runs_of(cell_solver, group)

    def per_block(col: np.ndarray, how=np.add) -> list:
        return how.reduceat(np.asarray(col)[border], bstarts).tolist()

    hv = has.astype(np.int64)
    out = zip(cell_solver[border[bstarts]].tolist(), group[border[bstarts]].tolist(),
              per_block(n), per_block(n_ok), per_block(n_fail), per_block(id_sum), per_block(w),
              per_block(np.ones(len(n), dtype=np.int64)), per_block(cell_inst), per_block(id_max, np.maximum),
              per_block(lost.astype(np.int64)), per_block(hv), per_block(np.where(has, value, 0.0)),
              per_block(n * hv), per_block(n_fail * hv), per_block(n_ok * hv))
    rows = []
    for (s, g, bn, bok, bfail, bids, bw, bcells, binst, bmax, blost, vc, vs, vn, vf, vo) in out:
        rows.append((int(campaign_id), int(import_id), int(slot), s, g, bn, bok, bfail, bids, bw % W_MOD, bcells,
                     binst, bmax, blost, vc, float(vs) if vc else None, vn, vf, vo, int(group_valued.get(g, 0))))
    return rows


def write(conn, rows: list[tuple]) -> None:
    if not rows:
        return
    if conn.dialect.name == "sqlite":
        conn.execute(insert(B), [dict(zip(COLUMNS, r)) for r in rows])
        return
    # a server: one COPY, not a statement's parameters per row
    cur = conn.connection.driver_connection.cursor()
    with cur.copy(f"COPY block_stats ({', '.join(COLUMNS)}) FROM STDIN") as cp:
        for r in rows:
            cp.write_row(r)


def rebuild(conn, import_ids) -> int:
    """Make the block rows of these imports again from their stored cell summaries."""
    ids = sorted({int(i) for i in import_ids})
    if not ids:
        return 0
    conn.execute(delete(B).where(B.c.import_id.in_(ids)))
    written = 0
    for import_id in ids:
        out = rows_of(conn, import_id)
        write(conn, out)
        written += len(out)
    return written


def rows_of(conn, import_id: int) -> list[tuple]:
    """The block rows one import's stored cell summaries make (read only: `rebuild` writes them,
    `store.audit` compares them with the stored ones)."""
    inst = S.instances
    rows = conn.execute(
        select(C.c.campaign_id, C.c.slot, C.c.solver_id, C.c.instance_id, inst.c.group_id, C.c.n, C.c.n_ok,
               C.c.sum_ok, C.c.n_fail, C.c.id_sum, C.c.id_max)
        .join_from(C, inst, inst.c.id == C.c.instance_id).where(C.c.import_id == import_id)).all()
    if not rows:
        return []
    cols = list(zip(*rows))
    campaign = int(cols[0][0])
    slot = np.asarray(cols[1], dtype=np.int64)
    solver = np.asarray(cols[2], dtype=np.int64)
    instance = np.asarray(cols[3], dtype=np.int64)
    group_of = _lookup(dict(zip(map(int, cols[3]), map(int, cols[4]))))
    sums = {"n": np.asarray(cols[5], dtype=np.int64), "n_ok": np.asarray(cols[6], dtype=np.int64),
            "sum_ok": np.asarray([0.0 if v is None else float(v) for v in cols[7]], dtype=np.float64),
            "n_fail": np.asarray(cols[8], dtype=np.int64), "id_sum": np.asarray([int(v) for v in cols[9]], dtype=np.int64),
            "id_max": np.asarray([int(v) for v in cols[10]], dtype=np.int64)}
    out = []
    for s in np.unique(slot).tolist():
        pick = slot == s
        out += from_cells(campaign, import_id, s, solver[pick], instance[pick],
                          {k: v[pick] for k, v in sums.items()}, group_of)
    return out


def from_sums(sums, campaign_id: int, import_id: int, group_of: dict[int, int]) -> list[tuple]:
    """The block rows of a load from its cell sums in memory (ingest.cellsums.CellSums, merged)."""
    out = []
    group_of = _lookup(group_of)
    for slot in sorted(sums.parts):
        sums._merge(slot)
        keys, s = sums.parts[slot][0]
        out += from_cells(campaign_id, import_id, slot, keys[:, 0], keys[:, 1], s, group_of)
    return out
