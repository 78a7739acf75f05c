"""blocktest: the blocked ANOVA (complete, incomplete or generalized design) with its diagnostics,
the rank tests and, on request, all pairwise comparisons."""
from __future__ import annotations

from dataclasses import dataclass, field


from ..collapse.common import Collapsed
from ..collapse.observations import collapse
from ..errors import DesignError, InputError
from ..select.slices import Slice
from ..collapse.settings import Collapse
from .common import ALPHA, censored_runtimes, collapse_doc, dedupe, failure_part, numeric_warnings, read_cutoff
from ..shown import Shown


@dataclass
class BlocktestResult(Shown):
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

    def stats_doc(self) -> dict:
        """The statistics' document, made once for the ledger, the output and the text alike,
        without the table of residuals (one row per observation, which neither the document nor
        the text shows: converting it was most of recording a 170-treatment blocktest)."""
        sd = self.__dict__.get("_stats_doc")
        if sd is None:
            from dataclasses import fields

            from ..analyze.tidy import _jsonable

            s = self.stats
            sd = self.__dict__["_stats_doc"] = {f.name: _jsonable(getattr(s, f.name)) for f in fields(s)
                                                if f.name != "residuals"}
        return sd

    def to_dict(self) -> dict:
        c = self.collapsed
        sd = self.stats_doc()
        d = {"slice": c.slice_text, "metric": c.metric, "sense": c.sense, "design": self.design,
             "treatments": len(c.treatments), "blocks": len(c.blocks), "treatment_names": c.treatments,
             "dropped_blocks": c.dropped_blocks, "anova": sd["anova"], "collapse": collapse_doc(c),
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
        from ..present.text import num, pval

        return (f"{self.collapsed.metric}: treatment F = {num(row['f'], 3)} on {row['df']} and "
                f"{self.stats.residual_df} df, p {pval(row['p']) if pval(row['p']).startswith('<') else '= ' + pval(row['p'])}")

    def render(self) -> str:
        from ..present.analysis import render_blocktest

        return render_blocktest(self)


# imported by a helper thread while the collapse's SQL runs (prefetch)
_ANALYSIS_MODULES = ("warehouse.analyze.anova", "warehouse.analyze.designs", "warehouse.collapse.cautions")


def prefetch(modules) -> None:
    """Start importing these modules in a helper thread (a cold command: scipy.special and the
    analysis modules load while the collapse waits on the database, which lets go of Python's
    lock meanwhile); whoever imports one of them next waits for the helper to finish it."""
    import sys
    import threading
    from importlib import import_module

    todo = [m for m in modules if m not in sys.modules]
    if todo:
        threading.Thread(target=lambda: [import_module(m) for m in todo], name="blockyard-imports", daemon=True).start()


def run_blocktest(conn, sl: Slice, metric: str | None, settings: Collapse, transform: str = "none",
                  design: str = "auto", pairs: bool | str = False, quick: bool = True,
                  cutoff: float | None = None) -> BlocktestResult:
    """The blocked analysis of `metric` over slice `sl`. With `quick`, the collapse may run in SQL
    and leave out the per-instance table (the generalized design needs it; re-checks of analyses
    kept by Blockyard 0.1 need the pandas collapse for their fingerprint). With `cutoff`, the
    runs' times are also read as censored at it (see `censored_runtimes`)."""
    if transform not in ("none", "log", "boxcox", "rank"):
        raise InputError(f"--transform {transform}: choose none, log, boxcox or rank")
    if design not in ("auto", "complete", "incomplete", "generalized"):
        raise InputError(f"--design {design}: choose auto, complete, incomplete or generalized")
    methods = pair_methods(pairs)
    if design == "incomplete" and settings.holes != "keep":
        settings = Collapse(settings.replicates, settings.instances, settings.failures, "keep")
    cutoff = read_cutoff(cutoff)
    # not quick: a recheck, which reads the runs themselves rather than the summaries
    prefetch(_ANALYSIS_MODULES)
    c = collapse(conn, sl, metric, settings, cells=design == "generalized" or not quick, from_runs=not quick)
    from ..analyze.anova import rcbd_anova
    from ..analyze.designs import generalized_anova, incomplete_anova
    from ..analyze.tidy import refuse_overflow
    from ..collapse.cautions import design_cautions, host_caution, imputed_failures, pooling_cautions, pseudo_replication

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
    with numeric_warnings(warnings):
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
        from ..analyze.pairs import conover_friedman, nemenyi, ratios_from_log, tukey_hsd_blocked

        # Tukey works on the scale the ANOVA used; the within-block ranks of the rank methods do not change
        scaled = obs if transform == "none" else stats.residuals[["treatment", "block", "value"]]
        made = {"tukey": lambda: tukey_hsd_blocked(scaled), "conover": lambda: conover_friedman(obs),
                "nemenyi": lambda: nemenyi(obs)}
        with numeric_warnings(warnings):
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
    return BlocktestResult(c, chosen, stats, result_pairs, dedupe(warnings), options=options, censored=censored,
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
