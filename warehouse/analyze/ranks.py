"""Rank tests for a complete block design: Friedman (with the Iman-Davenport F) and Quade.

Both rank the treatments within each block, so they need no normality; Quade also weights each
block by the rank of its range. :func:`_friedman_core` and :func:`_within_ranks` take the
treatments x blocks matrix, for the RCBD ANOVA (which reports both tests beside its own) and
for the all-pairs comparisons after Friedman.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from warehouse.analyze.lean import average_ranks, chi2_sf, f_sf
from warehouse.analyze.tidy import _EPS, FEW_BLOCKS, _complete, _Result

#: what is said instead of an infinite F when every block ranks the treatments alike
IDENTICAL_RANKS = ("the ranks are identical in every block: the {test} is not defined (read it as the "
                   "strongest agreement the blocks can show, not as a number)")


@dataclass
class FriedmanResult(_Result):
    """Friedman test on within-block ranks.

    statistic   tie-corrected chi-square, df = a - 1, p from the chi-square distribution
    iman_davenport, df1, df2, p_f   the F form (b-1) chi2 / (b(a-1) - chi2) on (a-1), (a-1)(b-1) df
    kendall_w   Kendall's coefficient of concordance, chi2 / (b (a-1))
    mean_ranks  DataFrame treatment, mean_rank, rank_sum
    """

    treatments: int
    blocks: int
    statistic: float
    df: int
    p: float
    iman_davenport: float
    df1: int
    df2: int
    p_f: float
    kendall_w: float
    mean_ranks: pd.DataFrame
    warnings: list[str] = field(default_factory=list)

    def table(self) -> pd.DataFrame:
        return self.mean_ranks.copy()


@dataclass
class QuadeResult(_Result):
    """Quade test: within-block ranks weighted by the rank of the block's range.

    statistic, df1, df2, p   F on (a-1) and (a-1)(b-1) df
    weighted_ranks           DataFrame treatment, weighted_rank_sum (S_j), mean_rank
    """

    treatments: int
    blocks: int
    statistic: float
    df1: int
    df2: int
    p: float
    weighted_ranks: pd.DataFrame
    warnings: list[str] = field(default_factory=list)

    def table(self) -> pd.DataFrame:
        return self.weighted_ranks.copy()


def _within_ranks(Y: np.ndarray) -> np.ndarray:
    """Midranks of the treatments inside each block (column)."""
    return average_ranks(Y, axis=0)


def _friedman_core(Y: np.ndarray, treatments: list[str]) -> FriedmanResult:
    a, b = Y.shape
    R = _within_ranks(Y)
    rank_sums = R.sum(axis=1)
    A1 = float((R ** 2).sum())
    C1 = b * a * (a + 1) ** 2 / 4.0
    warnings: list[str] = []
    df1, df2 = a - 1, (a - 1) * (b - 1)
    if A1 - C1 <= _EPS * A1:
        stat = p = F = p_f = w = float("nan")
        warnings.append("every block ties all treatments: the Friedman test is not defined")
    else:
        # Conover's form of the statistic, which is the tie-corrected chi-square.
        stat = float((a - 1) * ((rank_sums - b * (a + 1) / 2.0) ** 2).sum() / (A1 - C1))
        p = float(chi2_sf(stat, a - 1))
        w = stat / (b * (a - 1))
        rest = b * (a - 1) - stat
        if rest <= _EPS * b * a:
            # chi2 at its largest, b (a-1): the F form divides by zero; it is not computed
            F, p_f = float("nan"), float("nan")
            warnings.append(IDENTICAL_RANKS.format(test="Iman-Davenport F"))
        else:
            F = (b - 1) * stat / rest
            p_f = float(f_sf(F, df1, df2))
    if b < FEW_BLOCKS:
        warnings.append(f"only {b} blocks: the Friedman test has little power")
    mr = pd.DataFrame({"treatment": treatments, "mean_rank": rank_sums / b, "rank_sum": rank_sums})
    return FriedmanResult(treatments=a, blocks=b, statistic=stat, df=a - 1, p=p, iman_davenport=F,
                          df1=df1, df2=df2, p_f=p_f, kendall_w=w, mean_ranks=mr, warnings=warnings)


def friedman(obs: pd.DataFrame) -> FriedmanResult:
    """Friedman's rank test for a complete block design, with the tie correction.

    Within each block the treatments are ranked (midranks for ties). With rank sums R_j,
    A1 = sum of squared ranks and C1 = b a (a+1)^2 / 4, the statistic is
    T1 = (a-1) sum_j (R_j - b(a+1)/2)^2 / (A1 - C1), which equals the chi-square statistic with the
    usual tie correction; p from chi-square on a-1 df. The Iman-Davenport form
    F = (b-1) T1 / (b(a-1) - T1) is referred to F on a-1 and (a-1)(b-1) df and is the more
    accurate of the two for few blocks. When every block ranks the treatments alike (no ties),
    T1 = b(a-1) and F divides by zero: F and its p are NaN (None in JSON) with a warning.

    Assumptions: blocks are independent; within a block the observations can be ranked; no
    normality needed.

    References: Friedman (1937), J. Amer. Statist. Assoc. 32; Iman and Davenport (1980), Comm.
    Statist. A9; Conover, Practical Nonparametric Statistics (1999), section 5.8.

    Example::

        from warehouse.analyze.ranks import friedman
        res = friedman(obs)          # obs: treatment, block, value
        res.statistic, res.p, res.iman_davenport, res.p_f
        res.table()                  # mean ranks
    """
    Y, treatments, _ = _complete(obs)
    return _friedman_core(Y, treatments)


def _quade_core(Y: np.ndarray, treatments: list[str]) -> QuadeResult:
    a, b = Y.shape
    R = _within_ranks(Y)
    Q = average_ranks(Y.max(axis=0) - Y.min(axis=0))
    S = Q[None, :] * (R - (a + 1) / 2.0)
    A2 = float((S ** 2).sum())
    Sj = S.sum(axis=1)
    B = float((Sj ** 2).sum() / b)
    df1, df2 = a - 1, (a - 1) * (b - 1)
    warnings: list[str] = []
    if A2 <= _EPS:
        F = p = float("nan")
        warnings.append("every block ties all treatments: the Quade test is not defined")
    elif A2 - B <= _EPS * A2:
        F, p = float("nan"), float("nan")
        warnings.append("the ranks are identical in every block and the blocks' ranges tie: the Quade F is not "
                        "defined (read it as the strongest agreement the blocks can show, not as a number)")
    else:
        F = (b - 1) * B / (A2 - B)
        p = float(f_sf(F, df1, df2))
    if b < FEW_BLOCKS:
        warnings.append(f"only {b} blocks: the Quade test has little power")
    tab = pd.DataFrame({"treatment": treatments, "weighted_rank_sum": Sj, "mean_rank": R.mean(axis=1)})
    return QuadeResult(treatments=a, blocks=b, statistic=float(F), df1=df1, df2=df2, p=float(p),
                       weighted_ranks=tab, warnings=warnings)


def quade(obs: pd.DataFrame) -> QuadeResult:
    """Quade's test for a complete block design.

    Within each block the treatments get midranks R_ij; the blocks are ranked by their range
    (largest minus smallest value), Q_i. With S_ij = Q_i (R_ij - (a+1)/2), A2 = sum S_ij^2 and
    B = (1/b) sum_j (sum_i S_ij)^2, the statistic F = (b-1) B / (A2 - B) is referred to F on a-1
    and (a-1)(b-1) df. Blocks with a wide spread count more, so it suits few treatments and
    blocks that differ in how much the treatments disagree. When A2 = B (every block ranks the
    treatments alike and the blocks' ranges tie) F divides by zero: F and p are NaN (None in JSON)
    and a warning says so.

    Assumptions: independent blocks; values comparable within a block, and ranges comparable
    across blocks.

    References: Quade (1979), J. Amer. Statist. Assoc. 74; Conover, Practical Nonparametric
    Statistics (1999), section 5.8.

    Example::

        from warehouse.analyze.ranks import quade
        res = quade(obs)
        res.statistic, res.df1, res.df2, res.p
    """
    Y, treatments, _ = _complete(obs)
    return _quade_core(Y, treatments)
