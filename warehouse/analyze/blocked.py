"""Blocked analysis of variance and its rank-based alternatives.

Every function takes a tidy table ``obs`` with the columns ``treatment`` (str), ``block`` (str)
and ``value`` (float). A treatment is a solver version, a block is an instance group. The
complete designs need exactly one row per treatment and block (collapse replicates and instances
first); :func:`incomplete_anova` accepts blocks that miss treatments and
:func:`generalized_anova` accepts several rows per cell.

Public functions
----------------
rcbd_anova(obs, transform="none")   additive block model, diagnostics, transforms, advice
friedman(obs)                       Friedman rank test with tie correction and Iman-Davenport F
quade(obs)                          Quade's range-weighted rank test
incomplete_anova(obs)               treatments adjusted for blocks, least-squares means, balance
generalized_anova(obs)              several observations per cell, treatment x block interaction

The sums of squares of the complete and generalized designs are computed from the textbook
formulas and from least squares with numpy; statsmodels is used by the tests as the reference.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field, fields

import numpy as np
import pandas as pd
from scipy import optimize, stats

from warehouse.errors import DesignError, InputError

#: p-value below which a diagnostic check counts as failed (common practice).
CHECK_LEVEL = 0.05
#: fewer blocks than this earn a "few blocks" warning (common practice for benchmark studies).
FEW_BLOCKS = 6
#: fewer residual degrees of freedom than this make the design "tiny" (common practice).
TINY_RESIDUAL_DF = 6
#: standardized residuals beyond this are flagged as outliers (common practice).
OUTLIER_LIMIT = 3.0
#: Box-Cox lambda is searched in this interval.
BOXCOX_BOUNDS = (-3.0, 3.0)

TRANSFORMS = ("none", "log", "boxcox", "rank")

_EPS = 1e-12

#: values larger than this in size are refused. The checks raise values to powers up to 3 (Box-Cox)
#: and square them: (1e50)^6 = 1e300, so sums over millions of cells stay below the largest
#: double, about 1.8e308 (IEEE 754 binary64). A metric this large is a stand-in, not a measurement.
LARGEST_VALUE = 1e50


# --------------------------------------------------------------------------- shared helpers


def _jsonable(x):
    """Turn results into plain JSON-safe Python (floats, ints, str, None, lists, dicts)."""
    if isinstance(x, _Result):
        return x.to_dict()
    if isinstance(x, pd.DataFrame):
        return [{str(k): _jsonable(v) for k, v in rec.items()} for rec in x.to_dict(orient="records")]
    if isinstance(x, pd.Series):
        return [_jsonable(v) for v in x.tolist()]
    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return [_jsonable(v) for v in x.tolist()]
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, (int, np.integer)):
        return int(x)
    if isinstance(x, (float, np.floating)):
        v = float(x)
        return v if math.isfinite(v) else None
    if x is None or isinstance(x, str):
        return x
    return str(x)


class _Result:
    """Mixin for result dataclasses: ``to_dict()`` and a default ``table()``."""

    def to_dict(self) -> dict:
        """JSON-safe dict: plain floats, None for NaN and infinite values, lists for tables."""
        return {f.name: _jsonable(getattr(self, f.name)) for f in fields(self)}

    def table(self) -> pd.DataFrame:  # pragma: no cover - overridden where a table exists
        row = {f.name: getattr(self, f.name) for f in fields(self)
               if not isinstance(getattr(self, f.name), (pd.DataFrame, list, dict, _Result))}
        return pd.DataFrame([row])


def _float(x) -> float:
    """Plain float (NaN stays NaN)."""
    return float(x) if x is not None else float("nan")


def _none_if_nan(x):
    if x is None:
        return None
    x = float(x)
    return None if math.isnan(x) else x


def _fmt_p(p) -> str:
    """'p = 0.003' or 'p < 0.001' for the plain sentences in warnings."""
    if p is None or (isinstance(p, float) and math.isnan(p)):
        return "p not available"
    if p < 0.001:
        return "p < 0.001"
    return f"p = {p:.3g}"


def _prepare(obs, extra: tuple[str, ...] = ()) -> pd.DataFrame:
    """Validate the tidy table and return a clean copy (str labels, float values)."""
    if not isinstance(obs, pd.DataFrame):
        raise InputError("observations must be a pandas DataFrame with columns treatment, block and value")
    need = ("treatment", "block", "value")
    missing = [c for c in need if c not in obs.columns]
    if missing:
        raise InputError(
            f"observations lack the column(s) {', '.join(missing)}: pass a table with treatment, block and value")
    cols = list(need) + [c for c in extra if c in obs.columns]
    df = obs[cols].copy()
    if df.empty:
        raise DesignError("there are no observations: widen the slice")
    if df["treatment"].isna().any() or df["block"].isna().any():
        raise InputError("some rows have no treatment or no block: fill or drop them before analysis")
    df["treatment"] = df["treatment"].astype(str)
    df["block"] = df["block"].astype(str)
    values = pd.to_numeric(df["value"], errors="coerce")
    bad = values.isna() | ~np.isfinite(values.to_numpy(dtype=float, na_value=np.nan))
    if bad.any():
        raise InputError(
            f"{int(bad.sum())} value(s) are missing, infinite or not numbers: drop or fill them before analysis")
    df["value"] = values.astype(float)
    refuse_overflow(df["value"])
    return df.reset_index(drop=True)


def refuse_overflow(values, what: str = "the values") -> None:
    """Refuse, in one line, values whose sums of squares would overflow a double (and print
    numpy's overflow warnings on the way to meaningless numbers). Infinite values mean that a sum
    over runs overflowed already (every stored value is finite)."""
    v = np.abs(np.asarray(values, dtype=float))
    v = v[~np.isnan(v)]
    if not v.size:
        return
    top = float(v.max())
    if top <= LARGEST_VALUE:
        return
    why = ("adding up its runs overflows the largest number a double holds (about 1.8e+308)" if math.isinf(top)
           else f"a value of {top:.3g} is too large for sums of squares (the analysis takes values up to {LARGEST_VALUE:.0e} in size)")
    raise DesignError(f"{what}: {why}; such a value is usually a stand-in for a failed run: mark those runs "
                      "failed in the source, or leave them out of the slice")


def _labels(df: pd.DataFrame) -> tuple[list[str], list[str]]:
    treatments = list(pd.unique(df["treatment"]))
    blocks = list(pd.unique(df["block"]))
    if len(treatments) < 2:
        raise DesignError(
            f"only one treatment ({treatments[0]}): a blocked comparison needs at least 2; widen the slice")
    if len(blocks) < 2:
        raise DesignError(
            f"only one block ({blocks[0]}): a blocked analysis needs at least 2 blocks; widen the slice")
    return treatments, blocks


def _complete(obs) -> tuple[np.ndarray, list[str], list[str]]:
    """Check a complete design and return the values as a treatments x blocks matrix.

    Treatments and blocks keep the order of first appearance in ``obs``.
    """
    df = _prepare(obs)
    treatments, blocks = _labels(df)
    dup = df.duplicated(["treatment", "block"])
    if dup.any():
        first = df[dup].iloc[0]
        raise DesignError(
            f"{int(dup.sum())} extra row(s) for one treatment and block (first: {first.treatment} on "
            f"{first.block}): collapse to one value per cell, or use generalized_anova")
    wide = df.pivot(index="treatment", columns="block", values="value").reindex(index=treatments, columns=blocks)
    holes = wide.isna().to_numpy()
    if holes.any():
        i, j = np.argwhere(holes)[0]
        raise DesignError(
            f"{int(holes.sum())} hole(s) in the design (block {blocks[j]} has no value for {treatments[i]}): "
            f"drop the blocks with holes or use incomplete_anova")
    return wide.to_numpy(dtype=float), treatments, blocks


def _f_test(ms_num: float, ms_den: float, df1: float, df2: float, scale: float) -> tuple[float, float]:
    """F and upper-tail p; handles a zero denominator (perfect fit)."""
    if df2 <= 0 or df1 <= 0:
        return float("nan"), float("nan")
    tiny = _EPS * max(scale, 1e-300)
    if ms_den <= tiny:
        if ms_num <= tiny:
            return float("nan"), float("nan")
        return float("inf"), 0.0
    f = ms_num / ms_den
    return float(f), float(stats.f.sf(f, df1, df2))


def _additive(Y: np.ndarray) -> dict:
    """Least-squares fit of y = mu + treatment + block on a complete treatments x blocks matrix."""
    a, b = Y.shape
    grand = Y.mean()
    tm = Y.mean(axis=1)
    bm = Y.mean(axis=0)
    fitted = tm[:, None] + bm[None, :] - grand
    resid = Y - fitted
    ss_tot = float(((Y - grand) ** 2).sum())
    ss_t = float(b * ((tm - grand) ** 2).sum())
    ss_b = float(a * ((bm - grand) ** 2).sum())
    ss_e = float((resid ** 2).sum())
    df_t, df_b, df_e = a - 1, b - 1, (a - 1) * (b - 1)
    ms_t, ms_b, ms_e = ss_t / df_t, ss_b / df_b, ss_e / df_e
    scale = ss_tot / max(a * b - 1, 1)
    f_t, p_t = _f_test(ms_t, ms_e, df_t, df_e, scale)
    f_b, p_b = _f_test(ms_b, ms_e, df_b, df_e, scale)
    return dict(a=a, b=b, grand=grand, tm=tm, bm=bm, fitted=fitted, resid=resid,
                ss_tot=ss_tot, ss_t=ss_t, ss_b=ss_b, ss_e=ss_e, df_t=df_t, df_b=df_b, df_e=df_e,
                ms_t=ms_t, ms_b=ms_b, ms_e=ms_e, f_t=f_t, p_t=p_t, f_b=f_b, p_b=p_b,
                perfect=ss_e <= _EPS * max(ss_tot, 1e-300))


def _tukey_nonadditivity(Y: np.ndarray, fit: dict) -> dict:
    """Tukey's one-degree-of-freedom test for non-additivity.

    SS_N = [sum_ij y_ij (ybar_i. - ybar..)(ybar_.j - ybar..)]^2 /
           [sum_i (ybar_i. - ybar..)^2 * sum_j (ybar_.j - ybar..)^2]
    tested against the remaining residual SS on (a-1)(b-1)-1 df.
    """
    ta = fit["tm"] - fit["grand"]
    be = fit["bm"] - fit["grand"]
    df2 = fit["df_e"] - 1
    na, nb = math.sqrt(float((ta ** 2).sum())), math.sqrt(float((be ** 2).sum()))
    out = {"ss": None, "f": None, "df1": 1, "df2": df2, "p": None}
    # the formula above with the effects as unit vectors: the same SS_N, but no product of three
    # values (values of 1e60 would overflow it) and no square of SS_total in the guard
    if df2 < 1 or na * nb <= math.sqrt(_EPS) * max(fit["ss_tot"], 1e-300):
        return out
    ss_n = float((Y * (ta / na)[:, None] * (be / nb)[None, :]).sum() ** 2)
    ss_rem = max(fit["ss_e"] - ss_n, 0.0)
    f, p = _f_test(ss_n, ss_rem / df2, 1, df2, fit["ss_tot"])
    out.update(ss=ss_n, f=None if math.isnan(f) else f, p=_none_if_nan(p))
    return out


def _diagnostics(Y: np.ndarray, fit: dict, treatments: list[str], blocks: list[str]) -> dict:
    """Residual checks for the additive model."""
    a, b = Y.shape
    resid = fit["resid"]
    diag: dict = {"shapiro": {"statistic": None, "p": None},
                  "fligner": {"statistic": None, "p": None},
                  "brown_forsythe": {"statistic": None, "p": None},
                  "nonadditivity": _tukey_nonadditivity(Y, fit),
                  "outliers": []}
    if fit["perfect"]:
        return diag
    flat = resid.ravel()
    sw = stats.shapiro(flat)
    diag["shapiro"] = {"statistic": float(sw.statistic), "p": float(sw.pvalue)}
    groups = [resid[i, :] for i in range(a)]
    fk = stats.fligner(*groups)
    diag["fligner"] = {"statistic": _none_if_nan(fk.statistic), "p": _none_if_nan(fk.pvalue)}
    bf = stats.levene(*groups, center="median")
    diag["brown_forsythe"] = {"statistic": _none_if_nan(bf.statistic), "p": _none_if_nan(bf.pvalue)}
    std = resid / math.sqrt(fit["ms_e"])
    for i, j in np.argwhere(np.abs(std) > OUTLIER_LIMIT):
        diag["outliers"].append({"treatment": treatments[i], "block": blocks[j],
                                 "value": float(Y[i, j]), "residual": float(resid[i, j]),
                                 "standardized": float(std[i, j])})
    diag["outliers"].sort(key=lambda r: -abs(r["standardized"]))
    return diag


def _passes(diag: dict, level: float = CHECK_LEVEL) -> bool | None:
    """True when normality, equal variances and additivity are all not rejected."""
    ps = [diag["shapiro"]["p"], diag["fligner"]["p"], diag["nonadditivity"]["p"]]
    if diag["shapiro"]["p"] is None:
        return None
    return all(p is None or p >= level for p in ps)


# --------------------------------------------------------------------------- transforms


def _positive(Y: np.ndarray) -> tuple[np.ndarray, float]:
    """Shift values so that all are positive (smallest value becomes 1) when any is <= 0."""
    mn = float(Y.min())
    if mn > 0:
        return Y, 0.0
    shift = 1.0 - mn
    # (Y - min) + 1, not Y + (1 - min): with values of 1e20 the 1 would be lost, and the smallest
    # value would become 0, whose log is -inf
    return (Y - mn) + 1.0, shift


def _sse_additive(Z: np.ndarray) -> float:
    tm = Z.mean(axis=1, keepdims=True)
    bm = Z.mean(axis=0, keepdims=True)
    r = Z - tm - bm + Z.mean()
    return float((r ** 2).sum())


def boxcox_loglik(lmb: float, Y: np.ndarray) -> float:
    """Profile log-likelihood of Box-Cox ``lmb`` under the additive block model.

    ``Y`` is a positive treatments x blocks matrix. The transform is normalized by the geometric
    mean g, z = (y^lmb - 1) / (lmb g^(lmb-1)) (z = g log y at lmb = 0), which carries the Jacobian;
    the profile log-likelihood is then -n/2 log(SSE(z)/n) up to a constant, SSE being the residual
    sum of squares of the additive treatment + block fit (Box and Cox 1964).
    """
    Y = np.asarray(Y, dtype=float)
    n = Y.size
    logy = np.log(Y)
    lg = logy.mean()
    if abs(lmb) < 1e-10:
        Z = math.exp(lg) * logy
    else:
        Z = np.expm1(lmb * logy) / (lmb * math.exp(lg * (lmb - 1.0)))
    sse = _sse_additive(Z)
    if sse <= 0 or not math.isfinite(sse):
        return float("-inf") if not math.isfinite(sse) else float("inf")
    return -0.5 * n * math.log(sse / n)


def _boxcox_lambda(Y: np.ndarray) -> float:
    lo, hi = BOXCOX_BOUNDS
    grid = np.linspace(lo, hi, 61)
    ll = np.array([boxcox_loglik(g, Y) for g in grid])
    k = int(np.nanargmax(ll))
    a_, b_ = grid[max(k - 1, 0)], grid[min(k + 1, len(grid) - 1)]
    res = optimize.minimize_scalar(lambda x: -boxcox_loglik(x, Y), bounds=(a_, b_), method="bounded",
                                   options={"xatol": 1e-6})
    best = float(res.x) if -res.fun >= ll[k] else float(grid[k])
    return best


def _transform(Y: np.ndarray, name: str) -> tuple[np.ndarray, dict]:
    info = {"name": name, "shift": 0.0, "boxcox_lambda": None}
    if name == "none":
        return Y.copy(), info
    if name == "rank":
        return stats.rankdata(Y.ravel()).reshape(Y.shape), info
    Yp, shift = _positive(Y)
    info["shift"] = shift
    if name == "log":
        return np.log(Yp), info
    if name == "boxcox":
        lmb = _boxcox_lambda(Yp)
        info["boxcox_lambda"] = lmb
        if abs(lmb) < 1e-10:
            return np.log(Yp), info
        return np.expm1(lmb * np.log(Yp)) / lmb, info
    raise InputError(f"unknown transform {name!r}: use one of {', '.join(TRANSFORMS)}")


# --------------------------------------------------------------------------- rank tests


@dataclass
class FriedmanResult(_Result):
    """Friedman test on within-block ranks.

    statistic   tie-corrected chi-square, df = a - 1, p from the chi-square distribution
    iman_davenport, df1, df2, p_f   the F form (b-1) chi2 / (b(a-1) - chi2) on (a-1), (a-1)(b-1) df
    kendall_w   Kendall's coefficient of concordance, chi2 / (b (a-1))
    mean_ranks  DataFrame treatment, mean_rank, rank_sum
    """

    treatments: int
    blocks: int
    statistic: float
    df: int
    p: float
    iman_davenport: float
    df1: int
    df2: int
    p_f: float
    kendall_w: float
    mean_ranks: pd.DataFrame
    warnings: list[str] = field(default_factory=list)

    def table(self) -> pd.DataFrame:
        return self.mean_ranks.copy()


@dataclass
class QuadeResult(_Result):
    """Quade test: within-block ranks weighted by the rank of the block's range.

    statistic, df1, df2, p   F on (a-1) and (a-1)(b-1) df
    weighted_ranks           DataFrame treatment, weighted_rank_sum (S_j), mean_rank
    """

    treatments: int
    blocks: int
    statistic: float
    df1: int
    df2: int
    p: float
    weighted_ranks: pd.DataFrame
    warnings: list[str] = field(default_factory=list)

    def table(self) -> pd.DataFrame:
        return self.weighted_ranks.copy()


def _within_ranks(Y: np.ndarray) -> np.ndarray:
    """Midranks of the treatments inside each block (column)."""
    return stats.rankdata(Y, axis=0)


def _friedman_core(Y: np.ndarray, treatments: list[str]) -> FriedmanResult:
    a, b = Y.shape
    R = _within_ranks(Y)
    rank_sums = R.sum(axis=1)
    A1 = float((R ** 2).sum())
    C1 = b * a * (a + 1) ** 2 / 4.0
    warnings: list[str] = []
    df1, df2 = a - 1, (a - 1) * (b - 1)
    if A1 - C1 <= _EPS * A1:
        stat = p = F = p_f = w = float("nan")
        warnings.append("every block ties all treatments: the Friedman test is not defined")
    else:
        # Conover's form of the statistic, which is the tie-corrected chi-square.
        stat = float((a - 1) * ((rank_sums - b * (a + 1) / 2.0) ** 2).sum() / (A1 - C1))
        p = float(stats.chi2.sf(stat, a - 1))
        w = stat / (b * (a - 1))
        rest = b * (a - 1) - stat
        if rest <= _EPS * b * a:
            F, p_f = float("inf"), 0.0
        else:
            F = (b - 1) * stat / rest
            p_f = float(stats.f.sf(F, df1, df2))
    if b < FEW_BLOCKS:
        warnings.append(f"only {b} blocks: the Friedman test has little power")
    mr = pd.DataFrame({"treatment": treatments, "mean_rank": rank_sums / b, "rank_sum": rank_sums})
    return FriedmanResult(treatments=a, blocks=b, statistic=stat, df=a - 1, p=p, iman_davenport=F,
                          df1=df1, df2=df2, p_f=p_f, kendall_w=w, mean_ranks=mr, warnings=warnings)


def friedman(obs: pd.DataFrame) -> FriedmanResult:
    """Friedman's rank test for a complete block design, with the tie correction.

    Within each block the treatments are ranked (midranks for ties). With rank sums R_j,
    A1 = sum of squared ranks and C1 = b a (a+1)^2 / 4, the statistic is
    T1 = (a-1) sum_j (R_j - b(a+1)/2)^2 / (A1 - C1), which equals the chi-square statistic with the
    usual tie correction; p from chi-square on a-1 df. The Iman-Davenport form
    F = (b-1) T1 / (b(a-1) - T1) is referred to F on a-1 and (a-1)(b-1) df and is the more
    accurate of the two for few blocks.

    Assumptions: blocks are independent; within a block the observations can be ranked; no
    normality needed.

    References: Friedman (1937), J. Amer. Statist. Assoc. 32; Iman and Davenport (1980), Comm.
    Statist. A9; Conover, Practical Nonparametric Statistics (1999), section 5.8.

    Example::

        from warehouse.analyze.blocked import friedman
        res = friedman(obs)          # obs: treatment, block, value
        res.statistic, res.p, res.iman_davenport, res.p_f
        res.table()                  # mean ranks
    """
    Y, treatments, _ = _complete(obs)
    return _friedman_core(Y, treatments)


def _quade_core(Y: np.ndarray, treatments: list[str]) -> QuadeResult:
    a, b = Y.shape
    R = _within_ranks(Y)
    Q = stats.rankdata(Y.max(axis=0) - Y.min(axis=0))
    S = Q[None, :] * (R - (a + 1) / 2.0)
    A2 = float((S ** 2).sum())
    Sj = S.sum(axis=1)
    B = float((Sj ** 2).sum() / b)
    df1, df2 = a - 1, (a - 1) * (b - 1)
    warnings: list[str] = []
    if A2 <= _EPS:
        F = p = float("nan")
        warnings.append("every block ties all treatments: the Quade test is not defined")
    elif A2 - B <= _EPS * A2:
        F, p = float("inf"), 0.0
    else:
        F = (b - 1) * B / (A2 - B)
        p = float(stats.f.sf(F, df1, df2))
    if b < FEW_BLOCKS:
        warnings.append(f"only {b} blocks: the Quade test has little power")
    tab = pd.DataFrame({"treatment": treatments, "weighted_rank_sum": Sj, "mean_rank": R.mean(axis=1)})
    return QuadeResult(treatments=a, blocks=b, statistic=float(F), df1=df1, df2=df2, p=float(p),
                       weighted_ranks=tab, warnings=warnings)


def quade(obs: pd.DataFrame) -> QuadeResult:
    """Quade's test for a complete block design.

    Within each block the treatments get midranks R_ij; the blocks are ranked by their range
    (largest minus smallest value), Q_i. With S_ij = Q_i (R_ij - (a+1)/2), A2 = sum S_ij^2 and
    B = (1/b) sum_j (sum_i S_ij)^2, the statistic F = (b-1) B / (A2 - B) is referred to F on a-1
    and (a-1)(b-1) df. Blocks with a wide spread count more, so it suits few treatments and
    blocks that differ in how much the treatments disagree. When A2 = B (every block ranks the
    treatments alike) F is infinite and p is reported as 0.

    Assumptions: independent blocks; values comparable within a block, and ranges comparable
    across blocks.

    References: Quade (1979), J. Amer. Statist. Assoc. 74; Conover, Practical Nonparametric
    Statistics (1999), section 5.8.

    Example::

        from warehouse.analyze.blocked import quade
        res = quade(obs)
        res.statistic, res.df1, res.df2, res.p
    """
    Y, treatments, _ = _complete(obs)
    return _quade_core(Y, treatments)


# --------------------------------------------------------------------------- RCBD ANOVA


@dataclass
class BlockedResult(_Result):
    """Randomized complete block ANOVA with diagnostics.

    Fields
    ------
    treatments, blocks        a and b (counts)
    treatment_names, block_names   labels in analysis order
    transform                 dict name, shift (added before log/Box-Cox), boxcox_lambda
    anova                     list of rows {source, df, ss, ms, f, p}; source is treatment,
                              block or residual (residual f and p are None)
    r_squared                 1 - SS_residual / SS_total
    relative_efficiency       ((b-1) MS_block + b(a-1) MS_res) / ((ab-1) MS_res)
    relative_efficiency_corrected   the same times ((df_e+1)(df_crd+3)) / ((df_e+3)(df_crd+1)),
                              df_e = (a-1)(b-1), df_crd = a(b-1)
    residual_ms, residual_df
    treatment_means           DataFrame treatment, mean, n (on the analysis scale)
    residuals                 DataFrame treatment, block, original, value (analysis scale),
                              fitted, residual, standardized (residual / sqrt(MS_res)),
                              studentized (residual / sqrt(MS_res (1 - h)), h = 1/a + 1/b - 1/(ab))
    diagnostics               dict shapiro, fligner, brown_forsythe ({statistic, p}),
                              nonadditivity ({ss, f, df1, df2, p}), outliers (list of
                              {treatment, block, value, residual, standardized})
    transform_checks          list of {transform, shift, boxcox_lambda, shapiro_p, fligner_p,
                              brown_forsythe_p, nonadditivity_p, passes} for none, log, boxcox,
                              rank
    recommended               "none" | "log" | "boxcox" | "rank" | "friedman"
    friedman, quade           rank-based alternatives on the untransformed values
    warnings, advice          plain sentences
    """

    treatments: int
    blocks: int
    treatment_names: list[str]
    block_names: list[str]
    transform: dict
    anova: list[dict]
    r_squared: float
    relative_efficiency: float
    relative_efficiency_corrected: float
    residual_ms: float
    residual_df: int
    treatment_means: pd.DataFrame
    residuals: pd.DataFrame
    diagnostics: dict
    transform_checks: list[dict]
    recommended: str
    friedman: FriedmanResult
    quade: QuadeResult
    warnings: list[str] = field(default_factory=list)
    advice: list[str] = field(default_factory=list)

    def table(self) -> pd.DataFrame:
        """The ANOVA table: source, df, ss, ms, f, p."""
        return pd.DataFrame(self.anova, columns=["source", "df", "ss", "ms", "f", "p"])

    def row(self, source: str) -> dict:
        """One ANOVA row by source name."""
        for r in self.anova:
            if r["source"] == source:
                return r
        raise KeyError(source)


def _anova_rows(fit: dict) -> list[dict]:
    return [
        {"source": "treatment", "df": fit["df_t"], "ss": fit["ss_t"], "ms": fit["ms_t"],
         "f": fit["f_t"], "p": fit["p_t"]},
        {"source": "block", "df": fit["df_b"], "ss": fit["ss_b"], "ms": fit["ms_b"],
         "f": fit["f_b"], "p": fit["p_b"]},
        {"source": "residual", "df": fit["df_e"], "ss": fit["ss_e"], "ms": fit["ms_e"], "f": None, "p": None},
    ]


def relative_efficiency(a: int, b: int, ms_block: float, ms_error: float) -> tuple[float, float]:
    """Relative efficiency of a complete block design against a completely randomized one.

    Returns (plain, corrected): plain = ((b-1) MS_block + b(a-1) MS_error) / ((ab-1) MS_error);
    corrected multiplies by Fisher's degrees-of-freedom factor
    ((df_e+1)(df_crd+3)) / ((df_e+3)(df_crd+1)), df_e = (a-1)(b-1), df_crd = a(b-1).
    Both are NaN when MS_error is zero.
    """
    if ms_error <= 0:
        return float("nan"), float("nan")
    plain = ((b - 1) * ms_block + b * (a - 1) * ms_error) / ((a * b - 1) * ms_error)
    df_e, df_crd = (a - 1) * (b - 1), a * (b - 1)
    factor = ((df_e + 1) * (df_crd + 3)) / ((df_e + 3) * (df_crd + 1))
    return float(plain), float(plain * factor)


def _check_row(name: str, info: dict, diag: dict) -> dict:
    return {"transform": name, "shift": info["shift"], "boxcox_lambda": info["boxcox_lambda"],
            "shapiro_p": diag["shapiro"]["p"], "fligner_p": diag["fligner"]["p"],
            "brown_forsythe_p": diag["brown_forsythe"]["p"], "nonadditivity_p": diag["nonadditivity"]["p"],
            "passes": _passes(diag)}


def _design_warnings(a: int, b: int, df_e: int) -> list[str]:
    out = []
    if b < FEW_BLOCKS:
        out.append(f"only {b} blocks: tests have little power")
    if df_e < TINY_RESIDUAL_DF:
        out.append(f"the design is tiny ({a} treatments x {b} blocks, {df_e} residual degrees of freedom): "
                   f"the error estimate is rough")
    return out


def rcbd_anova(obs: pd.DataFrame, transform: str = "none") -> BlockedResult:
    """Analysis of variance of a randomized complete block design.

    Model y_ij = mu + tau_i + beta_j + e_ij (treatment i, block j, additive, errors independent
    normal with one variance). Sums of squares are the textbook ones:
    SS_treatment = b sum (ybar_i. - ybar..)^2, SS_block = a sum (ybar_.j - ybar..)^2,
    SS_residual = the rest, on (a-1)(b-1) df. Treatment and block are each tested with F against
    the residual mean square.

    ``transform`` is applied first: "none"; "log" (when any value is <= 0 the values are shifted
    by 1 - min so the smallest becomes 1, and the shift is reported); "boxcox" (lambda chosen by
    maximizing the profile likelihood of the additive block model, see :func:`boxcox_loglik`;
    shifted like log when needed); "rank" (the rank transform of Conover and Iman: all
    observations ranked together, then the same ANOVA on the ranks).

    Diagnostics on the residuals: Shapiro-Wilk (normality); Fligner-Killeen and Brown-Forsythe
    (Levene with medians) across treatments (equal variances; with 2 treatments the residuals of
    the two rows mirror each other and these tests carry no information); Tukey's one-degree-of-
    freedom test for non-additivity; standardized residuals beyond 3 as outliers. The same checks
    are run under log, Box-Cox and rank; when the chosen scale fails, the advice names the first
    of log, Box-Cox, rank that passes (all three p >= 0.05), else the Friedman test. Friedman and
    Quade tests on the untransformed values are always included.

    Assumptions: one observation per treatment and block; no treatment x block interaction
    (checked by Tukey's test); blocks and errors independent.

    References: Montgomery, Design and Analysis of Experiments, chapter on randomized blocks;
    Tukey (1949), Biometrics 5; Box and Cox (1964), J. R. Statist. Soc. B 26; Conover and Iman
    (1981), Amer. Statist. 35; Fligner and Killeen (1976); Brown and Forsythe (1974).

    Example::

        from warehouse.analyze.blocked import rcbd_anova
        res = rcbd_anova(obs, transform="log")
        res.table()                     # source, df, ss, ms, f, p
        res.diagnostics["shapiro"]["p"], res.warnings, res.advice
    """
    if transform not in TRANSFORMS:
        raise InputError(f"unknown transform {transform!r}: use one of {', '.join(TRANSFORMS)}")
    Y0, treatments, blocks = _complete(obs)
    a, b = Y0.shape
    warnings: list[str] = []
    advice: list[str] = []

    Y, info = _transform(Y0, transform)
    fit = _additive(Y)
    diag = _diagnostics(Y, fit, treatments, blocks)
    re_plain, re_corr = relative_efficiency(a, b, fit["ms_b"], fit["ms_e"])

    warnings += _design_warnings(a, b, fit["df_e"])
    if info["shift"]:
        warnings.append(f"values include zero or negatives: the {transform} transform was applied to value + "
                        f"{info['shift']:.6g}")
    if fit["ss_tot"] <= 0:
        warnings.append("all values are equal: there is nothing to test")
    elif fit["perfect"]:
        warnings.append("treatment and block effects explain the values exactly: the residual checks "
                        "cannot be run")

    # the same checks on every scale
    checks = []
    for name in TRANSFORMS:
        if name == transform:
            checks.append(_check_row(name, info, diag))
            continue
        Yt, inf_t = _transform(Y0, name)
        ft = _additive(Yt)
        checks.append(_check_row(name, inf_t, _diagnostics(Yt, ft, treatments, blocks)))

    sw_p = diag["shapiro"]["p"]
    fk_p = diag["fligner"]["p"]
    na_p = diag["nonadditivity"]["p"]
    failed = []
    if sw_p is not None and sw_p < CHECK_LEVEL:
        failed.append("normal")
        warnings.append(f"residuals are not normal (Shapiro-Wilk {_fmt_p(sw_p)})")
    if fk_p is not None and fk_p < CHECK_LEVEL:
        failed.append("variance")
        warnings.append(f"residual spread differs between treatments (Fligner-Killeen {_fmt_p(fk_p)})")
    if na_p is not None and na_p < CHECK_LEVEL:
        failed.append("additive")
        warnings.append(f"treatment and block effects do not add up (Tukey non-additivity {_fmt_p(na_p)})")
    if diag["outliers"]:
        where = ", ".join(f"{o['treatment']} on {o['block']} ({o['standardized']:+.2f})" for o in diag["outliers"][:5])
        more = "" if len(diag["outliers"]) <= 5 else f" and {len(diag['outliers']) - 5} more"
        warnings.append(f"{len(diag['outliers'])} standardized residual(s) beyond {OUTLIER_LIMIT:g}: {where}{more}")

    fr = _friedman_core(Y0, treatments)
    qd = _quade_core(Y0, treatments)

    recommended = transform
    if failed:
        what = {"normal": "residuals are not normal", "variance": "variances differ",
                "additive": "effects are not additive"}
        named = [what[f] for f in failed]
        problem = named[0] if len(named) == 1 else ", ".join(named[:-1]) + " and " + named[-1]
        order = [t for t in ("log", "boxcox", "rank") if t != transform]
        choice = next((c for c in checks if c["transform"] in order and c["passes"]), None)
        if choice is not None:
            recommended = choice["transform"]
            label = {"log": "log", "boxcox": "Box-Cox", "rank": "rank"}[recommended]
            extra = ""
            if recommended == "boxcox":
                extra = f" (lambda = {choice['boxcox_lambda']:.3g})"
            advice.append(
                f"{problem}: the {label} transform{extra} passes the checks (Shapiro-Wilk "
                f"{_fmt_p(choice['shapiro_p'])}, Fligner-Killeen {_fmt_p(choice['fligner_p'])}); "
                f"rerun with it, or rely on the Friedman test")
        else:
            recommended = "friedman"
            advice.append(f"{problem}, and no transform passes the checks: rely on the Friedman test "
                          f"(Friedman {_fmt_p(fr.p)}, Iman-Davenport {_fmt_p(fr.p_f)})")

    h = 1.0 / a + 1.0 / b - 1.0 / (a * b)
    if fit["ms_e"] > 0 and not fit["perfect"]:
        std = fit["resid"] / math.sqrt(fit["ms_e"])
        stud = fit["resid"] / math.sqrt(fit["ms_e"] * (1 - h))
    else:
        std = stud = np.full_like(Y, np.nan)
    ti, bj = np.meshgrid(np.arange(a), np.arange(b), indexing="ij")
    residuals = pd.DataFrame({
        "treatment": [treatments[i] for i in ti.ravel()],
        "block": [blocks[j] for j in bj.ravel()],
        "original": Y0.ravel(), "value": Y.ravel(), "fitted": fit["fitted"].ravel(),
        "residual": fit["resid"].ravel(), "standardized": std.ravel(), "studentized": stud.ravel()})
    means = pd.DataFrame({"treatment": treatments, "mean": fit["tm"], "n": b})

    return BlockedResult(
        treatments=a, blocks=b, treatment_names=treatments, block_names=blocks, transform=info,
        anova=_anova_rows(fit), r_squared=(1 - fit["ss_e"] / fit["ss_tot"]) if fit["ss_tot"] > 0 else float("nan"),
        relative_efficiency=re_plain, relative_efficiency_corrected=re_corr,
        residual_ms=fit["ms_e"], residual_df=fit["df_e"], treatment_means=means, residuals=residuals,
        diagnostics=diag, transform_checks=checks, recommended=recommended, friedman=fr, quade=qd,
        warnings=warnings, advice=advice)


# --------------------------------------------------------------------------- least squares helpers


def _codes(series: pd.Series, levels: list[str]) -> np.ndarray:
    pos = {v: i for i, v in enumerate(levels)}
    return series.map(pos).to_numpy(dtype=int)


def _dummies(codes: np.ndarray, nlev: int) -> np.ndarray:
    """Treatment (reference) coding: columns for levels 1..nlev-1."""
    M = np.zeros((len(codes), max(nlev - 1, 0)))
    rows = np.nonzero(codes > 0)[0]
    M[rows, codes[rows] - 1] = 1.0
    return M


def _lsq(X: np.ndarray, y: np.ndarray) -> tuple[float, int, np.ndarray]:
    beta, _, rank, _ = np.linalg.lstsq(X, y, rcond=None)
    r = y - X @ beta
    return float(r @ r), int(rank), beta


def _components(treat_codes: np.ndarray, block_codes: np.ndarray, a: int, b: int) -> list[list[int]]:
    """Treatments connected through shared blocks (lists of treatment indices)."""
    parent = list(range(a + b))

    def find(x):
        while parent[x] != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        return x

    for t, bl in zip(treat_codes, block_codes):
        rt, rb = find(int(t)), find(a + int(bl))
        if rt != rb:
            parent[rt] = rb
    groups: dict[int, list[int]] = {}
    for t in range(a):
        groups.setdefault(find(t), []).append(t)
    return sorted(groups.values(), key=lambda g: g[0])


# --------------------------------------------------------------------------- incomplete blocks


@dataclass
class IncompleteResult(_Result):
    """Block design in which blocks may miss treatments (at most one value per cell).

    Fields
    ------
    treatments, blocks, observations   counts
    anova          rows {source, df, ss, ms, f, p}: block (unadjusted, entered first; f and p
                   None because blocks are not adjusted for treatments), treatment (adjusted for
                   blocks), residual
    r_squared, residual_ms, residual_df
    adjusted_means DataFrame treatment, n, raw_mean, adjusted_mean (least-squares mean: the
                   fitted value of the treatment averaged over all blocks)
    balance        dict complete, bibd, block_size (k or None), replication (r or None),
                   pair_lambda (lambda or None), efficiency (lambda a / (r k) for a BIBD, else None),
                   block_sizes (min, max), replications (min, max)
    residuals      DataFrame treatment, block, value, fitted, residual
    warnings
    """

    treatments: int
    blocks: int
    observations: int
    anova: list[dict]
    r_squared: float
    residual_ms: float
    residual_df: int
    adjusted_means: pd.DataFrame
    balance: dict
    residuals: pd.DataFrame
    warnings: list[str] = field(default_factory=list)

    def table(self) -> pd.DataFrame:
        return pd.DataFrame(self.anova, columns=["source", "df", "ss", "ms", "f", "p"])


def _balance(inc: np.ndarray) -> dict:
    """Balance of an incidence matrix (treatments x blocks, 0/1)."""
    a, b = inc.shape
    ks = inc.sum(axis=0)
    rs = inc.sum(axis=1)
    pairs = inc @ inc.T
    off = pairs[~np.eye(a, dtype=bool)]
    complete = bool((inc == 1).all())
    same_k = ks.min() == ks.max()
    same_r = rs.min() == rs.max()
    same_l = off.size > 0 and off.min() == off.max()
    bibd = bool(not complete and same_k and ks[0] < a and same_r and same_l and off.min() > 0)
    out = {"complete": complete, "bibd": bibd,
           "block_size": int(ks[0]) if same_k else None,
           "replication": int(rs[0]) if same_r else None,
           "pair_lambda": int(off[0]) if same_l else None,
           "efficiency": None,
           "block_sizes": [int(ks.min()), int(ks.max())],
           "replications": [int(rs.min()), int(rs.max())]}
    if bibd:
        out["efficiency"] = float(off[0] * a / (rs[0] * ks[0]))
    return out


def incomplete_anova(obs: pd.DataFrame) -> IncompleteResult:
    """ANOVA of a block design in which blocks may miss treatments.

    Model y = mu + block + treatment (additive), fitted by least squares. Sequential sums of
    squares with blocks entered first: SS_block is the unadjusted block SS and SS_treatment is
    the treatment SS adjusted for blocks (the reduction in residual SS when treatments are added
    to a blocks-only model), tested with F against the residual mean square on
    n - a - b + 1 df. Adjusted treatment means are least-squares means: the model's fitted
    value for the treatment in each block, averaged over all blocks (for a complete design they
    equal the raw means).

    Balance is reported: a balanced incomplete block design (BIBD) has every block of one size
    k < a, every treatment r times and every pair of treatments together in lambda blocks; its
    efficiency factor is lambda a / (r k).

    Raises DesignError when a cell has several rows, when the treatments are not connected
    through shared blocks (then their differences cannot be estimated), or when no residual
    degrees of freedom remain.

    Assumptions: as for the complete design (additivity, independent normal errors with one
    variance); missing cells are missing for reasons unrelated to the values.

    References: Yates (1936), Ann. Eugenics 7; Montgomery, Design and Analysis of Experiments,
    chapter on balanced incomplete block designs; Searle, Linear Models for Unbalanced Data (1987).

    Example::

        from warehouse.analyze.blocked import incomplete_anova
        res = incomplete_anova(obs)
        res.table(); res.adjusted_means; res.balance["bibd"]
    """
    df = _prepare(obs)
    treatments, blocks = _labels(df)
    dup = df.duplicated(["treatment", "block"])
    if dup.any():
        first = df[dup].iloc[0]
        raise DesignError(
            f"{int(dup.sum())} extra row(s) for one treatment and block (first: {first.treatment} on "
            f"{first.block}): collapse to one value per cell, or use generalized_anova")
    a, b, n = len(treatments), len(blocks), len(df)
    tc = _codes(df["treatment"], treatments)
    bc = _codes(df["block"], blocks)
    comps = _components(tc, bc, a, b)
    if len(comps) > 1:
        shown = "; ".join(", ".join(treatments[i] for i in g) for g in comps[:3])
        raise DesignError(
            f"the treatments fall into {len(comps)} groups that share no block ({shown}): differences "
            f"between groups cannot be estimated; add blocks that hold treatments from several groups")
    y = df["value"].to_numpy(dtype=float)
    one = np.ones((n, 1))
    Xb = np.hstack([one, _dummies(bc, b)])
    Xf = np.hstack([Xb, _dummies(tc, a)])
    rss0 = float(((y - y.mean()) ** 2).sum())
    rss_b, rank_b, _ = _lsq(Xb, y)
    rss_f, rank_f, beta = _lsq(Xf, y)
    df_b, df_t, df_e = rank_b - 1, rank_f - rank_b, n - rank_f
    if df_e < 1:
        raise DesignError(
            f"{n} observations leave no residual degrees of freedom for {a} treatments in {b} blocks: "
            f"add blocks")
    ss_b, ss_t, ss_e = rss0 - rss_b, rss_b - rss_f, rss_f
    ms_b, ms_t, ms_e = ss_b / df_b, ss_t / df_t, ss_e / df_e
    f_t, p_t = _f_test(ms_t, ms_e, df_t, df_e, rss0 / max(n - 1, 1))
    anova = [
        {"source": "block", "df": df_b, "ss": ss_b, "ms": ms_b, "f": None, "p": None},
        {"source": "treatment", "df": df_t, "ss": ss_t, "ms": ms_t, "f": f_t, "p": p_t},
        {"source": "residual", "df": df_e, "ss": ss_e, "ms": ms_e, "f": None, "p": None},
    ]
    # least-squares means: fitted value of each treatment in every block, averaged over blocks
    grid_b = np.repeat(np.arange(b), a)
    grid_t = np.tile(np.arange(a), b)
    Xg = np.hstack([np.ones((a * b, 1)), _dummies(grid_b, b), _dummies(grid_t, a)])
    pred = (Xg @ beta).reshape(b, a)
    lsm = pred.mean(axis=0)
    raw = df.groupby("treatment")["value"].agg(["mean", "size"]).reindex(treatments)
    means = pd.DataFrame({"treatment": treatments, "n": raw["size"].to_numpy(dtype=int),
                          "raw_mean": raw["mean"].to_numpy(dtype=float), "adjusted_mean": lsm})
    inc = np.zeros((a, b), dtype=int)
    inc[tc, bc] = 1
    bal = _balance(inc)
    fitted = Xf @ beta
    res_df = pd.DataFrame({"treatment": df["treatment"], "block": df["block"], "value": y,
                           "fitted": fitted, "residual": y - fitted})
    warnings = _design_warnings(a, b, df_e)
    if not bal["complete"] and not bal["bibd"]:
        warnings.append("the design is not balanced: treatments are compared with unequal precision")
    return IncompleteResult(treatments=a, blocks=b, observations=n, anova=anova,
                            r_squared=(1 - ss_e / rss0) if rss0 > 0 else float("nan"),
                            residual_ms=ms_e, residual_df=df_e, adjusted_means=means, balance=bal,
                            residuals=res_df, warnings=warnings)


# --------------------------------------------------------------------------- generalized blocks


@dataclass
class GeneralizedResult(_Result):
    """Generalized block design: several observations per treatment and block.

    Fields
    ------
    treatments, blocks, observations   counts
    cell_sizes            [smallest, largest] number of observations in a cell
    anova                 rows {source, df, ss, ms, f, p} for treatment, block, interaction,
                          residual; every F is against the residual (blocks fixed)
    residual_ms, residual_df, interaction_ms, interaction_df
    treatment_random_blocks   {f, df1, df2, p}: treatment tested against the interaction mean
                          square, the test to use when the blocks are a random sample
    treatment_means       DataFrame treatment, mean (average of the cell means), n
    warnings
    """

    treatments: int
    blocks: int
    observations: int
    cell_sizes: list[int]
    anova: list[dict]
    residual_ms: float
    residual_df: int
    interaction_ms: float
    interaction_df: int
    treatment_random_blocks: dict
    treatment_means: pd.DataFrame
    warnings: list[str] = field(default_factory=list)

    def table(self) -> pd.DataFrame:
        return pd.DataFrame(self.anova, columns=["source", "df", "ss", "ms", "f", "p"])


def generalized_anova(obs: pd.DataFrame) -> GeneralizedResult:
    """ANOVA of a generalized block design (several observations per treatment and block).

    Typical use: the instances of a group are kept apart instead of being averaged, so each
    treatment x block cell holds one value per instance. Model
    y = mu + treatment + block + treatment x block + e. Sequential sums of squares with blocks
    first, then treatments, then the interaction (for equal cell sizes the order does not
    matter). The interaction is tested against the residual (within-cell) mean square. The
    treatment effect is tested twice: against the residual mean square (blocks fixed: the
    conclusion holds for these blocks) and against the interaction mean square on
    (a-1) and (a-1)(b-1) df (blocks a random sample: the conclusion is meant to carry over to
    other blocks like them). With unequal cell sizes the second test is approximate.

    Needs every treatment in every block and at least one cell with two or more rows. When the
    column ``instance`` is present, a repeated (treatment, block, instance) raises DesignError
    (collapse seeds first).

    References: Montgomery, Design and Analysis of Experiments (factorial and random-effects
    chapters); Hinkelmann and Kempthorne, Design and Analysis of Experiments, vol. 1
    (generalized randomized block design).

    Example::

        from warehouse.analyze.blocked import generalized_anova
        res = generalized_anova(obs)        # obs: treatment, block, instance, value
        res.table(); res.treatment_random_blocks["p"]
    """
    df = _prepare(obs, extra=("instance",))
    treatments, blocks = _labels(df)
    if "instance" in df.columns:
        dup = df.duplicated(["treatment", "block", "instance"])
        if dup.any():
            first = df[dup].iloc[0]
            raise DesignError(
                f"{int(dup.sum())} repeated row(s) for one treatment and instance (first: {first.treatment} on "
                f"{first.instance}): collapse replicates to one value per instance first")
    a, b, n = len(treatments), len(blocks), len(df)
    tc = _codes(df["treatment"], treatments)
    bc = _codes(df["block"], blocks)
    counts = np.zeros((a, b), dtype=int)
    np.add.at(counts, (tc, bc), 1)
    if (counts == 0).any():
        i, j = np.argwhere(counts == 0)[0]
        raise DesignError(
            f"block {blocks[j]} has no value for {treatments[i]}: the generalized design needs every treatment "
            f"in every block; drop the blocks with holes")
    if counts.max() < 2:
        raise DesignError("every treatment x block cell holds one value, so there is no within-cell variation to test the interaction against; use the complete design (--design complete)")
    y = df["value"].to_numpy(dtype=float)
    rss0 = float(((y - y.mean()) ** 2).sum())
    one = np.ones((n, 1))
    Xb = np.hstack([one, _dummies(bc, b)])
    Xf = np.hstack([Xb, _dummies(tc, a)])
    rss_b, rank_b, _ = _lsq(Xb, y)
    rss_f, rank_f, _ = _lsq(Xf, y)
    # full cell-means model: residual = within-cell variation
    cell = tc * b + bc
    sums = np.bincount(cell, weights=y, minlength=a * b)
    cmeans = sums / counts.ravel()
    rss_c = float(((y - cmeans[cell]) ** 2).sum())
    df_b, df_t = rank_b - 1, rank_f - rank_b
    df_i, df_e = a * b - rank_f, n - a * b
    ss_b, ss_t, ss_i, ss_e = rss0 - rss_b, rss_b - rss_f, rss_f - rss_c, rss_c
    ms_b, ms_t, ms_i, ms_e = ss_b / df_b, ss_t / df_t, ss_i / df_i, ss_e / df_e
    scale = rss0 / max(n - 1, 1)
    f_t, p_t = _f_test(ms_t, ms_e, df_t, df_e, scale)
    f_b, p_b = _f_test(ms_b, ms_e, df_b, df_e, scale)
    f_i, p_i = _f_test(ms_i, ms_e, df_i, df_e, scale)
    f_r, p_r = _f_test(ms_t, ms_i, df_t, df_i, scale)
    anova = [
        {"source": "treatment", "df": df_t, "ss": ss_t, "ms": ms_t, "f": f_t, "p": p_t},
        {"source": "block", "df": df_b, "ss": ss_b, "ms": ms_b, "f": f_b, "p": p_b},
        {"source": "interaction", "df": df_i, "ss": ss_i, "ms": ms_i, "f": f_i, "p": p_i},
        {"source": "residual", "df": df_e, "ss": ss_e, "ms": ms_e, "f": None, "p": None},
    ]
    cm = cmeans.reshape(a, b)
    means = pd.DataFrame({"treatment": treatments, "mean": cm.mean(axis=1), "n": counts.sum(axis=1)})
    warnings = []
    if b < FEW_BLOCKS:
        warnings.append(f"only {b} blocks: tests have little power, and the test with random blocks has only "
                        f"{df_i} denominator degrees of freedom")
    if df_e < TINY_RESIDUAL_DF:
        warnings.append(f"the design is tiny ({df_e} residual degrees of freedom): the error estimate is rough")
    if counts.min() != counts.max():
        warnings.append(f"cells hold between {counts.min()} and {counts.max()} values: with unequal cells "
                        f"the test against the interaction is approximate")
    if not math.isnan(p_i) and p_i < CHECK_LEVEL:
        warnings.append(f"treatment effects differ between blocks (interaction {_fmt_p(p_i)}): if the blocks "
                        f"stand for a wider population, use the treatment test against the interaction")
    return GeneralizedResult(treatments=a, blocks=b, observations=n,
                             cell_sizes=[int(counts.min()), int(counts.max())], anova=anova,
                             residual_ms=ms_e, residual_df=df_e, interaction_ms=ms_i, interaction_df=df_i,
                             treatment_random_blocks={"f": f_r, "df1": df_t, "df2": df_i, "p": p_r},
                             treatment_means=means, warnings=warnings)
