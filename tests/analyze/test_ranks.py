"""Checks of warehouse.analyze.ranks against published examples and reference libraries.

Each check names its source. Invented data appear only where the result is compared with a
reference library (scipy, statsmodels, pingouin) on the same data.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from warehouse.analyze.ranks import friedman, quade

from .kit import from_matrix, sm_anova


# Conover, Practical Nonparametric Statistics, Friedman example: twelve homeowners rank four
# grass seeds (ranks from memory of the book; rank sums 38, 23.5, 24.5, 34 as printed there).
GRASS = np.array([[4, 3, 2, 1], [4, 2, 3, 1], [3, 1.5, 1.5, 4], [3, 1, 2, 4], [4, 2, 1, 3], [2, 2, 2, 4],
                  [1, 3, 2, 4], [2, 4, 1, 3], [3.5, 1, 2, 3.5], [4, 1, 3, 2], [4, 2, 3, 1], [3.5, 1, 2, 3.5]]).T


def test_friedman_conover_grass_example():
    res = friedman(from_matrix(GRASS))
    # Conover, grass-seed example: T1 = 8.097 (tie-corrected), T2 = 3.19 on 3 and 33 df
    # (from memory of the book)
    assert res.mean_ranks["rank_sum"].tolist() == [38.0, 23.5, 24.5, 34.0]
    assert res.statistic == pytest.approx(8.097, abs=5e-4)
    assert res.iman_davenport == pytest.approx(3.19, abs=0.005)
    assert (res.df1, res.df2) == (3, 33)
    # scipy.stats.friedmanchisquare (reference library)
    ref = stats.friedmanchisquare(*GRASS)
    assert res.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert res.p == pytest.approx(ref.pvalue, rel=1e-10)


def test_friedman_with_ties_matches_scipy_and_pingouin():
    rng = np.random.default_rng(3)
    Y = rng.integers(0, 4, size=(5, 11)).astype(float)  # invented, many ties
    obs = from_matrix(Y)
    res = friedman(obs)
    # scipy.stats.friedmanchisquare (reference library, tie-corrected)
    ref = stats.friedmanchisquare(*Y)
    assert res.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert res.p == pytest.approx(ref.pvalue, rel=1e-10)
    import pingouin as pg

    # pingouin.friedman (reference library): Q, p and Kendall's W; its "f" method reports the
    # same F value as Iman-Davenport (with different df)
    pq = pg.friedman(data=obs, dv="value", within="treatment", subject="block")
    assert res.statistic == pytest.approx(float(pq["Q"].iloc[0]), rel=1e-10)
    assert res.p == pytest.approx(float(pq["p_unc"].iloc[0]), rel=1e-8)
    assert res.kendall_w == pytest.approx(float(pq["W"].iloc[0]), rel=1e-10)
    pf = pg.friedman(data=obs, dv="value", within="treatment", subject="block", method="f")
    assert res.iman_davenport == pytest.approx(float(pf["F"].iloc[0]), rel=1e-10)


def test_iman_davenport_equals_anova_on_within_block_ranks():
    rng = np.random.default_rng(9)
    Y = rng.normal(size=(4, 10)) + np.array([0, 0.3, 0.6, 1.2])[:, None]
    res = friedman(from_matrix(Y))
    # Iman and Davenport (1980): their F is the RCBD F on within-block ranks; reference:
    # statsmodels anova_lm on scipy.stats.rankdata within blocks
    ranks = stats.rankdata(Y, axis=0)
    ref = sm_anova(from_matrix(ranks), "value ~ C(treatment) + C(block)")
    assert res.iman_davenport == pytest.approx(ref.loc["C(treatment)", "F"], rel=1e-9)
    assert res.p_f == pytest.approx(ref.loc["C(treatment)", "PR(>F)"], rel=1e-7)
    # formula F = (b-1) chi2 / (b(a-1) - chi2) (Iman and Davenport 1980, from memory)
    assert res.iman_davenport == pytest.approx(9 * res.statistic / (10 * 3 - res.statistic), rel=1e-12)


def test_quade_conover_store_example():
    # Conover, Practical Nonparametric Statistics, Quade test example: seven stores (blocks)
    # and five brands of hand lotion (treatments), units sold; F = 3.83 on 4 and 24 df,
    # p = 0.015 (data and result from memory of the book)
    stores = np.array([[5, 4, 7, 10, 12], [1, 3, 1, 0, 2], [16, 12, 22, 22, 35], [5, 4, 3, 5, 4],
                       [10, 9, 7, 13, 10], [19, 18, 28, 37, 58], [10, 7, 6, 8, 7]], dtype=float).T
    res = quade(from_matrix(stores))
    assert res.statistic == pytest.approx(3.83, abs=0.005)
    assert (res.df1, res.df2) == (4, 24)
    assert res.p == pytest.approx(0.015, abs=0.0005)
