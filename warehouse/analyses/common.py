"""The parts every analysis shares: the collapse's document, numerical warnings as one caution,
cautions without repeats, the --cutoff check, the censored-runtime and failure parts."""
from __future__ import annotations


import pandas as pd

from ..collapse.common import Collapsed
from ..errors import DesignError, InputError
from ..select.slices import Slice


ALPHA = 0.05


def collapse_doc(c: Collapsed) -> dict:
    return {"runs_in_slice": c.runs_in_slice, "runs_used": c.runs_used, "instances_used": c.instances_used,
            "notes": c.notes, "settings": c.settings, "hosts": c.hosts, "campaigns": c.campaigns}


class numeric_warnings:
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


def dedupe(items: list[str]) -> list[str]:
    seen, out = set(), []
    for w in items:
        if w not in seen:
            seen.add(w)
            out.append(w)
    return out


# --- censored runtimes (--cutoff) --------------------------------------------------------------

def read_cutoff(cutoff) -> float | None:
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
    from ..analyze.censored import censor_at, compare_censored
    from ..collapse.runs import common_runs, run_times

    cutoff = read_cutoff(cutoff)
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
    collapse leaves it out of the values, not out of this). Counted by the database from the
    cell summaries where every treatment ran every instance (`failure_counts`), else from the
    full table of cells (the runs themselves when not `quick`); the collapse's own per-instance table holds
    only the instances with values, so it cannot serve here. Returns the FailuresResult, its
    cautions already worded for the analysis."""
    from ..analyze.failures import compare_solved, compare_solved_counts
    from ..collapse.observations import cell_counts, failure_counts

    counts = failure_counts(conn, sl, c.metric) if quick else None
    res = (compare_solved_counts(**counts, baseline=baseline) if counts is not None
           else compare_solved(cell_counts(conn, sl, c.metric, from_runs=not quick), baseline))
    if c.settings.get("failures") == "drop" and res.test.p is not None and res.test.p < ALPHA:
        # the values above are those of successful runs: the treatment that fails more is judged
        # on its easier runs
        res.warnings = [w + ("; the values above come from successful runs only (--failures worst or penalize:F "
                             "count the failures in)" if w.startswith("failure rates differ") else "")
                        for w in res.warnings]
    return res


# --- versus ------------------------------------------------------------------------------------


def baseline_cautions(c: Collapsed, baseline: str, numeric: list[str]) -> list[str]:
    """The cautions every comparison against a baseline carries: the design, hosts, pooling,
    pseudo-replication, numerical trouble, and the blocks dropped for want of the baseline or of
    another treatment (named, the first eight)."""
    from ..collapse.cautions import design_cautions, host_caution, pooling_cautions, pseudo_replication

    out = (list(design_cautions(c)) + host_caution(c, baseline) + pooling_cautions(c, baseline)
           + pseudo_replication(c) + list(numeric))
    missing_base = [d["block"] for d in c.dropped_blocks if baseline in d["missing"]]
    other = [d["block"] for d in c.dropped_blocks if baseline not in d["missing"]]
    if missing_base:
        n = len(missing_base)
        out.append(f"{n} block{' is' if n == 1 else 's are'} not in the baseline and {'was' if n == 1 else 'were'} "
                   f"dropped: {', '.join(missing_base[:8])}")
    if other:
        n = len(other)
        out.append(f"{n} block{' misses' if n == 1 else 's miss'} another treatment and {'was' if n == 1 else 'were'} "
                   f"dropped: {', '.join(other[:8])}")
    return out


def drift_cautions(drift: list[dict], large: float | None, large_words: str) -> list[str]:
    """A treatment that differs from itself across campaigns, significantly or by at least `large`
    (the smallest difference reported, or the margin), earns a caution: part of each difference
    between campaigns may be the campaigns."""
    out = []
    for d in drift:
        big = large is not None and d["difference"] is not None and abs(d["difference"]) >= large
        sig = d["p"] is not None and d["p"] < 0.05
        if sig or big:
            out.append(f"{d['treatment']} differs from itself between {d['campaigns'][0]} and {d['campaigns'][1]} by "
                       f"{d['difference']:+.3g} on {d['blocks']} common blocks ({'significant' if sig else 'not significant'}"
                       f"{', ' + large_words if big else ''}): part of each difference between campaigns may be "
                       "the campaigns, not the treatments")
    return out
