"""A stored analysis as a self-contained report: HTML (figures inline) or Markdown (figures beside it).

The report is built once as a short list of plain blocks (headings, paragraphs, key-value lists,
tables, figures) here, and then written out by one of two small renderers (`present/pages.py`), so
both formats always carry the same content: the claims, the state of the analysis, what was analysed, the result tables,
the figures, the cautions, the coverage and the provenance.

Every value taken from the warehouse is data: the HTML renderer escapes all of it with
html.escape, the Markdown renderer escapes Markdown punctuation and HTML-significant characters.
"""
from __future__ import annotations


import pandas as pd

from ..errors import BlockyardError
from .document import KV, Fig, FigureItem, Heading, Items, Para, ReportData, State, Table, _utc, better_words
from .text import num, pval, signed

STATE_MEANING = {
    "fresh": "the stored record is intact and none of the runs it used has been retracted since it was made. "
             "Runs loaded later are not part of it.",
    "stale": "{n} runs this analysis stood on have been retracted since it was made, so the numbers below may no "
             "longer hold. They are shown as they were kept; blockyard recheck {id} re-runs the analysis on today's data.",
    "tampered": "the stored record no longer matches the digest written when it was kept: it has been changed "
                "outside Blockyard. Do not rely on the numbers below.",
}


_METHODS = {"dunnett": "Dunnett", "paired-t": "paired t", "wilcoxon": "Wilcoxon signed-rank"}


# --- figures -----------------------------------------------------------------------------------

def draw_figures(st) -> tuple[list[FigureItem], list[str]]:
    """The figures a stored analysis supports, drawn from its stored observations only."""
    from . import figures as F

    r = st.result or {}
    obs = pd.DataFrame(st.observations or [])
    metric = st.metric or r.get("metric") or "value"
    sense = r.get("sense") or "min"
    order = r.get("treatment_names") or None
    made: list[FigureItem] = []
    notes: list[str] = []
    tr = r.get("transform") if st.kind == "blocktest" else None
    scale = "" if not tr or (tr.get("name") or "none") == "none" else f" on the {tr['name']} scale the analysis used"

    plan = []
    if st.kind == "noise":
        obs = pd.DataFrame()  # the per-group means it keeps are a record, not a design to draw
        parts = _noise_parts(r)
        if parts:
            plan.append(("components", "where the variance lies",
                         f"Share of the variance of {metric} at each level: pooled over the treatments, per treatment, "
                         "and for a treatment difference from block to block (the levels a plan of groups, instances "
                         "and seeds uses).", lambda: F.component_shares(parts, metric)))
    if st.kind == "versus" and r.get("comparisons"):
        plan.append(("differences", "differences from the baseline",
                     f"Each treatment minus {r.get('baseline')} in {metric}, with its "
                     f"{_pct(r.get('confidence'))} % interval ({_METHODS.get(r.get('method'), r.get('method'))}); "
                     "intervals that do not cross zero mark a clear difference.",
                     lambda: F.baseline_differences(r["comparisons"], r.get("baseline", "baseline"), metric, sense,
                                                    r.get("confidence") or 0.95)))
    if not obs.empty:
        plan.append(("profile", "block profile",
                     f"{metric} per block and treatment, blocks ordered by their mean: lines that keep their order "
                     "across blocks mean a consistent difference; crossing lines mean the ranking depends on the block.",
                     lambda: F.block_profile(obs, sense, metric, order)))
        base = r.get("baseline") if st.kind in ("versus", "guard") else None
        against = f"{base}'s value on the same block" if base else "the block's mean over treatments"
        plan.append(("relative", "block profile, relative",
                     f"Each treatment's {metric} per block as a percentage difference from {against}: a "
                     "difference of a few percent shows even when blocks differ by orders of magnitude.",
                     lambda: F.relative_profile(obs, sense, metric, order, base)))
        plan.append(("qq", "residual Q-Q plot",
                     f"Residuals of the additive treatment + block model{scale} against normal quantiles (Blom "
                     "plotting positions): points near the line support the normal-theory tests.",
                     lambda: F.residual_qq(F.analysis_scale(obs, tr), metric)))
        if st.kind == "blocktest":
            plan.append(("residuals", "residuals against fitted values",
                         f"Residuals{scale} against fitted values: a funnel means the spread grows with the level "
                         "(try a log transform); a curve means treatment and block effects do not add up.",
                         lambda: F.residuals_vs_fitted(F.analysis_scale(obs, tr), metric, order)))
    cen = r.get("censored")
    if isinstance(cen, dict) and cen.get("per_treatment"):
        plan.append(("solved", "share of runs solved by each time",
                     f"Kaplan-Meier share of each treatment's runs solved by each time, up to the cutoff "
                     f"{_plain(cen.get('cutoff'))} (dashed); failed runs and runs at or past the cutoff count as unsolved.",
                     lambda: F.solved_fraction(cen["per_treatment"], cen["cutoff"], metric, cen.get("unit") or "")))
    for key, title, caption, draw in plan:
        try:
            fig = draw()
        except (BlockyardError, ValueError, KeyError, TypeError) as exc:
            notes.append(f"the {title} was not drawn: {exc}")
            continue
        made.append(FigureItem(key, title, caption, F.png_bytes(fig)))
    return made, notes


def _noise_parts(r: dict) -> list[tuple[str, list[dict]]]:
    parts = [("pooled", r.get("components") or [])] if r.get("components") else []
    parts += [(p["treatment"], p["components"]) for p in r.get("per_treatment") or [] if p.get("components")
              and len(r.get("per_treatment") or []) > 1]
    comp = r.get("comparison_components") or {}
    if comp.get("components"):
        parts.append(("a difference", comp["components"]))
    return parts


def _noise_blocks(r: dict) -> list:
    def rows(comps):
        return [[str(c.get("level")), num(c.get("variance")), num(None if c.get("share") is None else 100 * c["share"]),
                 num(c.get("ci_low")), num(c.get("ci_high"))] for c in comps or []]

    pct = _pct(r.get("confidence"))
    head = ["level", "variance", "share (%)", f"{pct} % low", f"{pct} % high"]
    out: list = [Heading("components, pooled over the treatments", 3),
                 Para(f"method: {r.get('method')}; {r.get('runs_used')} of {r.get('runs_in_slice')} runs used"),
                 Table(head, rows(r.get("components")), [False, True, True, True, True])]
    comp = r.get("comparison_components") or {}
    if comp.get("components"):
        out += [Heading("components of a treatment difference (what a plan uses)", 3),
                Table(head, rows(comp["components"]), [False, True, True, True, True])]
    if r.get("run_seconds") is not None:
        out.append(Para(f"a run takes {num(r['run_seconds'])} s on average ({r.get('time_metric')})"))
    return out


# --- the content -------------------------------------------------------------------------------

def _settings_pairs(st) -> list[tuple[str, str]]:
    r = st.result or {}
    out = [("kind", st.kind), ("slice", st.slice_text or "(everything)")]
    if st.metric:
        out.append(("metric", f"{st.metric} ({better_words(r.get('sense'))})"))
    if st.kind in ("versus", "guard"):
        out.append(("baseline", str(r.get("baseline", "-"))))
    if st.kind == "blocktest" and r.get("design"):
        out.append(("design", f"{r.get('treatments', '-')} treatments x {r.get('blocks', '-')} blocks, {r['design']}"))
    elif r.get("blocks") is not None:
        out.append(("blocks", str(r.get("blocks"))))
    col = (st.settings or {}).get("collapse") or {}
    if col:
        out.append(("collapse", f"replicates {col.get('replicates', '-')}, instances {col.get('instances', '-')}, "
                                f"failed runs {col.get('failures', '-')}, blocks with holes {col.get('holes', '-')}"))
    opts = (st.settings or {}).get("options") or {}
    if opts:
        out.append(("options", ", ".join(f"{k} {_plain(v)}" for k, v in sorted(opts.items()))))
    tr = r.get("transform")
    if isinstance(tr, dict) and (tr.get("name") or "none") != "none":
        extra = f", shifted by {num(tr['shift'])}" if tr.get("shift") else ""
        lam = f", lambda {num(tr['boxcox_lambda'], 3)}" if tr.get("boxcox_lambda") is not None else ""
        out.append(("scale", f"analysed on the {tr['name']} scale{extra}{lam}"))
    c = r.get("collapse") or {}
    if c.get("runs_in_slice") is not None:
        out.append(("runs", f"{c.get('runs_used', '-')} of {c.get('runs_in_slice')} runs in the slice used, "
                            f"on {c.get('instances_used', '-')} instances"))
    for note in c.get("notes") or []:
        out.append(("collapse note", str(note)))
    return out


def _plain(v) -> str:
    if v is None:
        return "(default)"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        return f"{v:g}"
    return str(v)


def _p_eq(p) -> str:
    s = pval(p)
    return s if s.startswith("<") or s == "-" else f"= {s}"


def _yes(p, level: float) -> str:
    return "-" if p is None else ("yes" if p >= level else "no")


def _blocktest_blocks(r: dict) -> list:
    from ..analyze.tidy import CHECK_LEVEL

    out: list = [Heading("analysis of variance", 3)]
    rows = [[str(a.get("source", "")), _plain(a.get("df")), num(a.get("ss")), num(a.get("ms")),
             num(a.get("f"), 3) if a.get("f") is not None else "", pval(a.get("p")) if a.get("p") is not None else ""]
            for a in r.get("anova") or []]
    out.append(Table(["source of variation", "df", "sum of squares", "mean square", "F", "p"], rows,
                     [False, True, True, True, True, True]))
    if r.get("relative_efficiency") is not None:
        out.append(Para(f"r squared {num(r.get('r_squared'), 3)}; blocking was {num(r['relative_efficiency'], 3)} times "
                        "as efficient as an unblocked design on these data"))
    bal = r.get("balance")
    if r.get("design") == "incomplete" and isinstance(bal, dict):
        kind = "a balanced incomplete block design" if bal.get("bibd") else ("complete" if bal.get("complete") else "unbalanced")
        out.append(Para(f"treatments adjusted for blocks (blocks entered first); the design is {kind}"))
    rb = r.get("treatment_random_blocks")
    if r.get("design") == "generalized" and isinstance(rb, dict):
        out.append(Para(f"with blocks as a random sample: treatment against the interaction, F = {num(rb.get('f'), 3)} "
                        f"on {rb.get('df1')} and {rb.get('df2')} df, p {_p_eq(rb.get('p'))}"))
    means = r.get("treatment_means") or []
    if means:
        out.append(Heading("treatment means", 3))
        ranks = {m["treatment"]: m.get("mean_rank") for m in ((r.get("friedman") or {}).get("mean_ranks") or [])}
        adjusted = any("adjusted_mean" in m for m in means)
        scale = tr_name if (tr_name := ((r.get("transform") or {}).get("name") or "none")) != "none" else ""
        geo = any("geometric_mean" in m for m in means)  # log scale: the mean back on the original scale
        head = ["treatment", "blocks", f"mean ({scale} scale)" if scale else "mean"] + (["geometric mean"] if geo else [])
        if adjusted:
            head = ["treatment", "blocks", "mean", "adjusted mean"]
        if ranks:
            head.append("mean rank")
        rows = []
        for m in means:
            row = [str(m.get("treatment")), _plain(m.get("n"))]
            row += [num(m.get("raw_mean")), num(m.get("adjusted_mean"))] if adjusted else [num(m.get("mean"))]
            row += [num(m.get("geometric_mean"))] if geo and not adjusted else []
            if ranks:
                row.append(num(ranks.get(m.get("treatment"))))
            rows.append(row)
        out.append(Table(head, rows, [False] + [True] * (len(head) - 1)))
    d = r.get("diagnostics") or {}
    if d:
        out.append(Heading("checks", 3))
        rows = []

        def p_of(key):
            return (d.get(key) or {}).get("p")

        sh = p_of("shapiro")
        rows.append(["residuals normal", f"Shapiro-Wilk p {_p_eq(sh)}", _yes(sh, CHECK_LEVEL)])
        for chk in r.get("transform_checks") or []:
            if chk.get("transform") in ("log", "boxcox") and sh is not None and sh < CHECK_LEVEL:
                rows.append(["", f"after {chk['transform']}: Shapiro-Wilk p {_p_eq(chk.get('shapiro_p'))}",
                             _yes(chk.get("shapiro_p"), CHECK_LEVEL)])
                break
        if (d.get("fligner") or {}).get("note"):  # two treatments: the spread checks cannot tell anything
            rows.append(["equal variances", "Fligner-Killeen, Brown-Forsythe: " + str(d["fligner"]["note"]), "-"])
        else:
            rows.append(["equal variances", f"Fligner-Killeen p {_p_eq(p_of('fligner'))}", _yes(p_of("fligner"), CHECK_LEVEL)])
            rows.append(["", f"Brown-Forsythe p {_p_eq(p_of('brown_forsythe'))}", _yes(p_of("brown_forsythe"), CHECK_LEVEL)])
        rows.append(["additive", f"Tukey non-additivity p {_p_eq(p_of('nonadditivity'))}",
                     _yes(p_of("nonadditivity"), CHECK_LEVEL)])
        outl = d.get("outliers") or []
        rows.append(["no outliers", "; ".join(f"{o.get('treatment')} on {o.get('block')} (standardized residual "
                                              f"{num(o.get('standardized'), 2)})" for o in outl[:8])
                     or "none beyond 3 standardized residuals", "no" if outl else "yes"])
        out.append(Table(["check", "test", "holds"], rows, [False, False, False]))
        out.append(Para(f"a check holds when its p value is at least {CHECK_LEVEL:g} (common practice)", "note"))
    f, q = r.get("friedman"), r.get("quade")
    ranks = []
    if isinstance(f, dict) and isinstance(q, dict):
        from .analysis import rank_test_lines

        ranks = rank_test_lines(f, q)
    if ranks:
        out.append(Heading("rank tests", 3))
        out.append(Items(ranks))
    if r.get("advice"):
        out.append(Heading("advice", 3))
        out.append(Items([str(a) for a in r["advice"]]))
    for p in r.get("pairs") or []:
        name = {"tukey": "Tukey HSD on the block model", "nemenyi": "Nemenyi after Friedman",
                "conover": f"Conover after Friedman ({p.get('adjust')} adjusted)"}.get(p.get("method"), str(p.get("method")))
        out.append(Heading(f"all pairs: {name}", 3))
        conf = p.get("confidence") or 0.95
        ratios = isinstance(p.get("original_scale"), dict)  # a log-scale Tukey, also as ratios
        rows = []
        for x in p.get("pairs") or []:
            row = [f"{x.get('first')} - {x.get('second')}", signed(x.get("diff")),
                   f"{_lo(x.get('ci_low'))} .. {_hi(x.get('ci_high'))}"]
            if ratios:
                row += [num(x.get("ratio"), 3), f"{num(x.get('ratio_low'), 3)} .. {num(x.get('ratio_high'), 3)}",
                        f"{signed(x.get('percent'), 2)} %"]
            rows.append(row + [pval(x.get("p_adjusted"))])
        head = ["pair", "diff", f"{_pct(conf)} % interval"]
        head += ["ratio", f"ratio {_pct(conf)} % interval", "change"] if ratios else []
        out.append(Table(head + ["p adj"], rows, [False] + [True] * len(head)))
        if ratios:
            out.append(Para(f"diff on the log scale; ratio = exp(diff), the {p['original_scale'].get('ratios')}; "
                            "change = the ratio as a percent difference", "note"))
    return out


def _pct(conf) -> str:
    return f"{float(conf or 0.95) * 100:g}"


def _lo(x) -> str:
    return "-inf" if x is None or x == float("-inf") else signed(x)


def _hi(x) -> str:
    return "+inf" if x is None or x == float("inf") else signed(x)


def _versus_blocks(r: dict) -> list:
    conf = r.get("confidence") or 0.95
    method = _METHODS.get(r.get("method"), str(r.get("method")))
    side = "two-sided" if r.get("alternative", "two-sided") == "two-sided" else f"one-sided ({r.get('alternative')})"
    adj = "" if r.get("method") == "dunnett" else f", {r.get('adjust')} adjusted"
    ms = (f", residual mean square {num(r['residual_ms'])} on {r.get('residual_df')} df"
          if r.get("residual_ms") is not None else "")
    out: list = [Heading("comparisons with the baseline", 3),
                 Para(f"baseline {r.get('baseline')}; {method}, {side}, {_pct(conf)} % simultaneous intervals{adj}{ms}")]
    rows = []
    for c in r.get("comparisons") or []:
        rel = c.get("relative_pct")
        rows.append([str(c.get("treatment")), signed(c.get("diff")), f"{_lo(c.get('ci_low'))} .. {_hi(c.get('ci_high'))}",
                     f"{signed(rel, 2)} %" if rel is not None else "-", pval(c.get("p_adjusted")),
                     f"{c.get('wins', '-')} / {c.get('ties', '-')} / {c.get('losses', '-')}",
                     str(c.get("verdict") or "")])
    out.append(Table(["treatment", "diff", f"{_pct(conf)} % interval", "change", "p adj", "wins / ties / losses",
                      "verdict"], rows, [False, True, True, True, True, True, False]))
    out.append(Para("diff = treatment - baseline, in the metric's units; change is relative to the baseline; wins, ties "
                    "and losses count blocks where the treatment did better than, the same as, or worse than the baseline",
                    "note"))
    return out


def _guard_blocks(r: dict) -> list:
    conf = r.get("confidence") or 0.95
    unit = f" {r['unit']}" if r.get("unit") else ""
    ms = (f", residual mean square {num(r['residual_ms'])} on {r.get('residual_df')} df"
          if r.get("residual_ms") is not None else "")
    out: list = [Heading("guard against the baseline", 3),
                 Para(f"baseline {r.get('baseline')}; margin {num(r.get('margin_units'))}{unit} (given as "
                      f"{r.get('margin')}); Dunnett, one-sided in the worse direction, {_pct(conf)} % family-wise "
                      f"bounds{ms}; exit status {r.get('exit_status')}")]
    rows = [[str(v.get("treatment")), str(v.get("verdict")), signed(v.get("difference")), signed(v.get("bound")),
             "-" if v.get("more_blocks") is None else str(v.get("more_blocks")), str(v.get("reason") or "")]
            for v in r.get("verdicts") or []]
    out.append(Table(["treatment", "verdict", "difference", "worse by at most", "more blocks", "why"], rows,
                     [False, False, True, True, True, False]))
    out.append(Para("difference = treatment - baseline, in the metric's units; 'worse by at most' is the one-sided "
                    "family-wise bound in the worse direction; more blocks is an estimate", "note"))
    return out


def _censored_blocks(cen: dict) -> list:
    """The --cutoff part of a blocktest or versus: counts and Kaplan-Meier per treatment, hazard
    ratios of solving against the reference, the stratified log-rank test."""
    cut = f"{_plain(cen.get('cutoff'))}" + (f" {cen['unit']}" if cen.get("unit") else "")
    out: list = [Heading("runtimes with a cutoff", 3),
                 Para(f"{cen.get('metric') or 'time'} up to {cut}: failed runs and runs at or past {cut} count as "
                      f"unsolved at {cut}; {cen.get('runs')} runs in {cen.get('blocks')} blocks")]
    out += [Para(str(n), "note") for n in cen.get("notes") or []]
    rows = [[str(p.get("treatment")), _plain(p.get("runs")), _plain(p.get("solved")), _plain(p.get("censored")),
             f"{num(100 * (p.get('solved_fraction') or 0), 3)} %",
             num(p.get("median_time")) if p.get("median_time") is not None else "not reached",
             num(p.get("restricted_mean_time")), num(p.get("mean_time_solved_only"))]
            for p in cen.get("per_treatment") or []]
    out.append(Table(["treatment", "runs", "solved", "unsolved", "share solved", "median time", "restricted mean",
                      "mean (solved runs only)"], rows, [False] + [True] * 7))
    out.append(Para(f"median time: Kaplan-Meier, unsolved runs censored at {cut} (not reached: fewer than half "
                    f"solve); restricted mean: the mean time with unsolved runs counted at {cut}", "note"))
    if cen.get("cox"):
        conf = cen.get("confidence") or 0.95
        rows = []
        for c in cen["cox"]:
            ph = c.get("proportional_p")
            rows.append([str(c.get("treatment")), num(c.get("hazard_ratio"), 3) if c.get("estimable") else "not estimable",
                         f"{num(c.get('ci_low'), 3)} .. {num(c.get('ci_high'), 3)}" if c.get("estimable") else "-",
                         pval(c.get("p_adjusted")), "-" if ph is None else f"{'yes' if ph >= 0.05 else 'no'} (p {_p_eq(ph)})"])
        out.append(Para(f"hazard of solving against {cen.get('reference')}: Cox model stratified by block "
                        f"(variance: {(cen.get('cox_method') or {}).get('variance', 'model-based')})"))
        out.append(Table(["treatment", "hazard ratio", f"{_pct(conf)} % interval", "p adj", "proportional"], rows,
                         [False, True, True, True, False]))
        out.append(Para("a hazard ratio above 1 solves sooner than the reference; p adjusted by Holm; proportional: "
                        "the ratio holds over time (Schoenfeld residuals)", "note"))
    lr = cen.get("logrank") or {}
    if lr.get("chi2") is not None:
        out.append(Para(f"log-rank test, stratified by block: chi2 = {num(lr['chi2'], 4)} on {lr.get('df')} df, "
                        f"p {_p_eq(lr.get('p'))}"))
    return out


def _failures_blocks(f: dict) -> list:
    """The failures part of a blocktest or versus: rates per treatment, the test of whether
    solving depends on the treatment, the follow-ups against the baseline."""
    from ..analyze.failures import share_text
    from .analysis import failure_test_line

    out: list = [Heading("failures", 3)]
    n = f.get("instances") or 0
    if not n:
        return out + [Para("not compared: no instance was run by every treatment")]
    if not any(p.get("failed") for p in f.get("per_treatment") or []):
        return out + [Para(f"none: every run on the {n} instances every treatment ran succeeded")]
    left = f"; {f['left_out']} instances not run by every treatment were left out" if f.get("left_out") else ""
    out.append(Para(f"on the {n} instances every treatment ran{left}; {f.get('rule')}"))
    out.append(Table(["treatment", "runs", "failed", "share failed", "unsolved instances"],
                     [[str(p.get("treatment")), _plain(p.get("runs")), _plain(p.get("failed")),
                       share_text(p.get("failed_share")), f"{p.get('unsolved')} of {p.get('instances')}"]
                      for p in f.get("per_treatment") or []], [False, True, True, True, True]))
    if isinstance(f.get("test"), dict):
        out.append(Para(failure_test_line(f["test"])))
    follow = f.get("follow_ups") or []
    if follow:
        out.append(Para(f"against {f.get('baseline')}: McNemar per treatment (exact below 25 instances solved by one "
                        "only), Holm adjusted"))
        out.append(Table(["treatment", "unsolved by it only", "unsolved by the baseline only", "p adj"],
                         [[str(x.get("treatment")), _plain(x.get("unsolved_only_by_treatment")),
                           _plain(x.get("unsolved_only_by_baseline")), pval(x.get("p_adjusted"))] for x in follow],
                         [False, True, True, True]))
    return out


def _plan_blocks(r: dict) -> list:
    pairs = [(str(k).replace("_", " "), _plain(v) if not isinstance(v, (list, dict)) else ", ".join(_plain(x) for x in v)
              if isinstance(v, list) else "; ".join(f"{a} {_plain(b)}" for a, b in v.items()))
             for k, v in sorted(r.items()) if k not in ("warnings", "analysis_id")]
    return [Heading("plan", 3), KV(pairs)]


def _coverage_blocks(st) -> list:
    r = st.result or {}
    obs = pd.DataFrame(st.observations or [])
    out: list = [Heading("coverage")]
    if obs.empty:
        out.append(Para("this analysis holds no observation table"))
        return out
    treatments = [t for t in (r.get("treatment_names") or []) if t in set(obs["treatment"])]
    treatments += [t for t in dict.fromkeys(obs["treatment"]) if t not in treatments]
    blocks = sorted(set(obs["block"]))
    cell = {(o["block"], o["treatment"]): o for o in obs.to_dict("records")}
    failed_by: dict[str, int] = {}  # failures per treatment, and its runs: a failure is data, shown beside the value
    runs_by: dict[str, int] = {}
    rows = []
    for b in blocks:
        row = [str(b)]
        runs = failed = 0
        for t in treatments:
            o = cell.get((b, t))
            if o is None:
                row.append(".")
                continue
            lost = int(o.get("failed") or 0)
            row.append(num(o.get("value")) + (f" ({lost} failed)" if lost else ""))
            runs += int(o.get("runs") or 0)
            failed += lost
            failed_by[t] = failed_by.get(t, 0) + lost
            runs_by[t] = runs_by.get(t, 0) + int(o.get("runs") or 0)
        rows.append(row + [str(runs), str(failed)])
    out.append(Para(f"the observation table the analysis used: one value per treatment and block "
                    f"({len(treatments)} treatments x {len(blocks)} blocks); . marks a hole; (k failed) counts the "
                    "failed runs behind a value; the last row gives each treatment's failed runs of its runs"))
    rows.append(["failed runs", *[f"{failed_by.get(t, 0)} of {runs_by.get(t, 0)}" for t in treatments],
                 str(sum(runs_by.values())), str(sum(failed_by.values()))])
    out.append(Table(["block", *treatments, "runs", "failed runs"], rows, [False] + [True] * (len(treatments) + 2)))
    dropped = r.get("dropped_blocks") or []
    if dropped:
        out.append(Para(f"{len(dropped)} blocks were left out because they miss a treatment:"))
        out.append(Items([f"{d.get('block')}: no value for {', '.join(d.get('missing') or [])}" for d in dropped]))
    else:
        out.append(Para("no block was left out"))
    return out


def _chain_pairs(st) -> list[tuple[str, str]]:
    """Renewals (recheck --renew): where this analysis's claims came from, or went."""
    out = []
    if getattr(st, "renewed_from", None) is not None:
        out.append(("renewed from", f"analysis {st.renewed_from}: this analysis re-ran it on newer data "
                                    "and took over its claims"))
    if getattr(st, "renewed_as", None) is not None:
        out.append(("renewed as", f"analysis {st.renewed_as}: it re-ran this analysis on newer data "
                                  "and holds its claims now"))
    return out


def _provenance_blocks(data: ReportData) -> list:
    st = data.stored
    out: list = [Heading("provenance"),
                 KV([("analysis", str(st.id)),
                     ("fingerprint", str(st.fingerprint)),
                     ("runs", f"ids up to {st.max_run_id}; {getattr(st, 'stale_runs', 0)} of the runs it stood on retracted since"
                      if st.max_run_id else "none: this analysis stands on no runs of its own"),
                     ("record", "intact (matches its digest)" if st.intact else "changed since it was kept (digest mismatch)"),
                     *_chain_pairs(st),
                     ("analysed at", _utc(st.created_at)),
                     ("exported at", _utc(data.exported_at))])]
    out.append(Heading("imports the slice drew on", 3))
    if data.imports:
        out.append(Table(["file", "campaign", "sha256", "loaded at"],
                         [[str(i.get("file_name")), str(i.get("campaign")), str(i.get("sha256")), _utc(i.get("loaded_at"))]
                          for i in data.imports], [False, False, False, False]))
        out.append(Para("every import holding a run under the stored slice with an id up to the analysis's last run, "
                        "retracted runs included", "note"))
    else:
        out.append(Para("no import found for this analysis's slice"))
    out.append(Heading("software", 3))
    out.append(Table(["package", "version"], [[str(k), str(v)] for k, v in sorted((st.software or {}).items())],
                     [False, False]))
    return out


def content(data: ReportData) -> list:
    st = data.stored
    r = st.result or {}
    blocks: list = [Heading(data.title, 1),
                    Para(f"analysis {st.id}, a {st.kind}" + (f" of {st.metric}" if st.metric else "")
                         + f", made {_utc(st.created_at)}; report exported {_utc(data.exported_at)}", "note"),
                    State(st.state, STATE_MEANING[st.state].format(id=st.id, n=getattr(st, 'stale_runs', 0)))]
    blocks.append(Heading("claims"))
    if st.claims:
        blocks.append(Items([(f"{c['text']} (claim {c['id']}, kept {_utc(c.get('created_at'))})", list(c.get("tags") or []))
                             for c in st.claims]))
    elif getattr(st, "renewed_as", None) is not None:
        blocks.append(Para(f"no claim rests on this analysis now: any it had moved to analysis {st.renewed_as}, "
                           "which renewed it (see provenance)"))
    else:
        blocks.append(Para(f"no claim has been kept with this analysis (blockyard keep \"...\" --analysis {st.id})"))
    blocks.append(Heading("what was analysed"))
    blocks.append(KV(_settings_pairs(st)))
    blocks.append(Heading("result"))
    if st.kind == "blocktest":
        blocks += _blocktest_blocks(r)
    elif st.kind == "versus":
        blocks += _versus_blocks(r)
    elif st.kind == "guard":
        blocks += _guard_blocks(r)
    elif st.kind == "noise":
        blocks += _noise_blocks(r)
    else:
        blocks += _plan_blocks(r)
    if isinstance(r.get("failures"), dict):
        blocks += _failures_blocks(r["failures"])
    cen = r.get("censored") if isinstance(r.get("censored"), dict) else None
    if cen:
        blocks += _censored_blocks(cen)
    blocks.append(Heading("cautions"))
    warnings = [str(w) for w in (r.get("warnings") or []) + ((cen or {}).get("warnings") or [])]
    blocks.append(Items(warnings) if warnings else Para("no cautions were recorded with this analysis"))
    if data.figures or data.notes:
        blocks.append(Heading("figures"))
        for f in data.figures:
            blocks.append(Fig(f.key, f.title, f.caption))
        for n in data.notes:
            blocks.append(Para(n, "note"))
    blocks += _coverage_blocks(st)
    blocks += _provenance_blocks(data)
    return blocks
