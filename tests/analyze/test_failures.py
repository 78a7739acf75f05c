"""Checks of warehouse.analyze.failures, and of the degenerate cases of the other methods.

Outside sources: statsmodels (statsmodels.stats.contingency_tables.cochrans_q and mcnemar,
statsmodels.stats.multitest.multipletests) and scipy.stats on the same data; Cochran's Q on the
interview example of Siegel (1956), Nonparametric Statistics for the Behavioral Sciences, and
McNemar on the approval-rating example of Agresti, Categorical Data Analysis (both from memory).
"""
from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.contingency_tables import cochrans_q as sm_cochrans_q
from statsmodels.stats.contingency_tables import mcnemar as sm_mcnemar
from statsmodels.stats.multitest import multipletests

from warehouse.analyze.anova import rcbd_anova
from warehouse.analyze.failures import (
    EXACT_BELOW,
    cochran_q,
    compare_solved,
    compare_solved_counts,
    failure_rates,
    mcnemar,
    mcnemar_counts,
    solved_matrix,
)
from warehouse.analyze.pairs import conover_friedman, ratios_from_log, tukey_hsd_blocked
from warehouse.analyze.ranks import friedman, quade
from warehouse.errors import DesignError, InputError

from .kit import from_matrix, invented_rcbd, tidy

# Siegel (1956), Cochran's Q example: 18 sets of households asked under three interview styles,
# yes = 1. Column totals 13, 13, 3 and Q = 16.7 on 2 df are the book's (from memory); the rows
# below reproduce those margins, and Q depends on the rows only through their totals.
SIEGEL = np.array([
    [0, 0, 0], [1, 1, 0], [0, 1, 0], [0, 0, 0], [1, 0, 0], [1, 1, 0], [1, 1, 0], [0, 1, 0], [1, 0, 0],
    [0, 0, 0], [1, 1, 1], [1, 1, 1], [1, 1, 0], [1, 1, 0], [1, 1, 0], [1, 1, 1], [1, 1, 0], [1, 1, 0]])


# --- Cochran's Q -------------------------------------------------------------------------------

def test_cochran_q_reproduces_the_published_interview_example():
    assert SIEGEL.sum(axis=0).tolist() == [13, 13, 3]
    res = cochran_q(SIEGEL)
    assert res.statistic == pytest.approx(16.7, abs=0.05)  # from memory of Siegel (1956): Q = 16.7
    assert res.df == 2
    assert res.p == pytest.approx(stats.chi2.sf(16.667, 2), rel=1e-3) and res.p < 0.001
    assert res.separating == 12 and res.instances == 18 and res.note == ""  # 3 all-no, 3 all-yes rows


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_cochran_q_equals_statsmodels(seed):
    rng = np.random.default_rng(seed)
    X = (rng.random((30, 4)) < np.array([0.9, 0.8, 0.6, 0.85])).astype(int)
    ours, ref = cochran_q(X), sm_cochrans_q(X)  # statsmodels
    assert ours.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert ours.p == pytest.approx(ref.pvalue, rel=1e-12)
    assert ours.df == ref.df


def test_cochran_q_with_two_treatments_is_the_uncorrected_mcnemar_chi_square():
    # an identity of the two tests (common practice; from memory of Cochran 1950)
    rng = np.random.default_rng(7)
    X = (rng.random((40, 2)) < [0.8, 0.5]).astype(int)
    ours = cochran_q(X)
    ref = sm_mcnemar(pd.crosstab(X[:, 0], X[:, 1]).to_numpy(), exact=False, correction=False)  # statsmodels
    assert ours.statistic == pytest.approx(ref.statistic, rel=1e-12)


def test_cochran_q_without_separating_instances_has_no_statistic_and_no_p():
    res = cochran_q([[1, 1, 1], [0, 0, 0], [1, 1, 1]])
    assert res.statistic is None and res.p is None and "nothing to compare" in res.note
    assert res.to_dict()["p"] is None


def test_cochran_q_says_when_its_chi_square_is_rough():
    res = cochran_q([[1, 0, 1], [1, 1, 1], [0, 1, 1], [1, 1, 1]])
    # common practice (from memory of Tate and Brown 1970): at least 4 separating rows, 24 cells
    assert res.separating == 2 and "rough" in res.note


def test_cochran_q_refuses_what_is_not_zero_or_one():
    with pytest.raises(InputError, match="0 / 1"):
        cochran_q([[1, 2], [0, 1]])
    with pytest.raises(DesignError, match="two or more"):
        cochran_q([[1], [0]])


# --- McNemar -----------------------------------------------------------------------------------

def test_mcnemar_reproduces_the_published_approval_example():
    # from memory of Agresti, Categorical Data Analysis: 794 approve twice, 150 approve then
    # disapprove, 86 the reverse, 570 disapprove twice; z = (86 - 150) / sqrt(86 + 150) = -4.17
    res = mcnemar_counts(150, 86, correction=False)
    assert math.sqrt(res.statistic) == pytest.approx(4.17, abs=0.005)
    assert res.method == "mcnemar-chi2" and res.df == 1
    ref = sm_mcnemar([[794, 150], [86, 570]], exact=False, correction=False)  # statsmodels
    assert res.statistic == pytest.approx(ref.statistic) and res.p == pytest.approx(ref.pvalue)
    corrected = mcnemar_counts(150, 86)
    ref = sm_mcnemar([[794, 150], [86, 570]], exact=False, correction=True)  # statsmodels, Edwards' correction
    assert corrected.statistic == pytest.approx(ref.statistic) and corrected.p == pytest.approx(ref.pvalue)


@pytest.mark.parametrize("n10,n01", [(7, 2), (0, 5), (12, 12), (1, 0), (0, 0), (20, 4)])
def test_exact_mcnemar_below_25_discordant_equals_statsmodels_and_scipy(n10, n01):
    res = mcnemar_counts(n10, n01)
    assert res.method == "mcnemar-exact"
    ref = sm_mcnemar([[10, n10], [n01, 10]], exact=True)  # statsmodels (binomial)
    assert res.p == pytest.approx(ref.pvalue, rel=1e-12)
    if n10 + n01:
        assert res.p == pytest.approx(stats.binomtest(n10, n10 + n01, 0.5).pvalue, rel=1e-9)  # scipy.stats
    assert res.statistic == min(n10, n01)


def test_mcnemar_switches_to_the_chi_square_at_25_discordant():
    # common practice: the exact test below 25 discordant pairs
    assert mcnemar_counts(20, 4).method == "mcnemar-exact"
    assert mcnemar_counts(20, 5).method == "mcnemar-chi2" and EXACT_BELOW == 25
    a = np.array([1] * 20 + [0] * 5 + [1] * 30)
    b = np.array([0] * 20 + [1] * 5 + [1] * 30)
    res = mcnemar(a, b)
    ref = sm_mcnemar(pd.crosstab(a, b).to_numpy(), exact=False, correction=True)  # statsmodels
    assert res.statistic == pytest.approx(ref.statistic) and res.p == pytest.approx(ref.pvalue)
    assert res.instances == 55 and res.separating == 25


# --- the solved rule, the rates and one analysis --------------------------------------------------

def _cells(rows):
    return pd.DataFrame(rows, columns=["treatment", "instance", "runs", "failed"])


def test_an_instance_is_solved_when_at_least_half_of_its_runs_succeed():
    cells = _cells([("a", "i1", 4, 2), ("b", "i1", 4, 3), ("a", "i2", 3, 1), ("b", "i2", 3, 2),
                    ("a", "i3", 5, 0)])  # b never ran i3: left out
    wide, left = solved_matrix(cells)
    assert left == 1 and list(wide.index) == ["i1", "i2"]
    assert wide.loc["i1"].tolist() == [True, False]  # 2 of 4 succeeded: solved; 1 of 4: not
    assert wide.loc["i2"].tolist() == [True, False]  # 2 of 3: solved; 1 of 3: not
    rates = failure_rates(cells).set_index("treatment")
    assert rates.loc["a", "failed"] == 3 and rates.loc["a", "runs"] == 12
    assert rates.loc["a", "failed_share"] == pytest.approx(0.25)


def _three(seed=4, n=30, fail=(0.02, 0.05, 0.6), runs=5):
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        for t, rate in zip(["s@1", "s@2", "s@3"], fail):
            rows.append((t, f"g{i % 6}/i{i}", runs, int(rng.binomial(runs, rate))))
    return _cells(rows)


def test_compare_solved_tests_on_the_solved_table_and_names_the_rates_in_a_caution():
    cells = _three()
    res = compare_solved(cells, baseline="s@1")
    wide = (cells.assign(ok=cells["runs"] - cells["failed"] >= cells["runs"] / 2)
            .pivot(index="instance", columns="treatment", values="ok").astype(int))
    ref = sm_cochrans_q(wide[["s@1", "s@2", "s@3"]].to_numpy())  # statsmodels
    assert res.test.method == "cochran-q"
    assert res.test.statistic == pytest.approx(ref.statistic) and res.test.p == pytest.approx(ref.pvalue)
    assert res.test.p < 0.05
    shares = {r["treatment"]: r["failed_share"] for r in res.per_treatment}
    assert shares["s@3"] == pytest.approx(cells[cells.treatment == "s@3"]["failed"].sum() / 150)
    caution = next(w for w in res.warnings if w.startswith("failure rates differ"))
    for t in ("s@1", "s@2", "s@3"):
        assert t in caution
    # follow-ups: McNemar per treatment against the baseline (statsmodels), Holm adjusted (statsmodels)
    raw = []
    for row, t in zip(res.follow_ups, ["s@2", "s@3"]):
        assert row["treatment"] == t and row["baseline"] == "s@1"
        n10 = int(((wide[t] == 1) & (wide["s@1"] == 0)).sum())
        n01 = int(((wide[t] == 0) & (wide["s@1"] == 1)).sum())
        assert row["unsolved_only_by_treatment"] == n01 and row["unsolved_only_by_baseline"] == n10
        raw.append(sm_mcnemar([[0, n10], [n01, 0]], exact=n10 + n01 < 25).pvalue)
        assert row["p"] == pytest.approx(raw[-1])
    holm = multipletests(raw, method="holm")[1]
    assert [r["p_adjusted"] for r in res.follow_ups] == pytest.approx(list(holm))
    json.dumps(res.to_dict(), allow_nan=False)


def test_compare_solved_with_two_treatments_uses_mcnemar():
    cells = _three(fail=(0.05, 0.5, 0.5))
    cells = cells[cells.treatment != "s@3"]
    res = compare_solved(cells)
    assert res.test.method.startswith("mcnemar") and res.follow_ups == []


def test_compare_solved_without_failures_says_there_is_nothing_to_compare():
    res = compare_solved(_three(fail=(0.0, 0.0, 0.0)), baseline="s@1")
    assert res.test.statistic is None and res.test.p is None and not res.warnings
    assert not res.any_failed and all(r["p_adjusted"] == 1.0 for r in res.follow_ups)


def test_compare_solved_refuses_a_baseline_without_runs():
    with pytest.raises(DesignError, match="baseline s@9"):
        compare_solved(_three(), baseline="s@9")


# --- degenerate cases of the other methods --------------------------------------------------------

def test_identical_ranks_in_every_block_leave_the_f_forms_undefined():
    # every block ranks a < b < c: Friedman's chi2 is at its largest, b (a-1) (scipy agrees)
    Y = np.array([[1.0, 2.0, 1.5, 3.0, 2.2, 4.1], [2.0, 3.5, 2.0, 4.0, 2.9, 5.0], [3.0, 4.0, 6.0, 5.5, 3.1, 7.0]])
    obs = from_matrix(Y)
    fr = friedman(obs)
    assert fr.statistic == pytest.approx(stats.friedmanchisquare(*Y).statistic)  # scipy.stats
    assert fr.statistic == pytest.approx(6 * 2)
    assert math.isnan(fr.iman_davenport) and math.isnan(fr.p_f)
    assert fr.to_dict()["iman_davenport"] is None and fr.to_dict()["p_f"] is None
    assert any("ranks are identical in every block" in w for w in fr.warnings)
    # Quade weighs blocks by their range: finite while the ranges differ (scipy has no Quade; the
    # value against Conover's example is checked in test_ranks.py) ...
    assert quade(obs).p is not None and math.isfinite(quade(obs).statistic)
    # ... and undefined when every block also has the same range (A2 = B)
    same = quade(from_matrix(np.add.outer(np.array([0.0, 1.0, 2.0]), np.array([5.0, 7.0, 9.0, 11.0]))))
    assert same.to_dict()["statistic"] is None and same.to_dict()["p"] is None
    assert any("Quade F is not defined" in w for w in same.warnings)
    co = conover_friedman(obs)
    assert all(r["p_adjusted"] is None and r["statistic"] is None for r in co.to_dict()["pairs"])


def test_tukey_without_residual_spread_gives_no_p():
    Y = np.add.outer(np.array([0.0, 1.0, 2.0]), np.array([5.0, 7.0, 9.0, 11.0]))
    res = tukey_hsd_blocked(from_matrix(Y))
    doc = res.to_dict()
    assert all(r["statistic"] is None and r["p_adjusted"] is None for r in doc["pairs"])
    assert any("cannot be computed" in w for w in res.warnings)


def test_with_two_treatments_the_spread_checks_are_not_run():
    obs = invented_rcbd(3, a=2, b=10)
    res = rcbd_anova(obs)
    # why: the two residuals of each block are equal and opposite, so scipy's tests cannot fail
    # (rounded: the last bits of r and -r differ, and would decide the ranks of equal deviations)
    r = res.residuals.pivot(index="block", columns="treatment", values="residual").round(9)
    assert stats.fligner(r.iloc[:, 0], r.iloc[:, 1]).pvalue == pytest.approx(1.0)  # scipy.stats
    assert stats.levene(r.iloc[:, 0], r.iloc[:, 1], center="median").pvalue == pytest.approx(1.0)
    for key in ("fligner", "brown_forsythe"):
        assert res.diagnostics[key]["p"] is None and "cannot tell" in res.diagnostics[key]["note"]
    three = rcbd_anova(invented_rcbd(3, a=3, b=10))
    assert three.diagnostics["fligner"]["p"] is not None and "note" not in three.diagnostics["fligner"]


# --- back from the log scale ----------------------------------------------------------------------

def test_log_scale_differences_become_ratios_of_geometric_means():
    obs = tidy({"a": [12.0, 30.0, 7.5, 101.0, 55.0, 18.0], "b": [10.0, 27.0, 7.0, 90.0, 50.0, 15.0],
                "c": [14.0, 29.0, 9.0, 130.0, 61.0, 22.0]})
    res = rcbd_anova(obs, transform="log")
    geo = dict(zip(res.treatment_means["treatment"], res.treatment_means["geometric_mean"]))
    for t in ("a", "b", "c"):
        assert geo[t] == pytest.approx(stats.gmean(obs[obs.treatment == t]["value"]))  # scipy.stats
    logged = obs.assign(value=np.log(obs["value"]))
    pairs = ratios_from_log(tukey_hsd_blocked(logged))
    for row in pairs.pairs:
        assert row["ratio"] == pytest.approx(geo[row["first"]] / geo[row["second"]])
        assert row["percent"] == pytest.approx(100 * (geo[row["first"]] / geo[row["second"]] - 1))
        assert row["ratio_low"] == pytest.approx(math.exp(row["ci_low"]))
        assert row["ratio_low"] < row["ratio"] < row["ratio_high"]
    assert pairs.to_dict()["original_scale"]["shift"] == 0.0
    with pytest.raises(InputError, match="mean ranks"):
        ratios_from_log(conover_friedman(obs))


# --- the counts form (what the database's cell summaries give) against the full table ----------

def _counts_of(cells: pd.DataFrame, names: list[str]) -> dict:
    """The arguments of compare_solved_counts, counted from a full table of cells in pandas."""
    per = cells.groupby("treatment")[["runs", "failed"]].sum().reindex(names)
    failing = cells[cells["failed"] > 0].reset_index(drop=True)
    return {"treatments": names, "instances": sorted(cells["instance"].unique()), "runs": per["runs"].tolist(),
            "failed": per["failed"].tolist(), "failing": failing}


@pytest.mark.parametrize("seed", range(12))
def test_the_counts_form_gives_what_the_full_table_gives(seed):
    # invented cells (for the check only): every treatment on every instance, failures scattered,
    # sometimes none, sometimes a treatment failing everywhere; both forms must agree to the last
    # digit, with and without a baseline, and for two treatments (McNemar)
    rng = np.random.default_rng(seed)
    k = [2, 3, 5, 8][seed % 4]
    names = [f"s@{i + 1}" for i in range(k)]
    n_inst = int(rng.integers(1, 60))
    rows = []
    for t_i, t in enumerate(names):
        rate = [0.0, 0.05, 0.3, 1.0][(seed + t_i) % 4] if seed % 5 else 0.0
        for inst in rng.permutation(n_inst) * 7 + 3:
            runs = int(rng.integers(1, 6))
            rows.append((t, int(inst), runs, int(rng.binomial(runs, rate))))
    cells = pd.DataFrame(rows, columns=["treatment", "instance", "runs", "failed"])
    for baseline in (None, names[-1]):
        for share in (0.5, 1.0):
            full = compare_solved(cells, baseline=baseline, treatments=names, share=share).to_dict()
            counted = compare_solved_counts(**_counts_of(cells, names), baseline=baseline, share=share).to_dict()
            assert json.dumps(counted, sort_keys=True) == json.dumps(full, sort_keys=True)


def test_the_counts_form_refuses_a_failing_cell_outside_its_counts():
    cells = pd.DataFrame({"treatment": ["s@1"], "instance": [99], "runs": [2], "failed": [1]})
    with pytest.raises(InputError, match="not among the counts"):
        compare_solved_counts(["s@1", "s@2"], [1, 2], [4, 4], [1, 0], cells)
