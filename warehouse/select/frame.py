"""A slice's runs as one tidy table: one row per run, every name spelled out, one column per metric.

This is what a notebook asks for first (`Yard.runs`). The rows come from one query on the runs
and the instances, filtered by the slice's condition on integer keys; the small dimension tables
turn ids into names in pandas, column by column (no per-row Python).
"""
from __future__ import annotations

from sqlalchemy import select

from ..errors import InputError
from ..store import schema as S
from .resolve import Dims, condition
from .slices import Slice

R, I = S.runs, S.instances

COLUMNS = ["run_id", "campaign", "solver", "version", "treatment", "family", "group", "block", "instance", "seed",
           "replicate", "status", "host", "finished_at", "import_id", "source_line"]


def metric_names(dims: Dims, metric: str | None) -> list[str]:
    """The metrics a table carries: the one named, or every metric of the warehouse."""
    if metric is None:
        return sorted(dims.metrics, key=lambda m: dims.metrics[m][1])
    if metric not in dims.metrics:
        from difflib import get_close_matches

        near = get_close_matches(metric, list(dims.metrics), n=2)
        hint = f" (did you mean {' or '.join(near)}?)" if near else ""
        known = ", ".join(sorted(dims.metrics)) or "none yet"
        raise InputError(f"no metric '{metric}' in this warehouse{hint}; known: {known}")
    return [metric]


def runs_frame(conn, sl: Slice, metric: str | None = None):
    """Every run of slice `sl` (live runs unless the slice says `retracted=`), with the named
    metric's values (or every metric's), as a DataFrame with the columns of `COLUMNS` and then one
    float column per metric, named after it. `finished_at` is a UTC timestamp (NaT where unknown);
    the names are categoricals, the counts integers."""
    import numpy as np
    import pandas as pd

    dims = Dims.load(conn)
    metrics = metric_names(dims, metric)
    slots = [dims.metrics[m][1] for m in metrics]
    q = (select(R.c.id, R.c.campaign_id, R.c.solver_id, I.c.group_id, I.c.name, R.c.seed, R.c.replicate, R.c.status,
                R.c.host_id, R.c.finished_at, R.c.import_id, R.c.source_line, *[R.c[f"v{s}"] for s in slots])
         .select_from(R.join(I, I.c.id == R.c.instance_id))
         .where(condition(sl, dims, conn))
         .order_by(R.c.id))
    result = conn.execute(q)
    rows = result.all()
    raw = ["id", "campaign_id", "solver_id", "group_id", "instance", "seed", "replicate", "status", "host_id",
           "finished_at", "import_id", "source_line", *metrics]
    cols = list(zip(*rows)) if rows else [[] for _ in raw]
    got = dict(zip(raw, cols))

    def names(ids, mapping: dict, order: list | None = None) -> pd.Categorical:
        codes = pd.Series(np.asarray(ids, dtype="float64")).map(mapping)  # None (no host) maps to NaN
        return pd.Categorical(codes, categories=order or sorted(set(mapping.values())))

    solver_ids = got["solver_id"]
    group_ids = got["group_id"]
    treatments = {i: dims.treatment(i) for i in set(solver_ids)}
    family_of = {g: dims.families[dims.groups[g][0]] for g in set(group_ids)}
    frame = pd.DataFrame({
        "run_id": pd.array(got["id"], dtype="int64"),
        "campaign": names(got["campaign_id"], dims.campaigns),
        "solver": names(solver_ids, {i: dims.solvers[i][0] for i in set(solver_ids)}),
        "version": names(solver_ids, {i: dims.solvers[i][1] for i in set(solver_ids)}),
        "treatment": names(solver_ids, treatments),
        "family": names(group_ids, family_of),
        "group": names(group_ids, {g: dims.groups[g][1] for g in set(group_ids)}),
        "block": names(group_ids, {g: dims.block(g) for g in set(group_ids)}),
        "instance": pd.array(got["instance"], dtype="string"),
        "seed": pd.array(got["seed"], dtype="int64"),
        "replicate": pd.array(got["replicate"], dtype="int64"),
        "status": names(got["status"], S.STATUS_NAMES, list(S.STATUS_CODES)),
        "host": names(got["host_id"], dims.hosts),
        "finished_at": pd.to_datetime(pd.Series(got["finished_at"], dtype="float64"), unit="s", utc=True),
        "import_id": pd.array(got["import_id"], dtype="int64"),
        "source_line": pd.array(got["source_line"], dtype="int64"),
    })
    for m in metrics:
        frame[m] = pd.Series(got[m], dtype="float64")
    return frame
