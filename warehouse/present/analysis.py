"""Text for peek, blocktest, versus and plan (the plans made from a noise analysis: present/noise.py)."""
from __future__ import annotations

from .text import num, pairs, pval, signed, table


def render_peek(cov, limit: int | None = None) -> str:
    cells = cov.cells.set_index(["block", "treatment"])
    rows = []
    shown = cov.blocks if not limit or limit >= len(cov.blocks) else cov.blocks[:limit]
    for b in shown:
        row = [b]
        for t in cov.treatments:
            if (b, t) in cells.index:
                c = cells.loc[(b, t)]
                row.append(f"{int(c['runs'])}{'!' if c['failed'] else ' '}")
            else:
                row.append(". ")
        rows.append(row)
    out = [table(rows, ["block", *cov.treatments], align=["left"] + ["right"] * len(cov.treatments))]
    if len(shown) < len(cov.blocks):
        out.append(f"({len(cov.blocks) - len(shown)} more blocks not shown; raise --limit, or use --json)")
    f = cov.failures
    fails = ", ".join(f"{v} {k}{'s' if k == 'timeout' and v != 1 else ''}" for k, v in f.items() if v) or "none"
    out.append("runs per cell (seeds x instances); . no runs (a hole); ! some runs did not succeed")
    out.append(f"failures  {fails}")
    if cov.holes:
        out.append(f"holes     {len(cov.holes)} blocks miss a treatment: " + "; ".join(
            f"{h['block']} lacks {', '.join(h['missing'])}" for h in cov.holes[:6]) + (" ..." if len(cov.holes) > 6 else ""))
    for w in cov.warnings:
        out.append(f"caution   {w}")
    return "\n".join(out)


def _better(sense: str) -> str:
    return "lower is better" if sense == "min" else "higher is better"


def _collapse_line(c) -> str:
    st = c.settings
    rep = f"trimmed mean ({st['trim']:g})" if st["replicates"] == "trimmed" else st["replicates"]
    if st["failures"] == "penalize":
        fail = f"failed runs penalized x{st['penalty']:g}"
    else:
        fail = {"drop": "failed runs dropped", "worst": "failed runs at the instance's worst value"}[st["failures"]]
    return f"seeds -> {rep} per instance -> {st['instances']} per block; {fail}"


def _header(c, design: str) -> str:
    a, b = len(c.treatments), len(c.blocks)
    dropped = f"{len(c.dropped_blocks)} blocks with holes" if c.dropped_blocks and c.settings["holes"] == "drop" else "none"
    left = [("slice", c.slice_text or "(everything)"),
            ("design", f"{a} treatments x {b} blocks, {design}"),
            ("collapse", _collapse_line(c)),
            ("used", f"{c.runs_used} of {c.runs_in_slice} runs, {c.instances_used} instances")]
    out = pairs(left)
    lines = out.splitlines()
    lines[0] += f"    metric  {c.metric} ({_better(c.sense)})"
    lines[1] += f"    dropped  {dropped}"
    extra = [f"          {n}" for n in c.notes]  # every note that changed what was analysed
    return "\n".join(lines + extra)


def _anova_table(rows) -> str:
    body = []
    for r in rows:
        body.append([r["source"], str(r["df"]), num(r["ss"]), num(r["ms"]),
                     num(r["f"], 3) if r.get("f") is not None else "", pval(r["p"]) if r.get("p") is not None else ""])
    return table(body, ["source of variation", "df", "sum of squares", "mean square", "F", "p"],
                 align=["left", "right", "right", "right", "right", "right"])


def _yes(p, level: float = 0.05) -> str:
    return "-" if p is None else ("yes" if p >= level else "no")


def render_blocktest(res) -> str:
    c, s = res.collapsed, res.stats
    out = [_header(c, res.design), ""]
    tr = getattr(s, "transform", {"name": "none"}) or {"name": "none"}
    if tr.get("name", "none") != "none":
        extra = f", shifted by {num(tr['shift'])}" if tr.get("shift") else ""
        lam = f", lambda = {num(tr['boxcox_lambda'], 3)}" if tr.get("boxcox_lambda") is not None else ""
        out.append(f"analysed on the {tr['name']} scale{extra}{lam}")
    out.append(_anova_table(s.anova))
    if hasattr(s, "relative_efficiency") and s.relative_efficiency is not None:
        out.append(f"r squared {num(s.r_squared, 3)}; blocking was {num(s.relative_efficiency, 3)} times as efficient "
                   "as an unblocked design on these data")
    if res.design == "incomplete":
        bal = s.balance
        kind = "a balanced incomplete block design" if bal.get("bibd") else ("complete" if bal.get("complete") else "unbalanced")
        out.append(f"treatments adjusted for blocks (blocks entered first); the design is {kind}")
    if res.design == "generalized":
        rb = s.treatment_random_blocks
        out.append(f"with blocks as a random sample: treatment against the interaction, F = {num(rb['f'], 3)} on "
                   f"{rb['df1']} and {rb['df2']} df, p {_p_eq(rb['p'])}")
    out.append("")
    out.append(_means_table(res))
    if res.design == "complete":
        d = s.diagnostics
        out.append("")
        out.append("checks")
        sh = d["shapiro"]["p"]
        after = ""
        for chk in s.transform_checks:
            if chk["transform"] in ("log", "boxcox") and chk["transform"] != tr.get("name") and sh is not None and sh < 0.05:
                after = f"   (after {chk['transform']}: p = {pval(chk['shapiro_p'])}, {_yes(chk['shapiro_p'])})"
                break
        rows = [("residuals normal", f"Shapiro-Wilk p {_p_eq(sh)}", _yes(sh) + after)]
        if d["fligner"].get("note"):  # two treatments: the spread checks cannot tell anything
            rows.append(("equal variances", "Fligner-Killeen, Brown-Forsythe", "-   (" + d["fligner"]["note"] + ")"))
        else:
            rows += [("equal variances", f"Fligner-Killeen p {_p_eq(d['fligner']['p'])}", _yes(d["fligner"]["p"])),
                     ("", f"Brown-Forsythe p {_p_eq(d['brown_forsythe']['p'])}", _yes(d["brown_forsythe"]["p"]))]
        rows.append(("additive", f"Tukey non-additivity p {_p_eq(d['nonadditivity']['p'])}", _yes(d["nonadditivity"]["p"])))
        w1 = max(len(r[1]) for r in rows)
        for name, test, verdict in rows:
            out.append(f"  {name.ljust(18)}  {test.ljust(w1)}  {verdict}")
        outl = d.get("outliers") or []
        if outl:
            txt = "; ".join(f"{o['treatment']} on {o['block']} ({num(o['standardized'], 2)})" for o in outl[:5])
            out.append(f"  {'outliers'.ljust(18)}  {txt}")
        else:
            out.append(f"  {'outliers'.ljust(18)}  none beyond 3 standardized residuals")
        fd, qd = s.friedman.to_dict(), s.quade.to_dict()
        out.append(f"rank tests            {rank_test_lines(fd, qd)[0]}")
        out.append(f"                      {rank_test_lines(fd, qd)[1]}")
        for line in s.advice:
            out.append(f"advice                {line}")
    for p in res.pairs:
        out.append("")
        out.append(_pairs_table(p))
    if getattr(res, "failures", None) is not None:
        out += ["", render_failures(res.failures.to_dict())]
    cen = getattr(res, "censored", None)
    if cen is not None:
        out += ["", render_censored(cen)]
    for w in res.warnings + (cen.warnings if cen is not None else []):
        out.append(f"caution   {w}")
    if res.analysis_id is not None:
        out.append(f"kept as analysis {res.analysis_id}     blockyard keep \"...\" --analysis {res.analysis_id}")
    return "\n".join(out)


def rank_test_lines(f: dict, q: dict) -> list[str]:
    """Friedman (with Iman-Davenport) and Quade in two lines, from their documents. A statistic
    that is not defined is said in words, with no p beside it."""
    if f.get("statistic") is None:
        first = "Friedman not defined: every block ties all treatments"
    else:
        first = f"Friedman chi2 = {num(f['statistic'], 3)} (ties corrected), p {_p_eq(f.get('p'))}; "
        first += (f"Iman-Davenport F = {num(f['iman_davenport'], 3)}, p {_p_eq(f.get('p_f'))}"
                   if f.get("iman_davenport") is not None else
                   "Iman-Davenport F not defined: the ranks are identical in every block")
    if q.get("statistic") is not None:
        second = f"Quade F = {num(q['statistic'], 3)} on {q.get('df1')} and {q.get('df2')} df, p {_p_eq(q.get('p'))}"
    elif f.get("statistic") is None:
        second = "Quade not defined: every block ties all treatments"
    else:
        second = "Quade F not defined: the ranks are identical in every block and the blocks' ranges tie"
    return [first, second]


def _p_eq(p) -> str:
    s = pval(p)
    return s if s.startswith("<") or s == "-" else f"= {s}"


def _means_table(res) -> str:
    s = res.stats
    sd = res.stats_doc()
    if res.design == "incomplete":
        rows = [[r["treatment"], str(r["n"]), num(r["raw_mean"]), num(r["adjusted_mean"])] for r in sd["adjusted_means"]]
        return table(rows, ["treatment", "blocks", "mean", "adjusted mean"], align=["left", "right", "right", "right"])
    rows = []
    ranks = {}
    if hasattr(s, "friedman") and s.friedman is not None:
        ranks = dict(zip(s.friedman.mean_ranks["treatment"], s.friedman.mean_ranks["mean_rank"]))
    geo = any("geometric_mean" in r for r in sd["treatment_means"])  # log scale: also the original scale
    for r in sd["treatment_means"]:
        rows.append([r["treatment"], num(r["mean"])] + ([num(r.get("geometric_mean"))] if geo else [])
                    + [num(ranks.get(r["treatment"])) if ranks else ""])
    head = ["treatment", "mean" + (" (analysis scale)" if getattr(s, "transform", {}).get("name", "none") != "none" else ""),
            *(["geometric mean"] if geo else []), "mean rank" if ranks else ""]
    return table(rows, head, align=["left", "right"] + (["right"] if geo else []) + ["right"])


def _pairs_table(p) -> str:
    name = {"tukey": "Tukey HSD on the block model", "nemenyi": "Nemenyi after Friedman",
            "conover": f"Conover after Friedman ({p.adjust} adjusted)"}[p.method]
    pct = f"{int(p.confidence * 100)} % interval"
    rows = [[f"{r['first']} - {r['second']}", signed(r["diff"]), f"{num(r['ci_low'])} .. {num(r['ci_high'])}",
             pval(r["p_adjusted"])] for r in p.pairs]
    head, align = ["pair", "diff", pct, "p adj"], ["left", "right", "right", "right"]
    tail = ""
    if p.original_scale is not None:  # a log-scale Tukey: the same pairs as ratios of geometric means
        for row, r in zip(rows, p.pairs):
            row[3:3] = [num(r["ratio"], 3), f"{num(r['ratio_low'], 3)} .. {num(r['ratio_high'], 3)}",
                        f"{signed(r['percent'], 2)} %"]
        head[3:3] = ["ratio", f"ratio {pct}", "change"]
        align[3:3] = ["right", "right", "right"]
        tail = ("\ndiff on the log scale; ratio = exp(diff), the " + p.original_scale["ratios"]
                + "; change = the ratio as a percent difference")
    return f"all pairs: {name}\n" + table(rows, head, align=align) + tail


def render_versus(res) -> str:
    c, s = res.collapsed, res.stats
    camp = ", ".join(c.campaigns.get(res.baseline, []))
    total = len(c.blocks) + len(c.dropped_blocks)
    lines = [f"baseline  {res.baseline} ({camp})     common blocks {len(c.blocks)} of {total}     "
             f"metric {c.metric} ({_better(c.sense)})"]
    method = {"dunnett": "Dunnett", "paired-t": "paired t", "wilcoxon": "Wilcoxon signed-rank"}[s.method]
    side = "two-sided" if s.alternative == "two-sided" else f"one-sided ({res.better} is better)"
    adj = "" if s.method == "dunnett" else f", {s.adjust} adjusted"
    ms = f", residual mean square {num(s.residual_ms)} on {s.residual_df} df" if s.residual_ms is not None else ""
    lines.append(f"method    {method}, {side}, {int(round(s.confidence * 100))} % simultaneous intervals{adj}{ms}")
    lines.append(f"collapse  {_collapse_line(c)}")
    lines.append(f"used      {c.runs_used} of {c.runs_in_slice} runs, {c.instances_used} instances")
    lines += [f"          {n}" for n in c.notes]  # whatever changed what was analysed, said here too
    for d in getattr(res, "drift", []):
        if d["difference"] is None:
            lines.append(f"drift     {d['treatment']}: {d['campaigns'][1]} against {d['campaigns'][0]}: "
                         f"too few common blocks ({d['blocks']}) to measure")
            continue
        lines.append(f"drift     {d['treatment']}: {d['campaigns'][1]} against {d['campaigns'][0]} "
                     f"{signed(d['difference'])} ({signed(d['ci_low'])} .. {signed(d['ci_high'])}, "
                     f"p {_p_eq(d['p'])}) on {d['blocks']} common blocks")
    lines.append("")
    rows = []
    for r in s.comparisons:
        lo = "-inf" if r["ci_low"] is None or r["ci_low"] == float("-inf") else signed(r["ci_low"])
        hi = "+inf" if r["ci_high"] is None or r["ci_high"] == float("inf") else signed(r["ci_high"])
        rel = r.get("relative_pct")
        rows.append([r["treatment"], signed(r["diff"]), f"{lo} .. {hi}",
                     f"{signed(rel, 2)} %" if rel is not None else "-", pval(r["p_adjusted"]),
                     f"{r['wins']} / {r['ties']} / {r['losses']}", num(r.get("effect"), 3), res.verdict(r)])
    out = "\n".join(lines) + "\n" + table(
        rows, ["treatment", "diff", f"{int(round(s.confidence * 100))} % interval", "change", "p adj",
               "wins / ties / losses", "effect", ""],
        align=["left", "right", "right", "right", "right", "right", "right", "left"])
    tail = ["diff = treatment - baseline, in the metric's units; change is relative to the baseline; "
            "effect = mean block difference / sd of block differences"]
    if getattr(res, "failures", None) is not None:
        tail += ["", render_failures(res.failures.to_dict())]
    cen = getattr(res, "censored", None)
    if cen is not None:
        tail += ["", render_censored(cen)]
    for w in res.warnings + (cen.warnings if cen is not None else []):
        tail.append(f"caution   {w}")
    if res.analysis_id is not None:
        tail.append(f"kept as analysis {res.analysis_id}")
    return out + "\n" + "\n".join(tail)


def failure_test_line(t: dict) -> str:
    """The test of solved / not solved in one line, its verdict beside it (text and report)."""
    from ..analyze.failures import method_words

    name = method_words(t.get("method"))
    if t.get("statistic") is None:
        return f"{name}: not computed, {t.get('note') or 'nothing to compare'}"
    if t.get("method") == "mcnemar-exact":
        stat = f"McNemar exact binomial on the {t['separating']} instances solved by one only"
    elif t.get("method") == "cochran-q":
        stat = f"Cochran's Q = {num(t['statistic'], 3)} on {t['df']} df"
    else:
        stat = f"McNemar chi2 = {num(t['statistic'], 3)} on {t['df']} df (continuity corrected)"
    verdict = "solving depends on the treatment" if t["p"] is not None and t["p"] < 0.05 else \
        "no clear difference in solving"
    return (f"{verdict}: {stat}, p {_p_eq(t['p'])}; {t['separating']} of {t['instances']} instances are solved "
            "by some treatments and not others")


def _failure_word(row: dict, baseline: str) -> str:
    p = row.get("p_adjusted")
    if p is None or p >= 0.05:
        return ""
    return "fails more" if row["unsolved_only_by_treatment"] > row["unsolved_only_by_baseline"] else "fails less"


def render_failures(f: dict) -> str:
    """The failures block of blocktest and versus: rates per treatment, the test of whether
    solving depends on the treatment, and (versus) each treatment against the baseline."""
    from ..analyze.failures import share_text

    n = f.get("instances") or 0
    if not n:
        return "failures  not compared: no instance was run by every treatment"
    if not any(r["failed"] for r in f.get("per_treatment") or []):
        return f"failures  none: every run on the {n} instances every treatment ran succeeded"
    left = f"; {f['left_out']} instances not run by every treatment left out" if f.get("left_out") else ""
    out = [f"failures  on the {n} instances every treatment ran{left}; {f.get('rule')}"]
    rows = [[r["treatment"], str(r["runs"]), str(r["failed"]), share_text(r["failed_share"]),
             f"{r['unsolved']} of {r['instances']}"] for r in f["per_treatment"]]
    out.append(table(rows, ["treatment", "runs", "failed", "share failed", "unsolved instances"],
                     align=["left", "right", "right", "right", "right"]))
    out.append(failure_test_line(f["test"]))
    follow = f.get("follow_ups") or []
    if follow:
        base = f.get("baseline")
        out.append(f"against {base}: McNemar per treatment (exact below 25 instances solved by one only), Holm adjusted")
        rows = [[r["treatment"], str(r["unsolved_only_by_treatment"]), str(r["unsolved_only_by_baseline"]),
                 pval(r.get("p_adjusted")), _failure_word(r, base)] for r in follow]
        out.append(table(rows, ["treatment", "unsolved by it only", "unsolved by the baseline only", "p adj", ""],
                         align=["left", "right", "right", "right", "left"]))
    return "\n".join(out)


def render_censored(cen) -> str:
    """The censored-runtime part of blocktest and versus (--cutoff): counts and Kaplan-Meier per
    treatment, hazard ratios of solving against the reference, the log-rank test. Its cautions go
    with the analysis's own, at the bottom."""
    cut = f"{cen.cutoff:g}" + (f" {cen.unit}" if cen.unit else "")
    where = f"{cen.runs} runs on {cen.instances} instances in {cen.blocks} blocks" if cen.instances is not None \
        else f"{cen.runs} runs in {cen.blocks} blocks"
    out = [f"runtimes with a cutoff   {cen.metric or 'time'} up to {cut}: failed runs and runs at or past {cut} "
           f"count as unsolved at {cut}", f"                         {where}"]
    out += [f"                         {n}" for n in cen.notes]
    rows = []
    for r in cen.per_treatment:
        med = num(r["median_time"]) if r["median_time"] is not None else "not reached"
        rows.append([r["treatment"], str(r["runs"]), str(r["solved"]), str(r["censored"]),
                     f"{num(100 * r['solved_fraction'], 3)} %", med, num(r["restricted_mean_time"]),
                     num(r["mean_time_solved_only"])])
    out.append(table(rows, ["treatment", "runs", "solved", "unsolved", "share solved", "median time",
                            "restricted mean", "mean (solved runs only)"],
                     align=["left", "right", "right", "right", "right", "right", "right", "right"]))
    out.append(f"median time: Kaplan-Meier, unsolved runs censored at {cut} (not reached: fewer than half solve); "
               f"restricted mean: the mean time with unsolved runs counted at {cut}")
    if cen.cox:
        pct = int(round(cen.confidence * 100))
        out.append("")
        out.append(f"hazard of solving against {cen.reference}: Cox model stratified by block, Efron's ties, "
                   + ("intervals allowing for runs on one instance being alike" if cen.instances is not None
                      else "model-based intervals"))
        rows = []
        for r in cen.cox:
            if not r["estimable"]:
                rows.append([r["treatment"], "-", "not estimable", "-", "-", ""])
                continue
            ph = r["proportional_p"]
            holds = "-" if ph is None else f"{'yes' if ph >= 0.05 else 'no'} (p {_p_eq(ph)})"
            word = ""
            if r["p_adjusted"] is not None and r["p_adjusted"] < 1 - cen.confidence:
                word = "solves sooner" if r["hazard_ratio"] > 1 else "solves later"
            rows.append([r["treatment"], num(r["hazard_ratio"], 3), f"{num(r['ci_low'], 3)} .. {num(r['ci_high'], 3)}",
                         pval(r["p_adjusted"]), holds, word])
        out.append(table(rows, ["treatment", "hazard ratio", f"{pct} % interval", "p adj", "proportional", ""],
                         align=["left", "right", "right", "right", "left", "left"]))
        out.append(f"a hazard ratio above 1 solves sooner than {cen.reference}; p adjusted by Holm; proportional: "
                   "the ratio holds over time (Schoenfeld residuals)")
    lr = cen.logrank
    if lr.get("chi2") is not None:
        out.append(f"log-rank test, stratified by block: chi2 = {num(lr['chi2'], 4)} on {lr['df']} df, p {_p_eq(lr['p'])}")
    return "\n".join(out)


def render_plan(res) -> str:
    if res.kind_of_plan in ("allocation", "more"):
        from .noise import render_allocation, render_more

        return (render_allocation if res.kind_of_plan == "allocation" else render_more)(res)
    d = res.plan.to_dict()
    out = []
    if res.source:
        out.append(f"sigma from analysis {res.source['analysis_id']}: residual mean square {num(res.source['residual_ms'])} "
                   f"(sigma {num(res.source['sigma'])}, sd of block differences {num(res.source['sd_of_differences'])})")
    if res.kind_of_plan == "paired":
        eff = f"standardized effect {num(d['effect'], 3)}"
        if d.get("delta") is not None:
            eff += f" (difference {num(d['delta'])} over sd {num(d['sd'])})"
        out.append(f"paired comparison, {eff}, two-sided")
        split = f", split over {d['comparisons']} comparisons ({num(d['alpha_per_comparison'], 3)} each, Bonferroni)" if d["comparisons"] > 1 else ""
        out.append(f"alpha {num(d['alpha'], 3)}{split}; target power {num(d['power'], 3)}")
        out.append(f"blocks needed  {d['blocks_needed']}   (power reached with that many: {num(d['achieved_power'], 3)})")
    elif res.kind_of_plan == "rcbd-blocks":
        out.append(f"RCBD F test for treatment means {', '.join(num(m) for m in d.get('means', []))} with sigma {num(d.get('sigma'))}")
        out.append(f"alpha {num(d['alpha'], 3)}; target power {num(d['power'], 3)}")
        out.append(f"blocks needed  {d['blocks_needed']}   (power reached: {num(d.get('achieved_power'), 3)})")
    else:
        out.append(f"RCBD F test with {d.get('blocks')} blocks: power {num(d.get('power'), 3)} at alpha {num(d.get('alpha'), 3)}")
    more, held = (res.source or {}).get("blocks_more"), (res.source or {}).get("blocks_held")
    if more is not None:
        aid = res.source["analysis_id"]
        out.append(f"needs {d['blocks_needed']} blocks; the slice of analysis {aid} holds {held}: {more} more"
                   if more else f"the slice of analysis {aid} holds {held} blocks: enough")
    out.append("the number of observations is the number of blocks (instance groups), not the number of runs")
    for w in d.get("warnings", []):
        out.append(f"caution   {w}")
    if res.analysis_id is not None:
        out.append(f"kept as analysis {res.analysis_id}")
    return "\n".join(out)
