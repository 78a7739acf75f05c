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
        return {"blocks_needed": self.plan.to_dict().get("blocks_needed")}

    def headline(self) -> str:
        d = self.plan.to_dict()
        if "blocks_needed" in d:
            return f"{d['blocks_needed']} blocks needed for power {d.get('power')} at alpha {d.get('alpha')}"
        return f"power {d.get('power'):.3f} with {d.get('blocks')} blocks"

    def render(self) -> str:
        from ..present.analysis import render_plan

        return render_plan(self)


def run_plan(*, effect: float | None = None, delta: float | None = None, sd: float | None = None,
             source: dict | None = None, power: float = 0.8, alpha: float = 0.05, comparisons: int = 1,
             means: list[float] | None = None, sigma: float | None = None, blocks: int | None = None) -> PlanResult:
    """Blocks needed (or power reached) for a paired comparison or for the RCBD F test.

    `source` is a stored analysis's document ({"analysis_id", "residual_ms", ...}); its residual mean
    square gives sigma for the F test and sqrt(2 MS) as the sd of block differences.
    """
    from ..analyze import planning

    if comparisons < 1:
        raise InputError("--comparisons must be 1 or more")
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
