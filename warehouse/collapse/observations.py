"""Collapse: replicates to one value per instance, instances to one value per block.

The observation table has one row per treatment and block; the number of observations for
tests and power is the number of blocks, never the number of runs. Failed runs are handled by a
declared policy, and every step reports what it touched.

With the default settings (mean of replicates) the whole replicate step runs in SQL as one
GROUP BY over the slice; median and trimmed means read the slice's values and finish in pandas.
For blocktest and versus with all the defaults (mean of replicates and of instances, failures
dropped) on a slice the cell summaries answer, the instance step runs in SQL too, and only the
observations come back (`collapse(..., cells=False)`).
"""
from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import pandas as pd
from sqlalchemy import and_, case, func, select

from ..errors import DesignError, InputError
from ..select.resolve import Dims, cells_can_answer, condition
from ..select.slices import Slice, brief
from .settings import Collapse
from ..store import schema as S
from ..store.blocks import W_MOD  # 2**31 - 1: weighted id terms and their sums stay exact in SQL

R = S.runs


@dataclass
class Collapsed:
    slice_text: str
    metric: str
    sense: str  # min or max
    unit: str
    settings: dict
    obs: pd.DataFrame  # treatment, block, value, instances, runs, failed
    _cells: pd.DataFrame | None  # treatment, block, instance, value, runs, ok, failed (see `cells`)
    treatments: list[str]
    blocks: list[str]  # blocks kept
    dropped_blocks: list[dict]  # {"block", "missing": [...]}
    runs_in_slice: int
    runs_used: int
    instances_used: int
    notes: list[str]
    hosts: dict[str, list[str]]  # treatment -> hosts its runs came from
    campaigns: dict[str, list[str]]  # treatment -> campaigns
    fingerprint: str
    max_run_id: int
    hash_conflicts: list[str] = field(default_factory=list)
    # treatment -> [(campaign, host, runs)]: where each treatment's runs in the slice came from
    sources: dict[str, list[tuple[str, str, int]]] = field(default_factory=dict)
    _earlier: Callable[[], str] | None = None  # makes the 0.1 hash of the same runs (pandas way only)
    _all_cells: pd.DataFrame | None = None  # see `every_cell` (pandas way only)

    @property
    def fingerprint_v1(self) -> str:
        """The hash Blockyard 0.1 kept for these runs ("" from the SQL collapse), made when asked:
        only a re-check of an analysis kept by 0.1 needs it."""
        return self._earlier() if self._earlier is not None else ""

    @property
    def cells(self) -> pd.DataFrame:
        """One row per treatment, block and instance; only from collapse(..., cells=True)."""
        if self._cells is None:
            raise RuntimeError("this collapse left out the per-instance table; collapse with cells=True")
        return self._cells

    @property
    def every_cell(self) -> pd.DataFrame:
        """Every treatment and instance of the slice with runs, before instances are matched up:
        the columns of `cells`, with no value (NaN) where no run gave one (every run failed, under
        --failures drop). A performance profile counts those as never solved; only from
        collapse(..., cells=True)."""
        if self._all_cells is None:
            raise RuntimeError("this collapse left out the per-instance table; collapse with cells=True")
        return self._all_cells

    @property
    def complete(self) -> bool:
        counts = self.obs.groupby("block")["treatment"].nunique()
        return bool(len(counts)) and bool((counts == len(self.treatments)).all())


def parse_settings(c: Collapse) -> dict:
    rep = c.replicates
    trim = None
    if rep.startswith("trimmed"):
        _, _, frac = rep.partition(":")
        try:
            trim = float(frac or 0.1)
        except ValueError:
            raise InputError(f"--replicates {rep}: write trimmed:0.1 (the share cut from each end)") from None
        if not 0 <= trim < 0.5:
            raise InputError(f"--replicates {rep}: the trimmed share must be at least 0 and below 0.5")
    elif rep not in ("mean", "median"):
        raise InputError(f"--replicates {rep}: choose mean, median or trimmed:0.1")
    if c.instances not in ("mean", "median"):
        raise InputError(f"--instances {c.instances}: choose mean or median")
    fail, _, factor = c.failures.partition(":")
    if fail not in ("drop", "penalize", "worst"):
        raise InputError(f"--failures {c.failures}: choose drop, penalize:FACTOR (e.g. penalize:10) or worst")
    pen = None
    if fail == "penalize":
        try:
            pen = float(factor or 10)
        except ValueError:
            raise InputError(f"--failures {c.failures}: the factor must be a number, e.g. penalize:10") from None
        if pen <= 0:
            raise InputError(f"--failures {c.failures}: the factor must be positive")
    if c.holes not in ("drop", "keep"):
        raise InputError(f"--holes {c.holes}: choose drop or keep")
    return {"replicates": "trimmed" if trim is not None else rep, "trim": trim, "instances": c.instances,
            "failures": fail, "penalty": pen, "holes": c.holes}


def _metric(dims: Dims, metric: str | None) -> tuple[str, int, str, str]:
    if not dims.metrics:
        raise DesignError("the warehouse holds no metrics yet; load some runs first")
    if metric is None:
        if len(dims.metrics) == 1:
            metric = next(iter(dims.metrics))
        else:
            raise InputError(f"say which metric: --metric {' | '.join(sorted(dims.metrics))}")
    if metric not in dims.metrics:
        from difflib import get_close_matches

        near = get_close_matches(metric, list(dims.metrics), n=2)
        hint = f" (did you mean {' or '.join(near)}?)" if near else ""
        raise InputError(f"no metric '{metric}' in this warehouse{hint}; known: {', '.join(sorted(dims.metrics))}")
    _, slot, sense, unit = dims.metrics[metric]
    return metric, slot, sense, unit


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


def collapse(conn, sl: Slice, metric: str | None, settings: Collapse, cells: bool = True,
             from_runs: bool = False) -> Collapsed:
    """One observation per treatment and block for `metric` over the runs of slice `sl`.

    With `cells=False` the per-instance table is not needed: for the default settings (mean of
    replicates and of instances, failures dropped) on a slice the cell summaries can answer, the
    whole collapse then runs in SQL, and only the observations (one row per treatment and block)
    come back. Both ways give the same observations, notes and fingerprint (the tests hold them
    side by side); `Collapsed.cells` is then not available.

    With `from_runs=True` the summaries are not read at all: the runs themselves are collapsed
    (a recheck does this, so that an edit made to the runs outside Blockyard shows).
    """
    st = parse_settings(settings)
    dims = Dims.load(conn)
    metric, slot, sense, unit = _metric(dims, metric)
    if not cells and not from_runs and st["replicates"] == "mean" and st["instances"] == "mean" and st["failures"] == "drop" \
            and cells_can_answer(sl):
        quick = _collapse_in_sql(conn, sl, dims, metric, slot, sense, unit, st)
        if quick is not None:
            return quick
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
    hosts, campaigns, sources = _sources(conn, table, where, dims)
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
        sources=sources,
        fingerprint=fingerprint, _earlier=lambda: fingerprint_v1(agg, st, metric, sl), max_run_id=max_run_id, hash_conflicts=conflicts,
        _all_cells=every,
    )


def _collapse_in_sql(conn, sl: Slice, dims: Dims, metric: str, slot: int, sense: str, unit: str,
                     st: dict) -> Collapsed | None:
    """The default collapse in SQL: from the block summaries where they serve the slice, else as
    one statement over the cell summaries (see `collapse`).

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
    hosts, campaigns, sources = _sources(conn, C, where, dims)
    return Collapsed(
        slice_text=sl.text, metric=metric, sense=sense, unit=unit, settings=st, obs=obs, _cells=None,
        treatments=treatments,
        blocks=kept_blocks, dropped_blocks=dropped, runs_in_slice=sum(int(r.n) for r in rows), runs_used=runs_used,
        instances_used=instances_used, notes=notes, hosts=hosts, campaigns=campaigns, sources=sources,
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


def cell_counts(conn, sl: Slice, metric: str | None, from_runs: bool = False) -> pd.DataFrame:
    """Runs and failed runs per treatment and instance of slice `sl`, every cell (a treatment
    whose runs all failed too): what the failures part of an analysis counts. The same cells the
    collapse reads (the cell summaries for `metric`'s slot where they answer the slice, else the
    runs; `from_runs` as in `collapse`), without the values: one small grouped query.

    Columns: treatment, instance (the instance id: an instance name seen with two content hashes
    is two instances, as in the collapse), runs, failed. Two solvers under one label give two rows
    for an instance; the failures part adds them up."""
    dims = Dims.load(conn)
    metric, slot, _, _ = _metric(dims, metric)
    if cells_can_answer(sl) and not from_runs:
        C = S.cell_stats
        query = (select(C.c.solver_id, C.c.instance_id, func.sum(C.c.n), func.sum(C.c.n_fail))
                 .where(condition(sl, dims, conn, table=C), C.c.slot == slot)
                 .group_by(C.c.solver_id, C.c.instance_id))
    else:
        query = (select(R.c.solver_id, R.c.instance_id, func.count(), func.sum(case((R.c.status != 0, 1), else_=0)))
                 .where(condition(sl, dims, conn)).group_by(R.c.solver_id, R.c.instance_id))
    got = rows_frame(conn.execute(query), columns=["solver_id", "instance_id", "runs", "failed"])
    if got.empty:
        return pd.DataFrame({c: [] for c in ("treatment", "instance", "runs", "failed")})
    label = {int(s): dims.treatment(int(s)) for s in got["solver_id"].unique()}
    order = {t: i for i, t in enumerate(sorted(set(label.values()), key=_treatment_key))}
    out = pd.DataFrame({"treatment": got["solver_id"].map(lambda s: label[int(s)]),
                        "instance": got["instance_id"].astype(np.int64),
                        "runs": got["runs"].astype(np.int64), "failed": got["failed"].astype(np.int64)})
    # in natural version order, so that the failures part lists the treatments as the analysis does
    return out.iloc[out["treatment"].map(order).argsort(kind="stable")].reset_index(drop=True)


def _holes(obs: pd.DataFrame, all_blocks: list[str], treatments: list[str], st: dict) -> tuple[pd.DataFrame, list[dict]]:
    """The blocks some treatment has no observation in; with holes=drop they leave the table."""
    have = obs.groupby("block")["treatment"].apply(set).to_dict()
    dropped = []
    for b in all_blocks:
        missing = [t for t in treatments if t not in have.get(b, set())]
        if missing:
            dropped.append({"block": b, "missing": missing})
    if st["holes"] == "drop" and dropped:
        gone = {d["block"] for d in dropped}
        obs = obs[~obs["block"].isin(gone)]
    return obs.reset_index(drop=True), dropped


def _hash_conflicts(conn, where, dims: Dims) -> list[str]:
    """Instances of the slice that share a block and a name but not a content hash."""
    I = S.instances
    clash = (select(I.c.group_id, I.c.name).group_by(I.c.group_id, I.c.name)
             .having(func.count(func.distinct(I.c.content_hash)) > 1))
    if conn.execute(clash.limit(1)).first() is None:  # none anywhere: nothing to look for in the slice
        return []
    ids = select(S.cell_stats.c.instance_id).where(where).distinct().scalar_subquery()
    rows = conn.execute(select(I.c.group_id, I.c.name, func.count(func.distinct(I.c.content_hash)))
                        .where(I.c.id.in_(ids)).group_by(I.c.group_id, I.c.name)
                        .having(func.count(func.distinct(I.c.content_hash)) > 1)
                        .order_by(I.c.group_id, I.c.name)).all()
    return [_conflict_note(dims, g, name, k) for g, name, k in rows]


def _conflict_note(dims: Dims, group_id, name: str, hashes) -> str:
    return (f"instance {dims.block(int(group_id))}/{name} has {int(hashes)} different content hashes in this "
            "slice; its versions are kept apart and are not comparable")


def _sources(conn, table, where, dims: Dims) -> tuple[dict, dict, dict]:
    """Which hosts and campaigns each treatment's runs came from, and how many runs from each."""
    runs = func.count() if table is R else func.sum(table.c.n)
    seen = rows_frame(conn.execute(select(table.c.solver_id, table.c.host_id, table.c.campaign_id, runs)
                                   .where(where).group_by(table.c.solver_id, table.c.host_id, table.c.campaign_id)),
                      columns=["solver_id", "host_id", "campaign_id", "runs"])
    host_name = {int(h): dims.hosts.get(int(h), "(unknown)") for h in seen["host_id"].dropna().unique()}
    hosts, campaigns, sources = {}, {}, {}
    for s, g in seen.groupby("solver_id"):
        t = dims.treatment(int(s))
        where_from = [(dims.campaigns[int(c)], "(unknown)" if pd.isna(h) else host_name[int(h)], int(n))
                      for c, h, n in zip(g["campaign_id"], g["host_id"], g["runs"])]
        sources[t] = sorted(where_from)
        hosts[t] = sorted({h for _, h, _ in where_from})
        campaigns[t] = sorted({c for c, _, _ in where_from})
    return hosts, campaigns, sources


def _with_values(treatments: list[str], obs: pd.DataFrame, notes: list[str], metric: str) -> list[str]:
    """The treatments that have a value to analyse. One in the slice with none is left out, and
    said: a treatment never disappears from an analysis without a word."""
    present = set(obs["treatment"])
    kept = [t for t in treatments if t in present]
    gone = [t for t in treatments if t not in present]
    if gone and kept:
        notes.append(f"{', '.join(gone)} {'has' if len(gone) == 1 else 'have'} runs in the slice but no usable "
                     f"{metric} value (every run failed, or none has the metric): left out of the analysis")
    return kept or treatments


def rows_frame(result, columns: list[str]) -> pd.DataFrame:
    """A query result as a frame, column by column (much quicker than row objects one by one).

    Numbers come back as the driver gives them (PostgreSQL sums of integers are Decimals), so
    each column is made numeric where it can be.
    """
    rows = result.cursor.fetchall() if getattr(result, "cursor", None) is not None else result.all()
    result.close()
    if not rows:
        return pd.DataFrame({c: [] for c in columns})
    frame = pd.DataFrame(dict(zip(columns, (np.asarray(col) if not isinstance(col[0], (str, bytes)) else col
                                            for col in zip(*rows)))))
    for c in frame.columns:
        if frame[c].dtype == object:
            conv = pd.to_numeric(frame[c], errors="coerce")
            if conv.notna().sum() == frame[c].notna().sum():
                frame[c] = conv
    return frame


def _instances(conn, ids: list[int]) -> pd.DataFrame:
    rows = []
    inst = S.instances
    for i in range(0, len(ids), 10_000):
        rows += conn.execute(select(inst.c.id, inst.c.group_id, inst.c.name, inst.c.content_hash)
                             .where(inst.c.id.in_(ids[i:i + 10_000]))).all()
    cols = ["instance_id", "group_id", "instance", "content_hash"]
    return pd.DataFrame(dict(zip(cols, zip(*rows)))) if rows else pd.DataFrame({c: [] for c in cols})


def _treatment_key(label: str):
    from ..select.versions import version_sort_key

    name, _, version = label.partition("@")
    return (name, version_sort_key(version))


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




def _fingerprint_of(groups: list[tuple], st: dict, metric: str, sl: Slice) -> str:
    """The hash of (treatment, block, n, n_ok, n_fail, id_sum, weighted id sum, cells, instance sum)
    rows, in treatment and block order, with the metric, settings and slice."""
    rows = [[t, b, int(n), int(ok), int(fail), int(ids), int(w) % W_MOD, int(cells), int(inst)]
            for t, b, n, ok, fail, ids, w, cells, inst in sorted(groups, key=lambda r: (r[0], r[1]))]
    payload = json.dumps({"fingerprint": 2, "metric": metric, "settings": st, "slice": sl.to_dict(), "cells": rows},
                         sort_keys=True)
    return hashlib.sha256(payload.encode()).hexdigest()


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
