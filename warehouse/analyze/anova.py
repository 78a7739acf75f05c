"""The analysis of variance of a randomized complete block design, with its checks and transforms.

:func:`rcbd_anova` fits the additive model (treatment + block) to one value per treatment and
block, and checks its residuals: Shapiro-Wilk, Fligner-Killeen and Brown-Forsythe, Tukey's test
for non-additivity, outliers. The same checks run on the log, Box-Cox and rank scales, and the
advice names the first scale that passes (else the Friedman test, from :mod:`.ranks`). Also here:
the relative efficiency of blocking and the Box-Cox profile likelihood. The additive fit
(:func:`_additive`) is the block model that the baseline and all-pairs comparisons use too.

The sums of squares are computed from the textbook formulas with numpy; statsmodels is used by
the tests as the reference. The residual checks, the ranks and the Box-Cox search come from
:mod:`.lean` (numpy and scipy.special), so that a blocktest never imports scipy.stats.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from warehouse.analyze.lean import average_ranks, bounded_minimum, brown_forsythe, fligner_killeen, shapiro_wilk
from warehouse.analyze.ranks import FriedmanResult, QuadeResult, _friedman_core, _quade_core
from warehouse.analyze.tidy import (
    _EPS,
    CHECK_LEVEL,
    _complete,
    _design_warnings,
    _f_test,
    _fmt_p,
    _none_if_nan,
    _Result,
)
from warehouse.errors import InputError

#: standardized residuals beyond this are flagged as outliers (common practice).
OUTLIER_LIMIT = 3.0
#: Box-Cox lambda is searched in this interval.
BOXCOX_BOUNDS = (-3.0, 3.0)

TRANSFORMS = ("none", "log", "boxcox", "rank")

#: why the spread checks say nothing with two treatments
TWO_TREATMENTS = ("with two treatments the residuals in each block are equal and opposite, so the spread "
                  "checks cannot tell anything")


# --------------------------------------------------------------------------- the additive model and its checks


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
    w, p = shapiro_wilk(flat)
    diag["shapiro"] = {"statistic": _none_if_nan(w), "p": _none_if_nan(p)}
    if a == 2:
        # each block's two residuals are r and -r: the spreads are equal by construction, and the
        # tests would always say so (p = 1); no p is better than one that cannot fail
        diag["fligner"] = {"statistic": None, "p": None, "note": TWO_TREATMENTS}
        diag["brown_forsythe"] = {"statistic": None, "p": None, "note": TWO_TREATMENTS}
    else:
        _spread_tests(diag, [resid[i, :] for i in range(a)])
    std = resid / math.sqrt(fit["ms_e"])
    for i, j in np.argwhere(np.abs(std) > OUTLIER_LIMIT):
        diag["outliers"].append({"treatment": treatments[i], "block": blocks[j],
                                 "value": float(Y[i, j]), "residual": float(resid[i, j]),
                                 "standardized": float(std[i, j])})
    diag["outliers"].sort(key=lambda r: -abs(r["standardized"]))
    return diag


def _spread_tests(diag: dict, groups: list) -> None:
    """Fligner-Killeen and Brown-Forsythe across treatments, into `diag`."""
    stat, p = fligner_killeen(*groups)
    diag["fligner"] = {"statistic": _none_if_nan(stat), "p": _none_if_nan(p)}
    stat, p = brown_forsythe(*groups)
    diag["brown_forsythe"] = {"statistic": _none_if_nan(stat), "p": _none_if_nan(p)}


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
    """The lambda in BOXCOX_BOUNDS that maximizes :func:`boxcox_loglik`: the best of a 61-point grid,
    then Brent's bounded search between its neighbours (:func:`.lean.bounded_minimum`)."""
    lo, hi = BOXCOX_BOUNDS
    grid = np.linspace(lo, hi, 61)
    ll = np.array([boxcox_loglik(g, Y) for g in grid])
    k = int(np.nanargmax(ll))
    a_, b_ = grid[max(k - 1, 0)], grid[min(k + 1, len(grid) - 1)]
    x, least = bounded_minimum(lambda x: -boxcox_loglik(x, Y), a_, b_, xatol=1e-6)
    return float(x) if -least >= ll[k] else float(grid[k])


def _transform(Y: np.ndarray, name: str) -> tuple[np.ndarray, dict]:
    info = {"name": name, "shift": 0.0, "boxcox_lambda": None}
    if name == "none":
        return Y.copy(), info
    if name == "rank":
        return average_ranks(Y).reshape(Y.shape), info
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
    treatment_means           DataFrame treatment, mean, n (on the analysis scale); with the log
                              transform also geometric_mean (exp(mean) - shift, original scale)
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
    the two rows mirror each other, so these tests cannot fail: they are not run, their p is None
    and their ``note`` says why); Tukey's one-degree-of-
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

        from warehouse.analyze.anova import rcbd_anova
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
        warnings.append("treatment and block effects explain the values exactly: the residual mean square is 0, "
                        "so F, p and the residual checks cannot be computed")

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
    if info["name"] == "log":  # the mean of logs, back on the original scale (less the shift, if any)
        means["geometric_mean"] = np.exp(fit["tm"]) - info["shift"]

    return BlockedResult(
        treatments=a, blocks=b, treatment_names=treatments, block_names=blocks, transform=info,
        anova=_anova_rows(fit), r_squared=(1 - fit["ss_e"] / fit["ss_tot"]) if fit["ss_tot"] > 0 else float("nan"),
        relative_efficiency=re_plain, relative_efficiency_corrected=re_corr,
        residual_ms=fit["ms_e"], residual_df=fit["df_e"], treatment_means=means, residuals=residuals,
        diagnostics=diag, transform_checks=checks, recommended=recommended, friedman=fr, quade=qd,
        warnings=warnings, advice=advice)
