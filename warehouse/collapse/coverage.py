"""peek: coverage of a slice, treatments x blocks, with holes, failures and cautions."""
from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd
from sqlalchemy import case, func, select

from ..errors import DesignError
from ..select.resolve import Dims, condition
from ..select.slices import Slice, brief
from ..store import schema as S

R = S.runs


@dataclass
class Coverage:
    slice_text: str
    metric: str | None
    treatments: list[str]
    blocks: list[str]
    cells: pd.DataFrame  # treatment, block, runs, failed, instances, statuses
    holes: list[dict]
    failures: dict[str, int]
    warnings: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        return {
            "slice": self.slice_text, "metric": self.metric, "treatments": self.treatments, "blocks": self.blocks,
            "cells": [{k: (int(v) if isinstance(v, (int,)) or hasattr(v, "item") else v) for k, v in r.items()}
                      for r in self.cells.to_dict("records")],
            "holes": self.holes, "failures": self.failures, "warnings": self.warnings,
        }


def coverage(conn, sl: Slice, metric: str | None = None, collapse_settings=None) -> Coverage:
    from .cautions import hash_pseudo_replication, host_caution, pseudo_replication
    from .common import _treatment_key, rows_frame
    from .observations import collapse

    dims = Dims.load(conn)
    cond = condition(sl, dims, conn)
    q = (select(R.c.solver_id, S.instances.c.group_id, func.count().label("runs"),
                func.count(func.distinct(R.c.instance_id)).label("instances"),
                *[func.sum(case((R.c.status == code, 1), else_=0)).label("n_" + name) for name, code in S.STATUS_CODES.items()])
         .join(S.instances, S.instances.c.id == R.c.instance_id).where(cond)
         .group_by(R.c.solver_id, S.instances.c.group_id))
    frame = rows_frame(conn.execute(q), columns=["solver_id", "group_id", "runs", "instances", *("n_" + k for k in S.STATUS_CODES)])
    if frame.empty:
        raise DesignError(f"no runs in slice '{brief(sl.text, 200) or '(everything)'}'; see blockyard inventory for what is stored")
    frame["treatment"] = [dims.treatment(s) for s in frame["solver_id"]]
    frame["block"] = [dims.block(g) for g in frame["group_id"]]
    frame["failed"] = frame["n_timeout"] + frame["n_failed"] + frame["n_infeasible"]
    treatments = sorted(frame["treatment"].unique(), key=_treatment_key)
    blocks = sorted(frame["block"].unique())
    have = frame.groupby("block")["treatment"].apply(set).to_dict()
    holes = [{"block": b, "missing": [t for t in treatments if t not in have[b]]} for b in blocks
             if len(have[b]) < len(treatments)]
    failures = {k: int(frame["n_" + k].sum()) for k in ("timeout", "failed", "infeasible")}
    warnings = hash_pseudo_replication(conn, dims, set(frame["group_id"]))
    if metric is not None:
        from .settings import Collapse

        c = collapse(conn, sl, metric, collapse_settings or Collapse(holes="keep"))
        warnings += c.hash_conflicts + pseudo_replication(c) + host_caution(c)
    else:
        # content-hash changes are visible without a metric too
        inst = conn.execute(select(S.instances.c.group_id, S.instances.c.name, func.count(func.distinct(S.instances.c.content_hash)))
                            .where(S.instances.c.id.in_(select(R.c.instance_id).where(cond).distinct()))
                            .group_by(S.instances.c.group_id, S.instances.c.name)
                            .having(func.count(func.distinct(S.instances.c.content_hash)) > 1)).all()
        warnings += [f"instance {dims.block(g)}/{n} appears with {k} different content hashes in this slice; "
                     "its versions are kept apart" for g, n, k in inst]
    cells = frame[["treatment", "block", "runs", "failed", "instances", "n_timeout", "n_failed", "n_infeasible"]]
    cells = cells.rename(columns={"n_timeout": "timeouts", "n_failed": "crashes", "n_infeasible": "infeasible"})
    return Coverage(sl.text, metric, treatments, blocks, cells.reset_index(drop=True), holes, failures, warnings)
