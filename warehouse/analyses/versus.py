"""versus: many-to-one comparisons against a baseline, with the cautions of pooling and hosts and
the drift of a treatment across campaigns."""
from __future__ import annotations

from dataclasses import dataclass, field


from ..collapse.common import Collapsed
from ..collapse.observations import collapse
from ..errors import DesignError, InputError
from ..select.slices import Slice
from ..collapse.settings import Collapse
from .common import (baseline_cautions, censored_runtimes, collapse_doc, dedupe, drift_cautions, failure_part,
                     numeric_warnings, read_cutoff)
from ..shown import Shown


@dataclass
class VersusResult(Shown):
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
             "comparisons": rows, "collapse": collapse_doc(c), "warnings": self.warnings, "drift": self.drift,
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
        from ..present.text import signed

        parts = []
        for r in self.stats.comparisons:
            v = self.verdict(r) or "no clear difference"
            parts.append(f"{r['treatment']} {signed(r['diff'])} ({v})")
        return f"{self.collapsed.metric} vs {self.baseline}: " + "; ".join(parts)

    def render(self) -> str:
        from ..present.analysis import render_versus

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
    from ..analyze.baseline import dunnett_vs_baseline, paired_vs_baseline
    from ..analyze.tidy import refuse_overflow
    from ..collapse.cautions import imputed_failures

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
    cutoff = read_cutoff(cutoff)
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
    with numeric_warnings(numeric):
        if method == "dunnett":
            stats = dunnett_vs_baseline(obs, baseline, alternative=alternative, confidence=confidence, better=word, margin=m)
        else:
            stats = paired_vs_baseline(obs, baseline, method=method, adjust=adjust, alternative=alternative,
                                       confidence=confidence, better=word, margin=m)
    warnings = baseline_cautions(c, baseline, numeric)
    drift = campaign_drift(conn, c, settings, baseline)
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
    warnings += drift_cautions(drift, smallest, "as large as the smallest difference reported")
    if any(res.verdict(r) for r in stats.comparisons) and not margin:
        warnings.append("significant is not the same as large enough to matter: judge the size of each difference, "
                        "or set --margin to count small differences as ties")
    res.warnings = dedupe(warnings)
    return res


DRIFT_MOST = 8  # treatments compared with themselves across campaigns, at most (each is two collapses)


def campaign_drift(conn, c: Collapsed, settings: Collapse, baseline: str) -> list[dict]:
    """Each treatment that ran in two of the slice's campaigns, against itself: the mean paired
    difference over their common blocks (later campaign minus the baseline's, or the first), with
    a 95 % t interval. What a treatment measures against itself is the campaigns' own difference
    (machines, load, instance files): a drift the comparisons across campaigns cannot see."""
    from scipy import stats as st
    from sqlalchemy import select

    from ..select.slices import Term
    from ..store import schema as S

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
