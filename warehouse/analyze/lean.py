"""The few tests and tails a blocktest needs, with numpy and scipy.special only.

Importing scipy.stats (and the scipy.optimize it pulls in) costs about half a second of a cold
``blockyard blocktest``; scipy.special loads in a tenth of that. So the blocked ANOVA's residual
checks, rank tests and failure tests take their statistics from here: Shapiro-Wilk (Royston's
AS R94), Fligner-Killeen and Brown-Forsythe, midranks, the Box-Cox search's bounded minimizer
(Brent's), and the chi-square, F and binomial tails. tests/analyze/test_lean.py holds each one
beside scipy.stats or scipy.optimize; the other analyses (versus, guard, plan, noise) keep
scipy.stats, imported inside their functions.
"""
from __future__ import annotations

import math

import numpy as np
from scipy import special

# --------------------------------------------------------------------------- tails


def f_sf(x, dfn, dfd):
    """Upper tail P(F > x) of the F distribution on (dfn, dfd) degrees of freedom."""
    return special.fdtrc(dfn, dfd, x)


def chi2_sf(x, df):
    """Upper tail P(X > x) of the chi-square distribution on df degrees of freedom."""
    return special.chdtrc(df, x)


def binom_cdf(k, n, p):
    """P(X <= k) for X ~ Binomial(n, p)."""
    return special.bdtr(k, n, p)


# --------------------------------------------------------------------------- ranks


def average_ranks(x, axis: int | None = None) -> np.ndarray:
    """Ranks from 1, ties sharing the mean of the ranks they span (midranks), of the flattened
    values (``axis=None``) or along ``axis``. For finite values; the same ranks as
    scipy.stats.rankdata(x, method="average")."""
    x = np.asarray(x, dtype=float)
    if axis is None:
        return average_ranks(x.ravel(), axis=0)
    x = np.moveaxis(x, axis, -1)
    n = x.shape[-1]
    order = np.argsort(x, axis=-1, kind="stable")
    s = np.take_along_axis(x, order, axis=-1)
    idx = np.broadcast_to(np.arange(n), s.shape)
    starts = np.ones(s.shape, dtype=bool)  # the first of each run of equal values
    starts[..., 1:] = s[..., 1:] != s[..., :-1]
    ends = np.ones(s.shape, dtype=bool)  # the last of each run
    ends[..., :-1] = starts[..., 1:]
    first = np.maximum.accumulate(np.where(starts, idx, 0), axis=-1)
    last = np.flip(np.minimum.accumulate(np.flip(np.where(ends, idx, n - 1), axis=-1), axis=-1), axis=-1)
    ranks = np.empty(s.shape)
    np.put_along_axis(ranks, order, (first + last) / 2.0 + 1.0, axis=-1)
    return np.moveaxis(ranks, -1, axis)


# --------------------------------------------------------------------------- Shapiro-Wilk

# Royston (1995), Applied Statistics 44(4), Algorithm AS R94: the polynomials for the two
# largest coefficients (in 1/sqrt(n)), and for the mean and log standard deviation of the
# normalized W (in n for n <= 11, in log n above), lowest power first.
_C1 = (0.0, 0.221157, -0.147981, -2.07119, 4.434685, -2.706056)
_C2 = (0.0, 0.042981, -0.293762, -1.752461, 5.682633, -3.582633)
_G = (-2.273, 0.459)
_C3 = (0.544, -0.39978, 0.025054, -6.714e-4)
_C4 = (1.3822, -0.77857, 0.062767, -0.0020322)
_C5 = (-1.5861, -0.31082, -0.083751, 0.0038915)
_C6 = (-0.4803, -0.082676, 0.0030302)


def _poly(c: tuple, x: float) -> float:
    """c[0] + c[1] x + c[2] x^2 + ..., by Horner's rule."""
    out = 0.0
    for coef in reversed(c[1:]):
        out = (out + coef) * x
    return c[0] + out


def _normal_quantile_as111(p: np.ndarray) -> np.ndarray:
    """Phi^-1(p) for 0 < p < 1 by Beasley and Springer (1977), Applied Statistics 26, Algorithm
    AS 111: a ratio of polynomials in (p - 1/2)^2 for |p - 1/2| <= 0.42, in sqrt(-log(tail))
    beyond (absolute error against scipy.special.ndtri below 3e-9 in the centre and 4e-5 in the
    tails, for p in [1e-7, 1 - 1e-7]). The Shapiro-Wilk normal scores come from it, not from
    ndtri, because scipy.stats.shapiro's AS R94 code takes them from it: with ndtri, W differed
    from scipy's by up to 4e-8 and p by up to 2e-6 (relative) near n = 5000; with it, by 1e-13
    and 2e-10 (tests/analyze/test_lean.py)."""
    p = np.asarray(p, dtype=float)
    q = p - 0.5
    r = q * q
    centre = q * (((-25.44106049637 * r + 41.39119773534) * r - 18.61500062529) * r + 2.50662823884) / (
        (((3.13082909833 * r - 21.06224101826) * r + 23.08336743743) * r - 8.47351093090) * r + 1.0)
    s = np.sqrt(-np.log(np.minimum(p, 1.0 - p)))
    tail = (((2.32121276858 * s + 4.85014127135) * s - 2.29796479134) * s - 2.78718931138) / (
        (1.63706781897 * s + 3.54388924762) * s + 1.0)
    return np.where(np.abs(q) <= 0.42, centre, np.where(q < 0, -tail, tail))


def _sw_coefficients(n: int) -> np.ndarray:
    """The n // 2 Shapiro-Wilk coefficients a_1 >= a_2 >= ... of the largest values (AS R94):
    Blom's normal scores m_i = Phi^-1((i - 3/8) / (n + 1/4)), normalized, with the first one
    (two when n > 5) from Royston's polynomials in 1/sqrt(n)."""
    if n == 3:
        return np.array([math.sqrt(0.5)])
    half = n // 2
    # positive, largest first
    m = -_normal_quantile_as111((np.arange(1, half + 1) - 0.375) / (n + 0.25))
    summ2 = 2.0 * float((m ** 2).sum())
    rsn = 1.0 / math.sqrt(n)
    a1 = _poly(_C1, rsn) + m[0] / math.sqrt(summ2)
    if n > 5:
        a2 = _poly(_C2, rsn) + m[1] / math.sqrt(summ2)
        fac = math.sqrt((summ2 - 2.0 * m[0] ** 2 - 2.0 * m[1] ** 2) / (1.0 - 2.0 * a1 ** 2 - 2.0 * a2 ** 2))
        a = m / fac
        a[:2] = a1, a2
    else:
        fac = math.sqrt((summ2 - 2.0 * m[0] ** 2) / (1.0 - 2.0 * a1 ** 2))
        a = m / fac
        a[0] = a1
    return a


def shapiro_wilk(x) -> tuple[float, float]:
    """Shapiro-Wilk W and its p value (small W: not normal), for 3 to 5000 values.

    Royston (1995), Applied Statistics 44(4), Algorithm AS R94: W is the squared correlation of
    the sorted values with the coefficients of :func:`_sw_coefficients` (computed as
    1 - (sqrt(SS_a SS_x) - S_ax)(sqrt(SS_a SS_x) + S_ax) / (SS_a SS_x), which keeps the digits of
    a W near 1); for n = 3 the p value is exact, (6/pi)(asin(sqrt(W)) - pi/3); above, log(1 - W)
    (for n <= 11 first -log(gamma - log(1 - W))) is taken as normal with Royston's polynomial mean
    and standard deviation. Values all equal give (nan, nan), not a W. Above 5000 values the p
    value is an extrapolation of the polynomials (as in scipy.stats.shapiro, which warns).
    """
    y = np.sort(np.asarray(x, dtype=float).ravel())
    n = y.size
    if n < 3:
        raise ValueError("Shapiro-Wilk needs at least 3 values")
    y = y - y[n // 2]  # centred near the median, so that large values keep their digits
    spread = y[-1] - y[0]
    if not spread > 0:  # scipy.stats.shapiro says W = 1, p = 1 (with a warning) below a range of 1e-19
        return math.nan, math.nan
    a = _sw_coefficients(n)
    coef = np.zeros(n)  # the coefficient of each sorted value: -a_i low, +a_i high, 0 in the middle
    coef[: n // 2] = -a
    coef[n - n // 2:] = a[::-1]
    z = y / spread
    ca, zx = coef - coef.mean(), z - z.mean()
    ssa, ssx, sax = float((ca ** 2).sum()), float((zx ** 2).sum()), float((ca * zx).sum())
    root = math.sqrt(ssa * ssx)
    w1 = (root - sax) * (root + sax) / (ssa * ssx)
    w = 1.0 - w1
    if n == 3:
        return w, max(6.0 / math.pi * (math.asin(math.sqrt(min(w, 1.0))) - math.pi / 3.0), 0.0)
    if w1 <= 0.0:  # the values lie on the normal scores (W = 1 but for rounding): log(1 - W) is -inf
        return w, 1.0
    t = math.log(w1)
    if n <= 11:
        gamma = _poly(_G, n)
        if t >= gamma:
            return w, 1e-99  # beyond the approximation's reach: W is as small as it gets
        t = -math.log(gamma - t)
        mean, sd = _poly(_C3, n), math.exp(_poly(_C4, n))
    else:
        ln = math.log(n)
        mean, sd = _poly(_C5, ln), math.exp(_poly(_C6, ln))
    return w, float(special.ndtr(-(t - mean) / sd))


# --------------------------------------------------------------------------- spread across groups


def fligner_killeen(*groups) -> tuple[float, float]:
    """Fligner-Killeen test of equal spread across groups, median-centred.

    Each value's distance from its group's median is ranked over all N values (midranks); the
    scores a = Phi^-1(1/2 + rank / (2(N + 1))) give X^2 = sum_i n_i (abar_i - abar)^2 / s_a^2
    (s_a^2 the variance of all N scores), referred to chi-square on k - 1 degrees of freedom.
    Fligner and Killeen (1976), J. Amer. Statist. Assoc. 71; Conover, Johnson and Johnson (1981),
    Technometrics 23. Scores that all tie give nan (numpy warns, as scipy.stats.fligner does).
    """
    groups = [np.asarray(g, dtype=float).ravel() for g in groups]
    sizes = np.array([g.size for g in groups])
    dist = np.concatenate([np.abs(g - np.median(g)) for g in groups])
    scores = special.ndtri(average_ranks(dist) / (2.0 * (dist.size + 1.0)) + 0.5)
    means = np.array([part.mean() for part in np.split(scores, np.cumsum(sizes)[:-1])])
    stat = (sizes * (means - scores.mean()) ** 2).sum() / np.var(scores, ddof=1)
    return float(stat), float(chi2_sf(stat, len(groups) - 1))


def brown_forsythe(*groups) -> tuple[float, float]:
    """Levene's test of equal spread with the group medians as centres (Brown and Forsythe):
    the one-way ANOVA F of z_ij = |y_ij - median_i|, on k - 1 and N - k degrees of freedom.
    Brown and Forsythe (1974), J. Amer. Statist. Assoc. 69. Distances that are all equal within
    each group give nan (numpy warns, as scipy.stats.levene does)."""
    z = [np.abs(np.asarray(g, dtype=float).ravel() - np.median(g)) for g in groups]
    sizes = np.array([zi.size for zi in z])
    k, total = len(z), int(sizes.sum())
    means = np.array([zi.mean() for zi in z])
    grand = (sizes * means).sum() / total
    between = (sizes * (means - grand) ** 2).sum()
    within = sum(((zi - m) ** 2).sum() for zi, m in zip(z, means))
    stat = (total - k) * between / ((k - 1.0) * within)
    return float(stat), float(f_sf(stat, k - 1.0, total - k))


# --------------------------------------------------------------------------- a bounded minimum


def bounded_minimum(f, lo: float, hi: float, xatol: float = 1e-5, maxiter: int = 500) -> tuple[float, float]:
    """The x in [lo, hi] at which f is least, and f(x), for f with one minimum there.

    Brent's method (Brent (1973), Algorithms for Minimization without Derivatives, chapter 5;
    Forsythe, Malcolm and Moler (1977), routine fmin): a parabola through the three best points
    when it steps inside the interval and shrinks it fast enough, a golden-section step
    otherwise. Stops when the interval around the best point is within 2 (sqrt(eps) |x| + xatol / 3).
    """
    golden = 0.5 * (3.0 - math.sqrt(5.0))
    # the square root of the double's machine epsilon, 2.2e-16 rounded as scipy.optimize's bounded
    # method has it, so that a Box-Cox lambda found before is found again to the last bit
    eps = math.sqrt(2.2e-16)
    a, b = float(lo), float(hi)
    x = w = v = a + golden * (b - a)
    fx = fw = fv = f(x)
    d = e = 0.0
    for _ in range(maxiter):
        mid = 0.5 * (a + b)
        tol1 = eps * abs(x) + xatol / 3.0
        tol2 = 2.0 * tol1
        if abs(x - mid) <= tol2 - 0.5 * (b - a):
            break
        p = q = r = 0.0
        if abs(e) > tol1:  # the parabola through x, w and v
            r = (x - w) * (fx - fv)
            q = (x - v) * (fx - fw)
            p = (x - v) * q - (x - w) * r
            q = 2.0 * (q - r)
            if q > 0.0:
                p = -p
            q = abs(q)
            r, e = e, d
        if abs(p) < abs(0.5 * q * r) and q * (a - x) < p < q * (b - x):
            d = p / q
            u = x + d
            if u - a < tol2 or b - u < tol2:  # not too near the ends
                d = tol1 if x < mid else -tol1
        else:
            e = (b - x) if x < mid else (a - x)
            d = golden * e
        u = x + (d if abs(d) >= tol1 else math.copysign(tol1, d))
        fu = f(u)
        if fu <= fx:
            if u < x:
                b = x
            else:
                a = x
            v, fv, w, fw, x, fx = w, fw, x, fx, u, fu
        else:
            if u < x:
                a = u
            else:
                b = u
            if fu <= fw or w == x:
                v, fv, w, fw = w, fw, u, fu
            elif fu <= fv or v == x or v == w:
                v, fv = u, fu
    return x, fx
