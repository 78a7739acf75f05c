"""Text for peek, blocktest, versus and plan."""
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
        rows = [("residuals normal", f"Shapiro-Wilk p {_p_eq(sh)}", _yes(sh) + after),
                ("equal variances", f"Fligner-Killeen p {_p_eq(d['fligner']['p'])}", _yes(d["fligner"]["p"])),
                ("", f"Brown-Forsythe p {_p_eq(d['brown_forsythe']['p'])}", _yes(d["brown_forsythe"]["p"])),
                ("additive", f"Tukey non-additivity p {_p_eq(d['nonadditivity']['p'])}", _yes(d["nonadditivity"]["p"]))]
        w1 = max(len(r[1]) for r in rows)
        for name, test, verdict in rows:
            out.append(f"  {name.ljust(18)}  {test.ljust(w1)}  {verdict}")
        outl = d.get("outliers") or []
        if outl:
            txt = "; ".join(f"{o['treatment']} on {o['block']} ({num(o['standardized'], 2)})" for o in outl[:5])
            out.append(f"  {'outliers'.ljust(18)}  {txt}")
        else:
            out.append(f"  {'outliers'.ljust(18)}  none beyond 3 standardized residuals")
        f = s.friedman
        out.append(f"rank tests            Friedman chi2 = {num(f.statistic, 3)} (ties corrected), p {_p_eq(f.p)}; "
                   f"Iman-Davenport F = {num(f.iman_davenport, 3)}, p {_p_eq(f.p_f)}")
        q = s.quade
        out.append(f"                      Quade F = {num(q.statistic, 3)} on {q.df1} and {q.df2} df, p {_p_eq(q.p)}")
        for line in s.advice:
            out.append(f"advice                {line}")
    for p in res.pairs:
        out.append("")
        out.append(_pairs_table(p))
    for w in res.warnings:
        out.append(f"caution   {w}")
    if res.analysis_id is not None:
        out.append(f"kept as analysis {res.analysis_id}     blockyard keep \"...\" --analysis {res.analysis_id}")
    return "\n".join(out)


def _p_eq(p) -> str:
    s = pval(p)
    return s if s.startswith("<") or s == "-" else f"= {s}"


def _means_table(res) -> str:
    s = res.stats
    sd = s.to_dict()
    if res.design == "incomplete":
        rows = [[r["treatment"], str(r["n"]), num(r["raw_mean"]), num(r["adjusted_mean"])] for r in sd["adjusted_means"]]
        return table(rows, ["treatment", "blocks", "mean", "adjusted mean"], align=["left", "right", "right", "right"])
    rows = []
    ranks = {}
    if hasattr(s, "friedman") and s.friedman is not None:
        ranks = dict(zip(s.friedman.mean_ranks["treatment"], s.friedman.mean_ranks["mean_rank"]))
    for r in sd["treatment_means"]:
        rows.append([r["treatment"], num(r["mean"]), num(ranks.get(r["treatment"])) if ranks else ""])
    head = ["treatment", "mean" + (" (analysis scale)" if getattr(s, "transform", {}).get("name", "none") != "none" else ""),
            "mean rank" if ranks else ""]
    return table(rows, head, align=["left", "right", "right"])


def _pairs_table(p) -> str:
    name = {"tukey": "Tukey HSD on the block model", "nemenyi": "Nemenyi after Friedman",
            "conover": f"Conover after Friedman ({p.adjust} adjusted)"}[p.method]
    rows = [[f"{r['first']} - {r['second']}", signed(r["diff"]), f"{num(r['ci_low'])} .. {num(r['ci_high'])}",
             pval(r["p_adjusted"])] for r in p.pairs]
    return f"all pairs: {name}\n" + table(rows, ["pair", "diff", f"{int(p.confidence * 100)} % interval", "p adj"],
                                           align=["left", "right", "right", "right"])


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
    for w in res.warnings:
        tail.append(f"caution   {w}")
    if res.analysis_id is not None:
        tail.append(f"kept as analysis {res.analysis_id}")
    return out + "\n" + "\n".join(tail)


def render_plan(res) -> str:
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
