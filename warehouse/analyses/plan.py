"""plan: how many blocks a comparison needs, from an effect and a standard deviation or from a kept
analysis."""
from __future__ import annotations

from dataclasses import dataclass, field


from ..errors import DesignError, InputError
from ..shown import Shown


@dataclass
class PlanResult(Shown):
    plan: object
    kind_of_plan: str
    source: dict = field(default_factory=dict)
    analysis_id: int | None = None
    options: dict = field(default_factory=dict)

    kind = "plan"

    @property
    def warnings(self) -> list[str]:
        """The plan's own cautions, which the front ends add to (a read-only warehouse, say)."""
        return self.plan.warnings

    def to_dict(self) -> dict:
        d = self.plan.to_dict()
        d["plan"] = self.kind_of_plan
        if self.source:
            d["from"] = self.source
        d["analysis_id"] = self.analysis_id
        return d

    def verdicts(self) -> dict:
        d = self.plan.to_dict()
        if self.kind_of_plan == "allocation":
            a = d["allocation"]
            return {"allocation": [a["groups"], a["instances_per_group"], a["seeds_per_instance"]]}
        if self.kind_of_plan == "more":
            return {f"more blocks for {r['treatment']}": r["more_blocks"] for r in d["more"]}
        return {"blocks_needed": d.get("blocks_needed")}

    def headline(self) -> str:
        d = self.plan.to_dict()
        if self.kind_of_plan == "allocation":
            a = d["allocation"]
            return (f"{a['groups']} groups x {a['instances_per_group']} instances x {a['seeds_per_instance']} seeds: "
                    f"power {a['power']:.3f} for {a['cpu_hours']:.3g} CPU hours")
        if self.kind_of_plan == "more":
            return "; ".join(f"{r['treatment']}: {r['state']}" for r in d["more"])
        if "blocks_needed" in d:
            return f"{d['blocks_needed']} blocks needed for power {d.get('power')} at alpha {d.get('alpha')}"
        return f"power {d.get('power'):.3f} with {d.get('blocks')} blocks"

    def render(self) -> str:
        from ..present.analysis import render_plan

        return render_plan(self)


def run_plan(*, effect: float | None = None, delta: float | None = None, sd: float | None = None,
             source: dict | None = None, power: float = 0.8, alpha: float = 0.05, comparisons: int = 1,
             means: list[float] | None = None, sigma: float | None = None, blocks: int | None = None,
             noise: dict | None = None, more: dict | None = None, budget_hours: float | None = None,
             run_seconds: float | None = None, group_seconds: float = 0.0, instance_seconds: float = 0.0,
             max_groups: int | None = None, max_instances: int | None = None) -> PlanResult:
    """Blocks needed (or power reached) for a paired comparison or for the RCBD F test; with `noise`
    the allocation of groups, instances and seeds; with `more` the blocks that would settle each
    comparison of a stored versus.

    `source` is a stored analysis's document ({"analysis_id", "residual_ms", ...}); its residual mean
    square gives sigma for the F test and sqrt(2 MS) as the sd of block differences. `noise` is a
    stored noise analysis's document (its "comparison_components" and "run_seconds"); with it,
    `effect` is a difference in the metric's units. `more` is a stored analysis's document with its
    "kind".
    """
    from ..analyze import planning

    if comparisons < 1:
        raise InputError("--comparisons must be 1 or more")
    if noise is not None and more is not None:
        raise InputError("plan one thing at a time: --noise ID or --more ID")
    if noise is not None:
        from .noise import allocation_from

        if effect is None and delta is None:
            raise InputError("--noise needs --effect E: the smallest difference worth finding, in the metric's units")
        eff = effect if effect is not None else delta
        opts = {"noise": noise.get("analysis_id"), "effect": eff, "power": power, "budget_hours": budget_hours,
                "alpha": alpha, "comparisons": comparisons, "run_seconds": run_seconds, "group_seconds": group_seconds,
                "instance_seconds": instance_seconds, "max_groups": max_groups, "max_instances": max_instances}
        plan = allocation_from(noise, eff, power, budget_hours, alpha, comparisons, run_seconds, group_seconds,
                               instance_seconds, max_groups, max_instances)
        src = {"analysis_id": noise.get("analysis_id"), "kind": "noise", "metric": noise.get("metric")}
        return PlanResult(plan, "allocation", src, options=opts)
    if budget_hours is not None:
        raise InputError("--budget-hours plans from the components of a noise analysis: give --noise ID too")
    if more is not None:
        from .noise import settle_from

        plan = settle_from(more, more.get("kind", ""), power)
        src = {"analysis_id": more.get("analysis_id"), "kind": more.get("kind")}
        return PlanResult(plan, "more", src, options={"more": more.get("analysis_id"), "power": power})
    opts = {"effect": effect, "delta": delta, "sd": sd, "power": power, "alpha": alpha, "comparisons": comparisons,
            "means": means, "sigma": sigma, "blocks": blocks, "from": (source or {}).get("analysis_id")}
    src = {}
    if source is not None:
        ms = source.get("residual_ms")
        if ms is None:
            raise DesignError(f"analysis {source.get('analysis_id')} has no residual mean square to take sigma from "
                              "(use a blocktest or a Dunnett versus)")
        src = {"analysis_id": source.get("analysis_id"), "residual_ms": ms, "sigma": ms ** 0.5,
               "sd_of_differences": (2 * ms) ** 0.5}
        sigma = sigma or ms ** 0.5
        if sd is None and delta is not None:
            sd = (2 * ms) ** 0.5
    if means:
        if sigma is None:
            raise InputError("the F-test plan needs --sigma S or --from ANALYSIS")
        if blocks:
            return PlanResult(planning.rcbd_power(means, sigma, blocks, alpha=alpha), "rcbd-power", src, options=opts)
        return PlanResult(planning.blocks_for_rcbd(means, sigma, power=power, alpha=alpha), "rcbd-blocks", src, options=opts)
    if effect is not None:
        return PlanResult(planning.blocks_for_paired(effect, power=power, alpha=alpha, comparisons=comparisons),
                          "paired", src, options=opts)
    if delta is not None and sd is not None:
        return PlanResult(planning.blocks_for_delta(delta, sd, power=power, alpha=alpha, comparisons=comparisons),
                          "paired", src, options=opts)
    raise InputError("say what to plan for: --effect D, or --delta X with --sd S or --from ANALYSIS, "
                     "or --means A,B,C with --sigma S")
