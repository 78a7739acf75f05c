"""Checks of warehouse.analyze.blocked against published examples and reference libraries.

Each check names its source. Invented data appear only where the result is compared with a
reference library (scipy, statsmodels, pingouin) on the same data.
"""
from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from warehouse.analyze.blocked import (
    boxcox_loglik,
    friedman,
    generalized_anova,
    incomplete_anova,
    quade,
    rcbd_anova,
    relative_efficiency,
)
from warehouse.errors import DesignError, InputError


def tidy(rows_by_treatment: dict[str, list[float]], block_prefix: str = "g") -> pd.DataFrame:
    """Treatment -> values in block order, as a tidy table."""
    return pd.DataFrame(
        [(t, f"{block_prefix}{j + 1}", float(v)) for t, vs in rows_by_treatment.items() for j, v in enumerate(vs)],
        columns=["treatment", "block", "value"])


def from_matrix(Y: np.ndarray) -> pd.DataFrame:
    """Treatments x blocks matrix as a tidy table (labels t0.., g0..)."""
    a, b = Y.shape
    return pd.DataFrame([(f"t{i}", f"g{j}", float(Y[i, j])) for i in range(a) for j in range(b)],
                        columns=["treatment", "block", "value"])


def sm_anova(obs: pd.DataFrame, formula: str, typ: int = 1) -> pd.DataFrame:
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    return anova_lm(smf.ols(formula, data=obs).fit(), typ=typ)


# Montgomery, Design and Analysis of Experiments, vascular-graft extrusion example:
# 4 extrusion pressures x 6 resin batches (data from memory of the book; the check below is that
# they reproduce the book's sums of squares).
GRAFT = {
    "8500": [90.3, 89.2, 98.2, 93.9, 87.4, 97.9],
    "8700": [92.5, 89.5, 90.6, 94.7, 87.0, 95.8],
    "8900": [85.5, 90.8, 89.6, 86.2, 88.0, 93.4],
    "9100": [82.5, 89.5, 85.6, 87.4, 78.9, 90.7],
}


def invented_rcbd(seed: int, a: int = 4, b: int = 8, block_sd: float = 3.0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    Y = (rng.normal(0, block_sd, size=b)[None, :] + np.linspace(0, 1.5, a)[:, None]
         + rng.normal(0, 1, size=(a, b)) + 50)
    return from_matrix(Y)


# --------------------------------------------------------------------------- RCBD ANOVA


def test_graft_example_reproduces_montgomery_sums():
    res = rcbd_anova(tidy(GRAFT))
    tr, bl, er = res.row("treatment"), res.row("block"), res.row("residual")
    # Montgomery, vascular-graft example: SS_treatment 178.17, SS_block 192.25, SS_error 109.89,
    # F = 8.11 on 3 and 15 df (from memory of the book)
    assert tr["ss"] == pytest.approx(178.17, abs=0.005)
    assert bl["ss"] == pytest.approx(192.25, abs=0.005)
    assert er["ss"] == pytest.approx(109.89, abs=0.005)
    assert tr["f"] == pytest.approx(8.11, abs=0.005)
    assert (tr["df"], bl["df"], er["df"]) == (3, 5, 15)
    assert er["f"] is None and er["p"] is None
    assert res.residual_df == 15 and res.residual_ms == pytest.approx(109.89 / 15, abs=1e-3)


def test_graft_relative_efficiency_formula():
    res = rcbd_anova(tidy(GRAFT))
    # RE = ((b-1) MS_block + b(a-1) MS_E) / ((ab-1) MS_E) (formula from memory of Montgomery),
    # evaluated with the book's sums (192.25 on 5 df, 109.89 on 15 df)
    msb, mse = 192.25 / 5, 109.89 / 15
    expected = (5 * msb + 6 * 3 * mse) / (23 * mse)
    assert res.relative_efficiency == pytest.approx(expected, rel=1e-3)
    # Fisher's degrees-of-freedom factor ((df_e+1)(df_crd+3))/((df_e+3)(df_crd+1)), df_e = 15,
    # df_crd = 20 (from memory of Montgomery's discussion of relative efficiency)
    assert res.relative_efficiency_corrected == pytest.approx(expected * (16 * 23) / (18 * 21), rel=1e-3)
    plain, corr = relative_efficiency(4, 6, msb, mse)
    assert plain == pytest.approx(expected) and corr < plain


def test_graft_is_clean_and_advice_is_empty():
    res = rcbd_anova(tidy(GRAFT))
    # common practice: with 6 blocks and passing checks nothing needs saying
    assert res.warnings == []
    assert res.advice == [] and res.recommended == "none"
    assert res.diagnostics["outliers"] == []


@pytest.mark.parametrize("seed", [1, 2])
def test_rcbd_matches_statsmodels_anova_lm(seed):
    obs = invented_rcbd(seed)
    res = rcbd_anova(obs)
    # statsmodels OLS value ~ C(treatment) + C(block), anova_lm typ 1 (reference library)
    ref = sm_anova(obs, "value ~ C(treatment) + C(block)")
    for src, key in [("treatment", "C(treatment)"), ("block", "C(block)"), ("residual", "Residual")]:
        row = res.row(src)
        assert row["ss"] == pytest.approx(ref.loc[key, "sum_sq"], rel=1e-10)
        assert row["df"] == ref.loc[key, "df"]
        if src != "residual":
            assert row["f"] == pytest.approx(ref.loc[key, "F"], rel=1e-9)
            assert row["p"] == pytest.approx(ref.loc[key, "PR(>F)"], rel=1e-7)


def test_rcbd_f_equals_repeated_measures_f():
    obs = invented_rcbd(5, a=5, b=9)
    res = rcbd_anova(obs)
    import pingouin as pg
    from statsmodels.stats.anova import AnovaRM

    # pingouin.rm_anova (reference library): one-way repeated-measures F equals the RCBD F
    ref = pg.rm_anova(data=obs, dv="value", within="treatment", subject="block", detailed=True)
    assert res.row("treatment")["f"] == pytest.approx(float(ref.loc[0, "F"]), rel=1e-9)
    assert res.row("treatment")["p"] == pytest.approx(float(ref.loc[0, "p_unc"]), rel=1e-7)
    # statsmodels AnovaRM (reference library)
    aov = AnovaRM(obs, depvar="value", subject="block", within=["treatment"]).fit().anova_table
    assert res.row("treatment")["f"] == pytest.approx(float(aov["F Value"].iloc[0]), rel=1e-9)
    assert res.residual_df == int(aov["Den DF"].iloc[0])


def test_residuals_match_statsmodels_fit():
    obs = invented_rcbd(7)
    res = rcbd_anova(obs)
    import statsmodels.formula.api as smf

    # statsmodels OLS (reference library): fitted values, residuals, internally studentized residuals
    fit = smf.ols("value ~ C(treatment) + C(block)", data=obs).fit()
    merged = obs.assign(sm_fit=fit.fittedvalues, sm_res=fit.resid,
                        sm_stud=fit.get_influence().resid_studentized_internal)
    merged = merged.merge(res.residuals, on=["treatment", "block"], suffixes=("", "_ours"))
    assert len(merged) == len(obs)
    np.testing.assert_allclose(merged["fitted"], merged["sm_fit"], rtol=1e-10)
    np.testing.assert_allclose(merged["residual"], merged["sm_res"], atol=1e-9)
    np.testing.assert_allclose(merged["studentized"], merged["sm_stud"], rtol=1e-8)
    np.testing.assert_allclose(merged["standardized"], merged["sm_res"] / math.sqrt(fit.mse_resid), rtol=1e-8)
    assert res.r_squared == pytest.approx(fit.rsquared, rel=1e-10)


def test_diagnostics_match_scipy_on_statsmodels_residuals():
    obs = invented_rcbd(11, a=4, b=10)
    res = rcbd_anova(obs)
    import statsmodels.formula.api as smf

    fit = smf.ols("value ~ C(treatment) + C(block)", data=obs).fit()
    r = obs.assign(r=fit.resid)
    groups = [r.loc[r.treatment == t, "r"].to_numpy() for t in pd.unique(r.treatment)]
    d = res.diagnostics
    # scipy.stats.shapiro / fligner / levene(center="median") (reference library)
    assert d["shapiro"]["p"] == pytest.approx(stats.shapiro(r["r"].to_numpy()).pvalue, rel=1e-6)
    assert d["fligner"]["p"] == pytest.approx(stats.fligner(*groups).pvalue, rel=1e-8)
    assert d["brown_forsythe"]["p"] == pytest.approx(stats.levene(*groups, center="median").pvalue, rel=1e-8)


def test_tukey_nonadditivity_montgomery_impurity_example():
    # Montgomery, Design and Analysis of Experiments, impurity example for Tukey's test
    # (3 temperatures x 5 pressures; data and results from memory of the book):
    # SS_N = 0.0985, F = 0.36, error SS of the additive model 2.00
    impurity = {"100": [5, 4, 6, 3, 5], "125": [3, 1, 4, 2, 3], "150": [1, 1, 3, 1, 2]}
    res = rcbd_anova(tidy(impurity, "p"))
    na = res.diagnostics["nonadditivity"]
    assert res.row("residual")["ss"] == pytest.approx(2.00, abs=1e-9)
    assert na["ss"] == pytest.approx(0.0985, abs=5e-5)
    assert na["f"] == pytest.approx(0.36, abs=0.005)
    assert (na["df1"], na["df2"]) == (1, 7)


def test_tukey_nonadditivity_matches_added_regressor_in_statsmodels():
    # Tukey's test equals the F test for adding the product of the fitted treatment and block
    # effects to the additive model (Tukey 1949); reference: statsmodels OLS compare_f_test
    rng = np.random.default_rng(4)
    t_eff = np.array([0.0, 1.0, 2.5, 4.0])
    b_eff = rng.normal(0, 2, size=7)
    Y = 10 + t_eff[:, None] + b_eff[None, :] + 0.15 * t_eff[:, None] * b_eff[None, :] + rng.normal(0, 0.5, (4, 7))
    obs = from_matrix(Y)
    res = rcbd_anova(obs)
    import statsmodels.formula.api as smf

    tm = obs.groupby("treatment")["value"].transform("mean")
    bm = obs.groupby("block")["value"].transform("mean")
    g = obs["value"].mean()
    obs2 = obs.assign(q=(tm - g) * (bm - g))
    small = smf.ols("value ~ C(treatment) + C(block)", data=obs2).fit()
    big = smf.ols("value ~ C(treatment) + C(block) + q", data=obs2).fit()
    f, p, ddf = big.compare_f_test(small)
    na = res.diagnostics["nonadditivity"]
    assert na["f"] == pytest.approx(f, rel=1e-8)
    assert na["p"] == pytest.approx(p, rel=1e-7)
    assert na["df2"] == big.df_resid
    assert na["p"] < 0.05
    assert any("do not add up" in w for w in res.warnings)


def test_outlier_is_flagged_with_its_cell():
    rng = np.random.default_rng(8)
    Y = 20 + rng.normal(0, 0.3, size=(4, 12)) + rng.normal(0, 2, size=12)[None, :]
    Y[2, 5] += 6.0
    res = rcbd_anova(from_matrix(Y))
    out = res.diagnostics["outliers"]
    # common practice: |standardized residual| > 3 marks an outlier
    assert [(o["treatment"], o["block"]) for o in out] == [("t2", "g5")]
    std = res.residuals.set_index(["treatment", "block"]).loc[("t2", "g5"), "standardized"]
    assert out[0]["standardized"] == pytest.approx(std) and abs(std) > 3
    assert any("t2 on g5" in w for w in res.warnings)


# --------------------------------------------------------------------------- transforms


def test_log_transform_with_shift_matches_statsmodels():
    obs = invented_rcbd(3)
    obs.loc[0, "value"] = 0.0
    obs.loc[5, "value"] = -2.5
    res = rcbd_anova(obs, transform="log")
    shift = 1.0 - obs["value"].min()
    # common practice: shift so the smallest value becomes 1 and say so
    assert res.transform["shift"] == pytest.approx(shift)
    assert any("value + 3.5" in w for w in res.warnings)
    ref = sm_anova(obs.assign(value=np.log(obs["value"] + shift)), "value ~ C(treatment) + C(block)")
    assert res.row("treatment")["ss"] == pytest.approx(ref.loc["C(treatment)", "sum_sq"], rel=1e-10)
    assert res.row("treatment")["f"] == pytest.approx(ref.loc["C(treatment)", "F"], rel=1e-9)


def test_log_without_shift_when_positive():
    res = rcbd_anova(tidy(GRAFT), transform="log")
    assert res.transform == {"name": "log", "shift": 0.0, "boxcox_lambda": None}
    ref = sm_anova(tidy(GRAFT).assign(value=lambda d: np.log(d["value"])), "value ~ C(treatment) + C(block)")
    assert res.row("residual")["ss"] == pytest.approx(ref.loc["Residual", "sum_sq"], rel=1e-10)


def test_boxcox_lambda_maximizes_profile_likelihood_of_block_model():
    rng = np.random.default_rng(12)
    Y = np.exp(2 + np.linspace(0, 0.6, 4)[:, None] + rng.normal(0, 0.5, 9)[None, :] + rng.normal(0, 0.3, (4, 9)))
    obs = from_matrix(Y)
    res = rcbd_anova(obs, transform="boxcox")
    lam = res.transform["boxcox_lambda"]
    import statsmodels.formula.api as smf

    # reference: statsmodels OLS log-likelihood of the additive model on y^(lambda), plus the
    # Box-Cox Jacobian (lambda - 1) sum log y (Box and Cox 1964), maximized on a fine grid
    logsum = float(np.log(obs["value"]).sum())

    def llf(lmb):
        z = np.log(obs["value"]) if abs(lmb) < 1e-12 else (obs["value"] ** lmb - 1) / lmb
        return smf.ols("z ~ C(treatment) + C(block)", data=obs.assign(z=z)).fit().llf + (lmb - 1) * logsum

    grid = np.round(np.arange(-2.0, 2.0001, 0.02), 10)
    best = grid[int(np.argmax([llf(g) for g in grid]))]
    assert abs(lam - best) <= 0.02
    assert llf(lam) >= max(llf(lam - 0.02), llf(lam + 0.02))
    # our profile log-likelihood differs from statsmodels' only by a constant
    diffs = [boxcox_loglik(g, Y) - llf(g) for g in (-0.5, 0.0, 0.7, 1.3)]
    assert max(diffs) - min(diffs) < 1e-8
    # the analysis uses (y^lambda - 1)/lambda
    z = (obs["value"] ** lam - 1) / lam
    ref = sm_anova(obs.assign(value=z), "value ~ C(treatment) + C(block)")
    assert res.row("treatment")["f"] == pytest.approx(ref.loc["C(treatment)", "F"], rel=1e-8)


def test_rank_transform_is_ranks_over_all_observations():
    obs = invented_rcbd(21)
    res = rcbd_anova(obs, transform="rank")
    # Conover and Iman rank transform; reference: statsmodels anova_lm on scipy.stats.rankdata
    ref = sm_anova(obs.assign(value=stats.rankdata(obs["value"])), "value ~ C(treatment) + C(block)")
    assert res.row("treatment")["f"] == pytest.approx(ref.loc["C(treatment)", "F"], rel=1e-9)
    assert res.row("block")["ss"] == pytest.approx(ref.loc["C(block)", "sum_sq"], rel=1e-9)


def test_advice_recommends_log_for_multiplicative_data():
    # invented: multiplicative (lognormal) errors with strongly different block scales
    found = None
    for seed in range(40):
        rng = np.random.default_rng(seed)
        Y = np.exp(rng.normal(0, 1.5, 12)[None, :] + np.array([0, 0.2, 0.4, 0.6])[:, None]
                   + rng.normal(0, 0.4, (4, 12)))
        res = rcbd_anova(from_matrix(Y))
        if res.diagnostics["shapiro"]["p"] < 0.05:
            found = res
            break
    assert found is not None
    checks = {c["transform"]: c for c in found.transform_checks}
    # scipy.stats.shapiro on the residuals of the log-scale fit (reference library)
    log_res = rcbd_anova(from_matrix(Y), transform="log")
    assert checks["log"]["shapiro_p"] == pytest.approx(log_res.diagnostics["shapiro"]["p"], rel=1e-9)
    first = next(c["transform"] for c in found.transform_checks if c["transform"] != "none" and c["passes"])
    assert found.recommended == first == "log"
    assert any("not normal" in w for w in found.warnings)
    assert found.advice and "passes the checks" in found.advice[0]


def test_advice_falls_back_to_friedman_when_nothing_passes():
    # invented: one treatment far noisier than the others, so no monotone transform evens it out
    rng = np.random.default_rng(5)
    Y = rng.normal(0, 1, (4, 16)) + rng.normal(0, 1, 16)[None, :]
    Y[3] = rng.standard_cauchy(16) * 20
    res = rcbd_anova(from_matrix(Y))
    assert [c["passes"] for c in res.transform_checks] == [False, False, False, False]
    assert res.recommended == "friedman"
    assert "rely on the Friedman test" in res.advice[0]


def test_transform_checks_cover_every_scale():
    res = rcbd_anova(tidy(GRAFT))
    assert [c["transform"] for c in res.transform_checks] == ["none", "log", "boxcox", "rank"]
    assert res.transform_checks[2]["boxcox_lambda"] is not None


# --------------------------------------------------------------------------- Friedman, Quade


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


def test_rcbd_includes_rank_tests_on_untransformed_values():
    obs = invented_rcbd(17)
    res = rcbd_anova(obs, transform="rank")
    Y = obs.pivot(index="treatment", columns="block", values="value").to_numpy()
    # scipy.stats.friedmanchisquare on the raw values (reference library)
    assert res.friedman.statistic == pytest.approx(stats.friedmanchisquare(*Y).statistic)
    assert res.quade.statistic == pytest.approx(quade(obs).statistic)


# --------------------------------------------------------------------------- incomplete designs


# Montgomery, Design and Analysis of Experiments, BIBD catalyst example: 4 catalysts in
# 4 batches of raw material, 3 per batch (data from memory of the book).
CATALYST = [("1", "b1", 73), ("1", "b2", 74), ("1", "b4", 71), ("2", "b2", 75), ("2", "b3", 67), ("2", "b4", 72),
            ("3", "b1", 73), ("3", "b2", 75), ("3", "b3", 68), ("4", "b1", 75), ("4", "b3", 72), ("4", "b4", 75)]


def catalyst() -> pd.DataFrame:
    return pd.DataFrame(CATALYST, columns=["treatment", "block", "value"]).astype({"value": float})


def test_bibd_catalyst_example():
    res = incomplete_anova(catalyst())
    rows = {r["source"]: r for r in res.anova}
    # Montgomery, catalyst BIBD: SS_treatments(adjusted) 22.75, SS_blocks 55.00, SS_E 3.25,
    # F = 11.67, p = 0.0107 (from memory of the book)
    assert rows["treatment"]["ss"] == pytest.approx(22.75, abs=1e-9)
    assert rows["block"]["ss"] == pytest.approx(55.00, abs=1e-9)
    assert rows["residual"]["ss"] == pytest.approx(3.25, abs=1e-9)
    assert rows["treatment"]["f"] == pytest.approx(11.67, abs=0.005)
    assert rows["treatment"]["p"] == pytest.approx(0.0107, abs=5e-5)
    assert res.balance["bibd"] is True
    # Montgomery: a = b = 4, k = 3, r = 3, lambda = 2 (from memory of the book)
    assert (res.balance["block_size"], res.balance["replication"], res.balance["pair_lambda"]) == (3, 3, 2)
    assert res.balance["efficiency"] == pytest.approx(2 * 4 / (3 * 3))


def test_incomplete_least_squares_means_match_statsmodels():
    obs = catalyst()
    res = incomplete_anova(obs)
    import statsmodels.formula.api as smf

    # reference: statsmodels OLS predictions for every treatment in every block, averaged
    fit = smf.ols("value ~ C(block) + C(treatment)", data=obs).fit()
    grid = pd.DataFrame([(t, b) for t in ["1", "2", "3", "4"] for b in ["b1", "b2", "b3", "b4"]],
                        columns=["treatment", "block"])
    lsm = grid.assign(p=fit.predict(grid)).groupby("treatment")["p"].mean()
    ours = res.adjusted_means.set_index("treatment")["adjusted_mean"]
    np.testing.assert_allclose(ours.loc[lsm.index], lsm.to_numpy(), rtol=1e-10)
    # Montgomery's intrablock estimates tau_i = k Q_i / (lambda a): -9/8, -7/8, -4/8, 20/8 around
    # the grand mean 72.5 (from memory of the book)
    np.testing.assert_allclose(ours.to_numpy(), 72.5 + np.array([-9, -7, -4, 20]) / 8, atol=1e-9)


def test_unbalanced_incomplete_matches_statsmodels_sequential_ss():
    rng = np.random.default_rng(31)
    rows = []
    for j in range(9):
        present = rng.choice(5, size=rng.integers(2, 5), replace=False)
        for i in present:
            rows.append((f"t{i}", f"g{j}", 10 + i * 0.5 + j + rng.normal()))
    obs = pd.DataFrame(rows, columns=["treatment", "block", "value"])
    res = incomplete_anova(obs)
    # statsmodels anova_lm typ 1 with blocks entered first (reference library)
    ref = sm_anova(obs, "value ~ C(block) + C(treatment)")
    rows_ = {r["source"]: r for r in res.anova}
    assert rows_["block"]["ss"] == pytest.approx(ref.loc["C(block)", "sum_sq"], rel=1e-9)
    assert rows_["treatment"]["ss"] == pytest.approx(ref.loc["C(treatment)", "sum_sq"], rel=1e-9)
    assert rows_["treatment"]["f"] == pytest.approx(ref.loc["C(treatment)", "F"], rel=1e-8)
    assert rows_["treatment"]["p"] == pytest.approx(ref.loc["C(treatment)", "PR(>F)"], rel=1e-7)
    assert rows_["residual"]["df"] == ref.loc["Residual", "df"]
    assert res.balance["bibd"] is False and res.balance["complete"] is False


def test_incomplete_on_complete_design_agrees_with_rcbd():
    obs = tidy(GRAFT)
    inc = incomplete_anova(obs)
    full = rcbd_anova(obs)
    rows = {r["source"]: r for r in inc.anova}
    # a complete design is a special case: same SS as the Montgomery example above
    assert rows["treatment"]["ss"] == pytest.approx(full.row("treatment")["ss"], rel=1e-10)
    assert inc.balance["complete"] is True and inc.balance["bibd"] is False
    np.testing.assert_allclose(inc.adjusted_means["adjusted_mean"], full.treatment_means["mean"], rtol=1e-12)


def test_disconnected_incomplete_design_is_refused():
    obs = pd.DataFrame([("a", "g1", 1.0), ("b", "g1", 2.0), ("a", "g2", 1.5), ("b", "g2", 2.5),
                        ("c", "g3", 3.0), ("d", "g3", 4.0), ("c", "g4", 3.2), ("d", "g4", 4.1)],
                       columns=["treatment", "block", "value"])
    with pytest.raises(DesignError, match="share no block"):
        incomplete_anova(obs)


# --------------------------------------------------------------------------- generalized designs


def generalized_data(seed: int, cells_min: int = 3, cells_max: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    rows = []
    b_eff = rng.normal(0, 2, 6)
    for i in range(3):
        for j in range(6):
            for k in range(int(rng.integers(cells_min, cells_max + 1))):
                rows.append((f"t{i}", f"g{j}", f"g{j}/i{k}", 5 + 0.7 * i + b_eff[j] + 0.3 * rng.normal() * i
                             + rng.normal()))
    return pd.DataFrame(rows, columns=["treatment", "block", "instance", "value"])


@pytest.mark.parametrize("cells", [(3, 3), (2, 4)])
def test_generalized_matches_statsmodels_with_interaction(cells):
    obs = generalized_data(41, *cells)
    res = generalized_anova(obs)
    # statsmodels anova_lm typ 1, blocks first, with the interaction (reference library)
    ref = sm_anova(obs, "value ~ C(block) + C(treatment) + C(block):C(treatment)")
    rows = {r["source"]: r for r in res.anova}
    pairs = [("block", "C(block)"), ("treatment", "C(treatment)"), ("interaction", "C(block):C(treatment)"),
             ("residual", "Residual")]
    for ours, key in pairs:
        assert rows[ours]["ss"] == pytest.approx(ref.loc[key, "sum_sq"], rel=1e-9)
        assert rows[ours]["df"] == ref.loc[key, "df"]
        if ours != "residual":
            assert rows[ours]["f"] == pytest.approx(ref.loc[key, "F"], rel=1e-8)
            assert rows[ours]["p"] == pytest.approx(ref.loc[key, "PR(>F)"], rel=1e-6)
    # random blocks: treatment against the interaction mean square (Montgomery, mixed model,
    # from memory); computed here from the statsmodels table
    ms_t = ref.loc["C(treatment)", "sum_sq"] / ref.loc["C(treatment)", "df"]
    ms_i = ref.loc["C(block):C(treatment)", "sum_sq"] / ref.loc["C(block):C(treatment)", "df"]
    rb = res.treatment_random_blocks
    assert rb["f"] == pytest.approx(ms_t / ms_i, rel=1e-9)
    assert rb["p"] == pytest.approx(stats.f.sf(ms_t / ms_i, 2, 10), rel=1e-8)
    assert (rb["df1"], rb["df2"]) == (2, 10)
    if cells[0] != cells[1]:
        assert any("approximate" in w for w in res.warnings)


def test_generalized_needs_replicated_cells_and_no_repeats():
    with pytest.raises(DesignError, match="no within-cell variation"):
        generalized_anova(invented_rcbd(1))
    obs = generalized_data(2)
    dup = pd.concat([obs, obs.iloc[[0]]], ignore_index=True)
    with pytest.raises(DesignError, match="collapse replicates"):
        generalized_anova(dup)
    with pytest.raises(DesignError, match="every treatment in every block"):
        generalized_anova(obs[~((obs.treatment == "t1") & (obs.block == "g2"))])


# --------------------------------------------------------------------------- design errors, warnings


def test_single_treatment_is_a_design_error():
    obs = pd.DataFrame({"treatment": ["a"] * 3, "block": ["g1", "g2", "g3"], "value": [1.0, 2.0, 3.0]})
    for fn in (rcbd_anova, friedman, quade, incomplete_anova):
        with pytest.raises(DesignError, match="only one treatment"):
            fn(obs)


def test_single_block_and_holes_and_duplicates_are_design_errors():
    one_block = pd.DataFrame({"treatment": ["a", "b"], "block": ["g1", "g1"], "value": [1.0, 2.0]})
    with pytest.raises(DesignError, match="only one block"):
        rcbd_anova(one_block)
    holes = tidy(GRAFT).drop(index=3)
    with pytest.raises(DesignError, match="incomplete_anova"):
        rcbd_anova(holes)
    dups = pd.concat([tidy(GRAFT), tidy(GRAFT).iloc[[0]]])
    with pytest.raises(DesignError, match="one value per cell"):
        friedman(dups)


def test_bad_input_is_an_input_error():
    with pytest.raises(InputError, match="lack"):
        rcbd_anova(pd.DataFrame({"treatment": ["a"], "value": [1.0]}))
    bad = tidy(GRAFT)
    bad.loc[2, "value"] = np.nan
    with pytest.raises(InputError, match="not numbers"):
        rcbd_anova(bad)
    with pytest.raises(InputError, match="unknown transform"):
        rcbd_anova(tidy(GRAFT), transform="sqrt")


def test_few_blocks_and_tiny_design_warnings():
    res = rcbd_anova(tidy({"a": [1.0, 2.1, 3.3], "b": [1.4, 2.2, 3.9], "c": [0.8, 2.6, 3.1]}))
    # common practice: fewer than 6 blocks give little power; residual df 4 is tiny
    assert any("only 3 blocks" in w for w in res.warnings)
    assert any("tiny" in w for w in res.warnings)
    assert not any("only" in w for w in rcbd_anova(tidy(GRAFT)).warnings)


def test_to_dict_is_json_safe():
    obs = invented_rcbd(2)
    for res in (rcbd_anova(obs, "boxcox"), friedman(obs), quade(obs), incomplete_anova(obs),
                generalized_anova(generalized_data(3))):
        d = res.to_dict()
        text = json.dumps(d, allow_nan=False)
        assert json.loads(text) == d
    d = rcbd_anova(obs).to_dict()
    assert d["anova"][2]["f"] is None
    assert isinstance(d["residuals"], list) and set(d["residuals"][0]) >= {"treatment", "block", "residual"}
    assert isinstance(rcbd_anova(obs).table(), pd.DataFrame)


def test_perfectly_additive_data_do_not_crash():
    Y = np.add.outer(np.array([0.0, 1.0, 2.0]), np.array([5.0, 7.0, 9.0, 11.0, 13.0, 15.0]))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = rcbd_anova(from_matrix(Y))
    assert res.diagnostics["shapiro"]["p"] is None
    assert math.isinf(res.row("treatment")["f"]) and res.row("treatment")["p"] == 0.0
    assert any("exactly" in w for w in res.warnings)
    json.dumps(res.to_dict(), allow_nan=False)
