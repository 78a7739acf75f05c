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


def run_times(conn, sl: Slice, metric: str | None) -> RunTimes:
    """Every live run of slice `sl` with its value of `metric` (None where it has none) and status."""
    from .common import _instances, _metric, _treatment_key, rows_frame

    dims = Dims.load(conn)
    metric, slot, sense, unit = _metric(dims, metric)
    q = select(R.c.solver_id, R.c.instance_id, R.c.status, R.c[f"v{slot}"]).where(condition(sl, dims, conn))
    got = rows_frame(conn.execute(q), columns=["solver_id", "instance_id", "status", "value"])
    if got.empty:
        raise DesignError(f"no runs in slice '{brief(sl.text, 200) or '(everything)'}'; see blockyard inventory for what is stored")
    inst = _instances(conn, sorted(int(i) for i in got["instance_id"].unique()))
    got = got.merge(inst, on="instance_id", how="left")
    label = {int(s): dims.treatment(int(s)) for s in got["solver_id"].unique()}
    block = {int(g): dims.block(int(g)) for g in got["group_id"].unique()}
    runs = pd.DataFrame({
        "treatment": got["solver_id"].astype("int64").map(label),
        "block": got["group_id"].astype("int64").map(block),
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
