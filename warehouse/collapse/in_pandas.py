"""The collapse in pandas: the cells (from the cell summaries for a mean of replicates, else from
the runs) come back as a frame, and the replicate policy, the instances every treatment shares
and the blocks are worked out here. Every setting goes this way; the default one goes through
`in_sql.py` when only the observations are asked for. Both give the same observations, notes and
fingerprint (`tests/test_collapse_in_sql.py`).
"""
from __future__ import annotations

import hashlib
import json
import math

import numpy as np
import pandas as pd
from sqlalchemy import and_, select

from ..errors import DesignError
from ..select.resolve import Dims, cells_can_answer, condition
from ..select.slices import Slice, brief
from ..store import schema as S
from ..store.blocks import W_MOD  # 2**31 - 1: weighted id terms and their sums stay exact in SQL
from .common import (R, Collapsed, _conflict_note, _fingerprint_of, _holes, _instances, _sources,
                     _treatment_key, _with_values, rows_frame)


BASE_COLS = ["n", "n_ok", "sum_ok", "sq_ok", "n_fail", "id_sum", "id_max"]
EXTREME_COLS = ["min_ok", "max_ok", "n_fail_v", "sum_fail_v"]  # only the penalize and worst policies need them


def _pick(aggs, extremes: bool):
    names = BASE_COLS + (EXTREME_COLS if extremes else [])
    by = {a.name: a for a in aggs}
    return [by[n] for n in names], names


def _cell_query(cond, v, extremes: bool):
    from ..store.cells import run_aggregates

    cols, names = _pick(run_aggregates(v), extremes)
    return (select(R.c.solver_id, R.c.instance_id, *cols).where(cond)
            .group_by(R.c.solver_id, R.c.instance_id)), names


def _summary_query(cond, slot: int, extremes: bool):
    """The same cells from the cell summaries: work in proportion to cells, not runs."""
    from ..store.cells import C, cell_aggregates

    cols, names = _pick(cell_aggregates(), extremes)
    return (select(C.c.solver_id, C.c.instance_id, *cols).where(cond, C.c.slot == slot)
            .group_by(C.c.solver_id, C.c.instance_id)), names


def _trimmed(values: np.ndarray, share: float) -> float:
    from scipy.stats import trim_mean

    return float(trim_mean(values, share)) if len(values) else math.nan


def collapse_in_pandas(conn, sl: Slice, dims: Dims, metric: str, slot: int, sense: str, unit: str, st: dict,
                       from_runs: bool = False) -> Collapsed:
    """The collapse of `observations.collapse` in pandas, with the per-instance tables."""
    cond = condition(sl, dims, conn)
    v = R.c[f"v{slot}"]
    extremes = st["failures"] != "drop"
    if st["replicates"] == "mean" and cells_can_answer(sl) and not from_runs:
        table = S.cell_stats
        where = and_(condition(sl, dims, conn, table=table), table.c.slot == slot)
        query, names = _summary_query(condition(sl, dims, conn, table=table), slot, extremes)
    else:
        table, where = R, cond
        query, names = _cell_query(cond, v, extremes)
    agg = rows_frame(conn.execute(query), columns=["solver_id", "instance_id", *names])
    if agg.empty:
        raise DesignError(f"no runs in slice '{brief(sl.text, 200) or '(everything)'}'; see blockyard inventory for what is stored")
    for c in EXTREME_COLS:
        if c not in agg:
            agg[c] = np.nan
    for c in ("n", "n_ok", "n_fail", "id_sum", "id_max"):  # whole numbers (PostgreSQL sums come as Decimals)
        agg[c] = agg[c].astype(np.int64)
    # which hosts and campaigns each treatment's runs came from: a small second query
    hosts, campaigns, sources, periods = _sources(conn, table, where, dims)
    runs_in_slice = int(agg["n"].sum())
    max_run_id = int(agg["id_max"].max())
    notes: list[str] = []
    fail_runs = int(agg["n_fail"].sum())
    # the replicate step
    if st["replicates"] == "mean":
        value = _policy_mean(agg, st, sense, notes)
    else:
        value = _policy_values(conn, cond, v, agg, st, sense, notes)
    agg["value"] = value
    # instance and block labels
    inst = _instances(conn, sorted(agg["instance_id"].unique().tolist()))
    agg = agg.merge(inst, on="instance_id", how="left")
    agg["treatment"] = agg["solver_id"].map({int(s): dims.treatment(int(s)) for s in agg["solver_id"].unique()})
    agg["block"] = agg["group_id"].map({int(g): dims.block(int(g)) for g in agg["group_id"].unique()})
    conflicts = []
    dup = inst.groupby(["group_id", "instance"])["content_hash"].nunique()
    for (gid, name), k in dup[dup > 1].items():
        conflicts.append(_conflict_note(dims, gid, name, k))
    fingerprint = _fingerprint(agg, st, metric, sl)
    # instances -> blocks: within a block, only instances every present treatment has a value for
    valid = agg[agg["value"].notna()]
    treatments = sorted(agg["treatment"].unique(), key=_treatment_key)
    present = valid.groupby("block")["treatment"].nunique()
    per_inst = valid.groupby(["block", "instance_id"])["treatment"].nunique()
    need = present.reindex(per_inst.index.get_level_values(0)).to_numpy()
    common = per_inst[per_inst.to_numpy() == need].reset_index()[["block", "instance_id"]]
    used = valid.merge(common, on=["block", "instance_id"])
    not_common = valid["instance_id"].nunique() - used["instance_id"].nunique()
    if not_common:
        notes.append(f"{not_common} instances left out because not every treatment in their block has a value on them")
    stat = "median" if st["instances"] == "median" else "mean"
    obs = used.groupby(["treatment", "block"], as_index=False).agg(
        value=("value", stat), instances=("instance_id", "nunique"), runs=("n", "sum"), failed=("n_fail", "sum"))
    treatments = _with_values(treatments, obs, notes, metric)  # one with no value is named, not a hole everywhere
    obs, dropped = _holes(obs, sorted(agg["block"].unique()), treatments, st)
    kept_blocks = sorted(obs["block"].unique())
    used_cells = used[used["block"].isin(kept_blocks)]
    if st["failures"] == "drop":
        runs_used = int(used_cells["n_ok"].sum())
    else:
        runs_used = int(used_cells["n"].sum())
    cells = used_cells[["treatment", "block", "instance", "value", "n", "n_ok", "n_fail"]].rename(
        columns={"n": "runs", "n_ok": "ok", "n_fail": "failed"}).reset_index(drop=True)
    if fail_runs and st["failures"] == "drop":
        notes.insert(0, f"{fail_runs} failed runs dropped")
    every = agg[["treatment", "block", "instance", "value", "n", "n_ok", "n_fail"]].rename(
        columns={"n": "runs", "n_ok": "ok", "n_fail": "failed"}).reset_index(drop=True)
    return Collapsed(
        slice_text=sl.text, metric=metric, sense=sense, unit=unit, settings=st, obs=obs, _cells=cells,
        treatments=treatments,
        blocks=kept_blocks, dropped_blocks=dropped, runs_in_slice=runs_in_slice, runs_used=runs_used,
        instances_used=int(used_cells["instance_id"].nunique()), notes=notes, hosts=hosts, campaigns=campaigns,
        sources=sources, periods=periods,
        fingerprint=fingerprint, _earlier=lambda: fingerprint_v1(agg, st, metric, sl), max_run_id=max_run_id, hash_conflicts=conflicts,
        _all_cells=every,
    )


def _policy_mean(agg: pd.DataFrame, st: dict, sense: str, notes: list[str]) -> np.ndarray:
    n_ok = agg["n_ok"].to_numpy(float)
    sum_ok = agg["sum_ok"].fillna(0).to_numpy(float)
    n_fail = agg["n_fail"].to_numpy(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        if st["failures"] == "drop":
            out = np.where(n_ok > 0, sum_ok / n_ok, np.nan)
            lost = int(((n_ok == 0) & (n_fail > 0)).sum())
            if lost:
                notes.append(f"{lost} cells (treatment x instance) had no successful run and are missing")
            return out
        if st["failures"] == "penalize":
            if sense != "min":
                raise DesignError("penalize is for metrics where lower is better (a runtime, say); use --failures worst or drop")
            fallback = np.nanmax(agg["max_ok"].to_numpy(float)) if agg["max_ok"].notna().any() else np.nan
            n_fail_v = agg["n_fail_v"].to_numpy(float)
            sum_fail_v = agg["sum_fail_v"].fillna(0).to_numpy(float)
            pen = st["penalty"] * (sum_fail_v + fallback * (n_fail - n_fail_v))
            total = n_ok + n_fail
            out = np.where(total > 0, (sum_ok + np.where(n_fail > 0, pen, 0)) / total, np.nan)
            touched = int(n_fail.sum())
            if touched:
                notes.append(f"{touched} failed runs counted at {st['penalty']:g} x their recorded value "
                             f"(or {st['penalty']:g} x the slice's largest value where none was recorded) in "
                             f"{int((n_fail > 0).sum())} cells")
            return out
        # worst: the worst successful value seen on the same instance, any treatment
        col = "max_ok" if sense == "min" else "min_ok"
        fn = "max" if sense == "min" else "min"
        worst = agg.groupby("instance_id")[col].transform(fn).to_numpy(float)
        total = n_ok + n_fail
        out = np.where((total > 0) & ~(np.isnan(worst) & (n_fail > 0)), (sum_ok + np.nan_to_num(worst) * n_fail) / total, np.nan)
        out = np.where((n_ok == 0) & np.isnan(worst), np.nan, out)
        touched = int(n_fail.sum())
        if touched:
            notes.append(f"{touched} failed runs counted at the worst value seen on their instance, in {int((n_fail > 0).sum())} cells")
        return out


def _policy_values(conn, cond, v, agg: pd.DataFrame, st: dict, sense: str, notes: list[str]) -> np.ndarray:
    """Median or trimmed mean of replicates: read the slice's values and finish in pandas."""
    rows = rows_frame(conn.execute(select(R.c.solver_id, R.c.instance_id, R.c.status, v).where(cond)),
                        columns=["solver_id", "instance_id", "status", "v"])
    rows["v"] = pd.to_numeric(rows["v"], errors="coerce").astype(float)
    ok = (rows["status"] == 0) & rows["v"].notna()
    if st["failures"] == "drop":
        rows = rows[ok]
        lost = int(((agg["n_ok"] == 0) & (agg["n_fail"] > 0)).sum())
        if lost:
            notes.append(f"{lost} cells (treatment x instance) had no successful run and are missing")
    elif st["failures"] == "penalize":
        if sense != "min":
            raise DesignError("penalize is for metrics where lower is better (a runtime, say); use --failures worst or drop")
        fallback = rows.loc[ok, "v"].max()
        rows.loc[~ok, "v"] = st["penalty"] * rows.loc[~ok, "v"].fillna(fallback)
        notes.append(f"{int((~ok).sum())} failed runs counted at {st['penalty']:g} x their recorded value")
    else:
        okrows = rows[ok]
        worst = okrows.groupby("instance_id")["v"].max() if sense == "min" else okrows.groupby("instance_id")["v"].min()
        rows.loc[~ok, "v"] = rows.loc[~ok, "instance_id"].map(worst)
        notes.append(f"{int((~ok).sum())} failed runs counted at the worst value seen on their instance")
        rows = rows[rows["v"].notna()]
    g = rows.groupby(["solver_id", "instance_id"])["v"]
    if st["replicates"] == "median":
        per = g.median()
    else:
        per = g.apply(lambda s: _trimmed(s.to_numpy(), st["trim"]))
    key = pd.MultiIndex.from_frame(agg[["solver_id", "instance_id"]])
    return per.reindex(key).to_numpy(float)


def _fingerprint(agg: pd.DataFrame, st: dict, metric: str, sl: Slice) -> str:
    """A hash over the runs that contribute: per treatment and block, the run counts (all, with a
    value, failed), the sum of run ids, a weighted sum of run ids, and the cells and instance ids
    (a changed content hash is another instance); plus the metric, the settings and the slice.

    Every part is a whole number summed exactly (the weighted terms are taken modulo 2**31 - 1),
    so the same runs give the same hash whichever way their cells were summed:
    by the loader in numpy, by SQL on another database, or from the runs themselves. Values
    are not hashed: a stored run is never overwritten, so its id stands for its values, and any
    run that arrives, leaves or comes back moves a count or an id sum.
    """
    f = agg[["treatment", "block", "instance_id", "n", "n_ok", "n_fail", "id_sum"]].copy()
    ids, inst = f["id_sum"].to_numpy(np.int64), f["instance_id"].to_numpy(np.int64)
    f["w_ids"] = (ids % W_MOD) * (inst % 9973 + 1) % W_MOD
    g = f.groupby(["treatment", "block"], sort=True).agg(
        n=("n", "sum"), n_ok=("n_ok", "sum"), n_fail=("n_fail", "sum"), id_sum=("id_sum", "sum"),
        w_ids=("w_ids", "sum"), cells=("instance_id", "count"), inst=("instance_id", "sum"))
    return _fingerprint_of([(t, b, r.n, r.n_ok, r.n_fail, r.id_sum, r.w_ids, r.cells, r.inst)
                            for (t, b), r in zip(g.index, g.itertuples(index=False))], st, metric, sl)


def fingerprint_v1(agg: pd.DataFrame, st: dict, metric: str, sl: Slice) -> str:
    """The hash Blockyard 0.1 kept with its analyses (value sums to 10 digits; order-sensitive at
    a rounding edge). Re-checks of analyses kept by 0.1 compare against it."""
    f = agg[["treatment", "block", "instance_id", "n", "n_ok", "n_fail", "id_sum"]].copy()
    w = (f["instance_id"].to_numpy(np.float64) % 9973) + 1.0
    for c in ("sum_ok", "sq_ok"):
        f[c] = np.nan_to_num(agg[c].to_numpy(np.float64))
    f["w_sum"] = f["sum_ok"] * w
    f["w_ids"] = f["id_sum"].to_numpy(np.float64) * w
    g = f.groupby(["treatment", "block"], sort=True).agg(
        n=("n", "sum"), n_ok=("n_ok", "sum"), n_fail=("n_fail", "sum"), id_sum=("id_sum", "sum"),
        sum_ok=("sum_ok", "sum"), sq_ok=("sq_ok", "sum"), w_sum=("w_sum", "sum"), w_ids=("w_ids", "sum"),
        cells=("instance_id", "count"), inst=("instance_id", "sum"))
    rows = []
    for (t, b), r in zip(g.index, g.itertuples(index=False)):
        rows.append([t, b, int(r.n), int(r.n_ok), int(r.n_fail), int(r.id_sum), int(r.cells), int(r.inst), *(float(f"{x:.10g}") for x in (r.sum_ok, r.sq_ok, r.w_sum, r.w_ids))])
    payload = json.dumps({"metric": metric, "settings": st, "slice": sl.to_dict(), "cells": rows}, sort_keys=True)
    return hashlib.sha256(payload.encode()).hexdigest()
