"""guard: does any treatment make things worse than the baseline by more than a margin that matters?

The one-sided many-to-one comparison of `analyze.guard` on the slice's common blocks, with the
failure-rate test of `analyses.common.failure_part` on top: a treatment that fails significantly
more often than the baseline is worse whatever its values. The verdicts decide the exit status a
pipeline reads: 0 when every treatment is not-worse, 3 when any is worse, 4 when none is worse but
some are inconclusive.
"""
from __future__ import annotations

from dataclasses import dataclass, field

from ..collapse.observations import Collapsed, collapse
from ..collapse.settings import Collapse
from ..errors import DesignError, InputError
from ..select.slices import Slice
from ..shown import Shown
from .common import baseline_cautions, collapse_doc, dedupe, drift_cautions, failure_part, numeric_warnings

WORSE = 3  # some treatment is worse (0: all not-worse; 2: a user's mistake, as everywhere)
UNSETTLED = 4  # none is worse, some are inconclusive

MORE_BLOCKS_BASIS = ("an estimate: the blocks to add before the bound would clear the margin if the present "
                     "difference and residual mean square stayed as they are")


@dataclass
class GuardResult(Shown):
    collapsed: Collapsed
    baseline: str
    stats: object  # analyze.guard.GuardStats
    verdicts: list[dict]  # one per treatment, failures taken into account
    failures: object = None  # FailuresResult
    warnings: list[str] = field(default_factory=list)
    analysis_id: int | None = None
    options: dict = field(default_factory=dict)
    drift: list[dict] = field(default_factory=list)
    settings: dict = field(default_factory=dict)  # the collapse settings, for the command that reproduces it

    kind = "guard"

    @property
    def exit_status(self) -> int:
        words = {v["verdict"] for v in self.verdicts}
        if "worse" in words:
            return WORSE
        return UNSETTLED if "inconclusive" in words else 0

    def errors(self) -> list[str]:
        worse = [v["treatment"] for v in self.verdicts if v["verdict"] == "worse"]
        if worse:
            return [f"worse than {self.baseline} by more than the margin: {', '.join(worse)} (exit status 3)"]
        open_ = [v["treatment"] for v in self.verdicts if v["verdict"] == "inconclusive"]
        if open_:
            return [f"not settled against {self.baseline}: {', '.join(open_)} (exit status 4)"]
        return []

    def to_dict(self) -> dict:
        c, s = self.collapsed, self.stats
        return {"baseline": self.baseline, "slice": c.slice_text, "metric": c.metric, "sense": c.sense,
                "unit": c.unit, "worse_direction": s.worse, "margin": self.options.get("margin"),
                "margin_units": s.margin_units, "baseline_mean": s.baseline_mean, "confidence": s.confidence,
                "method": "dunnett, one-sided",
                "blocks": len(c.blocks), "dropped_blocks": c.dropped_blocks, "residual_ms": s.residual_ms,
                "residual_df": s.residual_df, "critical_value": s.critical_value,
                "verdicts": self.verdicts, "more_blocks_basis": MORE_BLOCKS_BASIS,
                "exit_status": self.exit_status, "collapse": collapse_doc(c),
                "failures": self.failures.to_dict() if self.failures is not None else None,
                "drift": self.drift, "warnings": self.warnings, "analysis_id": self.analysis_id,
                "command": self.command()}

    def command(self) -> str:
        from ..present.guard import reproduce

        return reproduce(self)

    def headline(self) -> str:
        return f"{self.collapsed.metric} against {self.baseline}: " + "; ".join(
            f"{v['treatment']} {v['verdict']}" for v in self.verdicts)

    def render(self) -> str:
        from ..present.guard import render_guard

        return render_guard(self)

    def markdown(self, where: str | None = None) -> str:
        from ..present.guard import markdown_guard

        return markdown_guard(self, where)


def _fails_more(row: dict, level: float) -> bool:
    p = row.get("p_adjusted")
    return p is not None and p < level and row["unsolved_only_by_treatment"] > row["unsolved_only_by_baseline"]


def _failure_reason(row: dict) -> str:
    from ..analyze.failures import method_words
    from ..analyze.tidy import _fmt_p

    return (f"fails more often than the baseline: {row['unsolved_only_by_treatment']} instances unsolved by it and "
            f"solved by the baseline, {row['unsolved_only_by_baseline']} the other way ({method_words(row['method'])}, "
            f"Holm adjusted {_fmt_p(row['p_adjusted'])}); worse whatever its values")


def _value_reason(r: dict, m: float) -> str:
    def g(x):
        return f"{x:+.3g}"

    if r["verdict"] == "not-worse":
        return f"its bound on being worse, {g(r['bound'])}, lies inside the margin {m:.4g}"
    if r["verdict"] == "worse":
        return f"worse by at least {g(r['lower_bound'])}, more than the margin {m:.4g}"
    return (f"worse by between {g(r['lower_bound'])} and {g(r['bound'])}: the margin {m:.4g} lies in between, "
            "so the blocks cannot tell yet")


def _verdicts(stats, failures, level: float) -> list[dict]:
    """The value verdicts, overruled by the failures where a treatment fails significantly more."""
    follow = {r["treatment"]: r for r in (failures.follow_ups if failures is not None else [])}
    out = []
    m = stats.margin_units
    for r in stats.rows:
        v = {"treatment": r["treatment"], "verdict": r["verdict"], "difference": r["difference"],
             "bound": r["bound"], "more_blocks": r["more_blocks"], "worse_by": r["worse_by"],
             "lower_bound": r["lower_bound"], "p_worse": r["p_worse"], "p_not_worse": r["p_not_worse"],
             "on_values": r["verdict"], "on_failures": None, "reason": _value_reason(r, m)}
        f = follow.get(r["treatment"])
        if f is not None and _fails_more(f, level):
            v.update(verdict="worse", more_blocks=0, on_failures="fails more", reason=_failure_reason(f))
        out.append(v)
    # a treatment with no value on the common blocks (every run failed) is judged on its failures
    seen = {r["treatment"] for r in stats.rows} | {stats.baseline}
    for t, f in follow.items():
        if t in seen:
            continue
        v = {"treatment": t, "verdict": "inconclusive", "difference": None, "bound": None, "more_blocks": None,
             "worse_by": None, "lower_bound": None, "p_worse": None, "p_not_worse": None, "on_values": None,
             "on_failures": None, "reason": "no value on the common blocks (no successful run): only its failures "
                                            "can judge it, and they do not differ significantly"}
        if _fails_more(f, level):
            v.update(verdict="worse", more_blocks=0, on_failures="fails more", reason=_failure_reason(f))
        out.append(v)
    return out


def run_guard(conn, sl: Slice, metric: str | None, settings: Collapse, baseline: str, margin,
              confidence: float = 0.95, quick: bool = True) -> GuardResult:
    """Guard `baseline` on slice `sl`: every other treatment not-worse, worse or inconclusive
    against `margin` (a number in the metric's units or "X%" of the baseline's mean on the common
    blocks), at family-wise `confidence`; failures count (see the module's docstring)."""
    from ..analyze.guard import GuardStats, guard_vs_baseline, margin_in_units
    from ..analyze.tidy import refuse_overflow
    from ..collapse.cautions import imputed_failures
    from .versus import campaign_drift

    if margin is None or str(margin).strip() == "":
        raise InputError("guard needs --margin: the difference below which a change does not matter, in the "
                         "metric's units (0.5) or in percent of the baseline (2%)")
    try:
        margin_in_units(margin, 1.0)
    except InputError:
        raise InputError(f"--margin {margin}: write a number >= 0 in the metric's units (0.5) or a percentage of the "
                         "baseline (2%)") from None
    try:
        confidence = float(confidence)
    except (TypeError, ValueError):
        confidence = float("nan")
    if not 0.5 < confidence < 1:
        raise InputError(f"--confidence {confidence}: give a level between 0.5 and 1, e.g. 0.95")
    if "@" not in baseline:
        raise InputError(f"baseline '{baseline}': name one treatment as NAME@VERSION, e.g. stacker@1.4")
    if settings.holes == "keep":
        raise InputError("guard compares on common blocks only; leave --holes at drop")
    c = collapse(conn, sl, metric, settings, cells=not quick, from_runs=not quick)
    if baseline not in c.treatments:
        from difflib import get_close_matches

        near = get_close_matches(baseline, c.treatments, n=2)
        hint = f" (did you mean {' or '.join(near)}?)" if near else ""
        raise DesignError(f"baseline {baseline} is not in the slice{hint}; treatments there: {', '.join(c.treatments)}")
    failures = failure_part(conn, sl, c, baseline, quick=quick)
    if len(c.treatments) < 2 and len(failures.per_treatment) < 2:
        raise DesignError("the slice holds only the baseline; add the treatments to guard it against")
    if c.obs.empty:
        raise DesignError("no block holds the baseline and every other treatment; narrow the slice to common blocks")
    refuse_overflow(c.obs["value"], f"metric {c.metric}")
    worse = "higher" if c.sense == "min" else "lower"
    numeric: list[str] = []
    if len(c.treatments) < 2:
        # every other treatment failed every run: no value to compare, only its failures can judge it
        stats = GuardStats(baseline=baseline, blocks=len(c.blocks), treatments=[baseline], worse=worse,
                           confidence=confidence, margin=margin,
                           margin_units=margin_in_units(margin, float(c.obs["value"].mean())), residual_ms=None,
                           residual_df=None, critical_value=None, rows=[], baseline_mean=float(c.obs["value"].mean()))
    else:
        with numeric_warnings(numeric):
            stats = guard_vs_baseline(c.obs[["treatment", "block", "value"]], baseline, worse=worse, margin=margin,
                                      confidence=confidence)
    level = 1 - confidence
    verdicts = _verdicts(stats, failures, level)
    warnings = baseline_cautions(c, baseline, numeric)
    warnings += list(stats.warnings)
    warnings += imputed_failures(c) + failures.warnings
    drift = campaign_drift(conn, c, settings, baseline)
    warnings += drift_cautions(drift, stats.margin_units, "as large as the margin")
    res = GuardResult(c, baseline, stats, verdicts, failures, dedupe(warnings),
                      options={"baseline": baseline, "margin": str(margin).strip(), "confidence": confidence})
    res.drift = drift
    res.settings = settings.to_dict()
    return res
