"""What both ways of collapsing share: the result (`Collapsed`), the settings and the metric read
from the command line, and the steps that are the same whichever way the cells were summed
(blocks with holes, hash conflicts, where the runs came from, the fingerprint's hash).

`in_sql.py` collapses over the block or cell summaries in one statement; `in_pandas.py` reads the
cells (or the runs) and finishes in pandas; `observations.collapse` chooses between them.
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import pandas as pd
from sqlalchemy import func, select

from ..errors import DesignError, InputError
from ..select.resolve import Dims
from ..select.slices import Slice
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
    # treatment -> (earliest, latest finish time, imports): the span of the imports its runs came from
    periods: dict[str, tuple[int | None, int | None, int]] = field(default_factory=dict)
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


def _sources(conn, table, where, dims: Dims) -> tuple[dict, dict, dict, dict]:
    """Which hosts and campaigns each treatment's runs came from, and how many runs from each; and
    the period of the imports they came from (their runs' earliest and latest finish times)."""
    runs = func.count() if table is R else func.sum(table.c.n)
    seen = rows_frame(conn.execute(select(table.c.solver_id, table.c.host_id, table.c.campaign_id, table.c.import_id,
                                          runs)
                                   .where(where).group_by(table.c.solver_id, table.c.host_id, table.c.campaign_id,
                                                          table.c.import_id)),
                      columns=["solver_id", "host_id", "campaign_id", "import_id", "runs"])
    host_name = {int(h): dims.hosts.get(int(h), "(unknown)") for h in seen["host_id"].dropna().unique()}
    when = _import_periods(conn, seen["import_id"].dropna().unique().tolist())
    hosts, campaigns, sources, periods = {}, {}, {}, {}
    if seen.empty:
        return hosts, campaigns, sources, periods
    # one grouping for every treatment at once (a grouping per treatment cost 0.1 s at 170); two
    # solvers under one label count together, as the collapse groups them
    label = {int(s): dims.treatment(int(s)) for s in seen["solver_id"].unique()}
    seen["treatment"] = seen["solver_id"].map(label)
    by = seen.groupby(["treatment", "campaign_id", "host_id"], dropna=False, sort=False)["runs"].sum()
    for (t, c, h), n in by.items():
        sources.setdefault(t, []).append((dims.campaigns[int(c)], "(unknown)" if pd.isna(h) else host_name[int(h)],
                                          int(n)))
    for t, where_from in sources.items():
        where_from.sort()
        hosts[t] = sorted({h for _, h, _ in where_from})
        campaigns[t] = sorted({c for c, _, _ in where_from})
    imports: dict[str, set] = {}
    for t, i in seen[["treatment", "import_id"]].drop_duplicates().itertuples(index=False):
        imports.setdefault(t, set()).add(int(i))
    for t, ids in imports.items():
        spans = [when[i] for i in ids if i in when]
        firsts = [a for a, _ in spans if a is not None]
        lasts = [b for _, b in spans if b is not None]
        periods[t] = (min(firsts) if firsts else None, max(lasts) if lasts else None, len(ids))
    return hosts, campaigns, sources, periods


def _import_periods(conn, import_ids: list) -> dict[int, tuple[int | None, int | None]]:
    """Each import's earliest and latest run finish time (revision 0004 keeps them on the import)."""
    if not import_ids:
        return {}
    I = S.imports
    rows = conn.execute(select(I.c.id, I.c.first_finished, I.c.last_finished)
                        .where(I.c.id.in_([int(i) for i in import_ids])))
    return {int(r.id): (r.first_finished, r.last_finished) for r in rows}


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

    The rows go into one two-dimensional array of objects in a single numpy call, and each column
    is made numeric from there (`zip(*rows)` took four times as long on 200,000 rows). Numbers
    come back as the driver gives them (PostgreSQL sums of integers are Decimals), so each column
    is made numeric where every value it holds is a number; text stays text.
    """
    rows = result.cursor.fetchall() if getattr(result, "cursor", None) is not None else result.all()
    result.close()
    if not rows:
        return pd.DataFrame({c: [] for c in columns})
    grid = np.empty((len(rows), len(columns)), dtype=object)
    grid[:] = [tuple(r) for r in rows] if not isinstance(rows[0], tuple) else rows
    out = {}
    for i, c in enumerate(columns):
        col = grid[:, i]
        if isinstance(rows[0][i], (str, bytes)):
            out[c] = col.tolist()
            continue
        conv = pd.to_numeric(col, errors="coerce")
        out[c] = conv if int(pd.notna(conv).sum()) == int(pd.notna(col).sum()) else col
    return pd.DataFrame(out)


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


def _fingerprint_of(groups: list[tuple], st: dict, metric: str, sl: Slice) -> str:
    """The hash of (treatment, block, n, n_ok, n_fail, id_sum, weighted id sum, cells, instance sum)
    rows, in treatment and block order, with the metric, settings and slice."""
    rows = [[t, b, int(n), int(ok), int(fail), int(ids), int(w) % W_MOD, int(cells), int(inst)]
            for t, b, n, ok, fail, ids, w, cells, inst in sorted(groups, key=lambda r: (r[0], r[1]))]
    payload = json.dumps({"fingerprint": 2, "metric": metric, "settings": st, "slice": sl.to_dict(), "cells": rows},
                         sort_keys=True)
    return hashlib.sha256(payload.encode()).hexdigest()
