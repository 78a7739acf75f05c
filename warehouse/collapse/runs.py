"""Each run's value and status for a slice: what an analysis of censored runtimes reads.

The observations of `observations.collapse` average runs away and drop failed ones; a runtime
with a cutoff needs every run, failed or not, with its time. Blocks are the instances' groups,
as in the collapse.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd
from sqlalchemy import select

from ..errors import DesignError
from ..select.resolve import Dims, condition
from ..select.slices import Slice, brief
from ..store import schema as S

R = S.runs


@dataclass
class RunTimes:
    metric: str
    sense: str  # min or max
    unit: str
    runs: pd.DataFrame  # treatment, block, instance (label), instance_id, status (name), value
    treatments: list[str]  # in natural version order
    notes: list[str] = field(default_factory=list)


def _read(conn, sl: Slice, dims: Dims, cols: list, names: list[str], order=None) -> pd.DataFrame:
    """The slice's runs with the columns `cols` (named `names`, which hold solver_id and
    instance_id), each run's instance name and group, its treatment and block labels. One query on
    the runs, one on their instances; a slice with no runs is a one-line error."""
    from .common import _instances, rows_frame

    q = select(*cols).where(condition(sl, dims, conn))
    got = rows_frame(conn.execute(q if order is None else q.order_by(order)), columns=names)
    if got.empty:
        raise DesignError(f"no runs in slice '{brief(sl.text, 200) or '(everything)'}'; see blockyard inventory for what is stored")
    got = got.merge(_instances(conn, sorted(int(i) for i in got["instance_id"].unique())), on="instance_id", how="left")
    label = {int(s): dims.treatment(int(s)) for s in got["solver_id"].unique()}
    block = {int(g): dims.block(int(g)) for g in got["group_id"].unique()}
    got["treatment"] = got["solver_id"].astype("int64").map(label)
    got["block"] = got["group_id"].astype("int64").map(block)
    return got


def run_times(conn, sl: Slice, metric: str | None) -> RunTimes:
    """Every live run of slice `sl` with its value of `metric` (None where it has none) and status."""
    from .common import _metric, _treatment_key

    dims = Dims.load(conn)
    metric, slot, sense, unit = _metric(dims, metric)
    got = _read(conn, sl, dims, [R.c.solver_id, R.c.instance_id, R.c.status, R.c[f"v{slot}"]],
                ["solver_id", "instance_id", "status", "value"])
    runs = pd.DataFrame({
        "treatment": got["treatment"],
        "block": got["block"],
        "instance_id": got["instance_id"].astype("int64"),
        "status": got["status"].astype("int64").map(S.STATUS_NAMES).fillna("failed"),
        "value": pd.to_numeric(got["value"], errors="coerce").astype(float),
    })
    runs["instance"] = runs["block"] + "/" + got["instance"].astype(str)
    return RunTimes(metric, sense, unit, runs, sorted(runs["treatment"].unique(), key=_treatment_key))


def common_runs(rt: RunTimes, treatments: list[str], holes: str = "drop") -> tuple[pd.DataFrame, list[str]]:
    """The runs of `treatments` on the instances every treatment present in their block ran (any
    status), as the collapse keeps only instances all present treatments share; with holes
    "drop", only the blocks where every treatment ran. A treatment whose runs all failed stays:
    for a runtime with a cutoff, failing is an outcome. Notes say what was left out."""
    df = rt.runs[rt.runs["treatment"].isin(treatments)]
    notes: list[str] = []
    present = df.groupby("block")["treatment"].nunique()
    alone = present[present < 2].index
    if holes != "drop" and len(alone):  # a block with one treatment compares nothing
        notes.append(f"{len(alone)} blocks left out because only one treatment ran there")
        df = df[~df["block"].isin(alone)]
        present = present.drop(alone)
    if holes == "drop":
        full = present[present == len(treatments)].index
        gone = present.index.difference(full)
        if len(gone):
            notes.append(f"{len(gone)} blocks left out because a treatment has no runs there: "
                         + ", ".join(list(gone)[:6]) + (" ..." if len(gone) > 6 else ""))
        df = df[df["block"].isin(full)]
        present = present.reindex(full)
    per_inst = df.groupby(["block", "instance_id"])["treatment"].nunique()
    need = present.reindex(per_inst.index.get_level_values(0)).to_numpy()
    shared = per_inst[per_inst.to_numpy() == need].index
    left = len(per_inst) - len(shared)
    if left:
        notes.append(f"{left} instances left out because not every treatment in their block has runs on them")
    keep = pd.MultiIndex.from_frame(df[["block", "instance_id"]]).isin(shared)
    return df[keep].reset_index(drop=True), notes


# --- per-run values for the variance components -------------------------------------------------

#: metric names and units read as a run's CPU time when no --time-metric is given
TIME_NAMES = ("seconds", "cpu_seconds", "cpu", "runtime", "time", "wall_seconds")
TIME_UNITS = ("s", "sec", "secs", "second", "seconds")


@dataclass
class RunValues:
    metric: str
    sense: str
    unit: str
    runs: pd.DataFrame  # treatment, group (the block), instance (label), instance_id, seed, run_id, status, value, seconds
    treatments: list[str]
    time_metric: str | None  # the metric read as a run's seconds (None: none found)
    fingerprint: str
    max_run_id: int
    notes: list[str] = field(default_factory=list)


def time_metric_of(dims, wanted: str | None, metric: str) -> str | None:
    """The metric that holds a run's seconds: `wanted`, else the analysed metric when it is a time,
    else one named or measured like a time (TIME_NAMES, TIME_UNITS); None when there is none."""
    from ..errors import InputError

    if wanted:
        if wanted not in dims.metrics:
            raise InputError(f"--time-metric {wanted}: no such metric; known: {', '.join(sorted(dims.metrics))}")
        return wanted
    def timely(name: str) -> bool:
        return name.lower() in TIME_NAMES or str(dims.metrics[name][3]).lower() in TIME_UNITS
    if timely(metric):
        return metric
    for name in TIME_NAMES:
        if name in dims.metrics:
            return name
    return next((m for m in sorted(dims.metrics) if timely(m)), None)


def run_values(conn, sl: Slice, metric: str | None, time_metric: str | None = None) -> RunValues:
    """Every live run of slice `sl` with its value of `metric`, its seed, status and (when a time
    metric is found) its seconds: what the variance components read. One query, the slice as
    bound conditions on integer keys; the names are matched in Python."""
    import hashlib

    from .common import _metric, _treatment_key

    dims = Dims.load(conn)
    metric, slot, sense, unit = _metric(dims, metric)
    tm = time_metric_of(dims, time_metric, metric)
    cols = [R.c.id, R.c.solver_id, R.c.instance_id, R.c.seed, R.c.status, R.c[f"v{slot}"]]
    if tm is not None:
        cols.append(R.c[f"v{dims.metrics[tm][1]}"])
    names = ["run_id", "solver_id", "instance_id", "seed", "status", "value"] + (["seconds"] if tm else [])
    got = _read(conn, sl, dims, cols, names, order=R.c.id)
    runs = pd.DataFrame({
        "treatment": got["treatment"],
        "group": got["block"],
        "instance_id": got["instance_id"].astype("int64"),
        "seed": got["seed"].astype("int64"),
        "run_id": got["run_id"].astype("int64"),
        "status": got["status"].astype("int64").map(S.STATUS_NAMES).fillna("failed"),
        "value": pd.to_numeric(got["value"], errors="coerce").astype(float),
        "seconds": pd.to_numeric(got["seconds"], errors="coerce").astype(float) if tm else float("nan"),
    })
    runs["instance"] = got["instance"].astype(str)
    # the runs and their values, in id order: a recheck tells "the same runs" from this
    h = hashlib.sha256()
    h.update(runs["run_id"].to_numpy("int64").tobytes())
    h.update(runs["value"].to_numpy("float64").tobytes())
    return RunValues(metric, sense, unit, runs, sorted(runs["treatment"].unique(), key=_treatment_key), tm,
                     h.hexdigest(), int(runs["run_id"].max()))
