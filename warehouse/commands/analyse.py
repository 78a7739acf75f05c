"""peek, blocktest, versus, plan: the commands users come for."""
from __future__ import annotations

import argparse
from dataclasses import dataclass, replace

from .registry import add_json, args, command
from ..collapse.settings import Collapse
from .session import Session
from ..shown import Shown


class _Words(list):
    """The words an option takes, for help and shell completion. argparse does not check them:
    the command does, so a wrong word gets the usual one-line error and exit status 2."""

    def __contains__(self, item) -> bool:
        return True


def add_slice(p: argparse.ArgumentParser, metric: bool = True) -> None:
    p.add_argument("--slice", metavar="SLICE", help="which runs (default: the focus in the shell, else all); "
                   "e.g. \"solver=stacker version>=1.5 family=mixed-sku\"")
    if metric:
        p.add_argument("--metric", metavar="NAME", help="the metric to analyse (inventory metrics lists them)")


def add_cutoff(p: argparse.ArgumentParser) -> None:
    p.add_argument("--cutoff", metavar="SECONDS", help="also read the metric as a runtime with this time limit (in "
                   "its units): failed runs and runs at or past it count as unsolved at it; adds solved fractions, "
                   "Kaplan-Meier medians, hazard ratios of solving (Cox, stratified by block) and a log-rank test")


def add_collapse(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("collapse (how runs become one value per treatment and block)")
    g.add_argument("--replicates", metavar="mean|median|trimmed:0.1", help="statistic over seeds of one instance (default mean)")
    g.add_argument("--instances", metavar="mean|median", help="statistic over instances of one block (default mean)")
    g.add_argument("--failures", metavar="drop|penalize:F|worst", help="failed runs: drop them, count them at F x "
                   "their value (a runtime cutoff), or at the worst value on the instance (default drop)")
    g.add_argument("--holes", metavar="drop|keep", help="blocks missing a treatment: drop them (default) or keep "
                   "them and analyse the incomplete design")


def slice_of(session: Session, a):
    from ..select.slices import parse

    text = a.slice if getattr(a, "slice", None) is not None else session.focus
    return parse(text)


def settings_of(session: Session, a) -> Collapse:
    c = session.collapse
    return Collapse(
        replicates=getattr(a, "replicates", None) or c.replicates,
        instances=getattr(a, "instances", None) or c.instances,
        failures=getattr(a, "failures", None) or c.failures,
        holes=getattr(a, "holes", None) or c.holes,
    )


def metric_of(session: Session, a) -> str | None:
    return getattr(a, "metric", None) or session.metric


# --- peek --------------------------------------------------------------------------------------

def _peek_args(p):
    add_slice(p)
    p.add_argument("--limit", type=int, metavar="N", help="show at most N blocks (the JSON document has them all)")
    add_collapse(p)
    add_json(p)


@dataclass
class PeekResult(Shown):
    cov: object
    limit: int | None = None

    def to_dict(self) -> dict:
        return self.cov.to_dict()

    def render(self) -> str:
        from ..present.analysis import render_peek

        return render_peek(self.cov, self.limit)


@command("peek", "coverage of the slice: runs per treatment and block, holes, failures, cautions",
         'blockyard peek --slice "family=fragile-top" --metric pallets')
@args(_peek_args)
def cmd_peek(session: Session, a) -> PeekResult:
    from ..collapse.coverage import coverage

    wh = session.warehouse()
    with wh.engine.connect() as conn:
        settings = settings_of(session, a)
        if not getattr(a, "holes", None):
            settings = replace(settings, holes="keep")
        return PeekResult(coverage(conn, slice_of(session, a), metric_of(session, a), settings), getattr(a, "limit", None))


def _record(session: Session, result, sl, settings: Collapse | None) -> None:
    """Keep the analysis in the ledger; on a read-only or full warehouse, say once that it is not
    kept and let the numbers stand. A plan has no collapse settings (None)."""
    from .. import ledger

    from ..store.connect import database_trouble

    wh = session.warehouse()
    if wh.read_only:  # known when it was opened: no write is tried, and it is said once
        result.warnings.append(f"the warehouse is read-only here ({wh.read_only}): "
                               "this analysis is not kept in the ledger")
        return
    try:
        kept = {"options": result.options} if settings is None else {"collapse": settings.to_dict(), "options": result.options}
        result.analysis_id = ledger.record(wh, result, sl, kept)
    except Exception as exc:  # a full disk, or a write refused: the numbers still stand, unkept
        trouble = database_trouble(exc, wh.display)
        if trouble is None:
            raise
        result.warnings.append(f"this analysis is not kept in the ledger: {trouble}")
        return
    session.last_analysis = result.analysis_id


# --- blocktest ---------------------------------------------------------------------------------

def _blocktest_args(p):
    add_slice(p)
    p.add_argument("--transform", default="none", choices=_Words(["none", "log", "boxcox", "rank"]),
                   help="analyse on another scale (log shifts values when zeros occur, and says so)")
    p.add_argument("--design", default="auto", choices=_Words(["auto", "complete", "incomplete", "generalized"]),
                   help="complete: every treatment in every block; incomplete: blocks may miss treatments "
                   "(implies --holes keep); generalized: instances kept apart inside blocks, with the "
                   "treatment x block interaction")
    p.add_argument("--pairs", nargs="?", const="tukey,conover", default=False, metavar="METHODS",
                   choices=_Words(["tukey", "conover", "nemenyi", "tukey,conover", "tukey,nemenyi"]),
                   help="add all pairwise comparisons: tukey (Tukey HSD on the block model), conover or nemenyi "
                   "(both after Friedman), or several separated by commas; --pairs alone gives tukey,conover")
    add_cutoff(p)
    add_collapse(p)
    add_json(p)


@command("blocktest", "blocked ANOVA with diagnostics, transforms and the rank-based alternative",
         'blockyard blocktest --slice "family=mixed-sku" --metric pallets')
@args(_blocktest_args)
def cmd_blocktest(session: Session, a):
    from ..analyses import run_blocktest

    sl = slice_of(session, a).absolute()
    settings = settings_of(session, a)
    if a.design == "incomplete":
        settings = replace(settings, holes="keep")
    with session.warehouse().engine.connect() as conn:
        res = run_blocktest(conn, sl, metric_of(session, a), settings, a.transform, a.design, a.pairs,
                            cutoff=getattr(a, "cutoff", None))
    _record(session, res, sl, settings)
    return res


# --- versus ------------------------------------------------------------------------------------

def _versus_args(p):
    p.add_argument("baseline", metavar="BASELINE", help="the treatment everything is compared with, as NAME@VERSION")
    add_slice(p)
    p.add_argument("--method", default="dunnett", choices=_Words(["dunnett", "paired-t", "wilcoxon"]),
                   help="dunnett (default) uses the block model's residual mean square; paired-t and wilcoxon "
                   "test each treatment's block differences and adjust with --adjust")
    p.add_argument("--adjust", default="holm", choices=_Words(["holm", "bonferroni"]), help="multiplicity adjustment for paired-t and wilcoxon")
    p.add_argument("--better", choices=_Words(["lower", "higher"]), help="make the test one-sided: is a treatment better in this direction")
    p.add_argument("--margin", metavar="X|X%", help="differences within this margin count as ties (absolute, or %% of the baseline)")
    p.add_argument("--confidence", type=float, default=0.95, help="confidence level of the intervals (default 0.95)")
    add_cutoff(p)
    add_collapse(p)
    add_json(p)


@command("versus", "compare every treatment with a baseline on common blocks (Dunnett by default)",
         'blockyard versus stacker@1.4 --slice "stacker@1.4 campaign=oct-baseline | solver=stacker since=2026-11-01" --metric pallets')
@args(_versus_args)
def cmd_versus(session: Session, a):
    from ..analyses import run_versus

    sl = slice_of(session, a).absolute()
    settings = settings_of(session, a)
    with session.warehouse().engine.connect() as conn:
        res = run_versus(conn, sl, metric_of(session, a), settings, a.baseline, a.method, a.adjust, a.better,
                         a.margin, a.confidence, cutoff=getattr(a, "cutoff", None))
    _record(session, res, sl, settings)
    return res


# --- plan --------------------------------------------------------------------------------------

def _floats(text: str) -> list[float]:
    from ..errors import InputError

    try:
        vals = [float(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise InputError(f"--means {text}: write the means as numbers separated by commas, e.g. 40,39.2,38.5") from None
    if len(vals) < 2:
        raise InputError("--means needs two or more treatment means")
    return vals


def _plan_args(p):
    g = p.add_argument_group("what to detect (one of)")
    g.add_argument("--effect", type=float, metavar="D", help="standardized effect: mean block difference over the sd of block differences")
    g.add_argument("--delta", type=float, metavar="X", help="smallest difference that matters, in the metric's units (with --sd or --from)")
    g.add_argument("--means", metavar="A,B,...", help="treatment means for the RCBD F test (with --sigma or --from)")
    p.add_argument("--sd", type=float, metavar="S", help="sd of block differences (with --delta)")
    p.add_argument("--sigma", type=float, metavar="S", help="residual standard deviation of the block model (with --means)")
    p.add_argument("--from", dest="from_id", metavar="ANALYSIS", help="take sigma from a stored analysis (blocktest or "
                   "Dunnett versus); the plan also says how many blocks its slice holds")
    p.add_argument("--blocks", type=int, metavar="B", help="with --means: the power reached with this many blocks instead")
    p.add_argument("--power", type=float, default=0.8, help="target power (default 0.8)")
    p.add_argument("--alpha", type=float, default=0.05, help="family-wise significance level (default 0.05)")
    p.add_argument("--comparisons", type=int, default=1, help="comparisons sharing alpha (Bonferroni split; default 1)")
    g = p.add_argument_group("from a noise analysis: groups x instances x seeds (with --noise)")
    g.add_argument("--noise", metavar="ANALYSIS", help="plan the allocation of groups, instances per group and seeds "
                   "per instance from a stored noise analysis; --effect is then the difference in the metric's units")
    g.add_argument("--budget-hours", type=float, metavar="H", help="with --noise: the most power within H CPU hours "
                   "(instead of the least CPU time for --power)")
    g.add_argument("--run-seconds", type=float, metavar="S", help="with --noise: a run's CPU seconds, when the analysis "
                   "has no time metric (or to override it)")
    g.add_argument("--instance-seconds", type=float, default=0.0, metavar="S", help="with --noise: CPU seconds to make "
                   "one new instance (default 0)")
    g.add_argument("--group-seconds", type=float, default=0.0, metavar="S", help="with --noise: CPU seconds to make "
                   "one new instance group (default 0)")
    g.add_argument("--max-groups", type=int, metavar="N", help="with --noise: the groups there are (no cap by default)")
    g.add_argument("--max-instances", type=int, metavar="N", help="with --noise: the instances a group can hold")
    p.add_argument("--more", metavar="ANALYSIS", help="for a stored versus: how many more blocks would likely settle "
                   "each comparison at its current estimate (conditional power; an estimate)")
    add_json(p)


@command("plan", "blocks needed to detect a given effect with a given power; with --noise, groups x instances x seeds",
         "blockyard plan --effect 0.5 --power 0.8 --alpha 0.05 --comparisons 3; "
         "blockyard plan --noise 12 --effect 0.4 --budget-hours 20")
@args(_plan_args)
def cmd_plan(session: Session, a):
    from .. import ledger
    from ..analyses import run_plan

    source = st = None
    if a.from_id is not None:
        # with its state: a plan on a stale analysis's sigma says so
        st = ledger.get(session.warehouse(), ledger.parse_id(a.from_id, "--from"))
        source = dict(st.result)
        source["analysis_id"] = st.id
    noise = more = None
    for key, where in (("noise", "--noise"), ("more", "--more")):
        if getattr(a, key, None) is not None:
            if st is not None:
                from ..errors import InputError

                raise InputError(f"--from and {where} read different analyses: give one of them")
            st = ledger.get(session.warehouse(), ledger.parse_id(getattr(a, key), where))
            doc = dict(st.result)
            doc["analysis_id"], doc["kind"] = st.id, st.kind
            if key == "noise":
                if st.kind != "noise":
                    from ..errors import InputError

                    raise InputError(f"--noise {st.id}: analysis {st.id} is a {st.kind}; run blockyard noise first "
                                     "and give its id")
                noise = doc
            else:
                more = doc
    res = run_plan(effect=a.effect, delta=a.delta, sd=a.sd, source=source, power=a.power, alpha=a.alpha,
                   comparisons=a.comparisons, means=_floats(a.means) if a.means else None, sigma=a.sigma,
                   blocks=a.blocks, noise=noise, more=more, budget_hours=getattr(a, "budget_hours", None),
                   run_seconds=getattr(a, "run_seconds", None), group_seconds=getattr(a, "group_seconds", 0.0) or 0.0,
                   instance_seconds=getattr(a, "instance_seconds", 0.0) or 0.0,
                   max_groups=getattr(a, "max_groups", None), max_instances=getattr(a, "max_instances", None))
    if st is not None:
        ledger.note_source(res, st.result, st.kind, st.state, st.stale_runs)
    # a plan is kept like any analysis, so that a claim made on it ("we need 34 blocks") is tied to
    # it and not to whatever ran before; without a warehouse it is only printed
    from ..errors import StorageError
    from ..select.slices import Slice

    try:
        session.warehouse()
    except StorageError:
        return res
    _record(session, res, Slice(), None)
    return res
