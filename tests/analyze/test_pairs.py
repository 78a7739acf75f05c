"""Checks of warehouse.analyze.pairs against published tables and reference libraries.

Each check names its source. Invented data appear only where the result is compared with a
reference library (scipy, statsmodels) on the same data.
"""
from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from warehouse.analyze.pairs import conover_friedman, nemenyi, tukey_hsd_blocked
from warehouse.errors import DesignError, InputError


def from_matrix(Y: np.ndarray) -> pd.DataFrame:
    a, b = Y.shape
    return pd.DataFrame([(f"t{i}", f"g{j}", float(Y[i, j])) for i in range(a) for j in range(b)],
                        columns=["treatment", "block", "value"])


def invented(seed: int, a: int = 4, b: int = 10) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return 20 + rng.normal(0, 3, b)[None, :] + np.linspace(0, 1.2, a)[:, None] + rng.normal(0, 1, (a, b))


# Montgomery, Design and Analysis of Experiments, vascular-graft example (4 pressures x 6
# batches; data from memory of the book, checked in test_anova against the book's sums)
GRAFT = np.array([[90.3, 89.2, 98.2, 93.9, 87.4, 97.9], [92.5, 89.5, 90.6, 94.7, 87.0, 95.8],
                  [85.5, 90.8, 89.6, 86.2, 88.0, 93.4], [82.5, 89.5, 85.6, 87.4, 78.9, 90.7]])


def test_studentized_range_table_value_and_tukey_uses_it():
    # Studentized range, 5 %: q(4, 15) = 4.08 (from memory of the published tables)
    assert round(float(stats.studentized_range.ppf(0.95, 4, 15)), 2) == 4.08
    res = tukey_hsd_blocked(from_matrix(GRAFT))
    assert res.residual_df == 15
    assert round(res.critical_value, 2) == 4.08
    # HSD = q sqrt(MS_E / b) with the book's MS_E = 109.89 / 15 and b = 6
    assert res.critical_difference == pytest.approx(4.076 * math.sqrt(109.89 / 15 / 6), abs=0.01)
    assert len(res.pairs) == 6
    for r in res.pairs:
        assert r["ci_high"] - r["diff"] == pytest.approx(res.critical_difference)


def test_tukey_statistic_matches_block_model_contrasts_in_statsmodels():
    Y = invented(3, a=4, b=9)
    obs = from_matrix(Y)
    res = tukey_hsd_blocked(obs)
    import statsmodels.formula.api as smf

    # statsmodels OLS t test of each pairwise contrast in the additive block model (reference
    # library); Tukey's q is sqrt(2) |t| (Tukey 1953)
    fit = smf.ols("value ~ C(treatment) + C(block)", data=obs).fit()
    names = list(fit.params.index)
    for r in res.pairs:
        c = np.zeros(len(names))
        for lab, sign in ((r["first"], 1.0), (r["second"], -1.0)):
            key = f"C(treatment)[T.{lab}]"
            if key in names:
                c[names.index(key)] = sign
        tt = fit.t_test(c)
        assert r["diff"] == pytest.approx(float(np.squeeze(tt.effect)), rel=1e-9)
        assert r["statistic"] == pytest.approx(math.sqrt(2) * abs(float(np.squeeze(tt.tvalue))), rel=1e-9)
        assert r["p_adjusted"] >= float(np.squeeze(tt.pvalue)) - 1e-12


def test_tukey_with_two_treatments_is_the_paired_t_test():
    Y = invented(5, a=2, b=8)
    res = tukey_hsd_blocked(from_matrix(Y))
    # with two treatments the block-model test is the paired t-test: scipy.stats.ttest_rel
    assert res.pairs[0]["p_adjusted"] == pytest.approx(stats.ttest_rel(Y[0], Y[1]).pvalue, rel=1e-6)
    ci = stats.ttest_rel(Y[0], Y[1]).confidence_interval(0.95)
    assert res.pairs[0]["ci_low"] == pytest.approx(ci.low, rel=1e-6)


@pytest.mark.parametrize("k, q", [(2, 1.960), (3, 2.343), (4, 2.569), (5, 2.728), (6, 2.850), (7, 2.949),
                                  (8, 3.031), (9, 3.102), (10, 3.164)])
def test_nemenyi_critical_values_demsar_table(k, q):
    # Demsar (2006), J. Mach. Learn. Res. 7, table of q_0.05 for the Nemenyi test
    # (studentized range / sqrt 2, infinite df; from memory of the paper), to the table's three
    # printed decimals
    Y = invented(k, a=k, b=8)
    assert nemenyi(from_matrix(Y)).critical_value == pytest.approx(q, abs=1e-3)


def test_nemenyi_critical_difference_demsar_example():
    # Demsar (2006): four algorithms on fourteen data sets, CD = 1.25 at 5 %
    # (from memory of the paper's worked example); CD depends only on k and N
    res = nemenyi(from_matrix(invented(1, a=4, b=14)))
    assert round(res.critical_difference, 2) == 1.25
    for r in res.pairs:
        assert (r["p_adjusted"] < 0.05) == (abs(r["diff"]) > res.critical_difference)


def test_nemenyi_two_treatments_is_a_normal_test():
    Y = invented(9, a=2, b=12)
    res = nemenyi(from_matrix(Y))
    z = res.pairs[0]["statistic"]
    # range of two standard normals is sqrt 2 |Z|: p = 2 (1 - Phi(z)) (scipy.stats.norm)
    assert res.pairs[0]["p_adjusted"] == pytest.approx(2 * stats.norm.sf(z), rel=1e-6)
    ranks = stats.rankdata(Y, axis=0).mean(axis=1)
    assert res.pairs[0]["diff"] == pytest.approx(ranks[0] - ranks[1])


@pytest.mark.parametrize("adjust", ["holm", "bonferroni", "none"])
def test_conover_is_lsd_on_within_block_ranks(adjust):
    Y = invented(11, a=5, b=9)
    Y = np.round(Y)  # ties inside blocks
    res = conover_friedman(from_matrix(Y), adjust=adjust)
    ranks = stats.rankdata(Y, axis=0)
    obs_r = from_matrix(ranks)
    import statsmodels.formula.api as smf
    from statsmodels.stats.multitest import multipletests

    # Conover (1999): his test is the least-significant-difference test of the ANOVA on
    # within-block ranks; reference: statsmodels OLS contrasts on scipy ranks
    fit = smf.ols("value ~ C(treatment) + C(block)", data=obs_r).fit()
    names = list(fit.params.index)
    raw = []
    for r in res.pairs:
        c = np.zeros(len(names))
        for lab, sign in ((r["first"], 1.0), (r["second"], -1.0)):
            key = f"C(treatment)[T.{lab}]"
            if key in names:
                c[names.index(key)] = sign
        tt = fit.t_test(c)
        assert r["diff"] == pytest.approx(float(np.squeeze(tt.effect)), rel=1e-9, abs=1e-12)
        assert r["p_unadjusted"] == pytest.approx(float(np.squeeze(tt.pvalue)), rel=1e-7)
        raw.append(r["p_unadjusted"])
    want = raw if adjust == "none" else multipletests(raw, method=adjust)[1]
    np.testing.assert_allclose([r["p_adjusted"] for r in res.pairs], want, rtol=1e-12)
    assert res.residual_ms == pytest.approx(fit.mse_resid, rel=1e-9)
    assert res.friedman.statistic == pytest.approx(stats.friedmanchisquare(*Y).statistic)


def test_pairs_order_and_json():
    res = tukey_hsd_blocked(from_matrix(invented(2)))
    assert [(r["first"], r["second"]) for r in res.pairs] == list(itertools.combinations(["t0", "t1", "t2", "t3"], 2))
    for fn in (tukey_hsd_blocked, nemenyi, conover_friedman):
        d = fn(from_matrix(invented(2))).to_dict()
        assert json.loads(json.dumps(d, allow_nan=False)) == d


def test_pairs_errors_and_warnings():
    single = from_matrix(invented(1, a=1, b=5))
    with pytest.raises(DesignError, match="only one treatment"):
        tukey_hsd_blocked(single)
    with pytest.raises(DesignError):
        nemenyi(single)
    with pytest.raises(InputError, match="adjustment"):
        conover_friedman(from_matrix(invented(1)), adjust="fdr")
    assert any("only 4 blocks" in w for w in nemenyi(from_matrix(invented(1, b=4))).warnings)
