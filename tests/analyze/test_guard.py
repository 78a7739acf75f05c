"""analyze.guard: one-sided Dunnett verdicts against a margin, on a tidy table.

The bound is checked against an independent Dunnett computation: scipy.stats.dunnett (one-way) on
a design with the same residual degrees of freedom gives the one-sided critical value, and
statsmodels' OLS of value ~ treatment + block gives the residual mean square; the bound is then
assembled by hand. Verdicts are checked on simulated tables with a known truth.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from warehouse.analyze.guard import blocks_to_settle, guard_vs_baseline, margin_in_units
from warehouse.errors import DesignError, InputError

from .kit import from_matrix, sm_anova


def _blocks(a: int, b: int, shifts, sd: float = 1.0, seed: int = 1) -> pd.DataFrame:
    """Simulated block design: block level + treatment shift + normal noise (known truth)."""
    rng = np.random.default_rng(seed)
    level = rng.normal(50, 10, b)
    Y = np.array([level + shifts[i] + rng.normal(0, sd, b) for i in range(a)])
    return from_matrix(Y)


def _scipy_one_sided_c(groups: int, per_group: int, alternative: str) -> float:
    """The one-sided Dunnett critical value from scipy.stats.dunnett: its interval's half-width over
    the standard error of a one-way design with `groups` - 1 treatments and a control, `per_group`
    values each (df = groups (per_group - 1))."""
    rng = np.random.default_rng(11)
    control = rng.normal(0, 1, per_group)
    samples = [rng.normal(0, 1, per_group) for _ in range(groups - 1)]
    ref = stats.dunnett(*samples, control=control, alternative=alternative, rng=np.random.default_rng(5))
    ci = ref.confidence_interval(0.95)
    pooled = np.mean([np.var(s, ddof=1) for s in [control, *samples]])
    se = math.sqrt(2 * pooled / per_group)
    diff = np.array([s.mean() - control.mean() for s in samples])
    half = (diff - ci.low) / se if alternative == "greater" else (ci.high - diff) / se
    assert np.allclose(half, half[0])
    return float(half[0])


# (treatments a, blocks b) with a one-way design of a groups x n values on the same df:
# a (n - 1) = (a - 1)(b - 1)
SAME_DF = [(3, 7, 5), (4, 9, 7), (2, 11, 6)]


@pytest.mark.parametrize("a, b, n", SAME_DF)
@pytest.mark.parametrize("worse", ["higher", "lower"])
def test_the_bound_agrees_with_scipy_dunnett_and_statsmodels(a, b, n, worse):
    obs = _blocks(a, b, [0.0, 0.4, -0.3, 1.0][:a], sd=0.8, seed=a * 10 + b)
    res = guard_vs_baseline(obs, "t0", worse=worse, margin=0.5)
    # the residual mean square of the additive block model, from statsmodels
    aov = sm_anova(obs, "value ~ C(treatment) + C(block)")
    mse = float(aov.loc["Residual", "mean_sq"])
    assert res.residual_df == (a - 1) * (b - 1) == a * (n - 1) == int(aov.loc["Residual", "df"])
    assert res.residual_ms == pytest.approx(mse, rel=1e-9)
    # the one-sided critical value from scipy.stats.dunnett on the same df (scipy integrates by
    # quasi-Monte Carlo, so about three digits)
    c = _scipy_one_sided_c(a, n, "greater" if worse == "higher" else "less")
    assert res.critical_value == pytest.approx(c, abs=3e-3)
    means = obs.groupby("treatment")["value"].mean()
    sign = 1.0 if worse == "higher" else -1.0
    for r in res.rows:
        d = means[r["treatment"]] - means["t0"]
        assert r["difference"] == pytest.approx(d)
        assert r["worse_by"] == pytest.approx(sign * d)
        assert r["bound"] == pytest.approx(sign * d + c * math.sqrt(2 * mse / b), abs=4e-3)
        assert r["lower_bound"] == pytest.approx(sign * d - c * math.sqrt(2 * mse / b), abs=4e-3)


def test_one_treatment_is_a_one_sided_t_bound():
    # with one comparison Dunnett is the t test: bound = d + t(0.95, b - 1) sd_d / sqrt(b), the
    # paired t bound (common practice; scipy.stats.t)
    obs = _blocks(2, 8, [0.0, 0.3], sd=0.5, seed=4)
    res = guard_vs_baseline(obs, "t0", worse="higher", margin=1.0)
    wide = obs.pivot(index="block", columns="treatment", values="value")
    d = wide["t1"] - wide["t0"]
    bound = d.mean() + stats.t.ppf(0.95, 7) * d.std(ddof=1) / math.sqrt(8)
    assert res.rows[0]["bound"] == pytest.approx(bound, rel=1e-6)


def test_verdicts_recover_a_known_truth():
    # simulated, 20 campaigns: t1 equal to the baseline, t2 worse by 3, t3 worse by exactly the
    # margin 0.5 (sd 0.2, 16 blocks: the bounds are about 0.15 wide)
    open_ = 0
    for seed in range(20):
        obs = _blocks(4, 16, [0.0, 0.0, 3.0, 0.5], sd=0.2, seed=seed)
        got = {r["treatment"]: r for r in guard_vs_baseline(obs, "t0", worse="higher", margin=0.5).rows}
        assert got["t1"]["verdict"] == "not-worse" and got["t1"]["more_blocks"] == 0
        assert got["t2"]["verdict"] == "worse" and got["t2"]["more_blocks"] == 0
        open_ += got["t3"]["verdict"] == "inconclusive"
        if got["t3"]["verdict"] == "inconclusive":
            assert got["t3"]["more_blocks"] is None or got["t3"]["more_blocks"] > 0
    # on the margin, either one-sided verdict is an error of at most 5 % each
    assert open_ >= 17
    # for a metric where higher is better the same numbers read the other way
    flipped = guard_vs_baseline(obs, "t0", worse="lower", margin=0.5)
    assert {r["treatment"]: r["verdict"] for r in flipped.rows} == {"t1": "not-worse", "t2": "not-worse",
                                                                     "t3": "not-worse"}


def test_verdicts_agree_with_the_adjusted_p_values():
    obs = _blocks(4, 10, [0.0, 0.1, 2.0, 0.6], sd=0.7, seed=3)
    res = guard_vs_baseline(obs, "t0", worse="higher", margin=0.5)
    for r in res.rows:
        assert (r["verdict"] == "worse") == (r["p_worse"] < 0.05)
        assert (r["verdict"] == "not-worse") == (r["p_not_worse"] < 0.05)


def test_margin_in_units_and_in_percent():
    obs = _blocks(3, 8, [0.0, 0.8, -0.2], sd=0.3, seed=2)
    base = obs[obs["treatment"] == "t0"]["value"].mean()
    pct = guard_vs_baseline(obs, "t0", worse="higher", margin="2%")
    units = guard_vs_baseline(obs, "t0", worse="higher", margin=0.02 * abs(base))
    assert pct.margin_units == pytest.approx(0.02 * abs(base))
    assert [r["verdict"] for r in pct.rows] == [r["verdict"] for r in units.rows]
    assert [r["bound"] for r in pct.rows] == pytest.approx([r["bound"] for r in units.rows])
    # the margin moves the verdict and nothing else: 0.8 worse is inside 3 but not inside 0.1
    wide = guard_vs_baseline(obs, "t0", worse="higher", margin="3")
    narrow = guard_vs_baseline(obs, "t0", worse="higher", margin="0.1")
    assert wide.rows[0]["verdict"] == "not-worse" and narrow.rows[0]["verdict"] == "worse"
    assert wide.rows[0]["bound"] == narrow.rows[0]["bound"]
    assert margin_in_units("5%", -40.0) == pytest.approx(2.0)  # of |baseline mean|
    for bad in ("abc", "-1", "-2%", "nan", "", "1%%"):
        with pytest.raises(InputError):
            margin_in_units(bad, 10.0)


def test_more_blocks_is_where_the_half_width_clears_the_gap():
    obs = _blocks(3, 6, [0.0, 0.45, 0.0], sd=0.6, seed=8)
    res = guard_vs_baseline(obs, "t0", worse="higher", margin=0.5)
    r = res.rows[0]
    assert r["verdict"] == "inconclusive" and r["more_blocks"] > 0
    gap = abs(0.5 - r["worse_by"])
    b = 6 + r["more_blocks"]

    def half(blocks):  # the one-sided Dunnett half-width with b blocks, by scipy.stats.multivariate_t
        df = 2 * (blocks - 1)
        mvt = stats.multivariate_t(shape=[[1, 0.5], [0.5, 1]], df=df)
        from scipy.optimize import brentq

        c = brentq(lambda x: mvt.cdf([x, x], random_state=1, maxpts=200000) - 0.95, 1.0, 4.0)
        return c * math.sqrt(2 * res.residual_ms / blocks)

    assert half(b) < gap * 1.002 and half(b - 1) > gap * 0.998
    # bounds shrink as 1/sqrt(blocks): with the critical value held fixed, the plain rule asks for
    # at least as many
    plain = math.ceil(6 * ((r["bound"] - r["worse_by"]) / gap) ** 2)
    assert b <= plain
    # on the margin itself no number of blocks settles it
    assert blocks_to_settle(0.0, 1.0, 2, 6) is None


def test_an_exact_fit_gives_bounds_equal_to_the_estimates():
    Y = np.array([[1.0, 2.0, 3.0], [1.2, 2.2, 3.2], [2.0, 3.0, 4.0]])
    res = guard_vs_baseline(from_matrix(Y), "t0", worse="higher", margin=0.5)
    assert [r["verdict"] for r in res.rows] == ["not-worse", "worse"]
    assert res.rows[0]["bound"] == pytest.approx(0.2)
    assert any("fits exactly" in w for w in res.warnings)


def test_refusals():
    obs = _blocks(3, 5, [0.0, 0.0, 0.0])
    with pytest.raises(DesignError):
        guard_vs_baseline(obs, "t9", margin=1)
    with pytest.raises(InputError):
        guard_vs_baseline(obs, "t0", worse="sideways", margin=1)
    with pytest.raises(InputError):
        guard_vs_baseline(obs, "t0", margin=1, confidence=1.5)
