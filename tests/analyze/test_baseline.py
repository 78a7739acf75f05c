"""Checks of warehouse.analyze.baseline against published tables and reference libraries.

Each check names its source. Invented data appear only where the result is compared with a
reference library (scipy, statsmodels) on the same data, or in a simulation of the error rate.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats

from warehouse.analyze.baseline import (
    ROW_KEYS,
    dunnett_critical_value,
    dunnett_p_values,
    dunnett_vs_baseline,
    paired_vs_baseline,
    wins_ties_losses,
)
from warehouse.errors import DesignError, InputError


def from_matrix(Y: np.ndarray, names=None) -> pd.DataFrame:
    a, b = Y.shape
    names = names or [f"t{i}" for i in range(a)]
    return pd.DataFrame([(names[i], f"g{j}", float(Y[i, j])) for i in range(a) for j in range(b)],
                        columns=["treatment", "block", "value"])


def invented(seed: int, a: int = 4, b: int = 12, shifts=(0.0, -0.4, 0.1, -1.0), level: float = 50.0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    Y = level + rng.normal(0, 4, b)[None, :] + np.asarray(shifts[:a])[:, None] + rng.normal(0, 1, (a, b))
    return from_matrix(Y)


def wide(obs: pd.DataFrame) -> pd.DataFrame:
    return obs.pivot(index="treatment", columns="block", values="value")


# --------------------------------------------------------------------------- critical values


@pytest.mark.parametrize("k, df, table", [(3, 16, 2.59), (2, 10, 2.57), (4, 20, 2.65)])
def test_dunnett_two_sided_table_values(k, df, table):
    # Dunnett's table, two-sided 5 %: d(3, 16) = 2.59, d(2, 10) = 2.57, d(4, 20) = 2.65
    # (from memory of the published tables)
    assert round(dunnett_critical_value(k, df, 0.95), 2) == table


def _integral_quantile(k: int, df: int, confidence: float, two_sided: bool, rho: float = 0.5) -> float:
    """Reference: the one-dimensional-mixture form of the equicorrelated multivariate t
    (Dunnett 1955): condition on the common normal part Z and on S = sqrt(chi2_df / df)."""
    z = np.linspace(-8, 8, 321)
    wz = stats.norm.pdf(z) * (z[1] - z[0])
    u = (np.arange(1000) + 0.5) / 1000
    s = np.sqrt(stats.chi2.ppf(u, df) / df)
    r, q = math.sqrt(rho), math.sqrt(1 - rho)

    def prob(c):
        cs = c * s[:, None]
        if two_sided:
            inner = stats.norm.cdf((cs - r * z[None, :]) / q) - stats.norm.cdf((-cs - r * z[None, :]) / q)
        else:
            inner = stats.norm.cdf((cs - r * z[None, :]) / q)
        return float(((inner ** k) @ wz).mean())

    return optimize.brentq(lambda c: prob(c) - confidence, 1.0, 6.0, xtol=1e-7)


@pytest.mark.parametrize("k, df, alternative", [(3, 16, "two-sided"), (5, 30, "two-sided"), (4, 12, "greater")])
def test_critical_value_matches_independent_integration(k, df, alternative):
    ours = dunnett_critical_value(k, df, 0.95, alternative)
    ref = _integral_quantile(k, df, 0.95, alternative == "two-sided")
    assert ours == pytest.approx(ref, abs=2e-3)


def test_single_comparison_reduces_to_t():
    # one comparison: Dunnett is the t test (common practice); reference scipy.stats.t
    assert dunnett_critical_value(1, 9) == pytest.approx(stats.t.ppf(0.975, 9), rel=1e-12)
    assert dunnett_critical_value(1, 9, alternative="less") == pytest.approx(stats.t.ppf(0.95, 9), rel=1e-12)
    assert dunnett_p_values([2.0], 1, 9)[0] == pytest.approx(2 * stats.t.sf(2.0, 9), rel=1e-12)


@pytest.mark.parametrize("alternative", ["two-sided", "less", "greater"])
def test_p_values_cross_check_scipy_one_way_dunnett(alternative):
    # cross-check only: scipy.stats.dunnett covers the one-way design; with equal group sizes its
    # statistics are multivariate t with correlation 0.5 on N - (k+1) df, as in our block model
    rng = np.random.default_rng(77)
    control = rng.normal(0, 1, 9)
    groups = [rng.normal(m, 1, 9) for m in (0.3, -0.8, 1.1)]
    ref = stats.dunnett(*groups, control=control, alternative=alternative)
    ours = dunnett_p_values(ref.statistic, 3, 36 - 4, alternative)
    np.testing.assert_allclose(ours, ref.pvalue, atol=2e-3)
    if alternative == "two-sided":
        ci = ref.confidence_interval(0.95)
        pooled = np.mean([np.var(g, ddof=1) for g in [control, *groups]])
        half = (ci.high - ci.low) / 2 / math.sqrt(2 * pooled / 9)
        np.testing.assert_allclose(half, dunnett_critical_value(3, 32), atol=2e-3)


# --------------------------------------------------------------------------- Dunnett on blocks


def test_dunnett_uses_block_model_mse_and_df():
    obs = invented(3)
    res = dunnett_vs_baseline(obs, "t0")
    import statsmodels.formula.api as smf

    # statsmodels OLS with the baseline as reference level (reference library): the treatment
    # coefficients are the differences, their standard errors sqrt(2 MSE / b), their t tests
    # the unadjusted ones
    fit = smf.ols("value ~ C(treatment, Treatment(reference='t0')) + C(block)", data=obs).fit()
    assert res.residual_ms == pytest.approx(fit.mse_resid, rel=1e-10)
    assert res.residual_df == fit.df_resid == 33
    for row in res.comparisons:
        key = f"C(treatment, Treatment(reference='t0'))[T.{row['treatment']}]"
        assert row["diff"] == pytest.approx(fit.params[key], rel=1e-9)
        assert row["se"] == pytest.approx(fit.bse[key], rel=1e-9)
        assert row["statistic"] == pytest.approx(fit.tvalues[key], rel=1e-9)
        assert row["p_unadjusted"] == pytest.approx(fit.pvalues[key], rel=1e-7)
        assert row["p_adjusted"] >= row["p_unadjusted"]
        c = res.critical_value
        assert (row["ci_high"] - row["ci_low"]) / 2 == pytest.approx(c * row["se"], rel=1e-12)
    assert res.critical_value == pytest.approx(dunnett_critical_value(3, 33))
    assert set(ROW_KEYS) <= set(res.comparisons[0])


def test_dunnett_family_wise_error_stays_near_alpha():
    # simulation: 300 null RCBD data sets (4 treatments x 10 blocks, strong block effects);
    # the share with any adjusted p < 0.05 must sit inside a 99.9 % binomial band around 0.05
    # (common practice for checking error control), while unadjusted p-values exceed it
    rng = np.random.default_rng(2024)
    a, b, n = 4, 10, 300
    labels_t = np.repeat([f"v{i}" for i in range(a)], b)
    labels_b = np.tile([f"g{j}" for j in range(b)], a)
    any_adj = any_raw = 0
    for _ in range(n):
        Y = rng.normal(0, 5, b)[None, :] + rng.normal(0, 1, (a, b))
        res = dunnett_vs_baseline(pd.DataFrame({"treatment": labels_t, "block": labels_b, "value": Y.ravel()}), "v0")
        any_adj += min(r["p_adjusted"] for r in res.comparisons) < 0.05
        any_raw += min(r["p_unadjusted"] for r in res.comparisons) < 0.05
    lo, hi = stats.binom.ppf([0.0005, 0.9995], n, 0.05)
    assert lo <= any_adj <= hi
    assert any_raw > any_adj


def test_one_sided_intervals_have_an_infinite_end():
    obs = invented(5)
    less = dunnett_vs_baseline(obs, "t0", alternative="less")
    tab = less.table()
    assert np.isneginf(tab["ci_low"]).all() and np.isfinite(tab["ci_high"]).all()
    assert all(r["ci_low"] is None for r in less.to_dict()["comparisons"])
    greater = dunnett_vs_baseline(obs, "t0", alternative="greater")
    assert np.isposinf(greater.table()["ci_high"]).all()
    # one-sided critical value is smaller than the two-sided one (common practice)
    assert less.critical_value < dunnett_vs_baseline(obs, "t0").critical_value
    json.dumps(less.to_dict(), allow_nan=False)


def test_relative_change_through_log_scale():
    obs = invented(8)
    res = dunnett_vs_baseline(obs, "t0")
    W = wide(obs)
    k = 3
    for row in res.comparisons:
        lr = np.log(W.loc[row["treatment"]].to_numpy()) - np.log(W.loc["t0"].to_numpy())
        assert row["relative_pct"] == pytest.approx(100 * math.expm1(lr.mean()), rel=1e-10)
        # scipy.stats.ttest_1samp confidence interval on the log ratios (reference library) at
        # the Bonferroni level 1 - 0.05/k
        ci = stats.ttest_1samp(lr, 0.0).confidence_interval(1 - 0.05 / k)
        assert row["relative_low"] == pytest.approx(100 * math.expm1(ci.low), rel=1e-8)
        assert row["relative_high"] == pytest.approx(100 * math.expm1(ci.high), rel=1e-8)
        d = W.loc[row["treatment"]].to_numpy() - W.loc["t0"].to_numpy()
        assert row["effect"] == pytest.approx(d.mean() / d.std(ddof=1), rel=1e-10)


def test_relative_change_without_logs_when_values_are_not_positive():
    Y = np.array([[0.0, 1.0, -2.0, 4.0, 3.0, 1.0], [1.0, 2.0, -1.0, 6.0, 3.5, 2.0]])
    res = dunnett_vs_baseline(from_matrix(Y, ["base", "new"]), "base")
    row = res.comparisons[0]
    assert row["relative_pct"] == pytest.approx(100 * (Y[1] - Y[0]).mean() / Y[0].mean())
    assert row["relative_low"] is None and row["relative_high"] is None


# --------------------------------------------------------------------------- wins, ties, losses


def test_wins_ties_losses_by_hand():
    # common practice: per block, |difference| <= margin is a tie; otherwise the better side wins
    table = from_matrix(np.array([[10, 10, 10, 10, 20], [9, 10, 10.05, 12, 19.85]]), ["base", "A"])
    get = lambda **kw: wins_ties_losses(table, "base", **kw).iloc[0][["wins", "ties", "losses"]].tolist()
    assert get(better="lower") == [2, 1, 2]
    assert get(better="higher") == [2, 1, 2]
    assert get(better="lower", margin=0.1) == [2, 2, 1]
    assert get(better="lower", margin="1%") == [1, 3, 1]
    assert get(better="higher", margin="1%") == [1, 3, 1]
    # 1.1 - 1.0 is 0.10000000000000009 in floating point; it still ties at margin 0.1
    tiny = from_matrix(np.array([[1.0, 2.0], [1.1, 2.5]]), ["base", "B"])
    assert wins_ties_losses(tiny, "base", margin=0.1).iloc[0][["wins", "ties", "losses"]].tolist() == [0, 1, 1]


def test_rows_carry_wins_and_margin_errors():
    table = from_matrix(np.array([[10, 10, 10, 10, 20, 11], [9, 10, 10.05, 12, 19.85, 10]]), ["base", "A"])
    row = dunnett_vs_baseline(table, "base", margin="1%").comparisons[0]
    assert (row["wins"], row["ties"], row["losses"]) == (2, 3, 1)
    with pytest.raises(InputError, match="margin"):
        dunnett_vs_baseline(table, "base", margin="a bit")
    with pytest.raises(InputError, match="margin"):
        wins_ties_losses(table, "base", margin=-1)
    with pytest.raises(InputError, match="better"):
        wins_ties_losses(table, "base", better="faster")


# --------------------------------------------------------------------------- paired tests


@pytest.mark.parametrize("adjust", ["holm", "bonferroni"])
@pytest.mark.parametrize("alternative", ["two-sided", "less"])
def test_paired_t_matches_scipy_and_statsmodels(adjust, alternative):
    obs = invented(13)
    res = paired_vs_baseline(obs, "t0", method="paired-t", adjust=adjust, alternative=alternative)
    W = wide(obs)
    from statsmodels.stats.multitest import multipletests

    raw = []
    for row in res.comparisons:
        # scipy.stats.ttest_rel (reference library): p and the interval at the Bonferroni level
        tt = stats.ttest_rel(W.loc[row["treatment"]], W.loc["t0"], alternative=alternative)
        assert row["p_unadjusted"] == pytest.approx(tt.pvalue, rel=1e-10)
        ci = tt.confidence_interval(1 - 0.05 / 3)
        assert row["ci_low"] == pytest.approx(ci.low, rel=1e-10)
        assert row["ci_high"] == pytest.approx(ci.high, rel=1e-10)
        raw.append(tt.pvalue)
    # statsmodels multipletests (reference library)
    ref = multipletests(raw, method=adjust)[1]
    np.testing.assert_allclose([r["p_adjusted"] for r in res.comparisons], ref, rtol=1e-12)
    assert res.residual_ms is None and res.adjust == adjust


def test_wilcoxon_matches_scipy_and_interval_inverts_the_test():
    obs = invented(21, a=2, b=12, shifts=(0.0, -0.8))
    res = paired_vs_baseline(obs, "t0", method="wilcoxon")
    W = wide(obs)
    d = (W.loc["t1"] - W.loc["t0"]).to_numpy()
    row = res.comparisons[0]
    # scipy.stats.wilcoxon (reference library)
    assert row["p_unadjusted"] == pytest.approx(stats.wilcoxon(d).pvalue, rel=1e-12)
    # Hodges-Lehmann estimate: median of the Walsh averages (Hollander and Wolfe, from memory)
    i, j = np.triu_indices(len(d))
    assert row["diff"] == pytest.approx(np.median((d[i] + d[j]) / 2))
    # the interval is the set of shifts the exact signed-rank test (scipy) does not reject
    lo, hi = row["ci_low"], row["ci_high"]
    p = lambda mu: stats.wilcoxon(d - mu, method="exact").pvalue
    eps = 1e-7
    assert p(lo + eps) > 0.05 and p(hi - eps) > 0.05
    assert p(lo - eps) <= 0.05 and p(hi + eps) <= 0.05


def test_wilcoxon_floor_warning_with_few_blocks():
    obs = invented(2, a=3, b=5)
    res = paired_vs_baseline(obs, "t0", method="wilcoxon")
    # 5 blocks: the smallest two-sided exact p is 2 / 2^5 = 0.0625 (signed-rank distribution)
    assert any("cannot reach p below 0.0625" in w for w in res.warnings)
    assert any("only 5 blocks" in w for w in res.warnings)
    assert all(math.isinf(r["ci_low"]) for r in res.comparisons)


# --------------------------------------------------------------------------- errors and warnings


def test_missing_baseline_and_single_treatment_are_design_errors():
    obs = invented(1)
    with pytest.raises(DesignError, match="baseline 'stacker@9' is not among"):
        dunnett_vs_baseline(obs, "stacker@9")
    with pytest.raises(DesignError, match="baseline"):
        paired_vs_baseline(obs, "nope")
    single = obs[obs.treatment == "t0"]
    with pytest.raises(DesignError, match="only one treatment"):
        dunnett_vs_baseline(single, "t0")
    with pytest.raises(DesignError, match="hole"):
        dunnett_vs_baseline(obs.iloc[1:], "t0")


def test_bad_options_are_input_errors():
    obs = invented(1)
    with pytest.raises(InputError, match="alternative"):
        dunnett_vs_baseline(obs, "t0", alternative="smaller")
    with pytest.raises(InputError, match="confidence"):
        dunnett_vs_baseline(obs, "t0", confidence=95)
    with pytest.raises(InputError, match="method"):
        paired_vs_baseline(obs, "t0", method="sign")
    with pytest.raises(InputError, match="adjustment"):
        paired_vs_baseline(obs, "t0", adjust="fdr")


def test_warnings_name_the_family_and_few_blocks():
    res = dunnett_vs_baseline(invented(4, b=5), "t0")
    assert any(w.startswith("3 comparisons against the baseline") and "Dunnett" in w for w in res.warnings)
    assert any("only 5 blocks" in w for w in res.warnings)
    two = dunnett_vs_baseline(invented(4, a=2, b=8), "t0")
    assert not any("comparisons" in w for w in two.warnings)


def test_result_dict_and_table():
    res = dunnett_vs_baseline(invented(6), "t0")
    d = res.to_dict()
    assert json.loads(json.dumps(d, allow_nan=False)) == d
    assert d["method"] == "dunnett" and d["baseline"] == "t0" and d["blocks"] == 12
    assert list(res.table()["treatment"]) == ["t1", "t2", "t3"]
