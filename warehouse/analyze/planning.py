"""Planning: power and the number of blocks (instance groups) a campaign needs.

The sample size is the number of blocks, not the number of runs: seeds and instances inside a
block only sharpen each block's value.

Public functions
----------------
blocks_for_paired(effect, power=0.8, alpha=0.05, comparisons=1, alternative="two-sided")
blocks_for_delta(delta, sd, power=0.8, alpha=0.05, comparisons=1, alternative="two-sided")
blocks_for_dunnett(delta, sigma, treatments, power=0.8, alpha=0.05, alternative="two-sided")
rcbd_power(means, sigma, blocks, alpha=0.05)
blocks_for_rcbd(means, sigma, power=0.8, alpha=0.05)
more_blocks(needed, held)
conditional_power(z, held, more, critical)
blocks_to_settle(z, held, critical, power=0.8)
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from warehouse.analyze.tidy import _Result
from warehouse.errors import DesignError, InputError

#: the search for a number of blocks gives up beyond this.
MAX_BLOCKS = 100_000


def _check_levels(power: float, alpha: float) -> None:
    if not (0.0 < alpha < 1.0):
        raise InputError(f"alpha {alpha!r} must lie strictly between 0 and 1, e.g. 0.05")
    if not (0.0 < power < 1.0):
        raise InputError(f"power {power!r} must lie strictly between 0 and 1, e.g. 0.8")
    if power <= alpha:
        raise InputError(f"power {power!r} must exceed alpha {alpha!r}")


def _sides(alternative: str) -> int:
    if alternative == "two-sided":
        return 2
    if alternative in ("one-sided", "greater", "less"):
        return 1
    raise InputError(f"unknown alternative {alternative!r}: use 'two-sided' or 'one-sided'")


def _search(power_of, target: float, start: int, lo_limit: int = 2) -> tuple[int, float]:
    """Smallest integer n >= lo_limit with power_of(n) >= target (power increasing in n)."""
    memo: dict[int, float] = {}

    def pw(n: int) -> float:
        if n not in memo:
            memo[n] = power_of(n)
        return memo[n]

    n = min(max(int(start), lo_limit), MAX_BLOCKS)
    step = 1
    if pw(n) >= target:
        hi, lo = n, lo_limit - 1
        while hi - step >= lo_limit:
            if pw(hi - step) >= target:
                hi -= step
                step *= 2
            else:
                lo = hi - step
                break
    else:
        lo = n
        while True:
            hi = min(lo + step, MAX_BLOCKS)
            if pw(hi) >= target:
                break
            if hi == MAX_BLOCKS:
                raise DesignError(f"even {MAX_BLOCKS} blocks do not reach power {target:g}: "
                                  f"the effect is too small for this design")
            lo, step = hi, step * 2
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if pw(mid) >= target:
            hi = mid
        else:
            lo = mid
    return hi, pw(hi)


def _below(c: float, df: int, nc: float) -> float:
    """P(T < -c) for T noncentral t(df, nc), nc >= 0, c > 0. scipy gives NaN for this far tail when
    nc is large; T < -c needs Z + nc < 0 (Z standard normal), so it is then at most P(Z < -nc),
    and taken as 0 when that bound is below 1e-12."""
    p = float(stats.nct.cdf(-c, df, nc))
    if math.isnan(p) and stats.norm.sf(nc) < 1e-12:
        return 0.0
    return p


def paired_t_power(effect: float, blocks: int, alpha: float = 0.05, alternative: str = "two-sided") -> float:
    """Power of the paired t-test on ``blocks`` block differences with standardized effect d.

    Exact, from the noncentral t: T ~ t'(df = n-1, noncentrality = d sqrt(n)). Two-sided power
    P(T > t_{1-alpha/2}) + P(T < -t_{1-alpha/2}); one-sided P(T > t_{1-alpha}) with |d|.
    """
    n = int(blocks)
    if n < 2:
        raise DesignError("a paired t-test needs at least 2 blocks")
    df = n - 1
    nc = abs(effect) * math.sqrt(n)
    if _sides(alternative) == 2:
        c = stats.t.ppf(1 - alpha / 2, df)
        return float(stats.nct.sf(c, df, nc) + _below(c, df, nc))
    c = stats.t.ppf(1 - alpha, df)
    return float(stats.nct.sf(c, df, nc))


@dataclass
class BlocksPlan(_Result):
    """Blocks needed for a paired comparison.

    Fields: blocks_needed, effect (standardized d), power (target), alpha (family),
    alpha_per_comparison (alpha / comparisons, Bonferroni), comparisons, alternative,
    achieved_power (at blocks_needed), delta and sd (when given as a difference), warnings.
    """

    blocks_needed: int
    effect: float
    power: float
    alpha: float
    alpha_per_comparison: float
    comparisons: int
    alternative: str
    achieved_power: float
    delta: float | None = None
    sd: float | None = None
    warnings: list[str] = field(default_factory=list)

    def table(self):
        import pandas as pd

        return pd.DataFrame([{k: v for k, v in self.to_dict().items() if k != "warnings"}])


def blocks_for_paired(effect: float, power: float = 0.8, alpha: float = 0.05, comparisons: int = 1,
                      alternative: str = "two-sided") -> BlocksPlan:
    """Smallest number of blocks for a paired t-test to reach ``power``.

    ``effect`` is the standardized paired effect d = mean difference / sd of the block
    differences (its sign is ignored; for one-sided tests it is the size in the tested
    direction). With several comparisons against one baseline, alpha is split by Bonferroni:
    each test runs at alpha / comparisons. The count is exact: statsmodels' TTestPower gives the
    real-valued solution, which is rounded up and then checked (and moved if needed) with the
    noncentral t power of :func:`paired_t_power`.

    References: Cohen, Statistical Power Analysis for the Behavioral Sciences (1988), chapter 2;
    statsmodels.stats.power.TTestPower.

    Example::

        from warehouse.analyze.planning import blocks_for_paired
        blocks_for_paired(0.5).blocks_needed      # 34
    """
    _check_levels(power, alpha)
    sides = _sides(alternative)
    if int(comparisons) != comparisons or comparisons < 1:
        raise InputError(f"comparisons must be a whole number >= 1, not {comparisons!r}")
    if not (math.isfinite(effect) and effect != 0):
        raise InputError(f"effect {effect!r} must be a non-zero number (mean difference / sd of differences)")
    d = abs(float(effect))
    a_pc = alpha / int(comparisons)
    alt = "two-sided" if sides == 2 else "one-sided"
    try:
        import warnings

        import statsmodels.tools.sm_exceptions  # noqa: F401  (on import it sets its warnings to
        # "always": imported first, so that the filter below is the one that holds)
        from statsmodels.stats.power import TTestPower

        # a large effect leaves the root finder without a solution: it warns on stderr and gives
        # NaN, which the fallback below answers, so the warning would only be noise for the user
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            guess = TTestPower().solve_power(effect_size=d, alpha=a_pc, power=power,
                                             alternative="two-sided" if sides == 2 else "larger")
        start = int(math.ceil(float(np.squeeze(guess))))
    except Exception:  # noqa: BLE001 - fall back to the normal approximation
        z = stats.norm.ppf(1 - a_pc / sides) + stats.norm.ppf(power)
        start = int(math.ceil((z / d) ** 2)) + 1
    n, pw = _search(lambda n: paired_t_power(d, n, a_pc, alt), power, start)
    warnings = []
    if n < 6:
        warnings.append(f"only {n} blocks needed: with so few blocks the checks of the assumptions have no power; "
                        f"plan at least 6 (common practice)")
    return BlocksPlan(blocks_needed=n, effect=float(effect), power=power, alpha=alpha, alpha_per_comparison=a_pc,
                      comparisons=int(comparisons), alternative=alt, achieved_power=pw, warnings=warnings)


def blocks_for_delta(delta: float, sd: float, power: float = 0.8, alpha: float = 0.05, comparisons: int = 1,
                     alternative: str = "two-sided") -> BlocksPlan:
    """Blocks needed to detect a mean block difference ``delta`` when the block differences
    have standard deviation ``sd``: :func:`blocks_for_paired` with d = delta / sd.

    Example::

        from warehouse.analyze.planning import blocks_for_delta
        blocks_for_delta(0.3, 0.6, comparisons=3).blocks_needed
    """
    if not (math.isfinite(sd) and sd > 0):
        raise InputError(f"sd {sd!r} must be a positive number (sd of the block differences)")
    plan = blocks_for_paired(delta / sd, power=power, alpha=alpha, comparisons=comparisons, alternative=alternative)
    plan.delta = float(delta)
    plan.sd = float(sd)
    return plan


@dataclass
class DunnettPlan(_Result):
    """Blocks needed for one comparison with the baseline under Dunnett's test.

    Fields: blocks_needed, delta, sigma (residual sd of the block model), treatments (a, the
    baseline included), comparisons (a - 1), power, alpha, alternative, achieved_power,
    critical_value and residual_df at blocks_needed, warnings.
    """

    blocks_needed: int
    delta: float
    sigma: float
    treatments: int
    comparisons: int
    power: float
    alpha: float
    alternative: str
    achieved_power: float
    critical_value: float
    residual_df: int
    warnings: list[str] = field(default_factory=list)

    def table(self):
        import pandas as pd

        return pd.DataFrame([{k: v for k, v in self.to_dict().items() if k != "warnings"}])


def dunnett_power(delta: float, sigma: float, treatments: int, blocks: int, alpha: float = 0.05,
                  alternative: str = "two-sided") -> tuple[float, float]:
    """Power of one Dunnett comparison and the critical value used: (power, critical value).

    The comparison's statistic is noncentral t on (a-1)(b-1) df with noncentrality
    delta / (sigma sqrt(2/b)); it is compared with Dunnett's critical value for a-1 comparisons.
    """
    from warehouse.analyze.baseline import dunnett_critical_value

    a, b = int(treatments), int(blocks)
    df = (a - 1) * (b - 1)
    sides = _sides(alternative)
    c = dunnett_critical_value(a - 1, df, 1 - alpha, "two-sided" if sides == 2 else "greater")
    nc = abs(delta) / (sigma * math.sqrt(2.0 / b))
    if sides == 2:
        pw = stats.nct.sf(c, df, nc) + _below(c, df, nc)
    else:
        pw = stats.nct.sf(c, df, nc)
    return float(pw), float(c)


def blocks_for_dunnett(delta: float, sigma: float, treatments: int, power: float = 0.8, alpha: float = 0.05,
                       alternative: str = "two-sided") -> DunnettPlan:
    """Smallest number of blocks so that one treatment differing from the baseline by ``delta``
    is found by Dunnett's test with probability ``power``.

    ``sigma`` is the residual standard deviation of the additive block model (the square root
    of the residual mean square of a pilot rcbd_anova); ``treatments`` counts all treatments,
    baseline included. The power is that of one comparison (the others may or may not differ),
    using the noncentral t on (a-1)(b-1) df and Dunnett's family-wise critical value, so alpha
    is shared by the a-1 comparisons without Bonferroni's loss.

    References: Dunnett (1955); Hochberg and Tamhane, Multiple Comparison Procedures (1987).

    Example::

        from warehouse.analyze.planning import blocks_for_dunnett
        blocks_for_dunnett(delta=1.0, sigma=0.8, treatments=4).blocks_needed
    """
    _check_levels(power, alpha)
    sides = _sides(alternative)
    if int(treatments) != treatments or treatments < 2:
        raise DesignError(f"treatments must be a whole number >= 2 (baseline included), not {treatments!r}")
    if not (math.isfinite(sigma) and sigma > 0):
        raise InputError(f"sigma {sigma!r} must be a positive number (residual sd of the block model)")
    if not (math.isfinite(delta) and delta != 0):
        raise InputError(f"delta {delta!r} must be a non-zero difference worth detecting")
    a = int(treatments)
    k = a - 1
    z = stats.norm.ppf(1 - alpha / (sides * k)) + stats.norm.ppf(power)
    start = max(int(math.ceil(2 * (z * sigma / delta) ** 2)), 2)
    cache: dict[int, tuple[float, float]] = {}

    def pw(b: int) -> float:
        if b not in cache:
            cache[b] = dunnett_power(delta, sigma, a, b, alpha, alternative)
        return cache[b][0]

    b, p = _search(pw, power, start)
    alt = "two-sided" if sides == 2 else "one-sided"
    warnings = []
    if b < 6:
        warnings.append(f"only {b} blocks needed: plan at least 6 so that the assumptions can be checked "
                        f"(common practice)")
    return DunnettPlan(blocks_needed=b, delta=float(delta), sigma=float(sigma), treatments=a, comparisons=k,
                       power=power, alpha=alpha, alternative=alt, achieved_power=p, critical_value=cache[b][1],
                       residual_df=(a - 1) * (b - 1), warnings=warnings)


@dataclass
class RcbdPower(_Result):
    """Power of the RCBD treatment F test.

    Fields: treatments (a), blocks (b), means (list), sigma, alpha, noncentrality
    (b sum (mu_i - mean)^2 / sigma^2), effect_f (Cohen's f = sqrt(mean (mu_i - mean)^2) / sigma),
    df1 (a-1), df2 ((a-1)(b-1)), f_critical, power, warnings.
    """

    treatments: int
    blocks: int
    means: list[float]
    sigma: float
    alpha: float
    noncentrality: float
    effect_f: float
    df1: int
    df2: int
    f_critical: float
    power: float
    warnings: list[str] = field(default_factory=list)

    def table(self):
        import pandas as pd

        d = self.to_dict()
        d.pop("means")
        d.pop("warnings")
        return pd.DataFrame([d])


def _means(means) -> np.ndarray:
    m = np.asarray(list(means), dtype=float)
    if m.size < 2:
        raise DesignError("give the means of at least 2 treatments")
    if not np.isfinite(m).all():
        raise InputError("the treatment means must be finite numbers")
    return m


def rcbd_power(means, sigma: float, blocks: int, alpha: float = 0.05) -> RcbdPower:
    """Power of the treatment F test of a randomized complete block design.

    ``means`` are the treatment means to be detected (only their differences matter), ``sigma``
    the residual standard deviation of the additive block model. Under these means the F
    statistic is noncentral F on a-1 and (a-1)(b-1) df with noncentrality
    lambda = b sum (mu_i - mean)^2 / sigma^2; power = P(F' > F_{1-alpha}) (scipy.stats.ncf).

    Reference: Montgomery, Design and Analysis of Experiments (power of the F test in the
    randomized block design); Cohen (1988), chapter 8.

    Example::

        from warehouse.analyze.planning import rcbd_power
        rcbd_power([10.0, 10.5, 11.0], sigma=0.8, blocks=8).power
    """
    if not (0.0 < alpha < 1.0):
        raise InputError(f"alpha {alpha!r} must lie strictly between 0 and 1, e.g. 0.05")
    if not (math.isfinite(sigma) and sigma > 0):
        raise InputError(f"sigma {sigma!r} must be a positive number (residual sd of the block model)")
    m = _means(means)
    b = int(blocks)
    if b != blocks or b < 2:
        raise DesignError(f"blocks must be a whole number >= 2, not {blocks!r}")
    a = m.size
    dev2 = float(((m - m.mean()) ** 2).sum())
    lam = b * dev2 / sigma ** 2
    df1, df2 = a - 1, (a - 1) * (b - 1)
    fcrit = float(stats.f.ppf(1 - alpha, df1, df2))
    pw = float(stats.ncf.sf(fcrit, df1, df2, lam)) if lam > 0 else float(alpha)
    return RcbdPower(treatments=a, blocks=b, means=[float(x) for x in m], sigma=float(sigma), alpha=alpha,
                     noncentrality=lam, effect_f=math.sqrt(dev2 / a) / sigma, df1=df1, df2=df2, f_critical=fcrit,
                     power=pw)


@dataclass
class RcbdPlan(_Result):
    """Blocks needed for the RCBD treatment F test.

    Fields: blocks_needed, achieved_power, power (target), alpha, sigma, means, treatments,
    effect_f, and at blocks_needed: noncentrality, df1, df2, f_critical; warnings.
    """

    blocks_needed: int
    achieved_power: float
    power: float
    alpha: float
    sigma: float
    means: list[float]
    treatments: int
    effect_f: float
    noncentrality: float
    df1: int
    df2: int
    f_critical: float
    warnings: list[str] = field(default_factory=list)

    def table(self):
        import pandas as pd

        d = self.to_dict()
        d.pop("means")
        d.pop("warnings")
        return pd.DataFrame([d])


def blocks_for_rcbd(means, sigma: float, power: float = 0.8, alpha: float = 0.05) -> RcbdPlan:
    """Smallest number of blocks for which :func:`rcbd_power` reaches ``power``.

    Example::

        from warehouse.analyze.planning import blocks_for_rcbd
        blocks_for_rcbd([10.0, 10.5, 11.0], sigma=0.8, power=0.9).blocks_needed
    """
    _check_levels(power, alpha)
    m = _means(means)
    if float(np.ptp(m)) == 0.0:
        raise DesignError("the means are all equal: there is no effect to detect; give the smallest "
                          "differences worth detecting")
    if not (math.isfinite(sigma) and sigma > 0):
        raise InputError(f"sigma {sigma!r} must be a positive number (residual sd of the block model)")
    b, pw = _search(lambda n: rcbd_power(m, sigma, n, alpha).power, power, 2)
    r = rcbd_power(m, sigma, b, alpha)
    return RcbdPlan(blocks_needed=b, achieved_power=pw, power=power, alpha=alpha, sigma=float(sigma),
                    means=r.means, treatments=r.treatments, effect_f=r.effect_f, noncentrality=r.noncentrality,
                    df1=r.df1, df2=r.df2, f_critical=r.f_critical)


def more_blocks(needed: int, held: int) -> int:
    """Blocks to add to a slice holding ``held`` complete blocks to reach ``needed`` (0 when it
    holds enough). A block counts once however many instances and seeds it has: only new
    instance groups raise the count.

    Example::

        from warehouse.analyze.planning import more_blocks
        more_blocks(24, 18)      # 6
    """
    for name, v in (("needed", needed), ("held", held)):
        if isinstance(v, bool) or int(v) != v or v < 0:
            raise InputError(f"{name} must be a whole number of blocks >= 0, not {v!r}")
    return max(0, int(needed) - int(held))


def conditional_power(z: float, held: int, more: int, critical: float) -> float:
    """Chance that a comparison standing at statistic ``z`` on ``held`` blocks clears ``critical``
    once ``more`` blocks are added, if the true difference is the one estimated now (conditional
    power at the current estimate, on the normal scale). With the information fraction
    t = n / (n + m), the final statistic is sqrt(t) z + sqrt(1 - t) Z_new, Z_new ~ N(z sqrt(m / n), 1),
    so CP = Phi((|z| sqrt((n + m) / n) - c) / sqrt(m / (n + m))).

    Reference: Lan and Wittes, The B-value: a tool for monitoring data (Biometrics 1988);
    Proschan, Lan and Wittes, Statistical Monitoring of Clinical Trials (2006), chapter 3.

    Example::

        from warehouse.analyze.planning import conditional_power
        conditional_power(1.5, 12, 12, 1.96)
    """
    n, m = int(held), int(more)
    if n < 1:
        raise DesignError("conditional power needs the blocks held so far (1 or more)")
    if m <= 0:
        return float(abs(z) >= critical)
    num = abs(z) * math.sqrt((n + m) / n) - critical
    return float(stats.norm.cdf(num / math.sqrt(m / (n + m))))


def blocks_to_settle(z: float, held: int, critical: float, power: float = 0.8) -> int | None:
    """Fewest blocks to add so that :func:`conditional_power` reaches ``power``; 0 when |z| already
    clears ``critical``; None when the estimate is 0 or not even MAX_BLOCKS more would do.

    Example::

        from warehouse.analyze.planning import blocks_to_settle
        blocks_to_settle(1.5, 12, 1.96)
    """
    if not (0.0 < power < 1.0):
        raise InputError(f"power {power!r} must lie strictly between 0 and 1, e.g. 0.8")
    if abs(z) >= critical:
        return 0
    if z == 0 or not math.isfinite(z):
        return None
    if conditional_power(z, held, MAX_BLOCKS, critical) < power:
        return None
    lo, hi = 0, 1
    while conditional_power(z, held, hi, critical) < power:
        lo, hi = hi, min(hi * 2, MAX_BLOCKS)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if conditional_power(z, held, mid, critical) >= power:
            hi = mid
        else:
            lo = mid
    return hi
