"""Variance components and the allocation of groups, instances and seeds (analyze/noise.py),
checked against a published nested example, statsmodels (MixedLM, OLS, TTestPower),
simulated campaigns with known components, and the closed-form optimal allocation."""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from statsmodels.stats.power import TTestPower

from warehouse.analyze import allocation as A
from warehouse.analyze import noise as N
from warehouse.analyze.planning import blocks_to_settle, conditional_power
from warehouse.errors import DesignError

# Sokal and Rohlf, Biometry, the nested ANOVA of glycogen in rat livers: 3 treatments, 2 rats per
# treatment, 3 preparations per rat, 2 readings per preparation (data and sums of squares from
# memory of the book's box on the two-level nested anova). Here a rat is a group, a preparation an
# instance and a reading a seed; the treatments are removed as fixed effects, as in the book.
GLYCOGEN = {
    "control": [[(131, 130), (131, 125), (136, 142)], [(150, 148), (140, 143), (160, 150)]],
    "compound 217": [[(157, 145), (154, 142), (147, 153)], [(151, 155), (147, 147), (162, 152)]],
    "217 + sugar": [[(134, 125), (138, 138), (135, 136)], [(138, 140), (139, 138), (134, 127)]],
}


def glycogen() -> pd.DataFrame:
    return pd.DataFrame([dict(treatment=t, group=f"{t}/rat{r}", instance=f"prep{p}", value=v)
                         for t, rats in GLYCOGEN.items() for r, rat in enumerate(rats)
                         for p, prep in enumerate(rat) for v in prep])


def test_glycogen_sums_of_squares_and_components_match_the_book():
    res = N.variance_components(glycogen())
    assert res.method == "anova" and res.balanced
    ms = {r["source"]: r for r in res.mean_squares}
    # Biometry: rats within treatments SS 797.67 on 3 df, preparations within rats 594.0 on 12 df,
    # readings within preparations 381.0 on 18 df (from memory of the book)
    assert ms["group"]["ss"] == pytest.approx(797.67, abs=0.01) and ms["group"]["df"] == 3
    assert ms["instance"]["ss"] == pytest.approx(594.0, abs=1e-9) and ms["instance"]["df"] == 12
    assert ms["seed"]["ss"] == pytest.approx(381.0, abs=1e-9) and ms["seed"]["df"] == 18
    # the book's components: s2 readings 21.17, preparations (49.50 - 21.17) / 2 = 14.17,
    # rats (265.89 - 49.50) / 6 = 36.06 (from memory of the book)
    comps = {r["level"]: r for r in res.components}
    assert comps["seed"]["variance"] == pytest.approx(21.17, abs=0.01)
    assert comps["instance"]["variance"] == pytest.approx(14.17, abs=0.01)
    assert comps["group"]["variance"] == pytest.approx(36.06, abs=0.01)
    assert sum(r["share"] for r in res.components) == pytest.approx(1.0)
    # the seed interval is the exact chi-square one on 18 df: 381 / chi2(0.975, 18) .. 381 / chi2(0.025, 18)
    # (chi2 quantiles 31.526 and 8.231, from memory of the chi-square table)
    assert comps["seed"]["ci_low"] == pytest.approx(381 / 31.526, rel=1e-3)
    assert comps["seed"]["ci_high"] == pytest.approx(381 / 8.231, rel=1e-3)


def _mixedlm_nested(df: pd.DataFrame):
    """statsmodels MixedLM, written out here: groups are treatment x group, instances a variance component."""
    d = df.assign(tg=df["treatment"] + "|" + df["group"], ti=df["treatment"] + "|" + df["group"] + "|" + df["instance"])
    fit = smf.mixedlm("value ~ C(treatment)", d, groups=d["tg"], re_formula="1",
                      vc_formula={"i": "0 + C(ti)"}).fit(reml=True)
    return float(fit.cov_re.iloc[0, 0]), float(fit.vcomp[0]), float(fit.scale)


def simulate(rng, treatments=2, groups=30, instances=4, seeds=5, s2_g=4.0, s2_i=1.0, s2_s=0.25, s2_tg=0.0,
             s2_ti=0.0, effects=None) -> pd.DataFrame:
    """Runs with known components: group and instance effects shared by the treatments, plus
    treatment x group and treatment x instance interactions and seed noise."""
    effects = effects or [0.3 * k for k in range(treatments)]
    rows = []
    for g in range(groups):
        G = rng.normal(0, math.sqrt(s2_g))
        TG = rng.normal(0, math.sqrt(s2_tg), treatments) if s2_tg else np.zeros(treatments)
        for i in range(instances):
            I = rng.normal(0, math.sqrt(s2_i))
            TI = rng.normal(0, math.sqrt(s2_ti), treatments) if s2_ti else np.zeros(treatments)
            for t in range(treatments):
                for s in range(seeds):
                    rows.append(dict(treatment=f"t{t}", group=f"g{g}", instance=f"i{i}",
                                     value=10 + effects[t] + G + I + TG[t] + TI[t] + rng.normal(0, math.sqrt(s2_s))))
    return pd.DataFrame(rows)


def test_balanced_anova_equals_mixedlm_reml():
    # on balanced data with every estimate above zero, REML equals the ANOVA estimates
    # (Searle, Casella and McCulloch, Variance Components, ch. 6); statsmodels is the reference
    df = simulate(np.random.default_rng(11), groups=12, instances=3, seeds=4)
    res = N.variance_components(df)
    g, i, s = _mixedlm_nested(df)
    assert res.method == "anova"
    assert res.variance("group") == pytest.approx(g, rel=1e-3)
    assert res.variance("instance") == pytest.approx(i, rel=1e-3)
    assert res.variance("seed") == pytest.approx(s, rel=1e-3)
    # and our own REML path gives the same
    reml = N.variance_components(df, method="reml")
    assert reml.method == "reml"
    for level in ("group", "instance", "seed"):
        assert reml.variance(level) == pytest.approx(res.variance(level), rel=1e-3)


def test_unbalanced_runs_use_reml_like_mixedlm():
    rng = np.random.default_rng(5)
    df = simulate(rng, groups=15, instances=4, seeds=4)
    df = df.drop(index=rng.choice(len(df), size=60, replace=False)).reset_index(drop=True)
    res = N.variance_components(df)
    assert res.method == "reml" and not res.balanced
    g, i, s = _mixedlm_nested(df)
    assert res.variance("group") == pytest.approx(g, rel=1e-3)
    assert res.variance("instance") == pytest.approx(i, rel=1e-3)
    assert res.variance("seed") == pytest.approx(s, rel=1e-3)
    with pytest.raises(DesignError):
        N.variance_components(df, method="anova")


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_simulated_components_fall_inside_their_intervals(seed):
    # the known truth: group 4 (the shared 4 plus nothing else), instance 1, seed 0.25 per treatment
    rng = np.random.default_rng(seed)
    df = simulate(rng, treatments=2, groups=40, instances=4, seeds=5)
    for method in ("anova", "reml"):
        res = N.variance_components(df, method=method)
        for level, truth in (("group", 4.0), ("instance", 1.0), ("seed", 0.25)):
            row = next(r for r in res.components if r["level"] == level)
            assert row["ci_low"] <= truth <= row["ci_high"], (method, level, row)


def test_a_negative_estimate_is_set_to_zero_and_said():
    # no instance effect at all: the instance mean square falls below the seed one for this seed
    rng = np.random.default_rng(3)
    for k in range(50):
        df = simulate(rng, treatments=1, groups=10, instances=3, seeds=3, s2_i=0.0)
        ms = {r["source"]: r["ms"] for r in N.variance_components(df).mean_squares}
        if ms["instance"] < ms["seed"]:
            break
    res = N.variance_components(df)
    row = next(r for r in res.components if r["level"] == "instance")
    assert row["variance"] == 0.0 and row["ci_low"] == 0.0 and row["ci_high"] > 0
    assert any("below zero" in n and "set to 0" in n for n in res.notes)


@pytest.mark.filterwarnings("ignore::statsmodels.tools.sm_exceptions.SingularMatrixWarning")
def test_comparison_components_match_the_sequential_sums_of_squares_of_ols():
    rng = np.random.default_rng(8)
    df = simulate(rng, treatments=3, groups=10, instances=3, seeds=3, s2_tg=0.5, s2_ti=0.3)
    res = N.comparison_components(df)
    assert res.method == "anova"
    d = df.assign(inst=df["group"] + "/" + df["instance"])
    # statsmodels OLS: each term's sum of squares is the drop in the residual sum of squares when it
    # enters after the terms before it (sequential sums; on balanced data the nested terms are exact)
    terms = ["C(treatment)", "C(group)", "C(inst)", "C(treatment):C(group)", "C(treatment):C(inst)"]
    rss = [float(((d["value"] - d["value"].mean()) ** 2).sum())]
    for k in range(1, len(terms) + 1):
        rss.append(float(smf.ols("value ~ " + " + ".join(terms[:k]), d).fit().ssr))
    ref = dict(zip(["treatment", "group", "instance", "treatment x group", "treatment x instance"],
                   [a - b for a, b in zip(rss, rss[1:])]), seed=rss[-1])
    ours = {r["source"]: r for r in res.mean_squares}
    for src, value in ref.items():
        assert ours[src]["ss"] == pytest.approx(value, rel=1e-7), src
    assert ours["treatment x instance"]["df"] == 2 * 10 * 2 and ours["seed"]["df"] == 3 * 30 * 2
    # the contrast REML path agrees with the ANOVA on balanced data
    reml = N.comparison_components(df, method="reml")
    for level in ("treatment x group", "treatment x instance", "seed"):
        assert reml.variance(level) == pytest.approx(res.variance(level), rel=2e-3, abs=1e-6), level


@pytest.mark.parametrize("seed", [4, 5])
def test_simulated_comparison_components_fall_inside_their_intervals(seed):
    rng = np.random.default_rng(seed)
    df = simulate(rng, treatments=2, groups=60, instances=4, seeds=4, s2_g=9.0, s2_i=2.0, s2_s=0.5, s2_tg=0.4,
                  s2_ti=0.3)
    unbalanced = df.drop(index=rng.choice(len(df), size=150, replace=False)).reset_index(drop=True)
    for frame, method in ((df, "anova"), (unbalanced, "reml")):
        res = N.comparison_components(frame)
        assert res.method == method
        for level, truth in (("treatment x group", 0.4), ("treatment x instance", 0.3), ("seed", 0.5)):
            row = next(r for r in res.components if r["level"] == level)
            assert row["ci_low"] <= truth <= row["ci_high"], (method, level, row)


def test_block_difference_variance_is_what_a_simulated_block_shows():
    # 2 (s2_TG + s2_TI / n_i + s2_seed / (n_i n_s)), against the variance of simulated block differences
    rng = np.random.default_rng(21)
    df = simulate(rng, treatments=2, groups=4000, instances=3, seeds=2, s2_g=5.0, s2_i=1.0, s2_s=0.8, s2_tg=0.3,
                  s2_ti=0.6, effects=[0.0, 0.0])
    block = df.groupby(["group", "treatment"])["value"].mean().unstack()
    diff = block["t1"] - block["t0"]
    assert float(diff.var()) == pytest.approx(A.block_difference_variance(0.3, 0.6, 0.8, 3, 2), rel=0.06)


def test_the_allocation_finds_the_closed_form_optimum():
    # Cochran, Sampling Techniques, ch. 10: n_s* = sqrt(c_inst s2_seed / (c_run s2_TI)),
    # n_i* = sqrt(c_group s2_TI / (c_inst s2_TG)); with these numbers both are exactly 4
    cf = A.closed_form_allocation(1.0, 4.0, 16.0, cost_group=16.0, cost_instance=4.0, cost_run=1.0)
    assert cf == {"seeds_per_instance": pytest.approx(4.0), "instances_per_group": pytest.approx(4.0)}
    # a small effect, so that hundreds of groups are needed and the t's df do not tilt the choice
    for budget in (None, 10 * 1920 / 3600):
        plan = A.plan_allocation(1.0, 4.0, 16.0, effect=0.3, run_seconds=1.0, treatments=1, group_seconds=16.0,
                                 instance_seconds=4.0, budget_hours=budget)
        a = plan.allocation
        assert (a["instances_per_group"], a["seeds_per_instance"]) == (4, 4), plan.best[:3]


def test_the_power_of_an_allocation_is_the_paired_t_power():
    plan = A.plan_allocation(0.2, 0.5, 1.0, effect=0.5, run_seconds=30, treatments=2, max_groups=20)
    a = plan.allocation
    sd = math.sqrt(A.block_difference_variance(0.2, 0.5, 1.0, a["instances_per_group"], a["seeds_per_instance"]))
    # statsmodels' TTestPower is the reference for the paired t-test's power
    ref = TTestPower().power(effect_size=0.5 / sd, nobs=a["groups"], alpha=0.05, alternative="two-sided")
    assert a["power"] == pytest.approx(float(ref), abs=1e-6)
    assert a["power"] >= 0.8 and a["groups"] <= 20
    # one group fewer falls short, or costs no less
    fewer = next(r for r in plan.around if r["change"] == "one group fewer")
    assert fewer["power"] < 0.8
    # cost: groups x instances x seeds x treatments x seconds
    assert a["cpu_hours"] == pytest.approx(a["groups"] * a["instances_per_group"] * a["seeds_per_instance"] * 2 * 30
                                           / 3600)


def test_pure_run_cost_puts_the_optimum_at_the_boundary_and_says_so():
    plan = A.plan_allocation(0.2, 0.5, 1.0, effect=0.5, run_seconds=30, treatments=2)
    a = plan.allocation
    assert (a["instances_per_group"], a["seeds_per_instance"]) == (1, 1)
    assert any("only cost" in w for w in plan.warnings)
    budget = A.plan_allocation(0.2, 0.5, 1.0, effect=0.5, run_seconds=30, treatments=2, budget_hours=2.0)
    assert budget.allocation["cpu_hours"] <= 2.0 and budget.goal == "budget"


def test_conditional_power_matches_a_simulation():
    # the B-value algebra, against a Monte Carlo of the final statistic (fixed seed)
    rng = np.random.default_rng(0)
    z, n, m, c = 1.4, 12, 9, 1.96
    t = n / (n + m)
    z_new = rng.normal(z * math.sqrt(m / n), 1.0, 400_000)
    final = math.sqrt(t) * z + math.sqrt(1 - t) * z_new
    assert conditional_power(z, n, m, c) == pytest.approx(float((final > c).mean()), abs=0.003)
    more = blocks_to_settle(z, n, c, 0.8)
    assert conditional_power(z, n, more, c) >= 0.8 > conditional_power(z, n, more - 1, c)
    assert blocks_to_settle(2.5, n, c) == 0
    assert blocks_to_settle(0.0, n, c) is None
