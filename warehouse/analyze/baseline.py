"""Many-to-one comparisons: every treatment against one baseline, block by block.

Public functions
----------------
dunnett_vs_baseline(obs, baseline, ...)   Dunnett's test on the additive block model
paired_vs_baseline(obs, baseline, ...)    paired t or Wilcoxon signed-rank on block differences,
                                          Holm or Bonferroni adjusted
wins_ties_losses(obs, baseline, ...)      per-block win / tie / loss counts with a margin
dunnett_critical_value(comparisons, df, ...)   quantile of the max-|t| (or max-t) statistic
dunnett_p_values(t, comparisons, df, ...)      family-wise adjusted p-values

Differences are always treatment minus baseline. ``alternative="less"`` asks whether the
treatment is smaller than the baseline (better when fewer is better), ``"greater"`` whether it is
larger.
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import optimize, stats

from warehouse.analyze.anova import _additive
from warehouse.analyze.tidy import CHECK_LEVEL, FEW_BLOCKS, _complete, _fmt_p, _Result
from warehouse.errors import DesignError, InputError

ALTERNATIVES = ("two-sided", "less", "greater")

#: seed of the quasi-Monte Carlo integration of the multivariate t, fixed for reproducibility.
MVT_SEED = 20240607
#: integration points per dimension when solving for a critical value.
MVT_POINTS_QUANTILE = 25000
#: integration points per dimension for an adjusted p-value.
MVT_POINTS_P = 1500


# --------------------------------------------------------------------------- multivariate t


def _check_alternative(alternative: str) -> None:
    if alternative not in ALTERNATIVES:
        raise InputError(f"unknown alternative {alternative!r}: use one of {', '.join(ALTERNATIVES)}")


def _check_confidence(confidence: float) -> None:
    if not (0.0 < confidence < 1.0):
        raise InputError(f"confidence {confidence!r} must lie strictly between 0 and 1, e.g. 0.95")


def _mvt(k: int, df: float, rho: float):
    shape = np.full((k, k), rho)
    np.fill_diagonal(shape, 1.0)
    return stats.multivariate_t(shape=shape, df=df)


@functools.lru_cache(maxsize=64)
def _nodes(df: float):
    """Quadrature nodes for the equicorrelated form: Gauss-Hermite in the shared normal part,
    Gauss-Legendre over the chi scale S = sqrt(chi2_df / df) weighted by its density."""
    z, wz = np.polynomial.hermite_e.hermegauss(96)
    wz = wz / math.sqrt(2 * math.pi)
    if not math.isfinite(df) or df > 1e6:
        return z, wz, np.array([1.0]), np.array([1.0])
    chi = stats.chi(df)
    lo, hi = chi.ppf(1e-12), chi.ppf(1 - 1e-12)
    x, wx = np.polynomial.legendre.leggauss(96)
    u = lo + (x + 1) * (hi - lo) / 2
    ws = wx * (hi - lo) / 2 * chi.pdf(u)
    return z, wz, u / math.sqrt(df), ws / ws.sum()


def _max_cdf(c: float, k: int, df: float, two_sided: bool, rho: float, points: int) -> float:
    """P(max |T_i| < c) (two-sided) or P(max T_i < c) for equicorrelated multivariate t.

    With correlation rho >= 0, T_i = (sqrt(rho) Z0 + sqrt(1 - rho) Z_i) / S, so the probability is
    a two-dimensional integral over Z0 and S of a product of normal probabilities (Dunnett 1955),
    computed by deterministic quadrature: the same answer every time, to about 1e-8. A negative
    rho falls back to scipy.stats.multivariate_t.
    """
    if k == 1:
        if two_sided:
            return float(1.0 - 2.0 * stats.t.sf(c, df))
        return float(stats.t.cdf(c, df))
    if 0.0 <= rho < 1.0:
        from scipy.special import ndtr

        z, wz, sc, ws = _nodes(float(df))
        a, b = math.sqrt(rho), math.sqrt(1.0 - rho)
        cs = c * sc[:, None]  # (S nodes, 1)
        upper = ndtr((cs - a * z[None, :]) / b)
        inner = upper - ndtr((-cs - a * z[None, :]) / b) if two_sided else upper
        val = float(ws @ (np.clip(inner, 0.0, 1.0) ** k) @ wz)
        return min(max(val, 0.0), 1.0)
    mvt = _mvt(k, df, rho)
    up = np.full(k, c)
    lower = np.full(k, -c) if two_sided else np.full(k, -np.inf)
    val = mvt.cdf(up, lower_limit=lower, maxpts=points * k, random_state=MVT_SEED)
    return float(min(max(val, 0.0), 1.0))


@functools.lru_cache(maxsize=1024)
def _quantile(k: int, df: float, confidence: float, two_sided: bool, rho: float) -> float:
    if k == 1:
        return float(stats.t.ppf(1 - (1 - confidence) / 2, df) if two_sided else stats.t.ppf(confidence, df))
    alpha = 1 - confidence
    # single comparison and Bonferroni bound bracket the answer
    lo = float(stats.t.ppf(1 - alpha / 2, df) if two_sided else stats.t.ppf(confidence, df))
    hi = float(stats.t.ppf(1 - alpha / (2 * k), df) if two_sided else stats.t.ppf(1 - alpha / k, df)) + 0.05

    def g(c):
        return _max_cdf(c, k, df, two_sided, rho, MVT_POINTS_QUANTILE) - confidence

    while g(hi) < 0:
        hi += 0.5
    lo = max(lo - 0.05, 0.0)
    return float(optimize.brentq(g, lo, hi, xtol=1e-7))


def dunnett_critical_value(comparisons: int, df: float, confidence: float = 0.95,
                           alternative: str = "two-sided", correlation: float = 0.5) -> float:
    """Critical value of Dunnett's many-to-one test.

    The c with P(max_i |T_i| < c) = confidence (two-sided) or P(max_i T_i < c) = confidence
    (one-sided), where (T_1..T_k) is multivariate t with ``df`` degrees of freedom and all
    correlations equal to ``correlation`` (0.5 when every comparison uses the same number of
    blocks). The probability comes from a deterministic two-dimensional quadrature of the equicorrelated
    form (see _max_cdf); the quantile from Brent's root finder. Results
    are cached.

    Reference: Dunnett (1955), J. Amer. Statist. Assoc. 50; Dunnett (1964), Biometrics 20.

    Example::

        from warehouse.analyze.baseline import dunnett_critical_value
        dunnett_critical_value(3, 16)        # about 2.59
    """
    _check_alternative(alternative)
    _check_confidence(confidence)
    if int(comparisons) != comparisons or comparisons < 1:
        raise InputError(f"comparisons must be a whole number >= 1, not {comparisons!r}")
    if not df > 0:
        raise DesignError(f"{df} residual degrees of freedom: add blocks")
    return _quantile(int(comparisons), float(df), float(confidence), alternative == "two-sided",
                     float(correlation))


def dunnett_p_values(t, comparisons: int, df: float, alternative: str = "two-sided",
                     correlation: float = 0.5) -> np.ndarray:
    """Family-wise adjusted p-values of Dunnett's test for the statistics ``t``.

    Two-sided: p = 1 - P(max_i |T_i| < |t|). "greater": p = 1 - P(max_i T_i < t). "less":
    p = 1 - P(max_i (-T_i) < -t). ``comparisons`` is the size of the family (k) and may exceed
    len(t).
    """
    _check_alternative(alternative)
    tt = np.atleast_1d(np.asarray(t, dtype=float))
    out = np.empty_like(tt)
    for i, v in enumerate(tt):
        if math.isnan(v):
            out[i] = np.nan
            continue
        if alternative == "two-sided":
            c, two = abs(v), True
        elif alternative == "greater":
            c, two = v, False
        else:
            c, two = -v, False
        if math.isinf(c):
            out[i] = 0.0 if c > 0 else 1.0
            continue
        if two and c == 0:
            out[i] = 1.0
            continue
        out[i] = 1.0 - _max_cdf(c, int(comparisons), float(df), two, float(correlation), MVT_POINTS_P)
    return np.clip(out, 0.0, 1.0)


# --------------------------------------------------------------------------- wins, ties, losses


def _margins(margin, base: np.ndarray) -> np.ndarray:
    """Per-block tie margin: an absolute number, or 'x%' of |baseline value| in each block."""
    if isinstance(margin, str):
        text = margin.strip()
        if text.endswith("%"):
            try:
                pct = float(text[:-1])
            except ValueError:
                pct = float("nan")
            if math.isfinite(pct) and pct >= 0:
                return np.abs(base) * pct / 100.0
        else:
            try:
                val = float(text)
            except ValueError:
                val = float("nan")
            if math.isfinite(val) and val >= 0:
                return np.full_like(base, val)
        raise InputError(f"margin {margin!r} is neither a number >= 0 nor a percentage like '1%'")
    try:
        val = float(margin)
    except (TypeError, ValueError):
        raise InputError(f"margin {margin!r} is neither a number >= 0 nor a percentage like '1%'") from None
    if not (math.isfinite(val) and val >= 0):
        raise InputError(f"margin {margin!r} must be a number >= 0 or a percentage like '1%'")
    return np.full_like(base, val)


def _wtl(trt: np.ndarray, base: np.ndarray, better: str, margin) -> tuple[int, int, int]:
    if better not in ("lower", "higher"):
        raise InputError(f"better must be 'lower' or 'higher', not {better!r}")
    m = _margins(margin, base)
    d = trt - base
    # a hair of tolerance so that 1.1 - 1.0 counts as a tie at margin 0.1
    tol = 1e-9 * np.maximum(np.maximum(np.abs(trt), np.abs(base)), 1.0)
    tie = np.abs(d) <= m + tol
    win = ~tie & ((d < 0) if better == "lower" else (d > 0))
    loss = ~tie & ~win
    return int(win.sum()), int(tie.sum()), int(loss.sum())


def wins_ties_losses(obs: pd.DataFrame, baseline: str, better: str = "lower", margin=0.0) -> pd.DataFrame:
    """Per-block win / tie / loss counts of every treatment against the baseline.

    In each block the treatment's value is compared with the baseline's: when
    |treatment - baseline| <= margin it is a tie; otherwise it is a win when it is on the
    ``better`` side ("lower": smaller is better; "higher": larger is better) and a loss otherwise.
    ``margin`` is an absolute number or a string like "1%" (that share of |baseline value| in the
    same block). A relative tolerance of 1e-9 absorbs floating-point noise.

    Returns a DataFrame treatment, wins, ties, losses.

    Example::

        from warehouse.analyze.baseline import wins_ties_losses
        wins_ties_losses(obs, "stacker@1.4", better="lower", margin="1%")
    """
    Y, treatments, _ = _complete(obs)
    i0 = _baseline_index(treatments, baseline)
    rows = []
    for i, t in enumerate(treatments):
        if i == i0:
            continue
        w, ti, lo = _wtl(Y[i], Y[i0], better, margin)
        rows.append({"treatment": t, "wins": w, "ties": ti, "losses": lo})
    return pd.DataFrame(rows, columns=["treatment", "wins", "ties", "losses"])


# --------------------------------------------------------------------------- results


@dataclass
class BaselineResult(_Result):
    """Comparisons of every treatment with one baseline.

    Fields
    ------
    baseline, blocks, treatments (all labels, baseline included), method ("dunnett",
    "paired-t" or "wilcoxon"), adjust ("dunnett", "holm", "bonferroni"), alternative,
    confidence, better, margin
    residual_ms, residual_df   the additive block model's residual mean square and df (Dunnett);
                               None for the paired methods
    critical_value             Dunnett's simultaneous critical value; for paired-t the
                               Bonferroni-level t quantile on b-1 df; None for Wilcoxon
    comparisons                list of rows, one per treatment, with keys treatment, diff,
                               ci_low, ci_high, p_adjusted, method, relative_pct, wins, ties,
                               losses and also estimate, mean, baseline_mean, se, statistic,
                               p_unadjusted, relative_low, relative_high, effect, blocks
    warnings                   plain sentences
    """

    baseline: str
    blocks: int
    treatments: list[str]
    method: str
    adjust: str
    alternative: str
    confidence: float
    better: str
    margin: object
    residual_ms: float | None
    residual_df: int | None
    critical_value: float | None
    comparisons: list[dict]
    warnings: list[str] = field(default_factory=list)

    def table(self) -> pd.DataFrame:
        """One row per comparison."""
        return pd.DataFrame(self.comparisons)


ROW_KEYS = ("treatment", "diff", "ci_low", "ci_high", "p_adjusted", "method", "relative_pct",
            "wins", "ties", "losses")


def _baseline_index(treatments: list[str], baseline: str) -> int:
    if baseline not in treatments:
        shown = ", ".join(treatments[:8]) + (" ..." if len(treatments) > 8 else "")
        raise DesignError(f"baseline {baseline!r} is not among the treatments ({shown}): check its name and version")
    return treatments.index(baseline)


def _t_bounds(mean: float, se: float, df: float, level: float, alternative: str) -> tuple[float, float]:
    """t interval for a mean at confidence ``level``; one-sided ones have an infinite end."""
    if not (se > 0) or not math.isfinite(se):
        return (mean, mean) if se == 0 else (float("nan"), float("nan"))
    if alternative == "two-sided":
        q = stats.t.ppf(1 - (1 - level) / 2, df)
        return mean - q * se, mean + q * se
    q = stats.t.ppf(level, df)
    if alternative == "greater":
        return mean - q * se, float("inf")
    return float("-inf"), mean + q * se


def _relative(trt: np.ndarray, base: np.ndarray, level: float, alternative: str) -> dict:
    """Relative change in percent; through the log scale when every value is positive."""
    b = len(base)
    if (trt > 0).all() and (base > 0).all():
        lr = np.log(trt) - np.log(base)
        m = float(lr.mean())
        sd = float(lr.std(ddof=1)) if b > 1 else float("nan")
        lo, hi = _t_bounds(m, sd / math.sqrt(b), b - 1, level, alternative)
        conv = lambda x: 100.0 * math.expm1(x) if math.isfinite(x) else (float("inf") if x > 0 else float("-inf"))
        return {"relative_pct": 100.0 * math.expm1(m), "relative_low": conv(lo) if not math.isnan(lo) else None,
                "relative_high": conv(hi) if not math.isnan(hi) else None, "relative_scale": "log"}
    bm = float(base.mean())
    pct = 100.0 * float((trt - base).mean()) / bm if bm != 0 else None
    return {"relative_pct": pct, "relative_low": None, "relative_high": None, "relative_scale": "mean"}


def _effect(d: np.ndarray):
    sd = float(d.std(ddof=1)) if len(d) > 1 else float("nan")
    if not sd > 0:
        return None
    return float(d.mean() / sd)


def _common(obs, baseline, alternative, confidence):
    _check_alternative(alternative)
    _check_confidence(confidence)
    Y, treatments, blocks = _complete(obs)
    i0 = _baseline_index(treatments, baseline)
    return Y, treatments, blocks, i0


def _base_warnings(b: int, k: int, how: str) -> list[str]:
    out = []
    if b < FEW_BLOCKS:
        out.append(f"only {b} blocks: the comparisons have little power")
    if k > 1:
        out.append(f"{k} comparisons against the baseline: p-values and intervals are adjusted for the family "
                   f"({how}); unadjusted p-values would overstate the evidence")
    return out


def dunnett_vs_baseline(obs: pd.DataFrame, baseline: str, alternative: str = "two-sided",
                        confidence: float = 0.95, better: str = "lower", margin=0.0) -> BaselineResult:
    """Dunnett's many-to-one comparisons on the additive block model.

    For each treatment, diff = mean(treatment) - mean(baseline) over the b blocks, with standard
    error sqrt(2 MS_res / b), where MS_res and its (a-1)(b-1) df come from the additive
    treatment + block model (so block-to-block differences are removed, unlike the one-way
    Dunnett test). t = diff / se. The critical value and the adjusted p-values come from the
    multivariate t with correlation 0.5 (see :func:`dunnett_critical_value`), so the family of
    a-1 comparisons keeps its error rate at 1 - confidence. Intervals are simultaneous;
    one-sided alternatives give intervals with one infinite end (inf in the frame, None in
    to_dict).

    Each row also carries: relative_pct, the change in percent, 100 (exp(mean log ratio) - 1)
    when all values are positive, with relative_low/high from a paired t interval on the block
    log ratios at the Bonferroni level 1 - (1 - confidence)/(a-1) (so the family of relative
    intervals also holds together, conservatively); otherwise 100 diff / baseline mean without
    an interval. effect is the standardized paired effect d_z = mean / sd of the block
    differences. wins / ties / losses follow ``better`` and ``margin`` (see
    :func:`wins_ties_losses`).

    Assumptions: complete design; additive block model with independent normal errors of one
    variance (check with rcbd_anova).

    References: Dunnett (1955), J. Amer. Statist. Assoc. 50; Hochberg and Tamhane, Multiple
    Comparison Procedures (1987); Montgomery, Design and Analysis of Experiments.

    Example::

        from warehouse.analyze.baseline import dunnett_vs_baseline
        res = dunnett_vs_baseline(obs, "stacker@1.4", alternative="less")
        res.table()[["treatment", "diff", "ci_high", "p_adjusted", "wins"]]
    """
    Y, treatments, blocks, i0 = _common(obs, baseline, alternative, confidence)
    a, b = Y.shape
    fit = _additive(Y)
    mse, df_e = fit["ms_e"], fit["df_e"]
    k = a - 1
    se = math.sqrt(2.0 * mse / b)
    crit = dunnett_critical_value(k, df_e, confidence, alternative)
    others = [i for i in range(a) if i != i0]
    diffs = np.array([Y[i].mean() - Y[i0].mean() for i in others])
    with np.errstate(divide="ignore", invalid="ignore"):
        tvals = diffs / se if se > 0 else np.where(diffs == 0, np.nan, np.sign(diffs) * np.inf)
    padj = dunnett_p_values(tvals, k, df_e, alternative)
    if alternative == "two-sided":
        praw = 2 * stats.t.sf(np.abs(tvals), df_e)
    elif alternative == "greater":
        praw = stats.t.sf(tvals, df_e)
    else:
        praw = stats.t.cdf(tvals, df_e)
    rel_level = 1 - (1 - confidence) / k
    rows = []
    for n, i in enumerate(others):
        d = Y[i] - Y[i0]
        diff = float(diffs[n])
        if alternative == "two-sided":
            lo, hi = diff - crit * se, diff + crit * se
        elif alternative == "greater":
            lo, hi = diff - crit * se, float("inf")
        else:
            lo, hi = float("-inf"), diff + crit * se
        w, ti, ls = _wtl(Y[i], Y[i0], better, margin)
        row = {"treatment": treatments[i], "diff": diff, "ci_low": float(lo), "ci_high": float(hi),
               "p_adjusted": float(padj[n]), "method": "dunnett"}
        row.update(_relative(Y[i], Y[i0], rel_level, alternative))
        row.update({"wins": w, "ties": ti, "losses": ls, "estimate": "mean difference",
                    "mean": float(Y[i].mean()), "baseline_mean": float(Y[i0].mean()), "se": se,
                    "statistic": float(tvals[n]), "p_unadjusted": float(praw[n]),
                    "effect": _effect(d), "blocks": b})
        rows.append(row)
    warnings = _base_warnings(b, k, "Dunnett")
    if not fit["perfect"] and a * b >= 3:
        sw = stats.shapiro(fit["resid"].ravel())
        if sw.pvalue < CHECK_LEVEL:
            warnings.append(f"residuals of the block model are not normal (Shapiro-Wilk {_fmt_p(float(sw.pvalue))}): "
                            f"consider paired Wilcoxon tests or a log scale")
    if fit["perfect"]:
        warnings.append("the block model fits exactly (residual mean square 0): the tests are degenerate")
    return BaselineResult(baseline=baseline, blocks=b, treatments=treatments, method="dunnett", adjust="dunnett",
                          alternative=alternative, confidence=confidence, better=better, margin=margin,
                          residual_ms=mse, residual_df=df_e, critical_value=crit, comparisons=rows,
                          warnings=warnings)


# --------------------------------------------------------------------------- paired tests


def _signed_rank_cdf_counts(n: int) -> np.ndarray:
    """Cumulative null distribution of the signed-rank statistic T+ for n untied differences."""
    counts = np.zeros(n * (n + 1) // 2 + 1)
    counts[0] = 1.0
    for r in range(1, n + 1):
        counts[r:] = counts[r:] + counts[:-r].copy()
    return np.cumsum(counts) / 2.0 ** n


def _walsh_interval(d: np.ndarray, level: float, alternative: str) -> tuple[float, float, float]:
    """Hodges-Lehmann estimate and the distribution-free interval from Walsh averages.

    The interval runs between order statistics of the Walsh averages (d_i + d_j)/2, i <= j,
    at the ranks given by the signed-rank null distribution (exact up to 60 differences, normal
    approximation beyond), which inverts the Wilcoxon signed-rank test.
    """
    n = len(d)
    i, j = np.triu_indices(n)
    w = np.sort((d[i] + d[j]) / 2.0)
    M = len(w)
    est = float(np.median(w))
    tail = (1 - level) / 2 if alternative == "two-sided" else (1 - level)
    if n <= 60:
        cdf = _signed_rank_cdf_counts(n)
        ok = np.nonzero(cdf <= tail + 1e-12)[0]
        c = int(ok[-1]) + 1 if ok.size else 0      # number of Walsh averages cut from each end
    else:
        mu, sd = M / 2.0, math.sqrt(n * (n + 1) * (2 * n + 1) / 24.0)
        c = max(int(math.floor(mu - stats.norm.ppf(1 - tail) * sd - 0.5)) + 1, 0)
    if c == 0:
        lo, hi = float("-inf"), float("inf")
    else:
        lo, hi = float(w[c - 1]), float(w[M - c])
    if alternative == "greater":
        hi = float("inf")
    elif alternative == "less":
        lo = float("-inf")
    return est, lo, hi


def paired_vs_baseline(obs: pd.DataFrame, baseline: str, method: str = "paired-t", adjust: str = "holm",
                       alternative: str = "two-sided", confidence: float = 0.95, better: str = "lower",
                       margin=0.0) -> BaselineResult:
    """Paired tests of every treatment against the baseline, adjusted for multiplicity.

    For each treatment the block differences d_j = treatment_j - baseline_j are tested:
    method "paired-t" uses scipy.stats.ttest_rel (diff = mean of d, interval = t interval on
    b-1 df); method "wilcoxon" uses scipy.stats.wilcoxon (zero differences dropped; diff = the
    Hodges-Lehmann estimate, the median of the Walsh averages, with the matching
    distribution-free interval). The p-values are adjusted over the a-1 comparisons by Holm's
    step-down method or by Bonferroni (statsmodels multipletests). Intervals use the Bonferroni
    level 1 - (1 - confidence)/(a-1) for each comparison, so they hold simultaneously
    (conservatively) whichever adjustment is chosen. relative_pct, effect and wins / ties /
    losses as in :func:`dunnett_vs_baseline`.

    Assumptions: independent blocks; paired-t needs roughly normal block differences; Wilcoxon
    needs differences symmetric about their centre. Unlike Dunnett, each comparison uses its own
    variance, so unequal variances across treatments do no harm.

    References: Holm (1979), Scand. J. Statist. 6; Wilcoxon (1945), Biometrics Bull. 1;
    Hollander and Wolfe, Nonparametric Statistical Methods (Walsh-average interval).

    Example::

        from warehouse.analyze.baseline import paired_vs_baseline
        res = paired_vs_baseline(obs, "stacker@1.4", method="wilcoxon", adjust="holm")
        res.table()
    """
    if method not in ("paired-t", "wilcoxon"):
        raise InputError(f"unknown method {method!r}: use 'paired-t' or 'wilcoxon'")
    if adjust not in ("holm", "bonferroni"):
        raise InputError(f"unknown adjustment {adjust!r}: use 'holm' or 'bonferroni'")
    Y, treatments, blocks, i0 = _common(obs, baseline, alternative, confidence)
    from statsmodels.stats.multitest import multipletests

    a, b = Y.shape
    k = a - 1
    level = 1 - (1 - confidence) / k
    others = [i for i in range(a) if i != i0]
    warnings = _base_warnings(b, k, "Holm" if adjust == "holm" else "Bonferroni")
    crit = None
    if method == "paired-t":
        crit = float(stats.t.ppf(1 - (1 - level) / 2, b - 1) if alternative == "two-sided"
                     else stats.t.ppf(level, b - 1))
    praw, rows = [], []
    for i in others:
        d = Y[i] - Y[i0]
        sd = float(d.std(ddof=1))
        mean = float(d.mean())
        se = sd / math.sqrt(b)
        if method == "paired-t":
            if sd > 1e-12 * max(float(np.abs(Y[i]).max()), float(np.abs(Y[i0]).max()), 1.0):
                tt = stats.ttest_rel(Y[i], Y[i0], alternative=alternative)
                stat, p = float(tt.statistic), float(tt.pvalue)
            else:
                stat = float("nan") if mean == 0 else math.copysign(float("inf"), mean)
                p = 1.0 if mean == 0 else (0.0 if (alternative == "two-sided" or
                                                   (alternative == "greater") == (mean > 0)) else 1.0)
                if mean != 0:
                    warnings.append(f"{treatments[i]} differs from the baseline by the same amount in every block: "
                                    f"the t-test is degenerate")
            lo, hi = _t_bounds(mean, se, b - 1, level, alternative)
            est, estimate = mean, "mean difference"
        else:
            nz = int((d != 0).sum())
            if nz == 0:
                stat, p = float("nan"), 1.0
            else:
                wr = stats.wilcoxon(d, alternative=alternative)
                stat, p = float(wr.statistic), float(wr.pvalue)
            est, lo, hi = _walsh_interval(d, level, alternative)
            estimate = "Hodges-Lehmann"
        praw.append(p)
        w, ti, ls = _wtl(Y[i], Y[i0], better, margin)
        row = {"treatment": treatments[i], "diff": est, "ci_low": float(lo), "ci_high": float(hi),
               "p_adjusted": None, "method": method}
        row.update(_relative(Y[i], Y[i0], level, alternative))
        row.update({"wins": w, "ties": ti, "losses": ls, "estimate": estimate, "mean": float(Y[i].mean()),
                    "baseline_mean": float(Y[i0].mean()), "mean_diff": mean, "se": se, "statistic": stat,
                    "p_unadjusted": p, "effect": _effect(d), "blocks": b})
        rows.append(row)
    padj = multipletests(np.asarray(praw, dtype=float), method=adjust)[1]
    for row, p in zip(rows, padj):
        row["p_adjusted"] = float(p)
    if method == "wilcoxon":
        smallest = 2.0 / 2 ** b if alternative == "two-sided" else 1.0 / 2 ** b
        if smallest > (1 - confidence) / k:
            warnings.append(f"with {b} blocks the Wilcoxon test cannot reach p below {smallest:.3g} per comparison: "
                            f"add blocks")
    return BaselineResult(baseline=baseline, blocks=b, treatments=treatments, method=method, adjust=adjust,
                          alternative=alternative, confidence=confidence, better=better, margin=margin,
                          residual_ms=None, residual_df=None, critical_value=crit, comparisons=rows,
                          warnings=warnings)
