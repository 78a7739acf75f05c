"""Guarding a baseline: is any treatment worse than it by more than a margin that matters?

A one-sided many-to-one comparison (Dunnett) on the additive block model, read in the metric's
worse direction and against a margin, the way a nightly pipeline needs it: each treatment is
*not-worse*, *worse* or *inconclusive*, never merely "significant".

Public functions
----------------
guard_vs_baseline(obs, baseline, worse, margin, confidence)   the verdicts, with their bounds
margin_in_units(margin, baseline_mean)                       "0.5" or "2%" to the metric's units
blocks_to_settle(gap, mse, comparisons, blocks, confidence)  blocks at which a bound clears the margin

How a verdict is read
---------------------
worse_by = (treatment - baseline) in the worse direction (positive: worse), the mean over the b
common blocks, with standard error sqrt(2 MS_res / b) from the block model. With c the one-sided
Dunnett critical value for the a - 1 comparisons at the family-wise confidence,

- bound  = worse_by + c se, the upper confidence bound on how much worse the treatment is;
  *not-worse* when bound < margin (a non-inferiority test at the margin);
- lower  = worse_by - c se; *worse* when lower > margin (worse by more than the margin);
- otherwise *inconclusive*.

Each of the two readings keeps its family-wise error at 1 - confidence. The two are read off one
set of bounds, so a treatment in one direction and another in the other share a family: with
several treatments the chance of any wrong verdict can exceed 1 - confidence slightly (at 95 %,
about 5.6 % for 2 or 3 treatments and 5.8 % for 5 on 30 df, by scipy.stats.multivariate_t with the
signs of half the comparisons reversed). With one treatment it is exact.

Assumptions: complete design, additive block model, independent normal errors of one variance
(check with rcbd_anova).

References: Dunnett (1955), J. Amer. Statist. Assoc. 50; Hochberg and Tamhane, Multiple Comparison
Procedures (1987), on one-sided many-to-one comparisons; Wellek, Testing Statistical Hypotheses
of Equivalence and Noninferiority (2010), on testing against a margin.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from warehouse.analyze.anova import _additive
from warehouse.analyze.baseline import (_base_warnings, _baseline_index, _check_confidence, dunnett_critical_value,
                                        dunnett_p_values)
from warehouse.analyze.tidy import _complete, _Result
from warehouse.errors import InputError

VERDICTS = ("not-worse", "worse", "inconclusive")
#: the largest number of blocks the search for `blocks_to_settle` goes to: beyond it the answer
#: is "far more than a campaign holds", and the exact count says nothing more.
MOST_BLOCKS = 10_000_000


def margin_in_units(margin, baseline_mean: float) -> float:
    """A margin as a number in the metric's units: a number (or its text) as it is, "X%" as X % of
    |baseline_mean|. Refuses anything else, and negative margins."""
    text = str(margin).strip() if margin is not None else ""
    pct = text.endswith("%")
    try:
        value = float(text[:-1] if pct else text)
    except ValueError:
        value = float("nan")
    if not math.isfinite(value) or value < 0:
        raise InputError(f"margin {margin!r}: write a number >= 0 in the metric's units (0.5) or a percentage "
                         f"of the baseline (2%)")
    return abs(baseline_mean) * value / 100.0 if pct else value


def _half_width(mse: float, comparisons: int, blocks: int, confidence: float) -> float:
    df = comparisons * (blocks - 1)  # (a - 1)(b - 1) with a - 1 = comparisons
    c = dunnett_critical_value(comparisons, df, confidence, "greater")
    return c * math.sqrt(2.0 * mse / blocks)


def blocks_to_settle(gap: float, mse: float, comparisons: int, blocks: int, confidence: float = 0.95) -> int | None:
    """The fewest blocks (more than `blocks`) at which the one-sided Dunnett half-width
    c(k, k(B - 1)) sqrt(2 MS_res / B) falls below `gap`, the distance between an estimate and the
    margin: the bound then clears the margin if the estimate and the residual mean square stay as
    they are. The half-width shrinks as 1 / sqrt(B), and c with it as the df grow. None when the gap
    is 0 (the estimate sits on the margin: no number of blocks settles it) or not finite."""
    if not (gap > 0) or not math.isfinite(gap) or not math.isfinite(mse):
        return None
    if mse <= 0:
        return blocks + 1
    if _half_width(mse, comparisons, blocks + 1, confidence) < gap:
        return blocks + 1
    # the critical value at the present df is an upper bound for every larger design: it brackets B
    c_now = dunnett_critical_value(comparisons, comparisons * (blocks - 1), confidence, "greater")
    hi = min(max(int(math.floor(2.0 * mse * c_now ** 2 / gap ** 2)) + 1, blocks + 2), MOST_BLOCKS)
    if _half_width(mse, comparisons, hi, confidence) >= gap:
        return MOST_BLOCKS
    lo = blocks + 1  # fails here; hi holds
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if _half_width(mse, comparisons, mid, confidence) < gap:
            hi = mid
        else:
            lo = mid
    return hi


@dataclass
class GuardStats(_Result):
    """The verdicts of one guard.

    Fields
    ------
    baseline, blocks, treatments (baseline included), worse ("higher" or "lower": the direction in
    which a difference is worse), confidence, margin (as given), margin_units
    residual_ms, residual_df   the additive block model's (None when only the baseline has values)
    critical_value             the one-sided Dunnett critical value for the a - 1 comparisons
    baseline_mean              the baseline's mean over the blocks (what "X%" is a share of)
    rows                       one per treatment: treatment, verdict, difference (treatment -
                               baseline), worse_by (the difference in the worse direction), bound
                               (upper bound on worse_by), lower_bound, se, p_worse (adjusted p of
                               "worse by more than the margin"), p_not_worse (adjusted p of "worse by
                               less than the margin"), more_blocks, mean, baseline_mean
    warnings                   plain sentences
    """

    baseline: str
    blocks: int
    treatments: list[str]
    worse: str
    confidence: float
    margin: object
    margin_units: float
    residual_ms: float | None
    residual_df: int | None
    critical_value: float | None
    rows: list[dict]
    baseline_mean: float | None = None
    warnings: list[str] = field(default_factory=list)

    def table(self) -> pd.DataFrame:
        return pd.DataFrame(self.rows)


def guard_vs_baseline(obs: pd.DataFrame, baseline: str, worse: str = "higher", margin=0.0,
                      confidence: float = 0.95) -> GuardStats:
    """Verdicts of every treatment against the baseline: not-worse, worse or inconclusive.

    ``worse`` is the direction in which a value is worse ("higher" for a metric where fewer is
    better). ``margin`` is a number >= 0 in the metric's units or "X%" of |mean of the baseline|
    over the blocks. See the module's docstring for how the bounds and verdicts are made; an
    inconclusive verdict carries ``more_blocks``, the blocks to add before the present estimate and
    residual mean square would settle it (an estimate; None when the estimate sits on the margin).

    Example::

        from warehouse.analyze.guard import guard_vs_baseline
        res = guard_vs_baseline(obs, "stacker@1.4", worse="higher", margin="2%")
        res.table()[["treatment", "verdict", "worse_by", "bound"]]
    """
    if worse not in ("higher", "lower"):
        raise InputError(f"worse must be 'higher' or 'lower', not {worse!r}")
    _check_confidence(confidence)
    Y, treatments, _ = _complete(obs)
    i0 = _baseline_index(treatments, baseline)
    a, b = Y.shape
    base_mean = float(Y[i0].mean())
    m = margin_in_units(margin, base_mean)
    fit = _additive(Y)
    mse, df_e = float(fit["ms_e"]), int(fit["df_e"])
    k = a - 1
    se = math.sqrt(2.0 * mse / b)
    crit = dunnett_critical_value(k, df_e, confidence, "greater")
    sign = 1.0 if worse == "higher" else -1.0
    others = [i for i in range(a) if i != i0]
    diffs = np.array([float(Y[i].mean()) - base_mean for i in others])
    w = sign * diffs
    if se > 0:
        t = (w - m) / se
        p_worse = dunnett_p_values(t, k, df_e, "greater")
        p_not = dunnett_p_values(t, k, df_e, "less")
    else:  # the block model fits exactly: the bounds are the estimates themselves
        p_worse = np.where(w > m, 0.0, 1.0)
        p_not = np.where(w < m, 0.0, 1.0)
    rows = []
    for n, i in enumerate(others):
        est = float(w[n])
        upper, lower = est + crit * se, est - crit * se
        if upper < m:
            verdict = "not-worse"
        elif lower > m:
            verdict = "worse"
        else:
            verdict = "inconclusive"
        more: int | None = 0
        if verdict == "inconclusive":
            gap = abs(m - est)
            # an estimate within rounding of the margin sits on it
            if gap <= 1e-12 * max(abs(m), abs(est), 1.0):
                more = None
            else:
                need = blocks_to_settle(gap, mse, k, b, confidence)
                more = None if need is None else need - b
        rows.append({"treatment": treatments[i], "verdict": verdict, "difference": float(diffs[n]),
                     "worse_by": est, "bound": upper, "lower_bound": lower, "se": se,
                     "p_worse": float(p_worse[n]), "p_not_worse": float(p_not[n]), "more_blocks": more,
                     "mean": float(Y[i].mean()), "baseline_mean": base_mean})
    warnings = _base_warnings(b, k, "Dunnett, one-sided")
    if fit["perfect"]:
        warnings.append("the block model fits exactly (residual mean square 0): the bounds are the estimates "
                        "themselves")
    else:
        from scipy import stats

        from warehouse.analyze.tidy import CHECK_LEVEL, _fmt_p

        if a * b >= 3:
            sw = stats.shapiro(fit["resid"].ravel())
            if sw.pvalue < CHECK_LEVEL:
                warnings.append(f"residuals of the block model are not normal (Shapiro-Wilk {_fmt_p(float(sw.pvalue))}):"
                                " the bounds may be off; consider a log scale or more blocks")
    return GuardStats(baseline=baseline, blocks=b, treatments=treatments, worse=worse, confidence=confidence,
                      margin=margin, margin_units=m, residual_ms=mse, residual_df=df_e, critical_value=crit,
                      rows=rows, warnings=warnings, baseline_mean=base_mean)
