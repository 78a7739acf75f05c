"""Checks of warehouse.analyze.planning against published tables, statsmodels and simulation."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from warehouse.analyze.planning import (
    blocks_for_delta,
    blocks_for_dunnett,
    blocks_for_paired,
    blocks_for_rcbd,
    more_blocks,
    paired_t_power,
    rcbd_power,
)
from warehouse.errors import DesignError, InputError


def test_cohen_paired_d_half():
    # Cohen, Statistical Power Analysis: paired / one-sample t, d = 0.5, two-sided alpha 0.05,
    # power 0.80 needs n = 34 (from memory of the tables); statsmodels TTestPower gives 33.37
    from statsmodels.stats.power import TTestPower

    assert TTestPower().solve_power(effect_size=0.5, alpha=0.05, power=0.8) == pytest.approx(33.37, abs=0.01)
    plan = blocks_for_paired(0.5)
    assert plan.blocks_needed == 34
    assert plan.achieved_power >= 0.8


@pytest.mark.parametrize("effect, comparisons, alternative", [(0.5, 1, "two-sided"), (0.3, 3, "two-sided"),
                                                             (0.8, 2, "one-sided"), (1.2, 1, "two-sided")])
def test_blocks_needed_is_the_smallest_by_statsmodels_power(effect, comparisons, alternative):
    from statsmodels.stats.power import TTestPower

    plan = blocks_for_paired(effect, comparisons=comparisons, alternative=alternative)
    alt = "two-sided" if alternative == "two-sided" else "larger"
    power = lambda n: TTestPower().power(effect_size=effect, nobs=n, alpha=0.05 / comparisons, alternative=alt)
    # statsmodels TTestPower (reference library): n reaches 0.8, n - 1 does not
    assert power(plan.blocks_needed) >= 0.8 > power(plan.blocks_needed - 1)
    assert plan.achieved_power == pytest.approx(power(plan.blocks_needed), rel=1e-6)
    assert plan.alpha_per_comparison == pytest.approx(0.05 / comparisons)


def test_paired_power_matches_statsmodels():
    from statsmodels.stats.power import TTestPower

    # statsmodels TTestPower.power (reference library), both sides and one side
    for n in (5, 12, 40):
        assert paired_t_power(0.6, n) == pytest.approx(TTestPower().power(0.6, n, 0.05), rel=1e-7)
        assert paired_t_power(0.6, n, alternative="one-sided") == pytest.approx(
            TTestPower().power(0.6, n, 0.05, alternative="larger"), rel=1e-7)


def test_blocks_for_delta_is_standardized_paired():
    plan = blocks_for_delta(0.3, 0.6, comparisons=3)
    assert plan.effect == pytest.approx(0.5) and plan.delta == 0.3 and plan.sd == 0.6
    assert plan.blocks_needed == blocks_for_paired(0.5, comparisons=3).blocks_needed
    assert json.loads(json.dumps(plan.to_dict(), allow_nan=False))["blocks_needed"] == plan.blocks_needed


def test_rcbd_power_matches_statsmodels_ftest_power():
    means, sigma, b = [10.0, 10.4, 11.0, 10.2], 0.9, 7
    res = rcbd_power(means, sigma, b)
    from statsmodels.stats.power import FTestPower

    # statsmodels FTestPower (reference library). Its df_num/df_denom names are swapped (its own
    # docstring says so); noncentrality = f^2 (df_num + df_denom + ncc), and ncc = b gives
    # a b f^2 = b sum (mu - mean)^2 / sigma^2
    m = np.asarray(means)
    f = math.sqrt(((m - m.mean()) ** 2).mean()) / sigma
    ref = FTestPower().power(effect_size=f, df_num=3 * 6, df_denom=3, alpha=0.05, ncc=b)
    assert res.power == pytest.approx(ref, rel=1e-8)
    assert res.noncentrality == pytest.approx(b * ((m - m.mean()) ** 2).sum() / sigma ** 2)
    assert (res.df1, res.df2) == (3, 18) and res.effect_f == pytest.approx(f)


def test_rcbd_power_agrees_with_simulation():
    # simulation: 4000 RCBD data sets with the given means, block effects and sigma; the share
    # of F tests rejecting at 5 % must sit within a 99.9 % binomial band of the computed power
    means, sigma, b = np.array([0.0, 0.3, 0.6]), 0.7, 8
    res = rcbd_power(means, sigma, b)
    rng = np.random.default_rng(99)
    n = 4000
    a = len(means)
    Y = means[None, :, None] + rng.normal(0, 3, (n, 1, b)) + rng.normal(0, sigma, (n, a, b))
    tm, bm, g = Y.mean(2, keepdims=True), Y.mean(1, keepdims=True), Y.mean((1, 2), keepdims=True)
    ss_t = b * ((tm - g) ** 2).sum((1, 2))
    ss_e = ((Y - tm - bm + g) ** 2).sum((1, 2))
    F = (ss_t / (a - 1)) / (ss_e / ((a - 1) * (b - 1)))
    hits = int((F > stats.f.ppf(0.95, a - 1, (a - 1) * (b - 1))).sum())
    lo, hi = stats.binom.ppf([0.0005, 0.9995], n, res.power)
    assert lo <= hits <= hi


def test_blocks_for_rcbd_is_smallest():
    means, sigma = [10.0, 10.5, 11.0], 0.8
    plan = blocks_for_rcbd(means, sigma, power=0.9)
    from statsmodels.stats.power import FTestPower

    m = np.asarray(means)
    f = math.sqrt(((m - m.mean()) ** 2).mean()) / sigma
    # statsmodels FTestPower (reference library) judges the answer (see the note above on its df names)
    pw = lambda b: FTestPower().power(effect_size=f, df_num=2 * (b - 1), df_denom=2, alpha=0.05, ncc=b)
    assert pw(plan.blocks_needed) >= 0.9 > pw(plan.blocks_needed - 1)
    assert plan.achieved_power == pytest.approx(pw(plan.blocks_needed), rel=1e-8)


def test_blocks_for_dunnett_reduces_to_paired_with_one_comparison():
    # one comparison: Dunnett is the t test on (b-1) df and the paired sd is sigma sqrt 2
    # (common practice for the RCBD with two treatments)
    d2 = blocks_for_dunnett(1.0, 0.8, treatments=2)
    assert d2.blocks_needed == blocks_for_delta(1.0, 0.8 * math.sqrt(2)).blocks_needed
    d4 = blocks_for_dunnett(1.0, 0.8, treatments=4)
    assert d4.blocks_needed > d2.blocks_needed
    assert d4.residual_df == 3 * (d4.blocks_needed - 1)


def test_dunnett_power_agrees_with_simulation():
    # simulation: one treatment shifted by delta; share of data sets where its Dunnett statistic
    # exceeds the planned critical value, within a 99.9 % binomial band of the achieved power
    delta, sigma, a = 1.0, 0.8, 4
    plan = blocks_for_dunnett(delta, sigma, treatments=a)
    b, c = plan.blocks_needed, plan.critical_value
    rng = np.random.default_rng(7)
    n = 3000
    shift = np.array([0.0, delta, 0.0, 0.0])
    Y = shift[None, :, None] + rng.normal(0, 2, (n, 1, b)) + rng.normal(0, sigma, (n, a, b))
    tm, bm, g = Y.mean(2, keepdims=True), Y.mean(1, keepdims=True), Y.mean((1, 2), keepdims=True)
    mse = ((Y - tm - bm + g) ** 2).sum((1, 2)) / ((a - 1) * (b - 1))
    t = (tm[:, 1, 0] - tm[:, 0, 0]) / np.sqrt(2 * mse / b)
    hits = int((np.abs(t) > c).sum())
    lo, hi = stats.binom.ppf([0.0005, 0.9995], n, plan.achieved_power)
    assert lo <= hits <= hi


def test_planning_errors():
    with pytest.raises(InputError, match="effect"):
        blocks_for_paired(0.0)
    with pytest.raises(InputError, match="power"):
        blocks_for_paired(0.5, power=0.01)
    with pytest.raises(InputError, match="alternative"):
        blocks_for_paired(0.5, alternative="sideways")
    with pytest.raises(InputError, match="sd"):
        blocks_for_delta(1.0, 0.0)
    with pytest.raises(DesignError, match="all equal"):
        blocks_for_rcbd([3.0, 3.0, 3.0], 1.0)
    with pytest.raises(DesignError, match="at least 2"):
        rcbd_power([1.0], 1.0, 5)
    with pytest.raises(DesignError, match="treatments"):
        blocks_for_dunnett(1.0, 1.0, treatments=1)
    with pytest.raises(DesignError, match="do not reach"):
        blocks_for_paired(1e-4)


def test_small_answers_warn():
    plan = blocks_for_paired(3.0)
    # common practice: fewer than 6 blocks leave the assumption checks without power
    assert plan.blocks_needed < 6 and plan.warnings


def test_more_blocks_counts_what_a_slice_lacks():
    assert more_blocks(24, 18) == 6
    assert more_blocks(6, 18) == 0  # holds enough: nothing more
    assert more_blocks(18, 18) == 0
    with pytest.raises(InputError, match="whole number"):
        more_blocks(24, -1)
    with pytest.raises(InputError, match="whole number"):
        more_blocks(2.5, 1)


def test_every_plan_carries_its_cautions():
    # plan --from adds a caution about its source to whichever plan it made
    for plan in (blocks_for_paired(0.5), blocks_for_rcbd([10.0, 10.5, 11.0], 0.8), rcbd_power([10.0, 11.0], 0.8, 8)):
        assert isinstance(plan.warnings, list)
        assert isinstance(json.loads(json.dumps(plan.to_dict()))["warnings"], list)
        assert "warnings" not in plan.table().columns


@pytest.mark.parametrize("effect", [8.0, 3 / 0.3757, 20.0])
def test_a_large_effect_plans_without_library_warnings(effect):
    # statsmodels' root finder gives up on such effects (it warns and returns NaN); the plan answers
    # by itself, and the warning would only be noise on the user's screen
    import warnings

    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        plan = blocks_for_paired(effect)
    assert [str(w.message) for w in seen] == []
    # the smallest count, by scipy's upper tail alone: the lower tail P(T < -c) is at most
    # P(Z < -nc), below 1e-25 here (T < -c needs Z + nc < 0)
    def upper(n):
        return stats.nct.sf(stats.t.ppf(0.975, n - 1), n - 1, effect * math.sqrt(n))

    n = plan.blocks_needed
    assert upper(n) >= 0.8 and (n == 2 or upper(n - 1) < 0.8)
    assert plan.achieved_power == pytest.approx(upper(n), abs=1e-12)
