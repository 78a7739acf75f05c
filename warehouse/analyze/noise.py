"""Variance components of a campaign and the allocation of groups, instances and seeds.

A run's value splits into nested levels: the instance group (the block), the instance within its
group, the seed (run) within its instance. Treatment effects are removed first:

- pooled: each treatment's groups and instances are read as its own (treatment is a fixed effect,
  the components are common to the treatments): what one solver's campaign varies by;
- per treatment: each treatment's runs alone;
- for a comparison: how a treatment DIFFERENCE varies from block to block. Blocking removes the
  group effect itself; what is left is the treatment x group and treatment x instance
  interactions and the seed noise (a crossed model: treatment fixed, the rest random).

Balanced data (the same instances per group and seeds per instance everywhere) get the ANOVA
(expected mean squares) estimates, with Satterthwaite intervals for a difference of mean squares
and the exact chi-square interval for the seed level. Unbalanced data get REML (statsmodels
MixedLM with variance components), with intervals from the estimate's standard error on
Satterthwaite's 2 (estimate / se)^2 degrees of freedom. A negative ANOVA estimate is set to 0 and
said (the usual textbook rule); its interval then runs from 0 to a conservative upper bound.

The plan: the block difference of an allocation (n_i instances per group, n_s seeds per instance)
has variance 2 (s2_TG + s2_TI / n_i + s2_seed / (n_i n_s)); the paired t-test on G such blocks
has the exact noncentral-t power of `planning.paired_t_power`. The cost of an allocation is
G (c_group + n_i (c_instance + n_s T c_run)) seconds for T treatments.

References: Searle, Casella and McCulloch, Variance Components (1992), chapters 3-4 (nested
ANOVA estimators, expected mean squares, negative estimates); Satterthwaite (1946); Sokal and
Rohlf, Biometry, nested analysis of variance; Cochran, Sampling Techniques (1977), chapter 10
(optimal allocation in multistage sampling).

Public functions
----------------
variance_components(frame, confidence=0.95, method="auto")
comparison_components(frame, confidence=0.95, method="auto")
(the allocation of a campaign from these components is in `analyze/allocation.py`)
"""
from __future__ import annotations

import math
import warnings as _warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats

from warehouse.analyze.tidy import _Result
from warehouse.errors import DesignError, InputError

LEVELS = ("group", "instance", "seed")
COMPARISON_LEVELS = ("treatment x group", "treatment x instance", "seed")



# --- the table in ------------------------------------------------------------------------------

def _frame(frame: pd.DataFrame) -> pd.DataFrame:
    need = ["treatment", "group", "instance", "value"]
    missing = [c for c in need if c not in frame.columns]
    if missing:
        raise InputError(f"the runs table needs the columns {', '.join(need)}; missing {', '.join(missing)}")
    df = frame[need].copy()
    df["value"] = pd.to_numeric(df["value"], errors="coerce").astype(float)
    df = df[np.isfinite(df["value"])]
    for c in ("treatment", "group", "instance"):
        df[c] = df[c].astype(str)
    # an instance belongs to one group: its key carries the group, so equal names in two groups differ
    df["instance"] = df["group"] + "\x1f" + df["instance"]
    if df.empty:
        raise DesignError("no run has a value to split into components")
    return df.reset_index(drop=True)


def _check_levels(df: pd.DataFrame, crossed: bool) -> None:
    strata = ["group"] if crossed else ["treatment", "group"]
    if df.groupby(strata, observed=True).ngroups < 2 or df["group"].nunique() < 2:
        raise DesignError("the components need runs on 2 or more instance groups")
    per_group = df.groupby(["treatment", "group"])["instance"].nunique()
    if int(per_group.max()) < 2:
        raise DesignError("every group has one instance: the group and instance levels cannot be told apart; "
                          "run 2 or more instances in some groups")
    cell = ["treatment", "instance"]
    if int(df.groupby(cell).size().max()) < 2:
        raise DesignError("every instance has one run per treatment: the instance and seed levels cannot be told "
                          "apart; run 2 or more seeds on some instances")


def _balanced(df: pd.DataFrame, crossed: bool) -> tuple[bool, int, int]:
    """(balanced, instances per group, seeds per instance) for the nested (or crossed) layout."""
    per_group = df.groupby(["treatment", "group"])["instance"].nunique()
    per_cell = df.groupby(["treatment", "instance"]).size()
    n, r = int(per_group.iloc[0]), int(per_cell.iloc[0])
    ok = bool((per_group == n).all() and (per_cell == r).all())
    if ok and crossed:
        t = df["treatment"].nunique()
        ok = bool((df.groupby("instance")["treatment"].nunique() == t).all()
                  and (df.groupby("group")["treatment"].nunique() == t).all())
    return ok, n, r


# --- intervals -----------------------------------------------------------------------------------

def chi2_interval(ss: float, df: float, confidence: float) -> tuple[float, float]:
    """Exact interval for sigma^2 from SS ~ sigma^2 chi2(df)."""
    a = 1 - confidence
    return float(ss / stats.chi2.ppf(1 - a / 2, df)), float(ss / stats.chi2.ppf(a / 2, df))


def satterthwaite_interval(terms: list[tuple[float, float, float]], confidence: float) -> tuple[float, float, float]:
    """Interval for theta = sum c_k MS_k (terms: (c_k, MS_k, df_k)), theta > 0: theta is read as
    (theta / nu) chi2(nu) with nu = theta^2 / sum (c_k MS_k)^2 / df_k (Satterthwaite 1946).
    Returns (low, high, nu)."""
    theta = sum(c * ms for c, ms, _ in terms)
    den = sum((c * ms) ** 2 / d for c, ms, d in terms if d > 0)
    nu = theta ** 2 / den if den > 0 else math.inf
    if not math.isfinite(nu):
        return theta, theta, nu
    a = 1 - confidence
    return float(nu * theta / stats.chi2.ppf(1 - a / 2, nu)), float(nu * theta / stats.chi2.ppf(a / 2, nu)), float(nu)


def _upper_only(c: float, ms: float, df: float, confidence: float) -> float:
    """A conservative upper bound when an estimate c (MS_a - MS_b) is cut to 0: the component is at
    most c E[MS_a], whose exact upper bound is c df MS_a / chi2_{alpha/2}(df)."""
    a = 1 - confidence
    return float(c * df * ms / stats.chi2.ppf(a / 2, df))


def _component(level: str, plus: tuple[float, float, float], minus: tuple[float, float, float], k: float,
               confidence: float, notes: list[str]) -> dict:
    """theta = (MS_plus - MS_minus) / k, cut at 0, with its interval."""
    (_, ms_a, df_a), (_, ms_b, df_b) = plus, minus
    est = (ms_a - ms_b) / k
    if est > 0:
        lo, hi, nu = satterthwaite_interval([(1 / k, ms_a, df_a), (-1 / k, ms_b, df_b)], confidence)
        return {"level": level, "variance": est, "ci_low": lo, "ci_high": hi, "df": nu, "interval": "Satterthwaite"}
    notes.append(f"the moment estimate of the {level} variance is {est:.4g} (below zero); it is set to 0, the usual "
                 "rule: that level adds no variance these runs can see; its interval runs from 0 to a conservative "
                 "upper bound")
    return {"level": level, "variance": 0.0, "ci_low": 0.0, "ci_high": _upper_only(1 / k, ms_a, df_a, confidence),
            "df": None, "interval": "cut at 0; upper bound from the mean square above"}


def _shares(rows: list[dict]) -> list[dict]:
    total = sum(r["variance"] for r in rows if r["variance"] is not None)
    for r in rows:
        r["share"] = (r["variance"] / total) if total > 0 and r["variance"] is not None else None
    return rows


# --- the result ----------------------------------------------------------------------------------

@dataclass
class Components(_Result):
    """Variance components of nested (or, for a comparison, crossed) levels.

    Fields: components (list of {level, variance, share, ci_low, ci_high, df, interval}),
    method ("anova" or "reml"), balanced, instances_per_group and seeds_per_instance (balanced
    data; the means otherwise), groups, instances, runs, treatments, confidence, mean_squares
    (the ANOVA table: source, df, ss, ms), notes (estimates cut at 0, fits that did not settle).
    """

    components: list[dict]
    method: str
    balanced: bool
    groups: int
    instances: int
    runs: int
    treatments: int
    instances_per_group: float
    seeds_per_instance: float
    confidence: float
    mean_squares: list[dict] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    def variance(self, level: str) -> float:
        return next(float(r["variance"] or 0.0) for r in self.components if r["level"] == level)

    def table(self) -> pd.DataFrame:
        return pd.DataFrame(self.components)


def _sizes(df: pd.DataFrame) -> dict:
    return {"groups": int(df["group"].nunique()), "instances": int(df["instance"].nunique()), "runs": int(len(df)),
            "treatments": int(df["treatment"].nunique())}


# --- pooled and per-treatment nested components -----------------------------------------------------

def _nested_anova(df: pd.DataFrame, n: int, r: int, confidence: float) -> Components:
    """Balanced nested ANOVA within each treatment, sums of squares pooled over treatments."""
    ss = {"group": 0.0, "instance": 0.0, "seed": 0.0}
    dfs = {"group": 0, "instance": 0, "seed": 0}
    for _, part in df.groupby("treatment", sort=False):
        cell = part.groupby("instance")["value"].transform("mean")
        grp = part.groupby("group")["value"].transform("mean")
        top = part["value"].mean()
        g = part["group"].nunique()
        ss["seed"] += float(((part["value"] - cell) ** 2).sum())
        ss["instance"] += float(((cell - grp) ** 2).sum())  # r runs per instance: each counted r times
        ss["group"] += float(((grp - top) ** 2).sum())
        dfs["group"] += g - 1
        dfs["instance"] += g * (n - 1)
        dfs["seed"] += g * n * (r - 1)
    ms = {k: ss[k] / dfs[k] if dfs[k] else math.nan for k in ss}
    notes: list[str] = []
    seed_lo, seed_hi = chi2_interval(ss["seed"], dfs["seed"], confidence)
    rows = [
        _component("group", (1, ms["group"], dfs["group"]), (1, ms["instance"], dfs["instance"]), n * r, confidence, notes),
        _component("instance", (1, ms["instance"], dfs["instance"]), (1, ms["seed"], dfs["seed"]), r, confidence, notes),
        {"level": "seed", "variance": ms["seed"], "ci_low": seed_lo, "ci_high": seed_hi, "df": float(dfs["seed"]),
         "interval": "exact chi-square"},
    ]
    t = df["treatment"].nunique()
    if t > 1 and _balanced(df, crossed=True)[0]:
        _shared_intervals(df, n, r, t, rows, confidence)
    table = [{"source": k, "df": dfs[k], "ss": ss[k], "ms": ms[k]} for k in ("group", "instance", "seed")]
    return Components(_shares(rows), "anova", True, **_sizes(df), instances_per_group=float(n),
                      seeds_per_instance=float(r), confidence=confidence, mean_squares=table, notes=notes)


def _shared_intervals(df: pd.DataFrame, n: int, r: int, t: int, rows: list[dict], confidence: float) -> None:
    """The treatments ran the same groups and instances: their group (and instance) effects are
    shared, not t independent draws, so the pooled mean squares overstate the df. The same
    estimates, written in the crossed design's mean squares, give honest Satterthwaite intervals:
    s2_group + s2_TxG = [MS_G + (t-1) MS_TxG - MS_I - (t-1) MS_TxI] / (r n t) and
    s2_instance + s2_TxI = [MS_I + (t-1) MS_TxI - t MS_seed] / (r t)."""
    _, dfs, ms = _crossed_ms(df, n, r)
    tg, ti = "treatment x group", "treatment x instance"
    k = r * n * t
    terms = {"group": [(1 / k, ms["group"], dfs["group"]), ((t - 1) / k, ms[tg], dfs[tg]),
                       (-1 / k, ms["instance"], dfs["instance"]), (-(t - 1) / k, ms[ti], dfs[ti])],
             "instance": [(1 / (r * t), ms["instance"], dfs["instance"]), ((t - 1) / (r * t), ms[ti], dfs[ti]),
                          (-1 / r, ms["seed"], dfs["seed"])]}
    for row in rows:
        if row["level"] in terms and row["variance"] > 0:
            lo, hi, nu = satterthwaite_interval(terms[row["level"]], confidence)
            row.update(ci_low=lo, ci_high=hi, df=nu, interval="Satterthwaite on the crossed mean squares "
                       "(the treatments share the groups and instances)")


def _reml_interval(est: float, se: float | None, confidence: float) -> tuple[float | None, float | None, float | None]:
    if est <= 0 or se is None or not math.isfinite(se) or se <= 0:
        return (0.0 if est <= 0 else None), None, None
    nu = 2 * (est / se) ** 2
    a = 1 - confidence
    return float(nu * est / stats.chi2.ppf(1 - a / 2, nu)), float(nu * est / stats.chi2.ppf(a / 2, nu)), float(nu)


def _fit_mixed(df: pd.DataFrame, groups: str, vc: dict[str, str], fixed: str):
    import statsmodels.formula.api as smf
    from statsmodels.tools.sm_exceptions import ConvergenceWarning

    notes: list[str] = []
    with _warnings.catch_warnings(record=True) as seen:
        _warnings.simplefilter("always")
        model = smf.mixedlm(fixed, df, groups=df[groups], re_formula="1", vc_formula=vc)
        try:
            res = model.fit(reml=True)
        except (np.linalg.LinAlgError, ValueError) as exc:
            raise DesignError(f"the REML fit of the components failed ({exc}); narrow the slice or balance the runs") from None
    if not res.converged or any(issubclass(w.category, ConvergenceWarning) for w in seen):
        notes.append("the REML fit did not settle cleanly (a component may sit at zero): read the intervals with care")
    return res, notes


def _reml_row(level: str, est: float, se: float | None, confidence: float, notes: list[str]) -> dict:
    est = max(float(est), 0.0)
    lo, hi, nu = _reml_interval(est, se, confidence)
    if est <= 1e-12 * max(1.0, abs(est)):
        notes.append(f"the REML estimate of the {level} variance is at 0 (the boundary): these runs show no "
                     "variance there; no interval is given")
    return {"level": level, "variance": est, "ci_low": lo, "ci_high": hi, "df": nu,
            "interval": "REML, Satterthwaite df from the standard error" if hi is not None else "none (at the boundary)"}


def _nested_reml(df: pd.DataFrame, confidence: float) -> Components:
    df = df.assign(tg=df["treatment"] + "\x1f" + df["group"], ti=df["treatment"] + "\x1f" + df["instance"])
    fixed = "value ~ C(treatment)" if df["treatment"].nunique() > 1 else "value ~ 1"
    res, notes = _fit_mixed(df, "tg", {"instance": "0 + C(ti)"}, fixed)
    scale = float(res.scale)
    k_fe = len(res.fe_params)
    bse = np.asarray(res.bse, dtype=float)
    # the variance parameters are fitted divided by the residual variance: their se scales with it
    se_group = scale * bse[k_fe] if len(bse) > k_fe else None
    se_inst = scale * bse[k_fe + 1] if len(bse) > k_fe + 1 else None
    cells = df.groupby("ti").ngroups
    within = len(df) - cells
    shared = int(df.groupby("instance")["treatment"].nunique().max())
    if shared > 1:
        # the treatments share groups and instances, so their effects are not independent draws:
        # the standard errors are widened as if one treatment's runs alone had been seen (conservative)
        se_group = None if se_group is None else se_group * math.sqrt(shared)
        se_inst = None if se_inst is None else se_inst * math.sqrt(shared)
        notes.append(f"the treatments share groups and instances: the REML intervals of the group and instance "
                     f"levels are widened by sqrt({shared}) as if one treatment's runs alone had been seen "
                     "(conservative; balanced runs get exact-df intervals)")
    rows = [_reml_row("group", float(res.cov_re.iloc[0, 0]), se_group, confidence, notes),
            _reml_row("instance", float(res.vcomp[0]), se_inst, confidence, notes)]
    lo, hi = chi2_interval(scale * within, within, confidence) if within > 0 else (None, None)
    rows.append({"level": "seed", "variance": scale, "ci_low": lo, "ci_high": hi, "df": float(within),
                 "interval": "chi-square on the runs' within-instance df"})
    per_group = df.groupby("tg")["instance"].nunique().mean()
    per_cell = df.groupby("ti").size().mean()
    return Components(_shares(rows), "reml", False, **_sizes(df), instances_per_group=float(per_group),
                      seeds_per_instance=float(per_cell), confidence=confidence, notes=notes)


def _method(method: str) -> str:
    if method not in ("auto", "anova", "reml"):
        raise InputError(f"--method {method}: choose auto, anova or reml")
    return method


def variance_components(frame: pd.DataFrame, confidence: float = 0.95, method: str = "auto") -> Components:
    """Components of the levels group, instance (within group) and seed (within instance), with
    treatment effects removed: each treatment's groups and instances are its own, and the
    components are common to the treatments (one treatment: its runs alone).

    ``frame`` has one row per run: treatment, group, instance, value. Balanced data (one number of
    instances per group and of runs per instance) get the ANOVA estimates (method "auto" or
    "anova"); unbalanced data, or method "reml", get REML. Expected mean squares of the balanced
    nested design: E MS_seed = s2_seed; E MS_instance = s2_seed + r s2_instance;
    E MS_group = s2_seed + r s2_instance + n r s2_group.

    Example::

        from warehouse.analyze.noise import variance_components
        variance_components(runs).components     # [{"level": "group", "variance": ...}, ...]
    """
    if not 0.5 < confidence < 1:
        raise InputError(f"confidence {confidence}: give a level between 0.5 and 1, e.g. 0.95")
    method = _method(method)
    df = _frame(frame)
    _check_levels(df, crossed=False)
    balanced, n, r = _balanced(df, crossed=False)
    if balanced and method != "reml":
        return _nested_anova(df, n, r, confidence)
    if method == "anova":
        raise DesignError("the runs are unbalanced (instances per group or runs per instance differ): "
                          "the ANOVA estimates need balanced data; use --method reml or auto")
    return _nested_reml(df, confidence)


# --- the components of a treatment difference ----------------------------------------------------

def _crossed_anova(df: pd.DataFrame, n: int, r: int, confidence: float) -> Components:
    ss, dfs, ms = _crossed_ms(df, n, r)
    notes: list[str] = []
    lo, hi = chi2_interval(ss["seed"], dfs["seed"], confidence)
    tg, ti = "treatment x group", "treatment x instance"
    rows = [_component(tg, (1, ms[tg], dfs[tg]), (1, ms[ti], dfs[ti]), n * r, confidence, notes),
            _component(ti, (1, ms[ti], dfs[ti]), (1, ms["seed"], dfs["seed"]), r, confidence, notes),
            {"level": "seed", "variance": ms["seed"], "ci_low": lo, "ci_high": hi, "df": float(dfs["seed"]),
             "interval": "exact chi-square"}]
    table = [{"source": k, "df": dfs[k], "ss": ss[k], "ms": ms[k]} for k in ss]
    return Components(_shares(rows), "anova", True, **_sizes(df), instances_per_group=float(n),
                      seeds_per_instance=float(r), confidence=confidence, mean_squares=table, notes=notes)


def _crossed_ms(df: pd.DataFrame, n: int, r: int) -> tuple[dict, dict, dict]:
    """Sums of squares, df and mean squares of the balanced crossed design (treatment x group,
    instances within groups, runs within treatment and instance)."""
    t = df["treatment"].nunique()
    g = df["group"].nunique()
    y = df["value"]
    top = y.mean()
    m_t = df.groupby("treatment")["value"].transform("mean")
    m_g = df.groupby("group")["value"].transform("mean")
    m_i = df.groupby("instance")["value"].transform("mean")
    m_tg = df.groupby(["treatment", "group"])["value"].transform("mean")
    m_ti = df.groupby(["treatment", "instance"])["value"].transform("mean")
    # each run carries its cell's terms, so the sums count every mean as often as the design does
    ss = {"treatment": float(((m_t - top) ** 2).sum()), "group": float(((m_g - top) ** 2).sum()),
          "instance": float(((m_i - m_g) ** 2).sum()), "treatment x group": float(((m_tg - m_t - m_g + top) ** 2).sum()),
          "treatment x instance": float(((m_ti - m_tg - m_i + m_g) ** 2).sum()), "seed": float(((y - m_ti) ** 2).sum())}
    dfs = {"treatment": t - 1, "group": g - 1, "instance": g * (n - 1), "treatment x group": (t - 1) * (g - 1),
           "treatment x instance": (t - 1) * g * (n - 1), "seed": t * g * n * (r - 1)}
    ms = {k: ss[k] / dfs[k] if dfs[k] else math.nan for k in ss}
    return ss, dfs, ms


def _contrast_reml(df: pd.DataFrame, confidence: float) -> Components:
    """Unbalanced runs: the seed variance from the runs within each treatment and instance (exact
    chi-square), then the treatments' cell means on each instance turned into t - 1 orthonormal
    contrasts. Each contrast is free of the treatment's own level, the group and the instance
    effects; over instances it varies by a group part (variance s2_TG) and an instance part
    (s2_TI plus the seed noise of the cell means), a one-way random model fitted by REML."""
    from scipy.linalg import null_space

    cell = df.groupby(["treatment", "instance"])["value"]
    stats_ = cell.agg(["mean", "size", "var"]).reset_index()
    within_df = int(len(df) - len(stats_))
    within_ss = float(((stats_["size"] - 1) * stats_["var"].fillna(0.0)).sum())
    s2_seed = within_ss / within_df
    treatments = sorted(df["treatment"].unique())
    means = stats_.pivot(index="instance", columns="treatment", values="mean")[treatments]
    sizes = stats_.pivot(index="instance", columns="treatment", values="size")[treatments].to_numpy(float)
    contrasts = null_space(np.ones((1, len(treatments)))).T  # (t-1) x t, orthonormal, rows sum to 0
    w = means.to_numpy(float) @ contrasts.T  # instances x (t-1)
    seed_part = (1.0 / sizes) @ (contrasts.T ** 2)  # each contrast's seed variance over s2_seed
    group_of = df.drop_duplicates("instance").set_index("instance")["group"].reindex(means.index).to_numpy()
    k = len(treatments) - 1
    long = pd.DataFrame({"w": w.ravel(), "contrast": np.tile(np.arange(k), len(means)).astype(str),
                         "group": np.repeat(group_of, k)})
    long["kg"] = long["contrast"] + "\x1f" + long["group"]
    import statsmodels.formula.api as smf
    from statsmodels.tools.sm_exceptions import ConvergenceWarning

    notes: list[str] = []
    with _warnings.catch_warnings(record=True) as seen:
        _warnings.simplefilter("always")
        try:
            res = smf.mixedlm("w ~ C(contrast)" if k > 1 else "w ~ 1", long, groups=long["kg"]).fit(reml=True)
        except (np.linalg.LinAlgError, ValueError) as exc:
            raise DesignError(f"the REML fit of the components failed ({exc}); narrow the slice or balance the runs") from None
    if not res.converged or any(issubclass(x.category, ConvergenceWarning) for x in seen):
        notes.append("the REML fit did not settle cleanly (a component may sit at zero): read the intervals with care")
    scale = float(res.scale)
    bse = np.asarray(res.bse, dtype=float)
    k_fe = len(res.fe_params)
    se_tg = scale * bse[k_fe] if len(bse) > k_fe else None
    rows = [_reml_row("treatment x group", float(res.cov_re.iloc[0, 0]), se_tg, confidence, notes)]
    c_seed = float(seed_part.mean())
    resid_df = len(long) - long["kg"].nunique()
    rows.append(_component("treatment x instance", (1, scale, resid_df), (1, c_seed * s2_seed, within_df), 1.0,
                           confidence, notes))
    lo, hi = chi2_interval(within_ss, within_df, confidence)
    rows.append({"level": "seed", "variance": s2_seed, "ci_low": lo, "ci_high": hi, "df": float(within_df),
                 "interval": "exact chi-square"})
    rows[1]["interval"] = "REML residual less the seed part, Satterthwaite" if rows[1]["variance"] > 0 else rows[1]["interval"]
    per_group = df.groupby(["treatment", "group"])["instance"].nunique().mean()
    return Components(_shares(rows), "reml", False, **_sizes(df), instances_per_group=float(per_group),
                      seeds_per_instance=float(stats_["size"].mean()), confidence=confidence, notes=notes)


def comparison_components(frame: pd.DataFrame, confidence: float = 0.95, method: str = "auto") -> Components:
    """How a treatment difference varies from block to block: the treatment x group and treatment x
    instance interaction variances and the seed variance of the crossed model (treatment fixed;
    group, instance within group and the interactions random, independent effects).

    Only the instances every treatment of their group ran take part. Balanced data get the ANOVA
    estimates from E MS_TxI = s2_seed + r s2_TI and E MS_TxG = s2_seed + r s2_TI + n r s2_TG;
    otherwise REML. For two treatments, a block's difference of means over n instances with r
    seeds each has variance 2 (s2_TG + s2_TI / n + s2_seed / (n r)).
    """
    if not 0.5 < confidence < 1:
        raise InputError(f"confidence {confidence}: give a level between 0.5 and 1, e.g. 0.95")
    method = _method(method)
    df = _frame(frame)
    t = df["treatment"].nunique()
    if t < 2:
        raise DesignError("the components of a difference need 2 or more treatments on the same instances")
    shared = df.groupby("instance")["treatment"].nunique()
    df = df[df["instance"].isin(shared[shared == t].index)].reset_index(drop=True)
    if df.empty:
        raise DesignError("no instance was run by every treatment: a difference has no common ground")
    _check_levels(df, crossed=True)
    balanced, n, r = _balanced(df, crossed=True)
    if balanced and method != "reml":
        return _crossed_anova(df, n, r, confidence)
    if method == "anova":
        raise DesignError("the runs are unbalanced: the ANOVA estimates need balanced data; use --method reml or auto")
    return _contrast_reml(df, confidence)
