"""All-pairs comparisons in a complete block design.

Public functions
----------------
tukey_hsd_blocked(obs, confidence=0.95)      Tukey's HSD on the additive block model
nemenyi(obs, confidence=0.95)                Nemenyi's test on Friedman mean ranks
conover_friedman(obs, adjust="holm", ...)    Conover's t-based test on Friedman ranks
ratios_from_log(res, shift=0.0)              Tukey's log-scale differences as ratios of geometric means

Every row compares ``first`` with ``second`` (in the order the treatments appear) and
``diff`` is first minus second: a difference of means for Tukey, of mean ranks for the rank
methods (rank 1 = smallest value in the block).
"""
from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats

from warehouse.analyze.anova import _additive
from warehouse.analyze.ranks import _friedman_core, _within_ranks
from warehouse.analyze.tidy import FEW_BLOCKS, _complete, _Result
from warehouse.errors import InputError

ADJUSTMENTS = ("holm", "bonferroni", "none")


@dataclass
class PairsResult(_Result):
    """All-pairs comparisons.

    Fields
    ------
    method            "tukey", "nemenyi" or "conover"
    treatments        labels in analysis order
    blocks            number of blocks
    confidence        level of the intervals
    adjust            "tukey", "nemenyi", "holm", "bonferroni" or "none"
    residual_ms, residual_df   Tukey: additive block model; Conover: the ANOVA on within-block
                      ranks (residual_ms = (A1 - sum R_j^2 / b) / ((a-1)(b-1))); Nemenyi: None
    critical_value    Tukey: studentized range quantile q(a, df); Nemenyi: q(a, inf) / sqrt 2;
                      Conover: the t quantile used for the intervals
    critical_difference   smallest |diff| declared different at 1 - confidence (Tukey and
                      Nemenyi; Conover: at the interval level)
    friedman          Friedman result for the rank methods, else None
    pairs             list of rows first, second, diff, ci_low, ci_high, se, statistic,
                      p_adjusted (Conover also p_unadjusted; after ratios_from_log also ratio,
                      ratio_low, ratio_high, percent). A statistic that cannot be computed (no
                      spread to divide by) is NaN, and so is its p value.
    warnings
    original_scale    None, or (after ratios_from_log) {shift, ratios}
    """

    method: str
    treatments: list[str]
    blocks: int
    confidence: float
    adjust: str
    residual_ms: float | None
    residual_df: int | None
    critical_value: float
    critical_difference: float
    friedman: object
    pairs: list[dict]
    warnings: list[str] = field(default_factory=list)
    original_scale: dict | None = None  # after ratios_from_log: what the ratios are of

    def table(self) -> pd.DataFrame:
        return pd.DataFrame(self.pairs)


def _check_confidence(confidence: float) -> None:
    if not (0.0 < confidence < 1.0):
        raise InputError(f"confidence {confidence!r} must lie strictly between 0 and 1, e.g. 0.95")


def _few(b: int) -> list[str]:
    return [f"only {b} blocks: the pairwise tests have little power"] if b < FEW_BLOCKS else []


def tukey_hsd_blocked(obs: pd.DataFrame, confidence: float = 0.95) -> PairsResult:
    """Tukey's honestly significant difference test on the additive block model.

    For every pair of treatments, diff = mean_1 - mean_2 over the b blocks, se = sqrt(MS_res / b)
    with MS_res on (a-1)(b-1) df from the additive treatment + block model. The statistic
    q = |diff| / se is referred to the studentized range distribution with a means and the
    residual df (scipy.stats.studentized_range); intervals diff +- q_crit se hold simultaneously
    for all a(a-1)/2 pairs.

    Assumptions: complete design, additive model, independent normal errors with one variance.

    References: Tukey (1953), The Problem of Multiple Comparisons; Montgomery, Design and
    Analysis of Experiments (multiple comparisons in the randomized block design).

    Example::

        from warehouse.analyze.pairs import tukey_hsd_blocked
        tukey_hsd_blocked(obs).table()
    """
    _check_confidence(confidence)
    Y, treatments, _ = _complete(obs)
    a, b = Y.shape
    fit = _additive(Y)
    mse, df_e = fit["ms_e"], fit["df_e"]
    se = math.sqrt(mse / b)
    q = float(stats.studentized_range.ppf(confidence, a, df_e))
    rows = []
    for i, j in itertools.combinations(range(a), 2):
        diff = float(fit["tm"][i] - fit["tm"][j])
        if se > 0:
            stat = abs(diff) / se
            p = min(max(float(stats.studentized_range.sf(stat, a, df_e)), 0.0), 1.0)
        else:  # no residual spread: the statistic divides by zero, and has no p
            stat = p = float("nan")
        rows.append({"first": treatments[i], "second": treatments[j], "diff": diff,
                     "ci_low": diff - q * se, "ci_high": diff + q * se, "se": se, "statistic": stat,
                     "p_adjusted": p, "method": "tukey"})
    warnings = _few(b)
    if not se > 0:
        warnings.append("the block model fits exactly (residual mean square 0): Tukey's statistics and p values "
                        "cannot be computed")
    return PairsResult(method="tukey", treatments=treatments, blocks=b, confidence=confidence, adjust="tukey",
                       residual_ms=mse, residual_df=df_e, critical_value=q, critical_difference=q * se,
                       friedman=None, pairs=rows, warnings=warnings)


def nemenyi(obs: pd.DataFrame, confidence: float = 0.95) -> PairsResult:
    """Nemenyi's all-pairs test after a Friedman test.

    Treatments are ranked within each block; R_i is the mean rank of treatment i. For a pair,
    z = |R_1 - R_2| / sqrt(a(a+1) / (6b)); the pair differs when z exceeds q(a, inf) / sqrt(2),
    q being the studentized range quantile with infinite df, so the critical difference of mean
    ranks is CD = q(a, inf) / sqrt(2) * sqrt(a(a+1) / (6b)). p_adjusted = P(range > sqrt(2) z)
    for a independent standard normals. Intervals diff +- CD. Ties in a block take midranks
    (no further correction).

    Assumptions: complete design, independent blocks; a large-sample approximation.

    References: Nemenyi (1963), Distribution-free Multiple Comparisons, PhD thesis, Princeton;
    Demsar (2006), J. Mach. Learn. Res. 7 (critical difference for comparing algorithms).

    Example::

        from warehouse.analyze.pairs import nemenyi
        res = nemenyi(obs); res.critical_difference; res.table()
    """
    _check_confidence(confidence)
    Y, treatments, _ = _complete(obs)
    a, b = Y.shape
    fr = _friedman_core(Y, treatments)
    mr = fr.mean_ranks["mean_rank"].to_numpy()
    se = math.sqrt(a * (a + 1) / (6.0 * b))
    crit = float(stats.studentized_range.ppf(confidence, a, np.inf) / math.sqrt(2.0))
    cd = crit * se
    rows = []
    for i, j in itertools.combinations(range(a), 2):
        diff = float(mr[i] - mr[j])
        z = abs(diff) / se
        p = float(stats.studentized_range.sf(z * math.sqrt(2.0), a, np.inf))
        rows.append({"first": treatments[i], "second": treatments[j], "diff": diff, "ci_low": diff - cd,
                     "ci_high": diff + cd, "se": se, "statistic": z, "p_adjusted": min(max(p, 0.0), 1.0),
                     "method": "nemenyi"})
    return PairsResult(method="nemenyi", treatments=treatments, blocks=b, confidence=confidence, adjust="nemenyi",
                       residual_ms=None, residual_df=None, critical_value=crit, critical_difference=cd,
                       friedman=fr, pairs=rows, warnings=_few(b) + list(fr.warnings))


def conover_friedman(obs: pd.DataFrame, adjust: str = "holm", confidence: float = 0.95) -> PairsResult:
    """Conover's all-pairs test after a Friedman test.

    With within-block midranks, rank sums R_j and A1 = sum of squared ranks, two treatments
    differ when |R_1 - R_2| / sqrt(2 (b A1 - sum R_j^2) / ((b-1)(a-1))) exceeds the t quantile on
    (a-1)(b-1) df (Conover 1999). This is the least-significant-difference test of the ANOVA on
    within-block ranks, so it is more powerful than Nemenyi's. Raw two-sided p-values are
    adjusted by Holm (default), Bonferroni or not at all ("none"). diff is reported in mean ranks
    (rank sums / b); intervals use the t quantile at the Bonferroni level
    1 - (1 - confidence)/m over the m pairs (unadjusted level when adjust="none").

    Assumptions: complete design, independent blocks.

    References: Conover, Practical Nonparametric Statistics, 3rd ed. (1999), section 5.8;
    Conover and Iman (1979), Los Alamos report LA-7677-MS.

    Example::

        from warehouse.analyze.pairs import conover_friedman
        conover_friedman(obs, adjust="holm").table()
    """
    if adjust not in ADJUSTMENTS:
        raise InputError(f"unknown adjustment {adjust!r}: use one of {', '.join(ADJUSTMENTS)}")
    _check_confidence(confidence)
    Y, treatments, _ = _complete(obs)
    a, b = Y.shape
    fr = _friedman_core(Y, treatments)
    R = _within_ranks(Y)
    rs = R.sum(axis=1)
    A1 = float((R ** 2).sum())
    df = (a - 1) * (b - 1)
    inner = max(b * A1 - float((rs ** 2).sum()), 0.0)
    se_sum = math.sqrt(2.0 * inner / ((b - 1) * (a - 1)))
    pairs = list(itertools.combinations(range(a), 2))
    m = len(pairs)
    level = confidence if adjust == "none" else 1 - (1 - confidence) / m
    tq = float(stats.t.ppf(1 - (1 - level) / 2, df))
    raw = []
    rows = []
    for i, j in pairs:
        dsum = float(rs[i] - rs[j])
        if se_sum > 0:
            stat = abs(dsum) / se_sum
            p = float(2 * stats.t.sf(stat, df))
        else:  # the ranks are identical in every block: the statistic divides by zero, and has no p
            stat = p = float("nan")
        raw.append(p)
        diff = dsum / b
        se = se_sum / b
        rows.append({"first": treatments[i], "second": treatments[j], "diff": diff, "ci_low": diff - tq * se,
                     "ci_high": diff + tq * se, "se": se, "statistic": stat, "p_unadjusted": p,
                     "p_adjusted": None, "method": "conover"})
    raw_arr = np.asarray(raw, dtype=float)
    adj = raw_arr.copy()
    if adjust != "none" and np.isfinite(raw_arr).any():
        from statsmodels.stats.multitest import multipletests

        have = np.isfinite(raw_arr)
        adj[have] = multipletests(raw_arr[have], method=adjust)[1]
    for row, p in zip(rows, adj):
        row["p_adjusted"] = float(p)
    warnings = _few(b) + list(fr.warnings)
    if not se_sum > 0:
        warnings.append("the ranks are identical in every block: Conover's statistics and p values cannot be "
                        "computed")
    return PairsResult(method="conover", treatments=treatments, blocks=b, confidence=confidence, adjust=adjust,
                       residual_ms=inner / (b * df), residual_df=df, critical_value=tq,
                       critical_difference=tq * se_sum / b, friedman=fr, pairs=rows, warnings=warnings)


def ratios_from_log(res: PairsResult, shift: float = 0.0) -> PairsResult:
    """Tukey's differences made on the log scale, read back on the original scale.

    A difference of means of logs is the log of the ratio of geometric means, so each row gains
    ratio = exp(diff) (first over second), ratio_low / ratio_high = exp of the interval's ends
    (the same simultaneous coverage: exp is increasing) and percent = 100 (ratio - 1), the change
    of the first against the second. When the values were shifted before the log (any value <= 0),
    the ratios are of value + shift; ``original_scale`` on the result says so.

    Assumptions: those of :func:`tukey_hsd_blocked` on the log scale.

    References: Bland and Altman (1996), Transformations, means, and confidence intervals, BMJ 312;
    Keene (1995), The log transformation is special, Stat. Med. 14.

    Example::

        from warehouse.analyze.pairs import ratios_from_log, tukey_hsd_blocked
        ratios_from_log(tukey_hsd_blocked(log_obs)).pairs[0]["ratio"]
    """
    if res.method != "tukey":
        raise InputError(f"ratios come from differences of means of logs (Tukey); {res.method} compares mean ranks")
    for row in res.pairs:
        row["ratio"] = math.exp(row["diff"])
        row["ratio_low"] = math.exp(row["ci_low"])
        row["ratio_high"] = math.exp(row["ci_high"])
        row["percent"] = 100.0 * (row["ratio"] - 1.0)
    res.original_scale = {"shift": float(shift), "ratios": "geometric mean of the first over the second"
                          + (f", of value + {shift:g}" if shift else "")}
    return res
