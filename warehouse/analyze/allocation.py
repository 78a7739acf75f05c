"""The allocation of a campaign's CPU time between groups, instances per group and seeds per
instance, from the variance components of a comparison (`analyze.noise.comparison_components`).

The block difference of an allocation (n_i instances per group, n_s seeds per instance) has
variance 2 (s2_TG + s2_TI / n_i + s2_seed / (n_i n_s)); the paired t-test on G such blocks has
the exact noncentral-t power of `planning.paired_t_power`. The cost of an allocation is
G (c_group + n_i (c_instance + n_s T c_run)) seconds for T treatments. Reference: Cochran,
Sampling Techniques (1977), chapter 10 (optimal allocation in multistage sampling).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

from scipy import stats

from warehouse.analyze.tidy import _Result
from warehouse.errors import DesignError, InputError

#: the allocation search looks at up to this many instances per group and seeds per instance.
MOST_INSTANCES = 40
MOST_SEEDS = 40


# --- allocation -----------------------------------------------------------------------------------

def block_difference_variance(s2_tg: float, s2_ti: float, s2_seed: float, instances: int, seeds: int) -> float:
    """Variance of one block's treatment difference with ``instances`` instances of ``seeds`` runs
    per treatment: 2 (s2_TG + s2_TI / n_i + s2_seed / (n_i n_s))."""
    return 2.0 * (s2_tg + s2_ti / instances + s2_seed / (instances * seeds))


def closed_form_allocation(s2_tg: float, s2_ti: float, s2_seed: float, cost_group: float, cost_instance: float,
                           cost_run: float) -> dict:
    """The continuous optimum of a three-stage design (Cochran, Sampling Techniques, ch. 10): the
    variance of the mean difference, (2 / G)(s2_TG + s2_TI / n_i + s2_seed / (n_i n_s)), for the
    cost G (c_group + n_i (c_instance + n_s c_run)) is least at
    n_s* = sqrt(c_instance s2_seed / (c_run s2_TI)) and n_i* = sqrt(c_group s2_TI / (c_instance s2_TG)),
    whatever the budget (Cauchy-Schwarz: each term's variance over its cost is the same).
    A zero cost puts the optimum at a boundary: 0 (read as 1, as few as there can be) or infinity."""
    def ratio(num: float, den: float) -> float:
        if num <= 0:
            return 0.0  # nothing to save by spreading: as few as there can be (the boundary, 1)
        if den <= 0:
            return math.inf
        return math.sqrt(num / den)

    return {"seeds_per_instance": ratio(cost_instance * s2_seed, cost_run * s2_ti),
            "instances_per_group": ratio(cost_group * s2_ti, cost_instance * s2_tg)}


@dataclass
class Allocation(_Result):
    """The allocation of groups, instances per group and seeds per instance for a comparison.

    Fields: allocation ({groups, instances_per_group, seeds_per_instance, power, cpu_hours}),
    goal ("power" or "budget"), target_power, budget_hours, effect, alpha, alpha_per_comparison,
    comparisons, treatments, run_seconds, group_seconds, instance_seconds, variances (s2_TG,
    s2_TI, s2_seed), best (the best few allocations), around (how power falls off around the best),
    closed_form (the continuous optimum), warnings.
    """

    allocation: dict
    goal: str
    target_power: float | None
    budget_hours: float | None
    effect: float
    alpha: float
    alpha_per_comparison: float
    comparisons: int
    treatments: int
    run_seconds: float
    group_seconds: float
    instance_seconds: float
    variances: dict
    best: list[dict]
    around: list[dict]
    closed_form: dict
    warnings: list[str] = field(default_factory=list)


def plan_allocation(s2_tg: float, s2_ti: float, s2_seed: float, effect: float, run_seconds: float,
                    treatments: int = 2, power: float = 0.8, budget_hours: float | None = None, alpha: float = 0.05,
                    comparisons: int = 1, group_seconds: float = 0.0, instance_seconds: float = 0.0,
                    max_groups: int | None = None, max_instances: int | None = None, max_seeds: int | None = None,
                    shown: int = 5) -> Allocation:
    """The allocation (G groups, n_i instances per group, n_s seeds per instance) that reaches
    ``power`` for a difference ``effect`` (metric units) at the least CPU time, or with
    ``budget_hours`` the one with the most power within that CPU time.

    Power is exact: the paired t-test on G block differences, each with the variance of
    :func:`block_difference_variance`, at alpha / comparisons (Bonferroni), two-sided
    (`planning.paired_t_power`). Cost: G (group_seconds + n_i (instance_seconds + n_s T run_seconds))
    CPU seconds. Every n_i up to 40 and n_s up to 40 (or the caps given) is tried; for each, the
    fewest groups that reach the power (or the most groups the budget buys).

    Example::

        from warehouse.analyze.noise import plan_allocation
        plan_allocation(0.2, 0.5, 1.0, effect=0.5, run_seconds=30, treatments=2).allocation
    """
    from warehouse.analyze.planning import MAX_BLOCKS, _check_levels as check, _search, paired_t_power

    for name, v in (("s2_tg", s2_tg), ("s2_ti", s2_ti), ("s2_seed", s2_seed)):
        if not (math.isfinite(v) and v >= 0):
            raise InputError(f"{name} {v!r} must be a variance, a number >= 0")
    if s2_tg + s2_ti + s2_seed <= 0:
        raise DesignError("every component of a difference is 0: the runs show no noise to plan against")
    if not (math.isfinite(effect) and effect != 0):
        raise InputError(f"--effect {effect!r}: give the smallest difference worth finding, in the metric's units")
    if not (math.isfinite(run_seconds) and run_seconds > 0):
        raise InputError(f"run seconds {run_seconds!r} must be a positive number (give --run-seconds S)")
    if budget_hours is not None and not (math.isfinite(budget_hours) and budget_hours > 0):
        raise InputError(f"--budget-hours {budget_hours!r}: give the CPU hours to spend, a positive number")
    check(power if budget_hours is None else 0.5, alpha)
    if int(comparisons) != comparisons or comparisons < 1:
        raise InputError(f"comparisons must be a whole number >= 1, not {comparisons!r}")
    for name, v in (("group seconds", group_seconds), ("instance seconds", instance_seconds)):
        if not (math.isfinite(v) and v >= 0):
            raise InputError(f"{name} {v!r} must be a number of seconds >= 0")
    for name, v in (("--max-groups", max_groups), ("--max-instances", max_instances), ("--max-seeds", max_seeds)):
        if v is not None and (int(v) != v or v < (2 if name == "--max-groups" else 1)):
            raise InputError(f"{name} {v!r} must be a whole number >= {2 if name == '--max-groups' else 1}")
    a_pc = alpha / int(comparisons)
    t = int(treatments)
    c_run = t * run_seconds
    g_cap = min(int(max_groups), MAX_BLOCKS) if max_groups else MAX_BLOCKS
    top_i = int(max_instances) if max_instances else MOST_INSTANCES
    top_s = int(max_seeds) if max_seeds else MOST_SEEDS
    memo: dict[tuple[int, int, int], float] = {}

    def pw(g: int, n_i: int, n_s: int) -> float:
        key = (g, n_i, n_s)
        if key not in memo:
            sd = math.sqrt(block_difference_variance(s2_tg, s2_ti, s2_seed, n_i, n_s))
            memo[key] = paired_t_power(abs(effect) / sd, g, a_pc, "two-sided") if sd > 0 else 1.0
        return memo[key]

    def cost(g: int, n_i: int, n_s: int) -> float:
        return g * (group_seconds + n_i * (instance_seconds + n_s * c_run))

    def row(g: int, n_i: int, n_s: int) -> dict:
        return {"groups": g, "instances_per_group": n_i, "seeds_per_instance": n_s, "power": pw(g, n_i, n_s),
                "cpu_hours": cost(g, n_i, n_s) / 3600.0}

    z = stats.norm.ppf(1 - a_pc / 2) + stats.norm.ppf(power if budget_hours is None else 0.8)
    found: list[dict] = []
    cheapest: float | None = None
    for n_i in range(1, top_i + 1):
        for n_s in range(1, top_s + 1):
            if budget_hours is None:
                var = block_difference_variance(s2_tg, s2_ti, s2_seed, n_i, n_s)
                start = max(2, int(math.ceil(var * (z / effect) ** 2)))
                # the normal approximation never asks more groups than the t-test needs: a cell whose
                # approximate cost is already twice the cheapest found is neither best nor among the few shown
                if cheapest is not None and cost(max(2, start - 1), n_i, n_s) > 2 * cheapest:
                    continue
                if start > g_cap and pw(g_cap, n_i, n_s) < power:
                    continue
                try:
                    g, _ = _search(lambda k: pw(k, n_i, n_s), power, min(start, g_cap))
                except DesignError:
                    continue
                if g > g_cap:
                    continue
            else:
                per_group = cost(1, n_i, n_s)
                g = min(int(budget_hours * 3600.0 // per_group), g_cap)
                if g < 2:
                    continue
            found.append(row(g, n_i, n_s))
            if budget_hours is None:
                cheapest = min(cheapest, cost(g, n_i, n_s)) if cheapest is not None else cost(g, n_i, n_s)
    if not found:
        if budget_hours is None:
            raise DesignError(f"no allocation within the caps reaches power {power:g} for a difference of {effect:g}; "
                              "raise --max-groups (or the other caps), or plan for a larger effect")
        raise DesignError(f"{budget_hours:g} CPU hours do not buy 2 groups of one instance and one seed "
                          f"({cost(2, 1, 1) / 3600:.3g} hours); give a larger budget")
    if budget_hours is None:
        found.sort(key=lambda x: (round(x["cpu_hours"], 9), -round(x["power"], 9), x["groups"],
                                  -x["instances_per_group"]))
    else:
        found.sort(key=lambda x: (-round(x["power"], 9), round(x["cpu_hours"], 9), x["groups"],
                                  -x["instances_per_group"]))
    # on a tie an instance is preferred to a seed: a new instance averages the instance noise too
    best = found[0]
    g, n_i, n_s = best["groups"], best["instances_per_group"], best["seeds_per_instance"]
    around = []
    for dg, di, ds, what in ((0, 0, 0, "the allocation"), (-1, 0, 0, "one group fewer"),
                             (-max(1, g // 4), 0, 0, "a quarter fewer groups"), (0, -1, 0, "one instance fewer"),
                             (0, 0, -1, "one seed fewer"), (0, 1, 0, "one instance more"), (0, 0, 1, "one seed more"),
                             (1, 0, 0, "one group more")):
        gg, ii, ss = g + dg, n_i + di, n_s + ds
        if gg >= 2 and ii >= 1 and ss >= 1:
            around.append(dict(row(gg, ii, ss), change=what))
    closed = closed_form_allocation(s2_tg, s2_ti, s2_seed, group_seconds, instance_seconds, c_run)
    warnings = []
    if group_seconds == 0 and instance_seconds == 0:
        warnings.append("a run's CPU time is the only cost: each new group then costs no more than a new seed, and "
                        "the cheapest design puts every run into new groups (one instance, one seed each) as long as "
                        "groups can be had; give --max-groups for the groups there are, or --instance-seconds / "
                        "--group-seconds for what making a new instance or group costs")
    elif n_s == 1 and s2_seed > 0:
        warnings.append("the optimum sits at one seed per instance: a new instance buys more than a new seed here")
    if n_s == top_s or n_i == top_i:
        warnings.append(f"the allocation sits at the search's edge ({top_i} instances, {top_s} seeds): the optimum may "
                        "lie beyond it")
    if g < 6:
        warnings.append(f"only {g} groups: with so few blocks the checks of the assumptions have no power; plan at "
                        "least 6 (common practice)")
    return Allocation(allocation=best, goal="power" if budget_hours is None else "budget",
                      target_power=None if budget_hours is not None else power, budget_hours=budget_hours,
                      effect=float(effect), alpha=alpha, alpha_per_comparison=a_pc, comparisons=int(comparisons),
                      treatments=t, run_seconds=float(run_seconds), group_seconds=float(group_seconds),
                      instance_seconds=float(instance_seconds),
                      variances={"treatment x group": s2_tg, "treatment x instance": s2_ti, "seed": s2_seed},
                      best=found[:shown], around=around, closed_form=closed, warnings=warnings)
