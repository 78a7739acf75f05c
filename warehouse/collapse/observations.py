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

import numpy as np
import pandas as pd
from sqlalchemy import BigInteger, Integer, case, cast, func, select

from ..select.resolve import Dims, cells_can_answer, condition
from ..select.slices import Slice
from .common import R, Collapsed, _metric, _treatment_key, parse_settings, rows_frame
from .in_pandas import collapse_in_pandas
from .in_sql import collapse_in_sql
from .settings import Collapse
from ..store import schema as S

# what the layers above import from here (the result type and the settings' reading live in common.py)
__all__ = ["Collapsed", "cell_counts", "collapse", "failure_counts", "parse_settings", "rows_frame"]


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
        quick = collapse_in_sql(conn, sl, dims, metric, slot, sense, unit, st)
        if quick is not None:
            return quick
    return collapse_in_pandas(conn, sl, dims, metric, slot, sense, unit, st, from_runs)


def _whole(total):
    """A sum of whole numbers as a 64-bit integer: PostgreSQL sums a bigint column as numeric,
    which the driver hands over as one Decimal object a row (the conversion of a whole-data
    slice's cells was most of its failures part there). A count of runs stays far below 2**63."""
    return cast(total, BigInteger)


def _cell_sum(column):
    """The sum of a count kept per cell (runs, failed runs): each cell's count is cast to a 32-bit
    integer first (one solver on one instance and host in one import: far below 2**31), which
    PostgreSQL sums into a bigint with an 8-byte state where a bigint column keeps a numeric
    one; the grouping of a 510,000-run whole-data slice's cells by solver and instance spilled
    to disk at the default work_mem that way (EXPLAIN ANALYZE 49 ms, 34 ms with the cast)."""
    return _whole(func.sum(cast(column, Integer)))


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
        query = (select(C.c.solver_id, C.c.instance_id, _whole(func.sum(C.c.n)), _whole(func.sum(C.c.n_fail)))
                 .where(condition(sl, dims, conn, table=C), C.c.slot == slot)
                 .group_by(C.c.solver_id, C.c.instance_id))
    else:
        query = (select(R.c.solver_id, R.c.instance_id, func.count(),
                        _whole(func.sum(case((R.c.status != 0, 1), else_=0))))
                 .where(condition(sl, dims, conn)).group_by(R.c.solver_id, R.c.instance_id))
    got = rows_frame(conn.execute(query), columns=["solver_id", "instance_id", "runs", "failed"])
    if got.empty:
        return pd.DataFrame({c: [] for c in ("treatment", "instance", "runs", "failed")})
    # each solver's label and place in natural version order looked up once, then spread by code
    # (so that the failures part lists the treatments as the analysis does)
    solvers, code = np.unique(got["solver_id"].to_numpy(dtype=np.int64), return_inverse=True)
    labels = np.array([dims.treatment(int(s)) for s in solvers], dtype=object)
    order = {t: i for i, t in enumerate(sorted(set(labels), key=_treatment_key))}
    rank = np.array([order[t] for t in labels], dtype=np.int64)[code]
    keep = np.argsort(rank, kind="stable")
    return pd.DataFrame({"treatment": labels[code][keep].tolist(),
                         "instance": got["instance_id"].to_numpy(dtype=np.int64)[keep],
                         "runs": got["runs"].to_numpy(dtype=np.int64)[keep],
                         "failed": got["failed"].to_numpy(dtype=np.int64)[keep]})


def failure_counts(conn, sl: Slice, metric: str | None) -> dict | None:
    """What the failures part needs, counted by the database, when every treatment of slice `sl`
    ran every instance of it: the treatments in natural version order, the instances, each
    treatment's runs and failed runs, and only the cells with a failed run (a few per cent of
    them, where `cell_counts` sends every cell). The arguments of
    `analyze.failures.compare_solved_counts`; None when the slice is not like that (some instance
    not run by every treatment, two solvers under one label, a slice the cell summaries cannot
    answer): `cell_counts` then gives the full table."""
    if not cells_can_answer(sl):
        return None
    dims = Dims.load(conn)
    metric, slot, _, _ = _metric(dims, metric)
    C = S.cell_stats
    where = (condition(sl, dims, conn, table=C), C.c.slot == slot, C.c.n > 0)
    per_solver = conn.execute(select(C.c.solver_id, _cell_sum(C.c.n), _cell_sum(C.c.n_fail))
                              .where(*where).group_by(C.c.solver_id)).all()
    if not per_solver:
        return None
    label = {int(s): dims.treatment(int(s)) for s, _, _ in per_solver}
    if len(set(label.values())) != len(label):
        return None
    k = len(label)
    per_instance = conn.execute(select(C.c.instance_id, func.count(func.distinct(C.c.solver_id)))
                                .where(*where).group_by(C.c.instance_id)).all()
    if any(int(n) != k for _, n in per_instance):
        return None  # an instance some treatment did not run: the full table says which are left out
    failing = rows_frame(conn.execute(select(C.c.solver_id, C.c.instance_id, _cell_sum(C.c.n),
                                             _cell_sum(C.c.n_fail))
                                      .where(*where).group_by(C.c.solver_id, C.c.instance_id)
                                      .having(func.sum(cast(C.c.n_fail, Integer)) > 0)),
                         columns=["solver_id", "instance", "runs", "failed"])
    order = sorted(per_solver, key=lambda r: _treatment_key(label[int(r[0])]))
    return {"treatments": [label[int(r[0])] for r in order],
            "instances": np.array([int(i) for i, _ in per_instance], dtype=np.int64),
            "runs": [int(r[1]) for r in order], "failed": [int(r[2]) for r in order],
            "failing": pd.DataFrame({"treatment": [label[int(s)] for s in failing["solver_id"]],
                                     "instance": failing["instance"].to_numpy(dtype=np.int64),
                                     "runs": failing["runs"].to_numpy(dtype=np.int64),
                                     "failed": failing["failed"].to_numpy(dtype=np.int64)})}
