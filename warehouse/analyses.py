"""The analyses behind blocktest, versus and plan, as functions of explicit inputs.

Each takes an open connection, a parsed slice, a metric, collapse settings and its own options,
and returns a result that knows its JSON document and its text. The ledger re-runs these same
functions to recheck a stored analysis.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

from .collapse.observations import Collapsed, collapse
from .errors import DesignError, InputError
from .select.slices import Slice
from .collapse.settings import Collapse

ALPHA = 0.05


def _collapse_doc(c: Collapsed) -> dict:
    return {"runs_in_slice": c.runs_in_slice, "runs_used": c.runs_used, "instances_used": c.instances_used,
            "notes": c.notes, "settings": c.settings, "hosts": c.hosts, "campaigns": c.campaigns}


@dataclass
class BlocktestResult:
    collapsed: Collapsed
    design: str  # complete | incomplete | generalized
    stats: object  # BlockedResult | IncompleteResult | GeneralizedResult
    pairs: list = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    analysis_id: int | None = None
    options: dict = field(default_factory=dict)
    censored: object = None  # CensoredResult, with --cutoff
    failures: object = None  # FailuresResult: failure rates and the test of solved / not solved

    kind = "blocktest"

    def to_dict(self) -> dict:
        c, s = self.collapsed, self.stats
        sd = self.__dict__.get("_stats_doc")
        if sd is None:  # the statistics' document is the same for the ledger and for the output
            sd = self.__dict__["_stats_doc"] = s.to_dict()
        d = {"slice": c.slice_text, "metric": c.metric, "sense": c.sense, "design": self.design,
             "treatments": len(c.treatments), "blocks": len(c.blocks), "treatment_names": c.treatments,
             "dropped_blocks": c.dropped_blocks, "anova": sd["anova"], "collapse": _collapse_doc(c),
             "warnings": self.warnings}
        for key in ("r_squared", "relative_efficiency", "relative_efficiency_corrected", "residual_ms",
                    "residual_df", "transform", "recommended", "advice", "balance", "interaction_ms",
                    "interaction_df", "treatment_random_blocks", "transform_checks"):
            if key in sd:
                d[key] = sd[key]
        d["friedman"] = sd.get("friedman") or (self._friedman_doc())
        d["quade"] = sd.get("quade")
        d["diagnostics"] = sd.get("diagnostics", {})
        means = sd.get("treatment_means") or sd.get("adjusted_means")
        d["treatment_means"] = means
        if self.pairs:
            d["pairs"] = [p.to_dict() for p in self.pairs]
        if self.censored is not None:
            d["censored"] = self.censored.to_dict()
        if self.failures is not None:
            d["failures"] = self.failures.to_dict()
        d["analysis_id"] = self.analysis_id
        return d

    def _friedman_doc(self):
        return None

    def verdicts(self) -> dict:
        row = next(r for r in self.stats.anova if r["source"] == "treatment")
        return {"treatment_effect": bool(row["p"] is not None and row["p"] < ALPHA)}

    def headline(self) -> str:
        row = next(r for r in self.stats.anova if r["source"] == "treatment")
        from .present.text import num, pval

        return (f"{self.collapsed.metric}: treatment F = {num(row['f'], 3)} on {row['df']} and "
                f"{self.stats.residual_df} df, p {pval(row['p']) if pval(row['p']).startswith('<') else '= ' + pval(row['p'])}")

    def render(self) -> str:
        from .present.analysis import render_blocktest

        return render_blocktest(self)


def run_blocktest(conn, sl: Slice, metric: str | None, settings: Collapse, transform: str = "none",
                  design: str = "auto", pairs: bool | str = False, quick: bool = True,
                  cutoff: float | None = None) -> BlocktestResult:
    """The blocked analysis of `metric` over slice `sl`. With `quick`, the collapse may run in SQL
    and leave out the per-instance table (the generalized design needs it; re-checks of analyses
    kept by Blockyard 0.1 need the pandas collapse for their fingerprint). With `cutoff`, the
    runs' times are also read as censored at it (see `censored_runtimes`)."""
    from .analyze.anova import rcbd_anova
    from .analyze.designs import generalized_anova, incomplete_anova
    from .analyze.tidy import refuse_overflow
    from .collapse.cautions import design_cautions, host_caution, imputed_failures, pooling_cautions, pseudo_replication

    if transform not in ("none", "log", "boxcox", "rank"):
        raise InputError(f"--transform {transform}: choose none, log, boxcox or rank")
    if design not in ("auto", "complete", "incomplete", "generalized"):
        raise InputError(f"--design {design}: choose auto, complete, incomplete or generalized")
    methods = pair_methods(pairs)
    if design == "incomplete" and settings.holes != "keep":
        settings = Collapse(settings.replicates, settings.instances, settings.failures, "keep")
    cutoff = _cutoff(cutoff)
    # not quick: a recheck, which reads the runs themselves rather than the summaries
    c = collapse(conn, sl, metric, settings, cells=design == "generalized" or not quick, from_runs=not quick)
    if len(c.treatments) < 2:
        raise DesignError(f"the slice holds one treatment ({', '.join(c.treatments)}); a blocked comparison needs two or more")
    if c.obs.empty:
        raise DesignError("no block has every treatment; use --holes keep to analyse the incomplete design, or narrow the slice")
    refuse_overflow(c.obs["value"], f"metric {c.metric}")  # before any sum of squares, cautions' too
    warnings = list(design_cautions(c)) + host_caution(c) + pooling_cautions(c) + pseudo_replication(c)
    if c.dropped_blocks and settings.holes == "drop":
        warnings.append(f"{len(c.dropped_blocks)} blocks with holes were dropped (complete-case analysis): "
                        + ", ".join(d["block"] for d in c.dropped_blocks[:6]) + (" ..." if len(c.dropped_blocks) > 6 else ""))
    chosen = design
    if design == "auto":
        chosen = "complete" if c.complete else "incomplete"
    if chosen == "complete" and not c.complete:
        raise DesignError("the design has holes; use --holes keep with --design incomplete, or --holes drop")
    obs = c.obs[["treatment", "block", "value"]]
    if chosen != "complete" and transform != "none":
        raise InputError(f"--transform applies to the complete design; the {chosen} design is analysed as is")
    with _numeric_warnings(warnings):
        if chosen == "complete":
            stats = rcbd_anova(obs, transform=transform)
        elif chosen == "incomplete":
            stats = incomplete_anova(obs)
        else:
            cells = c.cells[c.cells["value"].notna()][["treatment", "block", "instance", "value"]]
            stats = generalized_anova(cells)
    warnings += list(getattr(stats, "warnings", []))
    result_pairs = []
    if methods:
        if chosen != "complete":
            raise InputError("--pairs needs a complete design (every treatment in every block)")
        from .analyze.pairs import conover_friedman, nemenyi, ratios_from_log, tukey_hsd_blocked

        # Tukey works on the scale the ANOVA used; the within-block ranks of the rank methods do not change
        scaled = obs if transform == "none" else stats.residuals[["treatment", "block", "value"]]
        made = {"tukey": lambda: tukey_hsd_blocked(scaled), "conover": lambda: conover_friedman(obs),
                "nemenyi": lambda: nemenyi(obs)}
        with _numeric_warnings(warnings):
            result_pairs = [made[m]() for m in methods]
        # the one caution of the pairs the ANOVA has not given already: statistics it cannot compute
        warnings += [w for p in result_pairs for w in p.warnings if "cannot be computed" in w]
        if transform == "log" and "tukey" in methods:
            ratios_from_log(result_pairs[methods.index("tukey")], stats.transform.get("shift") or 0.0)
            warnings.append("Tukey differences and intervals are on the log scale, like the ANOVA; their ratios "
                            "(geometric means, first over second) read them on the original scale")
        elif transform != "none" and "tukey" in methods:
            warnings.append(f"Tukey differences and intervals are on the {transform} scale, like the ANOVA")
        k = len(c.treatments)
        warnings.append(f"{k * (k - 1) // 2} pairwise comparisons: p values are adjusted for the family; "
                        "unadjusted p would overstate the evidence")
    failures = failure_part(conn, sl, c, quick=quick)
    warnings += imputed_failures(c) + failures.warnings
    options = {"transform": transform, "design": design, "pairs": ",".join(methods) if methods else False}
    censored = None
    if cutoff is not None:
        options["cutoff"] = cutoff
        censored = censored_runtimes(conn, sl, c.metric, cutoff, holes=settings.holes)
    return BlocktestResult(c, chosen, stats, result_pairs, _dedupe(warnings), options=options, censored=censored,
                           failures=failures)


PAIR_METHODS = ("tukey", "conover", "nemenyi")
PAIRS_DEFAULT = ("tukey", "conover")  # --pairs alone, and analyses kept before it took a word


def pair_methods(pairs) -> list[str]:
    """The all-pairs methods asked for: none (False, None, ""), the default pair (True, or
    --pairs alone), or a comma-separated list of tukey, conover and nemenyi."""
    if pairs is None or pairs is False or pairs == "":
        return []
    if pairs is True:
        return list(PAIRS_DEFAULT)
    words = [w.strip().lower() for w in str(pairs).split(",") if w.strip()]
    bad = [w for w in words if w not in PAIR_METHODS]
    if bad or not words:
        raise InputError(f"--pairs {pairs}: choose tukey, conover or nemenyi, or several separated by commas "
                         "(--pairs alone gives tukey,conover)")
    return list(dict.fromkeys(words))


class _numeric_warnings:
    """Numerical warnings from the libraries (all values equal, say) become one caution, not noise."""

    def __init__(self, cautions: list[str]):
        self.cautions = cautions

    def __enter__(self):
        import warnings

        self._ctx = warnings.catch_warnings(record=True)
        self._seen = self._ctx.__enter__()
        warnings.simplefilter("always", RuntimeWarning)
        return self

    def __exit__(self, *exc):
        self._ctx.__exit__(*exc)
        if any(issubclass(w.category, RuntimeWarning) for w in self._seen):
            self.cautions.append("some statistics are undefined on these data (for example, identical values "
                                 "everywhere) and are shown as '-': read them as missing, not as evidence")
        return False


def _dedupe(items: list[str]) -> list[str]:
    seen, out = set(), []
    for w in items:
        if w not in seen:
            seen.add(w)
            out.append(w)
    return out


# --- censored runtimes (--cutoff) --------------------------------------------------------------

def _cutoff(cutoff) -> float | None:
    """The --cutoff value, checked before any work (None: no censored part)."""
    if cutoff is None:
        return None
    import math

    try:
        value = float(cutoff)
    except (TypeError, ValueError):
        value = math.nan
    if not math.isfinite(value) or value <= 0:
        raise InputError(f"--cutoff {cutoff}: give the time limit in the metric's units as a positive number, e.g. 600")
    return value


def censored_runtimes(conn, sl: Slice, metric: str | None, cutoff: float, reference: str | None = None,
                      holes: str = "drop", confidence: float = 0.95):
    """The slice's runs as right-censored times: a successful run below `cutoff` solved at its
    time, every other run (failed, timed out, at or past the cutoff) unsolved at the cutoff.
    Each run counts, not the collapsed means: failing is an outcome here, not a gap. The runs are
    those on the instances every treatment of their block ran (`collapse.runs.common_runs`);
    `reference` (default: the first treatment in version order) is what the hazard ratios are
    against. Returns the analyze layer's CensoredResult, with the notes on what was left out."""
    from .analyze.censored import censor_at, compare_censored
    from .collapse.runs import common_runs, run_times

    cutoff = _cutoff(cutoff)
    rt = run_times(conn, sl, metric)
    if rt.sense != "min":
        raise InputError(f"--cutoff {cutoff:g}: {rt.metric} is a metric where higher is better; a cutoff applies "
                         "to a time (lower is better): give --metric with a runtime")
    reference = reference or rt.treatments[0]
    if reference not in rt.treatments:
        raise DesignError(f"{reference} has no runs in the slice; treatments there: {', '.join(rt.treatments)}")
    if len(rt.treatments) < 2:
        raise DesignError(f"the slice holds one treatment ({reference}); a comparison of runtimes needs two or more")
    runs, notes = common_runs(rt, rt.treatments, holes)
    ok = (runs["status"] == "ok").to_numpy()
    unknown = ok & runs["value"].isna().to_numpy()
    if unknown.any():  # a success without its time: when it solved is not known, so it is not guessed
        notes.append(f"{int(unknown.sum())} successful runs without a {rt.metric} value left out")
        runs, ok = runs[~unknown].reset_index(drop=True), ok[~unknown]
    if runs.empty or runs["treatment"].nunique() < 2:
        raise DesignError("--cutoff: no instance has runs of two or more treatments in one block; "
                          "narrow the slice to instances the treatments share")
    time, solved = censor_at(runs["value"], ok, cutoff)
    order = {t: i for i, t in enumerate(rt.treatments)}
    frame = pd.DataFrame({"treatment": runs["treatment"], "block": runs["block"], "instance": runs["instance_id"],
                          "time": time, "solved": solved, "failed": ~ok})
    frame = frame.iloc[frame["treatment"].map(order).argsort(kind="stable")].reset_index(drop=True)
    if reference not in set(frame["treatment"]):
        raise DesignError(f"{reference} has no runs on the instances the treatments share; narrow the slice")
    res = compare_censored(frame, reference, cutoff, confidence)
    short = runs[(runs["status"] == "timeout") & (runs["value"] < cutoff)]
    if len(short):
        res.warnings.insert(0, f"{len(short)} timed-out runs stopped before the cutoff {cutoff:g} (the longest at "
                               f"{short['value'].max():g}): they count as unsolved up to {cutoff:g}, a time they never "
                               "ran to; set --cutoff at or below the time limit the runs had")
    res.notes, res.metric, res.unit = notes, rt.metric, rt.unit
    return res


# --- failures ----------------------------------------------------------------------------------

def failure_part(conn, sl: Slice, c: Collapsed, baseline: str | None = None, quick: bool = True):
    """Failure rates per treatment and the test of whether solving depends on the treatment, on the
    instances every treatment of the slice ran (a treatment whose runs all failed included: the
    collapse leaves it out of the values, not out of this). One small query over the cell
    summaries (the runs themselves when not `quick`); the collapse's own per-instance table holds
    only the instances with values, so it cannot serve here. Returns the FailuresResult, its
    cautions already worded for the analysis."""
    from .analyze.failures import compare_solved
    from .collapse.observations import cell_counts

    res = compare_solved(cell_counts(conn, sl, c.metric, from_runs=not quick), baseline)
    if c.settings.get("failures") == "drop" and res.test.p is not None and res.test.p < ALPHA:
        # the values above are those of successful runs: the treatment that fails more is judged
        # on its easier runs
        res.warnings = [w + ("; the values above come from successful runs only (--failures worst or penalize:F "
                             "count the failures in)" if w.startswith("failure rates differ") else "")
                        for w in res.warnings]
    return res


# --- versus ------------------------------------------------------------------------------------

@dataclass
class VersusResult:
    collapsed: Collapsed
    baseline: str
    stats: object  # BaselineResult
    better: str  # lower | higher (what "better" means in the wording)
    sided: bool
    warnings: list[str] = field(default_factory=list)
    analysis_id: int | None = None
    options: dict = field(default_factory=dict)
    drift: list[dict] = field(default_factory=list)  # a treatment against itself across campaigns
    censored: object = None  # CensoredResult, with --cutoff
    failures: object = None  # FailuresResult, with follow-ups against the baseline

    kind = "versus"

    def verdict(self, row: dict) -> str:
        p = row.get("p_adjusted")
        if p is None or p >= 1 - self.stats.confidence:
            return ""
        lower = row["diff"] < 0
        good = lower if self.better == "lower" else not lower
        return "better" if good else "worse"

    def to_dict(self) -> dict:
        c, s = self.collapsed, self.stats
        rows = []
        for r in s.to_dict()["comparisons"]:  # JSON-safe: an open end of a one-sided interval is None
            row = dict(r)
            row["verdict"] = self.verdict(r) or "no clear difference"
            rows.append(row)
        d = {"baseline": self.baseline, "slice": c.slice_text, "metric": c.metric, "sense": c.sense,
             "blocks": len(c.blocks), "dropped_blocks": c.dropped_blocks, "method": s.method,
             "adjust": s.adjust, "alternative": s.alternative, "confidence": s.confidence,
             "residual_ms": s.residual_ms, "residual_df": s.residual_df, "critical_value": s.critical_value,
             "comparisons": rows, "collapse": _collapse_doc(c), "warnings": self.warnings, "drift": self.drift,
             "analysis_id": self.analysis_id}
        if self.censored is not None:
            d["censored"] = self.censored.to_dict()
        if self.failures is not None:
            d["failures"] = self.failures.to_dict()
        return d

    def verdicts(self) -> dict:
        return {r["treatment"]: {"significant": bool(self.verdict(r)), "sign": (r["diff"] > 0) - (r["diff"] < 0)}
                for r in self.stats.comparisons}

    def headline(self) -> str:
        from .present.text import signed

        parts = []
        for r in self.stats.comparisons:
            v = self.verdict(r) or "no clear difference"
            parts.append(f"{r['treatment']} {signed(r['diff'])} ({v})")
        return f"{self.collapsed.metric} vs {self.baseline}: " + "; ".join(parts)

    def render(self) -> str:
        from .present.analysis import render_versus

        return render_versus(self)


def _margin(margin: str | None):
    if margin is None or margin == "":
        return 0.0
    text = str(margin).strip()
    try:
        if text.endswith("%"):
            float(text[:-1])
            return text
        return float(text)
    except ValueError:
        raise InputError(f"--margin {margin}: write a number (0.5) or a percentage of the baseline (1%)") from None


def run_versus(conn, sl: Slice, metric: str | None, settings: Collapse, baseline: str, method: str = "dunnett",
               adjust: str = "holm", better: str | None = None, margin: str | None = None,
               confidence: float = 0.95, quick: bool = True, cutoff: float | None = None) -> VersusResult:
    from .analyze.baseline import dunnett_vs_baseline, paired_vs_baseline
    from .analyze.tidy import refuse_overflow
    from .collapse.cautions import design_cautions, host_caution, imputed_failures, pooling_cautions, pseudo_replication

    if method not in ("dunnett", "paired-t", "wilcoxon"):
        raise InputError(f"--method {method}: choose dunnett, paired-t or wilcoxon")
    if adjust not in ("holm", "bonferroni"):
        raise InputError(f"--adjust {adjust}: choose holm or bonferroni")
    if better not in (None, "lower", "higher"):
        raise InputError(f"--better {better}: choose lower or higher")
    if not 0.5 < confidence < 1:
        raise InputError(f"--confidence {confidence}: give a level between 0.5 and 1, e.g. 0.95")
    if "@" not in baseline:
        raise InputError(f"baseline '{baseline}': name one treatment as NAME@VERSION, e.g. stacker@1.4")
    if settings.holes == "keep":
        raise InputError("versus compares on common blocks only; leave --holes at drop")
    cutoff = _cutoff(cutoff)
    c = collapse(conn, sl, metric, settings, cells=not quick, from_runs=not quick)
    if baseline not in c.treatments:
        from difflib import get_close_matches

        near = get_close_matches(baseline, c.treatments, n=2)
        hint = f" (did you mean {' or '.join(near)}?)" if near else ""
        raise DesignError(f"baseline {baseline} is not in the slice{hint}; treatments there: {', '.join(c.treatments)}")
    if len(c.treatments) < 2:
        raise DesignError("the slice holds only the baseline; add the treatments to compare with it")
    if c.obs.empty:
        raise DesignError("no block holds the baseline and every other treatment; narrow the slice to common blocks")
    refuse_overflow(c.obs["value"], f"metric {c.metric}")
    sense_better = "lower" if c.sense == "min" else "higher"
    word = better or sense_better
    alternative = "two-sided" if better is None else ("less" if better == "lower" else "greater")
    m = _margin(margin)
    obs = c.obs[["treatment", "block", "value"]]
    numeric: list[str] = []
    with _numeric_warnings(numeric):
        if method == "dunnett":
            stats = dunnett_vs_baseline(obs, baseline, alternative=alternative, confidence=confidence, better=word, margin=m)
        else:
            stats = paired_vs_baseline(obs, baseline, method=method, adjust=adjust, alternative=alternative,
                                       confidence=confidence, better=word, margin=m)
    warnings = (list(design_cautions(c)) + host_caution(c, baseline) + pooling_cautions(c, baseline)
                + pseudo_replication(c) + numeric)
    drift = campaign_drift(conn, c, settings, baseline)
    if c.dropped_blocks:
        missing_base = [d["block"] for d in c.dropped_blocks if baseline in d["missing"]]
        other = [d["block"] for d in c.dropped_blocks if baseline not in d["missing"]]
        if missing_base:
            warnings.append(f"{len(missing_base)} blocks are not in the baseline and were dropped: {', '.join(missing_base[:8])}")
        if other:
            warnings.append(f"{len(other)} blocks miss another treatment and were dropped: {', '.join(other[:8])}")
    warnings += list(stats.warnings)
    failures = failure_part(conn, sl, c, baseline, quick=quick)
    warnings += imputed_failures(c) + failures.warnings
    res = VersusResult(c, baseline, stats, word, better is not None, [], options={
        "baseline": baseline, "method": method, "adjust": adjust, "better": better, "margin": margin,
        "confidence": confidence})
    res.drift = drift
    res.failures = failures
    if cutoff is not None:
        res.options["cutoff"] = cutoff
        res.censored = censored_runtimes(conn, sl, c.metric, cutoff, baseline, "drop", confidence)
    smallest = min((abs(r["diff"]) for r in stats.comparisons if r.get("diff") is not None), default=None)
    for d in drift:
        big = smallest is not None and d["difference"] is not None and abs(d["difference"]) >= smallest
        if (d["p"] is not None and d["p"] < 0.05) or big:
            why = "significant" if d["p"] is not None and d["p"] < 0.05 else "not significant"
            warnings.append(
                f"{d['treatment']} differs from itself between {d['campaigns'][0]} and {d['campaigns'][1]} by "
                f"{d['difference']:+.3g} on {d['blocks']} common blocks ({why}"
                f"{', as large as the smallest difference reported' if big else ''}): part of each difference "
                "between campaigns may be the campaigns, not the treatments")
    if any(res.verdict(r) for r in stats.comparisons) and not margin:
        warnings.append("significant is not the same as large enough to matter: judge the size of each difference, "
                        "or set --margin to count small differences as ties")
    res.warnings = _dedupe(warnings)
    return res


DRIFT_MOST = 8  # treatments compared with themselves across campaigns, at most (each is two collapses)


def campaign_drift(conn, c: Collapsed, settings: Collapse, baseline: str) -> list[dict]:
    """Each treatment that ran in two of the slice's campaigns, against itself: the mean paired
    difference over their common blocks (later campaign minus the baseline's, or the first), with
    a 95 % t interval. What a treatment measures against itself is the campaigns' own difference
    (machines, load, instance files): a drift the comparisons across campaigns cannot see."""
    from scipy import stats as st
    from sqlalchemy import select

    from .select.slices import Term
    from .store import schema as S

    campaigns = sorted({x for t in c.treatments for x in c.campaigns.get(t, [])})
    if len(campaigns) < 2:
        return []
    base_campaigns = c.campaigns.get(baseline, [])
    # where each treatment of the slice has runs among these campaigns, in or out of the slice
    q = (select(S.solvers.c.name, S.solvers.c.version, S.campaigns.c.name).distinct()
         .select_from(S.cell_stats.join(S.solvers, S.solvers.c.id == S.cell_stats.c.solver_id)
                      .join(S.campaigns, S.campaigns.c.id == S.cell_stats.c.campaign_id))
         .where(S.campaigns.c.name.in_(campaigns)))
    ran: dict[str, set[str]] = {}
    for name, version, campaign in conn.execute(q):
        ran.setdefault(f"{name}@{version}", set()).add(campaign)
    out = []
    for t in [t for t in c.treatments if len(ran.get(t, ())) > 1][:DRIFT_MOST]:
        theirs = sorted(ran[t], key=lambda x: (x not in base_campaigns, x))
        ref, other = theirs[0], theirs[1]
        values = []
        for campaign in (ref, other):
            one = Slice(((Term("treatment", "=", (t,)), Term("campaign", "=", (campaign,))),))
            try:
                obs = collapse(conn, one, c.metric, settings, cells=False).obs
            except DesignError:
                obs = None
            values.append(None if obs is None else obs.set_index("block")["value"])
        if values[0] is None or values[1] is None:
            continue
        common = values[0].index.intersection(values[1].index)
        inside = common.intersection(c.blocks)
        blocks = inside if len(inside) >= 2 else common
        d = (values[1].reindex(blocks) - values[0].reindex(blocks)).dropna()
        n = len(d)
        row = {"treatment": t, "campaigns": [ref, other], "blocks": n, "difference": None, "ci_low": None,
               "ci_high": None, "p": None}
        if n >= 2:
            mean, sd = float(d.mean()), float(d.std(ddof=1))
            half = float(st.t.ppf(0.975, n - 1)) * sd / n ** 0.5
            row.update(difference=mean, ci_low=mean - half, ci_high=mean + half,
                       p=float(2 * st.t.sf(abs(mean) / (sd / n ** 0.5), n - 1)) if sd > 0 else None)
        out.append(row)
    return out


# --- plan --------------------------------------------------------------------------------------

@dataclass
class PlanResult:
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
        from .present.analysis import render_plan

        return render_plan(self)


def run_plan(*, effect: float | None = None, delta: float | None = None, sd: float | None = None,
             source: dict | None = None, power: float = 0.8, alpha: float = 0.05, comparisons: int = 1,
             means: list[float] | None = None, sigma: float | None = None, blocks: int | None = None) -> PlanResult:
    """Blocks needed (or power reached) for a paired comparison or for the RCBD F test.

    `source` is a stored analysis's document ({"analysis_id", "residual_ms", ...}); its residual mean
    square gives sigma for the F test and sqrt(2 MS) as the sd of block differences.
    """
    from .analyze import planning

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
