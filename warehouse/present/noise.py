"""Text for noise (the variance components) and for the plans made from them: the allocation of
groups, instances and seeds, and the blocks that would settle a comparison."""
from __future__ import annotations

from .text import num, pairs, signed, table


def _better(sense: str) -> str:
    return "lower is better" if sense == "min" else "higher is better"


def _pct(x) -> str:
    return "-" if x is None else f"{100 * x:.1f} %"


def _interval(r: dict) -> str:
    lo, hi = r.get("ci_low"), r.get("ci_high")
    if lo is None and hi is None:
        return "-"
    return f"{num(lo)} .. {num(hi) if hi is not None else '?'}"


def _components_table(rows: list[dict], confidence: float) -> str:
    body = [[r["level"], num(r["variance"]), num(r["variance"] ** 0.5 if r["variance"] is not None else None),
             _pct(r.get("share")), _interval(r)] for r in rows]
    return table(body, ["level", "variance", "sd", "share", f"{round(100 * confidence)} % interval"],
                 align=["left", "right", "right", "right", "right"])


def _method_line(fit) -> str:
    if fit.method == "anova":
        return (f"ANOVA (expected mean squares): balanced, {num(fit.instances_per_group)} instances per group, "
                f"{num(fit.seeds_per_instance)} runs per instance and treatment")
    return (f"REML (MixedLM): unbalanced, {num(fit.instances_per_group, 3)} instances per group and "
            f"{num(fit.seeds_per_instance, 3)} runs per instance on average")


def render_noise(res) -> str:
    c, p = res.collapsed, res.pooled
    head = [("slice", c.slice_text or "(everything)"),
            ("runs", f"{res.runs_used} of {res.runs_in_slice} used: {len(res.treatments)} treatments, {p.groups} groups, "
                     f"{p.instances} instances"),
            ("method", _method_line(p))]
    lines = pairs(head).splitlines()
    lines[0] += f"    metric  {c.metric} ({_better(res.sense)})"
    out = lines + [f"          {n}" for n in res.notes] + [""]
    out.append("pooled over the treatments (treatment effects removed; each treatment's groups and instances read "
               "as its own)")
    out.append(_components_table(p.components, p.confidence))
    if len(res.treatments) > 1:
        out.append("")
        out.append("per treatment (its runs alone): share of the variance at each level")
        rows = []
        for part in res.per_treatment:
            if "fit" not in part:
                rows.append([part["treatment"], "-", "-", "-", part["error"]])
                continue
            f = part["fit"]
            rows.append([part["treatment"], *[_pct(r.get("share")) for r in f.components],
                         f.method.upper() if f.method == "anova" else "REML"])
        out.append(table(rows, ["treatment", "group", "instance", "seed", "method"],
                         align=["left", "right", "right", "right", "left"]))
    out.append("")
    if res.comparison is not None:
        cm = res.comparison
        out.append("how a treatment difference varies from block to block (blocking removes the group effect itself; "
                   "plan --noise uses these three)")
        out.append(_components_table(cm.components, cm.confidence))
        v = {r["level"]: r["variance"] or 0.0 for r in cm.components}
        n_i = max(1, round(cm.instances_per_group))
        n_s = max(1, round(cm.seeds_per_instance))
        var = 2 * (v["treatment x group"] + v["treatment x instance"] / n_i + v["seed"] / (n_i * n_s))
        out.append(f"sd of a block's difference with {n_i} instances of {n_s} runs each, as here: {num(var ** 0.5)} "
                   "(the square root of 2 (TxG + TxI / instances + seed / (instances x runs)))")
        for n in cm.notes:
            out.append(f"note      {n}")
    else:
        out.append(f"no components of a treatment difference: {res.comparison_error}")
    for n in p.notes:
        out.append(f"note      {n}")
    for part in res.per_treatment:
        if "fit" in part and part["fit"] is not p:
            for n in part["fit"].notes:
                out.append(f"note      {part['treatment']}: {n}")
    for w in res.warnings:
        out.append(f"caution   {w}")
    if res.analysis_id is not None:
        hint = f"blockyard plan --noise {res.analysis_id} --effect E" if res.comparison is not None else ""
        out.append(f"kept as analysis {res.analysis_id}" + (f"    {hint}" if hint else ""))
    return "\n".join(out)


def _alloc_rows(rows: list[dict], with_change: bool = False) -> list[list[str]]:
    out = []
    for r in rows:
        line = [str(r["groups"]), str(r["instances_per_group"]), str(r["seeds_per_instance"]),
                f"{r['groups'] * r['instances_per_group'] * r['seeds_per_instance']}", num(r["power"], 3),
                num(r["cpu_hours"], 3)]
        out.append(([r.get("change", "")] if with_change else []) + line)
    return out


HEAD = ["groups", "instances", "seeds", "runs per treatment", "power", "CPU hours"]


def _optimum(x) -> str:
    if x is None:  # infinite in the JSON document: the finer level costs nothing
        return "as many as there can be"
    if x < 1:
        return "1"
    return num(x, 3)


def render_allocation(res) -> str:
    d = res.plan.to_dict()
    a = d["allocation"]
    v = d["variances"]
    src = res.source or {}
    out = [f"from noise analysis {src.get('analysis_id')}: treatment x group {num(v['treatment x group'])}, "
           f"treatment x instance {num(v['treatment x instance'])}, seed {num(v['seed'])} (variances of "
           f"{src.get('metric') or 'the metric'}; the group variance itself is blocked out)"]
    cost = f"a run takes {num(d['run_seconds'])} s, {d['treatments']} treatments per seed"
    if d["instance_seconds"] or d["group_seconds"]:
        cost += f"; a new instance costs {num(d['instance_seconds'])} s, a new group {num(d['group_seconds'])} s"
    out.append(cost)
    split = (f", split over {d['comparisons']} comparisons ({num(d['alpha_per_comparison'], 3)} each, Bonferroni)"
             if d["comparisons"] > 1 else "")
    goal = (f"the least CPU time for power {num(d['target_power'], 3)}" if d["goal"] == "power"
            else f"the most power within {num(d['budget_hours'])} CPU hours")
    out.append(f"paired comparison of a difference of {num(d['effect'])}, two-sided, alpha {num(d['alpha'], 3)}{split}; "
               f"goal: {goal}")
    out.append("")
    out.append(f"allocation  {a['groups']} groups x {a['instances_per_group']} instances per group x "
               f"{a['seeds_per_instance']} seeds per instance: power {num(a['power'], 3)}, {num(a['cpu_hours'], 3)} CPU hours")
    out.append("")
    out.append("the best few")
    out.append(table(_alloc_rows(d["best"]), HEAD, align=["right"] * 6))
    out.append("")
    out.append("around the allocation")
    out.append(table(_alloc_rows(d["around"], True), ["change", *HEAD], align=["left"] + ["right"] * 6))
    cf = d["closed_form"]
    i_opt, s_opt = cf["instances_per_group"], cf["seeds_per_instance"]
    line = (f"continuous optimum (nested-design allocation): {_optimum(i_opt)} instances per group, "
            f"{_optimum(s_opt)} seeds per instance")
    if any(x is not None and x < 1 for x in (i_opt, s_opt)):
        line += " (1 is the boundary: below it nothing is saved)"
    out.append(line)
    out.append("the power is exact (noncentral t on the groups' differences); the number of observations is the number "
               "of groups")
    for w in d.get("warnings", []):
        out.append(f"caution   {w}")
    if res.analysis_id is not None:
        out.append(f"kept as analysis {res.analysis_id}")
    return "\n".join(out)


def render_more(res) -> str:
    d = res.plan.to_dict()
    src = res.source or {}
    out = [f"comparisons of analysis {src.get('analysis_id')} ({d['of_kind']}, {d['blocks_held']} blocks): the blocks "
           f"to add to reach power {num(d['power'], 3)} if each difference is what it is now (an estimate)"]
    rows = []
    for r in d["more"]:
        rows.append([r["treatment"], signed(r["diff"]), num(r["z"], 3),
                     "-" if r["more_blocks"] is None else str(r["more_blocks"]),
                     "-" if r.get("total_blocks") is None else str(r["total_blocks"]), r["state"]])
    out.append(table(rows, ["treatment", "diff", "z now", "more blocks", "then in all", "estimate"],
                     align=["left", "right", "right", "right", "right", "left"]))
    for w in d.get("warnings", []):
        out.append(f"caution   {w}")
    if res.analysis_id is not None:
        out.append(f"kept as analysis {res.analysis_id}")
    return "\n".join(out)
