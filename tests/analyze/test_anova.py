"""Checks of warehouse.analyze.anova against published examples and reference libraries.

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

from warehouse.analyze.anova import boxcox_loglik, rcbd_anova, relative_efficiency
from warehouse.analyze.ranks import quade

from .kit import GRAFT, from_matrix, invented_rcbd, sm_anova, tidy


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


# --------------------------------------------------------------------------- rank tests beside the ANOVA, warnings


def test_rcbd_includes_rank_tests_on_untransformed_values():
    obs = invented_rcbd(17)
    res = rcbd_anova(obs, transform="rank")
    Y = obs.pivot(index="treatment", columns="block", values="value").to_numpy()
    # scipy.stats.friedmanchisquare on the raw values (reference library)
    assert res.friedman.statistic == pytest.approx(stats.friedmanchisquare(*Y).statistic)
    assert res.quade.statistic == pytest.approx(quade(obs).statistic)


def test_few_blocks_and_tiny_design_warnings():
    res = rcbd_anova(tidy({"a": [1.0, 2.1, 3.3], "b": [1.4, 2.2, 3.9], "c": [0.8, 2.6, 3.1]}))
    # common practice: fewer than 6 blocks give little power; residual df 4 is tiny
    assert any("only 3 blocks" in w for w in res.warnings)
    assert any("tiny" in w for w in res.warnings)
    assert not any("only" in w for w in rcbd_anova(tidy(GRAFT)).warnings)


def test_perfectly_additive_data_do_not_crash():
    Y = np.add.outer(np.array([0.0, 1.0, 2.0]), np.array([5.0, 7.0, 9.0, 11.0, 13.0, 15.0]))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = rcbd_anova(from_matrix(Y))
    assert res.diagnostics["shapiro"]["p"] is None
    # no residual spread: F divides by zero, so neither F nor p is given (no p = 0 beside a missing F)
    assert math.isnan(res.row("treatment")["f"]) and math.isnan(res.row("treatment")["p"])
    assert res.to_dict()["anova"][0]["f"] is None and res.to_dict()["anova"][0]["p"] is None
    assert any("exactly" in w for w in res.warnings)
    json.dumps(res.to_dict(), allow_nan=False)
