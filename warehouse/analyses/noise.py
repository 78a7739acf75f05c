"""noise: how a slice's runs vary between groups, instances within a group and seeds within an
instance, pooled over the treatments and per treatment, and how a treatment difference varies
from block to block (what a plan of groups, instances and seeds needs)."""
from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

from ..errors import BlockyardError, DesignError, InputError
from ..select.slices import Slice
from .common import dedupe
from ..shown import Shown

#: the contract's keys of one component row; the rest of a fit goes under "details"
ROW_KEYS = ("level", "variance", "share", "ci_low", "ci_high")


@dataclass
class RunTable:
    """What the ledger keeps of the runs a noise analysis read: one row per treatment and group
    (the mean of the runs used, their count and the failed runs), the fingerprint of the runs and
    values, and the last run id. It stands where the other analyses keep their collapse."""

    slice_text: str
    metric: str
    obs: pd.DataFrame  # treatment, block, value, runs, failed
    fingerprint: str
    max_run_id: int
    fingerprint_v1: str = ""


@dataclass
class NoiseResult(Shown):
    collapsed: RunTable
    sense: str
    unit: str
    treatments: list[str]
    pooled: object  # analyze.noise.Components
    per_treatment: list[dict]  # {"treatment", "fit": Components} or {"treatment", "error"}
    comparison: object | None  # Components of a difference, or None
    comparison_error: str | None
    run_seconds: float | None
    time_metric: str | None
    runs_in_slice: int
    runs_used: int
    groups_held: int
    instances_held: int  # most instances any group holds
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    analysis_id: int | None = None
    options: dict = field(default_factory=dict)

    kind = "noise"

    @staticmethod
    def rows(fit) -> list[dict]:
        return [{k: r.get(k) for k in ROW_KEYS} for r in fit.components]

    @staticmethod
    def details(fit) -> dict:
        d = fit.to_dict()
        return {"method": d["method"], "balanced": d["balanced"], "groups": d["groups"], "instances": d["instances"],
                "runs": d["runs"], "instances_per_group": d["instances_per_group"],
                "seeds_per_instance": d["seeds_per_instance"], "confidence": d["confidence"],
                "intervals": [{"level": r["level"], "df": r.get("df"), "interval": r.get("interval")} for r in d["components"]],
                "mean_squares": d["mean_squares"], "notes": d["notes"]}

    def to_dict(self) -> dict:
        c = self.collapsed
        per = []
        for p in self.per_treatment:
            if "fit" in p:
                per.append({"treatment": p["treatment"], "method": p["fit"].method, "components": self.rows(p["fit"]),
                            "notes": list(p["fit"].notes)})
            else:
                per.append({"treatment": p["treatment"], "method": None, "components": [], "error": p["error"]})
        comp = None
        if self.comparison is not None:
            comp = {"components": self.rows(self.comparison), "details": self.details(self.comparison),
                    "used_by_plan": ["treatment x group", "treatment x instance", "seed"]}
        return {"slice": c.slice_text, "metric": c.metric, "sense": self.sense, "unit": self.unit,
                "method": self.pooled.method, "confidence": self.pooled.confidence,
                "treatment_names": self.treatments, "treatments": len(self.treatments),
                "components": self.rows(self.pooled), "details": self.details(self.pooled),
                "per_treatment": per, "comparison_components": comp, "comparison_error": self.comparison_error,
                "run_seconds": self.run_seconds, "time_metric": self.time_metric,
                "runs_in_slice": self.runs_in_slice, "runs_used": self.runs_used, "groups_held": self.groups_held,
                "instances_held": self.instances_held, "notes": self.notes, "warnings": self.warnings,
                "analysis_id": self.analysis_id}

    def verdicts(self) -> dict:
        return verdicts(self.to_dict())

    def headline(self) -> str:
        parts = [f"{r['level']} {100 * (r['share'] or 0):.0f} %" for r in self.pooled.components]
        return f"{self.collapsed.metric}: " + ", ".join(parts)

    def render(self) -> str:
        from ..present.noise import render_noise

        return render_noise(self)


def verdicts(doc: dict) -> dict:
    """What a recheck compares: which level holds the largest share, pooled and for a difference."""
    def top(rows):
        rows = [r for r in rows or [] if r.get("share") is not None]
        return max(rows, key=lambda r: r["share"])["level"] if rows else None

    comp = doc.get("comparison_components") or {}
    return {"largest level": top(doc.get("components")), "largest level of a difference": top(comp.get("components"))}


def run_noise(conn, sl: Slice, metric: str | None, confidence: float = 0.95, method: str = "auto",
              time_metric: str | None = None) -> NoiseResult:
    """The variance components of slice `sl`'s successful runs of `metric` (see analyze.noise)."""
    from ..analyze import noise as N
    from ..collapse.runs import run_values
    from .common import numeric_warnings

    if not 0.5 < confidence < 1:
        raise InputError(f"--confidence {confidence}: give a level between 0.5 and 1, e.g. 0.95")
    if method not in ("auto", "anova", "reml"):
        raise InputError(f"--method {method}: choose auto, anova or reml")
    rv = run_values(conn, sl, metric, time_metric)
    runs = rv.runs
    ok = (runs["status"] == "ok") & runs["value"].notna()
    notes: list[str] = []
    failed = int((runs["status"] != "ok").sum())
    blank = int(((runs["status"] == "ok") & runs["value"].isna()).sum())
    if failed:
        notes.append(f"{failed} runs that did not succeed left out (failed runs have no {rv.metric} to split)")
    if blank:
        notes.append(f"{blank} successful runs without a {rv.metric} value left out")
    used = runs[ok]
    if used.empty:
        raise DesignError(f"no successful run in the slice has a {rv.metric} value")
    frame = pd.DataFrame({"treatment": used["treatment"], "group": used["group"],
                          "instance": used["instance_id"].astype(str), "value": used["value"]})
    warnings: list[str] = []
    numeric: list[str] = []
    with numeric_warnings(numeric):
        pooled = N.variance_components(frame, confidence, method)
        per = []
        for t in rv.treatments:
            part = frame[frame["treatment"] == t]
            if len(rv.treatments) == 1:
                per.append({"treatment": t, "fit": pooled})
                continue
            try:
                per.append({"treatment": t, "fit": N.variance_components(part, confidence, method)})
            except BlockyardError as exc:
                per.append({"treatment": t, "error": str(exc)})
        comparison, why = None, None
        if len(rv.treatments) < 2:
            why = "one treatment in the slice: a difference between treatments has nothing to vary"
        else:
            try:
                comparison = N.comparison_components(frame, confidence, method)
            except BlockyardError as exc:
                why = str(exc)
    seconds = None
    if rv.time_metric is not None:
        s = runs["seconds"].dropna()
        s = s[s >= 0]
        seconds = float(s.mean()) if len(s) else None
        if seconds is not None:
            notes.append(f"a run takes {seconds:.4g} s on average ({rv.time_metric}, over {len(s)} runs, failed ones "
                         "included: they cost CPU time too)")
    if seconds is None:
        notes.append("no metric holds a run's seconds: a plan from this analysis needs --run-seconds S")
    groups = int(used["group"].nunique())
    if groups < 6:
        warnings.append(f"only {groups} groups: the group variance rests on {groups - 1} degrees of freedom per "
                        "treatment, and its interval is wide (plan at least 6 groups, common practice)")
    if pooled.method == "reml":
        warnings.append("the runs are unbalanced (instances per group or runs per instance differ): the components "
                        "are REML estimates and their intervals approximate (from the standard errors)")
    if failed and pooled.runs:
        warnings.append("the components describe successful runs only; a treatment that fails more is measured on "
                        "its easier runs")
    hosts_note = _hosts(conn, sl)
    if hosts_note:
        warnings.append(hosts_note)
    warnings += numeric
    obs = (runs.assign(ok=ok).groupby(["treatment", "group"], sort=False)
           .agg(value=("value", lambda v: float(v.mean()) if v.notna().any() else None),
                runs=("run_id", "size"), failed=("ok", lambda x: int((~x).sum())))
           .reset_index().rename(columns={"group": "block"}))
    table = RunTable(sl.text, rv.metric, obs, rv.fingerprint, rv.max_run_id)
    res = NoiseResult(table, rv.sense, rv.unit, list(rv.treatments), pooled, per, comparison, why, seconds,
                      rv.time_metric, int(len(runs)), int(ok.sum()), groups,
                      int(used.groupby("group")["instance_id"].nunique().max()), notes=notes,
                      options={"confidence": confidence, "method": method, "time_metric": time_metric})
    res.warnings = dedupe(warnings)
    return res


def _hosts(conn, sl: Slice) -> str | None:
    """Seeds run on different machines differ by the machines too: say so when the slice spans hosts."""
    from sqlalchemy import select

    from ..select.resolve import Dims, condition
    from ..store import schema as S

    dims = Dims.load(conn)
    q = select(S.runs.c.host_id).where(condition(sl, dims, conn)).distinct().limit(3)
    hosts = [h for (h,) in conn.execute(q) if h is not None]
    if len(hosts) > 1:
        return ("the runs come from more than one host: part of what varies between seeds and instances may be the "
                "machines (narrow the slice with host=NAME to see one machine's noise)")
    return None


# --- plan from a noise analysis, and the blocks that would settle a comparison -------------------

def allocation_from(doc: dict, effect: float, power: float = 0.8, budget_hours: float | None = None,
                    alpha: float = 0.05, comparisons: int = 1, run_seconds: float | None = None,
                    group_seconds: float = 0.0, instance_seconds: float = 0.0, max_groups: int | None = None,
                    max_instances: int | None = None, max_seeds: int | None = None):
    """The allocation for a stored noise analysis's document (see analyze.allocation.plan_allocation)."""
    from ..analyze.allocation import plan_allocation

    aid = doc.get("analysis_id")
    comp = doc.get("comparison_components")
    if not comp:
        why = doc.get("comparison_error") or "it holds no components of a treatment difference"
        raise DesignError(f"analysis {aid} cannot be planned from: {why}")
    v = {r["level"]: float(r.get("variance") or 0.0) for r in comp["components"]}
    seconds = run_seconds if run_seconds is not None else doc.get("run_seconds")
    if seconds is None:
        raise InputError(f"analysis {aid} has no run time (no seconds metric in its slice): give --run-seconds S")
    plan = plan_allocation(v["treatment x group"], v["treatment x instance"], v["seed"], effect, float(seconds),
                           treatments=int(doc.get("treatments") or 2), power=power, budget_hours=budget_hours,
                           alpha=alpha, comparisons=comparisons, group_seconds=group_seconds,
                           instance_seconds=instance_seconds, max_groups=max_groups, max_instances=max_instances,
                           max_seeds=max_seeds)
    a = plan.allocation
    held_g, held_i = doc.get("groups_held"), doc.get("instances_held")
    if isinstance(held_g, int) and a["groups"] > held_g:
        plan.warnings.append(f"the allocation asks {a['groups']} groups; the slice of analysis {aid} holds {held_g}: "
                             f"{a['groups'] - held_g} new instance groups must be found or made (--max-groups caps them)")
    if isinstance(held_i, int) and a["instances_per_group"] > held_i:
        plan.warnings.append(f"the allocation asks {a['instances_per_group']} instances per group; the groups of "
                             f"analysis {aid} hold at most {held_i}")
    if comp.get("details", {}).get("method") == "reml":
        plan.warnings.append("the components behind this plan are REML estimates from unbalanced runs")
    return plan


@dataclass
class Settle:
    """How many more blocks would likely settle each comparison of a stored analysis."""

    analysis_id: int | None
    kind: str
    blocks: int
    power: float
    rows: list[dict]
    warnings: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        return {"more": self.rows, "blocks_held": self.blocks, "power": self.power, "estimate": True,
                "of_kind": self.kind, "warnings": self.warnings}


def settle_from(doc: dict, kind: str, power: float = 0.8) -> Settle:
    """Per comparison of a stored versus: the blocks to add so that, if the true difference is the
    one estimated now, the comparison would clear its critical value with probability `power`
    (conditional power, normal scale: an estimate, not a promise)."""
    from scipy import stats

    from ..analyze.planning import blocks_to_settle, conditional_power

    aid = doc.get("analysis_id")
    if kind != "versus":
        raise DesignError(f"analysis {aid} is a {kind}: plan --more reads the comparisons of a versus analysis")
    n = doc.get("blocks")
    rows_in = doc.get("comparisons") or []
    if not isinstance(n, int) or n < 2 or not rows_in:
        raise DesignError(f"analysis {aid} holds no comparisons on 2 or more blocks to extend")
    level = 1 - float(doc.get("confidence", 0.95))
    sided = 1 if doc.get("alternative") in ("less", "greater") else 2
    crit = doc.get("critical_value") if doc.get("method") == "dunnett" else None
    k = len(rows_in)
    c = float(crit) if crit else float(stats.norm.ppf(1 - level / (sided * k)))
    out = []
    for r in rows_in:
        diff, se = r.get("diff"), r.get("se")
        p = r.get("p_adjusted")
        if diff is None or not se:
            out.append({"treatment": r.get("treatment"), "diff": diff, "z": None, "more_blocks": None,
                        "conditional_power_now": None, "state": "cannot tell (no standard error)"})
            continue
        z = float(diff) / float(se)
        if sided == 1 and ((doc.get("alternative") == "less") != (z < 0)):
            z_dir = 0.0  # the estimate points the other way: more blocks of the same would not settle it
        else:
            z_dir = z
        settled = p is not None and p < level
        more = 0 if settled else blocks_to_settle(z_dir, n, c, power)
        state = ("settled now" if settled else
                 "not within reach at the current estimate" if more is None else f"{more} more blocks")
        out.append({"treatment": r.get("treatment"), "diff": float(diff), "z": z, "more_blocks": more,
                    "total_blocks": None if more is None else n + more,
                    "conditional_power_now": conditional_power(z_dir, n, 0, c) if not settled else 1.0,
                    "state": state})
    warnings = ["an estimate: it assumes the true difference is the one measured so far; a smaller one needs more "
                "blocks (conditional power at the current estimate, normal approximation)"]
    if crit:
        warnings.append(f"the critical value is Dunnett's at the present {doc.get('residual_df')} df "
                        f"({c:.3g}); with more blocks it falls a little, so the counts lean high")
    else:
        warnings.append(f"the critical value is Bonferroni's normal quantile over {k} comparisons ({c:.3g}); Holm's "
                        "steps are kinder, so the counts lean high")
    return Settle(aid, kind, int(n), power, out, warnings)
