"""Checks of warehouse.analyze.lean (the blocktest's tests without scipy.stats) against the
scipy.stats and scipy.optimize functions they stand in for.

Each check names its reference. The samples are invented (random, with ties, offsets and
skew); what is checked is that the reference library gives the same numbers on the same data.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import optimize, special, stats

from warehouse.analyze import lean
from warehouse.analyze.anova import boxcox_loglik, rcbd_anova

from .kit import invented_rcbd

SW_SIZES = (3, 4, 5, 6, 7, 11, 12, 13, 20, 50, 500, 5000)


def _samples(rng, n: int):
    """Normal, skewed, tied (rounded) and far-from-zero samples of n values."""
    yield rng.normal(size=n)
    yield rng.exponential(size=n)
    yield np.round(rng.normal(size=n) * 2)
    yield rng.standard_t(2, size=n) * 1e6 + 1e9


def _scipy_shapiro(x):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # its note that p is rough above 5000 values
        return stats.shapiro(x)


# --------------------------------------------------------------------------- Shapiro-Wilk


@pytest.mark.parametrize("n", SW_SIZES)
def test_shapiro_wilk_equals_scipy(n):
    rng = np.random.default_rng(n)
    for _ in range(3 if n == 5000 else 25):
        for x in _samples(rng, n):
            if np.ptp(x) == 0:
                continue
            w, p = lean.shapiro_wilk(x)
            ref = _scipy_shapiro(x)
            # reference: scipy.stats.shapiro (the same AS R94, Royston 1995); measured agreement
            # about 1e-13 in W and 2e-10 in p (its normal tail is Hill's AS 66, ours scipy.special.ndtr)
            assert w == pytest.approx(float(ref.statistic), rel=1e-12)
            assert p == pytest.approx(float(ref.pvalue), rel=1e-9, abs=1e-14)


def test_shapiro_wilk_of_three_values_is_exact():
    # Royston (1995), AS R94, n = 3: p = (6/pi)(asin(sqrt(W)) - pi/3); W = 1 for equal gaps,
    # W = 3/4 (p = 0) when two of the three values tie (common practice: the extremes of W at n = 3)
    assert lean.shapiro_wilk([1.0, 2.0, 3.0]) == pytest.approx((1.0, 1.0), rel=1e-12)
    w, p = lean.shapiro_wilk([0.0, 0.0, 1.0])
    assert w == pytest.approx(0.75, rel=1e-12) and p == pytest.approx(0.0, abs=1e-12)
    x = [0.2, 1.7, 2.0]
    w, p = lean.shapiro_wilk(x)
    assert p == pytest.approx(6 / math.pi * (math.asin(math.sqrt(w)) - math.pi / 3), rel=1e-12)
    assert (w, p) == pytest.approx(tuple(_scipy_shapiro(x)), rel=1e-12)  # reference: scipy.stats.shapiro


@pytest.mark.parametrize("n", (3, 4, 5, 8, 12, 30, 501))
def test_shapiro_wilk_of_values_on_the_normal_scores_is_one(n):
    a = lean._sw_coefficients(n)
    on_scores = np.concatenate([-a, np.zeros(n % 2), a[::-1]])
    for y in (on_scores, 7.0 + 3.0 * on_scores):
        w, p = lean.shapiro_wilk(y)
        ref = _scipy_shapiro(y)  # reference: scipy.stats.shapiro (W = 1 but for rounding, p = 1)
        assert w == pytest.approx(float(ref.statistic), abs=1e-12) and w == pytest.approx(1.0, abs=1e-12)
        # at n = 3, p = (6/pi)(asin(sqrt(W)) - pi/3) turns W's last bit into 4e-8
        assert p == pytest.approx(float(ref.pvalue), abs=1e-12) and p == pytest.approx(1.0, abs=1e-6)


def test_shapiro_wilk_ignores_order_location_and_scale():
    rng = np.random.default_rng(7)
    x = rng.gamma(2.0, size=40)
    w, p = lean.shapiro_wilk(x)
    # W is a correlation of the sorted values with fixed coefficients (Shapiro and Wilk 1965)
    assert lean.shapiro_wilk(rng.permutation(x)) == (w, p)
    assert lean.shapiro_wilk(3e8 + 250.0 * x) == pytest.approx((w, p), rel=1e-9)


def test_shapiro_wilk_of_equal_values_is_not_a_number_and_of_two_is_refused():
    assert all(math.isnan(v) for v in lean.shapiro_wilk([4.0] * 10))
    with pytest.raises(ValueError):
        lean.shapiro_wilk([1.0, 2.0])


def test_normal_scores_are_beasley_springer_within_their_accuracy():
    # the Shapiro-Wilk scores ask p = (i - 3/8) / (n + 1/4): 1e-7 and up for up to 6 million values
    p = np.linspace(1e-7, 1 - 1e-7, 200001)
    got = lean._normal_quantile_as111(p)
    # reference: scipy.special.ndtri. Beasley and Springer (1977), AS 111: our measurement of its
    # error is 3.1e-5 at most in the tails and 3.0e-9 in the centre
    assert np.max(np.abs(got - special.ndtri(p))) < 4e-5
    centre = np.abs(p - 0.5) <= 0.42
    assert np.max(np.abs(got[centre] - special.ndtri(p[centre]))) < 4e-9


# --------------------------------------------------------------------------- spread tests


def _groups(rng, rep: int) -> list[np.ndarray]:
    k = int(rng.integers(2, 8))
    out = [rng.normal(size=int(rng.integers(1, 30))) * rng.uniform(0.1, 5) for _ in range(k)]
    return [np.round(g) for g in out] if rep % 3 == 0 else out  # every third with many ties


def test_fligner_killeen_and_brown_forsythe_equal_scipy():
    rng = np.random.default_rng(19)
    for rep in range(300):
        gs = _groups(rng, rep)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # a group of one value has no spread
            pairs = [(lean.fligner_killeen(*gs), stats.fligner(*gs)),  # reference: scipy.stats.fligner
                     (lean.brown_forsythe(*gs), stats.levene(*gs, center="median"))]  # reference: scipy.stats.levene
        for mine, ref in pairs:
            np.testing.assert_allclose(mine, (ref.statistic, ref.pvalue), rtol=1e-12, equal_nan=True)


def test_spread_tests_of_groups_without_spread_are_not_a_number_with_a_warning():
    # scipy warns on 0/0 here too, and blocktest turns such a warning into its caution about
    # undefined statistics (analyses/common.numeric_warnings)
    flat = [np.array([1.0, 1.0, 1.0]), np.array([2.0, 2.0]), np.array([5.0, 5.0, 5.0])]
    for mine, ref in ((lean.fligner_killeen, stats.fligner),
                      (lean.brown_forsythe, lambda *g: stats.levene(*g, center="median"))):
        for f in (mine, ref):
            # numpy's own settings named, since lifelines (imported by test_censored) leaves them at ignore
            with warnings.catch_warnings(record=True) as seen, np.errstate(divide="warn", invalid="warn"):
                warnings.simplefilter("always")
                stat, p = f(*flat)
            assert math.isnan(stat) and math.isnan(p)
            assert any(issubclass(w.category, RuntimeWarning) for w in seen)


# --------------------------------------------------------------------------- ranks and tails


def test_average_ranks_equal_scipy_rankdata():
    rng = np.random.default_rng(5)
    for _ in range(200):
        shape = tuple(int(v) for v in rng.integers(1, 9, size=int(rng.integers(1, 4))))
        x = rng.integers(0, 4, size=shape).astype(float) * rng.choice([1.0, 0.1, -1e9])
        # reference: scipy.stats.rankdata(method="average"), flattened and along each axis
        np.testing.assert_array_equal(lean.average_ranks(x), stats.rankdata(x))
        for axis in range(x.ndim):
            np.testing.assert_array_equal(lean.average_ranks(x, axis=axis), stats.rankdata(x, axis=axis))


def test_tails_equal_scipy_distributions():
    rng = np.random.default_rng(23)
    x = np.concatenate([[0.0, 1e-300, 0.5, 1.0, 3.0, 10.0, 100.0, 1e4], rng.exponential(5.0, 200)])
    for dfn, dfd in ((1, 1), (3, 24), (0.5, 7.5), (100, 1000)):
        np.testing.assert_allclose(lean.f_sf(x, dfn, dfd), stats.f.sf(x, dfn, dfd), rtol=1e-14)  # reference: scipy.stats.f
    for df in (1, 2, 5, 50.5):
        np.testing.assert_allclose(lean.chi2_sf(x, df), stats.chi2.sf(x, df), rtol=1e-14)  # reference: scipy.stats.chi2
    for n in range(1, 40):
        k = np.arange(n + 1)
        # reference: scipy.stats.binom
        np.testing.assert_allclose(lean.binom_cdf(k, n, 0.5), stats.binom.cdf(k, n, 0.5), rtol=1e-13)


# --------------------------------------------------------------------------- bounded minimum and Box-Cox


@pytest.mark.parametrize("f, lo, hi", [
    (lambda x: (x - 0.3) ** 2, -3.0, 3.0), (math.cos, -1.0, 2.0), (lambda x: abs(x - 1.234567), 0.0, 3.0),
    (lambda x: x ** 4 - x, -3.0, 3.0), (lambda x: math.exp(x) - 3 * x, 0.5, 0.6), (lambda x: -x, 0.0, 1.0)])
def test_bounded_minimum_steps_like_scipy_minimize_scalar(f, lo, hi):
    x, fx = lean.bounded_minimum(f, lo, hi, xatol=1e-6)
    # reference: scipy.optimize.minimize_scalar(method="bounded"), Brent's method as well
    ref = optimize.minimize_scalar(f, bounds=(lo, hi), method="bounded", options={"xatol": 1e-6})
    assert x == pytest.approx(float(ref.x), abs=1e-12)
    assert fx == f(x)


def _boxcox_lambda_through_scipy(Y: np.ndarray) -> float:
    """The Box-Cox search as anova.py made it before lean.py: the same grid, then
    scipy.optimize.minimize_scalar (bounded) between the best grid point's neighbours."""
    grid = np.linspace(-3.0, 3.0, 61)
    ll = np.array([boxcox_loglik(g, Y) for g in grid])
    k = int(np.nanargmax(ll))
    res = optimize.minimize_scalar(lambda x: -boxcox_loglik(x, Y), bounds=(grid[max(k - 1, 0)], grid[min(k + 1, 60)]),
                                   method="bounded", options={"xatol": 1e-6})
    return float(res.x) if -res.fun >= ll[k] else float(grid[k])


def test_boxcox_lambda_equals_the_search_through_scipy_optimize():
    rng = np.random.default_rng(29)
    for seed in range(40):
        obs = invented_rcbd(seed, a=int(rng.integers(2, 7)), b=int(rng.integers(3, 12)))
        obs["value"] = np.exp((obs["value"] - 50) * rng.uniform(0.05, 1.0)) * rng.uniform(0.01, 100)
        res = rcbd_anova(obs, transform="boxcox")
        Y = obs.pivot(index="treatment", columns="block", values="value").loc[res.treatment_names, res.block_names]
        # reference: scipy.optimize.minimize_scalar on the same profile likelihood
        assert res.transform["boxcox_lambda"] == pytest.approx(_boxcox_lambda_through_scipy(Y.to_numpy()), abs=1e-12)


def test_bounded_minimum_finds_scipy_boxcox_normmax_on_one_sample():
    rng = np.random.default_rng(31)
    for _ in range(20):
        x = rng.lognormal(0.0, rng.uniform(0.2, 1.0), size=int(rng.integers(10, 200)))
        lam, _ = lean.bounded_minimum(lambda t, x=x: -stats.boxcox_llf(t, x), -3.0, 3.0, xatol=1e-8)
        # reference: scipy.stats.boxcox_normmax (maximum likelihood) on the same sample
        assert lam == pytest.approx(stats.boxcox_normmax(x, method="mle"), abs=1e-5)
