"""Runtimes with a cutoff, read as right-censored data.

A run *solved* when it succeeded in less time than the cutoff. Every other run (failed, timed out,
or successful at or past the cutoff) is *censored* at the cutoff: all we know of it is that it did
not solve within that time. Dropping such runs, or averaging them in at some made-up value, biases
a comparison towards whoever fails most; survival methods use exactly what is known.

Public functions
----------------
censor_at(values, ok, cutoff)       the (time, solved) pair of every run
solved_curve(time, solved)          Kaplan-Meier solved fraction over time (statsmodels SurvfuncRight)
cox_treatments(time, event, group, strata, clusters)
                                    a stratified Cox model of one treatment factor, Efron's ties,
                                    robust covariance by cluster; PHReg's numbers, vectorized
compare_censored(runs, reference, cutoff, ...)
                                    per treatment: runs, solved, Kaplan-Meier median, restricted
                                    mean; against the reference: a Cox model stratified by block
                                    (hazard ratio of solving, interval, p, proportional-hazards
                                    check) and a stratified log-rank test over all treatments

Assumptions
-----------
- Censoring is independent of the time a run would have needed. Censoring at a common cutoff
  (type I censoring) satisfies it; a run that crashed early is taken as "not solved by the
  cutoff", which is the conservative reading for the treatment that crashed.
- Blocks are strata: each block has a baseline hazard of its own, and only runs in the same block
  are compared. Runs on one instance may be alike (seeds of the same instance): with an
  ``instance`` column the Cox covariance is the robust (sandwich) estimate clustered by instance
  (Lin and Wei 1989), which needs a good number of instances.
- Proportional hazards: within every block, a treatment's hazard of solving is a constant multiple
  of the reference's. It is checked per treatment with the Grambsch-Therneau test on the Schoenfeld
  residuals against the rank of the event times, and a caution is raised when it fails.
- The log-rank test counts every run as independent; the Cox p values allow for runs on one
  instance being alike, the log-rank p does not.

References
----------
Kaplan and Meier (1958), Nonparametric estimation from incomplete observations, JASA 53.
Cox (1972), Regression models and life-tables, JRSS B 34; Efron (1977) for tied times.
Mantel (1966) for the log-rank test; Kalbfleisch and Prentice (2002), The Statistical Analysis of
Failure Time Data, for stratification. Grambsch and Therneau (1994), Biometrika 81, for the
proportional-hazards test. Lin and Wei (1989), JASA 84, for the robust covariance. Peduzzi et al.
(1995), J Clin Epidemiol 48, for ten events per coefficient.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from warehouse.analyze.tidy import CHECK_LEVEL, _fmt_p, _Result
from warehouse.errors import DesignError, InputError

#: a solved-fraction curve in a result keeps at most about this many steps: the first step into
#: each band of 1/CURVE_POINTS of the share, and the last, so a figure drawn from the kept steps
#: is never off by more than 1/CURVE_POINTS (and a curve with fewer steps is kept whole).
CURVE_POINTS = 200
#: a Cox coefficient beyond this size (a hazard ratio past e^15) is the likelihood running off to
#: infinity (one treatment solves every run before the other solves any), not an estimate.
LARGEST_COEFFICIENT = 15.0
#: fewer instances than this make the clustered (sandwich) covariance rough (common practice).
FEW_CLUSTERS = 20
#: fewer solved runs per Cox coefficient than this make the estimates rough (Peduzzi et al. 1995).
EVENTS_PER_COEFFICIENT = 10


@dataclass
class CensoredResult(_Result):
    """Censored runtimes of several treatments, blocked.

    per_treatment  one dict per treatment: runs, solved, censored (and failed, past_cutoff when the
                   input says which runs failed), solved_fraction (Kaplan-Meier, by the cutoff),
                   median_time (Kaplan-Meier; None when fewer than half solve), restricted_mean_time
                   (area under the unsolved fraction up to the cutoff: the mean time with unsolved
                   runs counted at the cutoff), mean_time_solved_only and median_time_solved_only
                   (over solved runs only, so they flatter a treatment that fails often), curve
                   ([time, solved fraction] at the steps of the Kaplan-Meier curve)
    cox            one dict per treatment other than the reference: hazard_ratio of solving
                   (above 1: solves sooner), ci_low, ci_high, p (Wald), p_adjusted (Holm),
                   proportional_p (Grambsch-Therneau), estimable
    logrank        stratified log-rank test of equal solving over all treatments: chi2, df, p
    """

    cutoff: float
    reference: str
    confidence: float
    runs: int
    blocks: int
    instances: int | None
    per_treatment: list[dict]
    cox: list[dict]
    cox_method: dict
    logrank: dict
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    metric: str = ""  # labels for the text and figures; the statistics do not use them
    unit: str = ""

    def table(self) -> pd.DataFrame:
        return pd.DataFrame([{k: v for k, v in r.items() if k != "curve"} for r in self.per_treatment])


# --------------------------------------------------------------------------- censoring


def censor_at(values, ok, cutoff: float) -> tuple[np.ndarray, np.ndarray]:
    """(time, solved) of each run: a successful run below the cutoff solved at its value; every
    other run (failed, or at or past the cutoff, or without a value) is censored at the cutoff."""
    cutoff = _check_cutoff(cutoff)
    v = np.asarray(values, dtype=float)
    good = np.asarray(ok, dtype=bool)
    if v.shape != good.shape:
        raise InputError("censor_at needs one success flag per value")
    if np.any(good & (v < 0)):
        raise InputError(f"{int(np.sum(good & (v < 0)))} successful runs have a negative time; "
                         "a time is 0 or more: correct the source")
    solved = good & np.isfinite(v) & (v < cutoff)
    return np.where(solved, v, cutoff), solved


def _check_cutoff(cutoff) -> float:
    try:
        c = float(cutoff)
    except (TypeError, ValueError):
        raise InputError(f"cutoff {cutoff!r}: give the time limit as a positive number, e.g. 600") from None
    if not math.isfinite(c) or c <= 0:
        raise InputError(f"cutoff {cutoff!r}: give the time limit as a positive number, e.g. 600")
    return c


# --------------------------------------------------------------------------- Kaplan-Meier


def solved_curve(time, solved) -> pd.DataFrame:
    """The Kaplan-Meier solved fraction (1 - survival) at each time some run solved.

    Columns time, solved_fraction, at_risk, solved; empty when no run solved."""
    t = np.asarray(time, dtype=float)
    e = np.asarray(solved, dtype=bool)
    if not e.any():
        return pd.DataFrame({"time": [], "solved_fraction": [], "at_risk": [], "solved": []})
    from statsmodels.duration.survfunc import SurvfuncRight

    sf = SurvfuncRight(t, e.astype(int))
    return pd.DataFrame({"time": sf.surv_times, "solved_fraction": 1.0 - sf.surv_prob,
                         "at_risk": sf.n_risk, "solved": sf.n_events})


def _thin(curve: pd.DataFrame) -> list[list[float]]:
    f = curve["solved_fraction"].to_numpy(float)
    t = curve["time"].to_numpy(float)
    if len(f) > CURVE_POINTS:  # the first step into each 1/CURVE_POINTS band of the share, and the last step
        band = np.floor(f * CURVE_POINTS)
        keep = np.r_[True, band[1:] != band[:-1]]
        keep[-1] = True
        f, t = f[keep], t[keep]
    return [[float(a), float(b)] for a, b in zip(t, f)]


def _treatment_row(name: str, t: np.ndarray, e: np.ndarray, cutoff: float, failed: np.ndarray | None) -> dict:
    curve = solved_curve(t, e)
    row = {"treatment": name, "runs": int(len(t)), "solved": int(e.sum()), "censored": int((~e).sum())}
    if failed is not None:
        row["failed"] = int(failed.sum())
        row["past_cutoff"] = int((~e & ~failed).sum())
    frac = float(curve["solved_fraction"].iloc[-1]) if len(curve) else 0.0
    reached = curve[curve["solved_fraction"] >= 0.5 - 1e-12]
    # the area under the unsolved fraction S(t) from 0 to the cutoff, S stepping down at each solve
    steps = np.concatenate([[0.0], curve["time"].to_numpy(float), [cutoff]])
    surv = np.concatenate([[1.0], 1.0 - curve["solved_fraction"].to_numpy(float)])
    rmst = float(np.sum(surv * np.diff(steps)))
    done = t[e]
    row.update(solved_fraction=frac, median_time=float(reached["time"].iloc[0]) if len(reached) else None,
               restricted_mean_time=rmst,
               mean_time_solved_only=float(done.mean()) if done.size else None,
               median_time_solved_only=float(np.median(done)) if done.size else None,
               curve=_thin(curve))
    return row


# --------------------------------------------------------------------------- the comparison


def _prepare_runs(runs, cutoff: float) -> pd.DataFrame:
    if not isinstance(runs, pd.DataFrame):
        raise InputError("runs must be a pandas DataFrame with columns treatment, block, time and solved")
    missing = [c for c in ("treatment", "block", "time", "solved") if c not in runs.columns]
    if missing:
        raise InputError(f"runs lack the column(s) {', '.join(missing)}: pass treatment, block, time and solved "
                         "(censor_at gives time and solved)")
    cols = ["treatment", "block", "time", "solved"] + [c for c in ("instance", "failed") if c in runs.columns]
    df = runs[cols].copy()
    if df.empty:
        raise DesignError("there are no runs to analyse: widen the slice")
    if df["treatment"].isna().any() or df["block"].isna().any():
        raise InputError("some runs have no treatment or no block: fill or drop them first")
    df["treatment"] = df["treatment"].astype(str)
    df["block"] = df["block"].astype(str)
    t = pd.to_numeric(df["time"], errors="coerce").to_numpy(float)
    if not np.all(np.isfinite(t)):
        raise InputError(f"{int((~np.isfinite(t)).sum())} run time(s) are missing or not finite: censor_at gives every run a time")
    if np.any(t < 0):
        raise InputError(f"{int((t < 0).sum())} run time(s) are negative: a time is 0 or more")
    if np.any(t > cutoff):
        raise InputError(f"{int((t > cutoff).sum())} run time(s) lie past the cutoff {cutoff:g}: censor them with censor_at first")
    df["time"] = t
    df["solved"] = df["solved"].astype(bool)
    if "failed" in df.columns:
        df["failed"] = df["failed"].astype(bool)
    return df.reset_index(drop=True)


def compare_censored(runs: pd.DataFrame, reference: str, cutoff: float, confidence: float = 0.95) -> CensoredResult:
    """Censored runtimes per treatment, and every treatment against `reference`, blocked.

    `runs` has one row per run with treatment, block, time and solved (see `censor_at`); with an
    ``instance`` column the Cox covariance is clustered by instance, and with a ``failed`` column
    the counts tell failed runs from runs past the cutoff. Treatments keep their order of first
    appearance. Statistics: Kaplan-Meier per treatment (statsmodels SurvfuncRight), a Cox model
    stratified by block with Efron's ties (`cox_treatments`, which gives statsmodels PHReg's
    numbers in a fraction of its time), and the stratified log-rank test (statsmodels survdiff).
    See the module's notes for the assumptions.

    Example::

        t, e = censor_at(runs["seconds"], runs["status"] == "ok", 600)
        res = compare_censored(runs.assign(time=t, solved=e), "stacker@1.4", 600)
    """
    cutoff = _check_cutoff(cutoff)
    if not 0.5 < float(confidence) < 1.0:
        raise InputError(f"confidence {confidence!r} must lie between 0.5 and 1, e.g. 0.95")
    df = _prepare_runs(runs, cutoff)
    treatments = list(pd.unique(df["treatment"]))
    if reference not in treatments:
        raise InputError(f"reference {reference} has no runs here; treatments: {', '.join(treatments)}")
    if len(treatments) < 2:
        raise DesignError(f"only one treatment ({treatments[0]}): a comparison needs at least 2; widen the slice")
    warnings: list[str] = []
    per = []
    for name in treatments:
        part = df[df["treatment"] == name]
        per.append(_treatment_row(name, part["time"].to_numpy(float), part["solved"].to_numpy(bool), cutoff,
                                  part["failed"].to_numpy(bool) if "failed" in part else None))
    if not df["solved"].any():
        warnings.append(f"no run solved within the cutoff {cutoff:g}: there is nothing to compare but the counts")
    for r in per:
        if r["solved"] == 0 and df["solved"].any():
            warnings.append(f"{r['treatment']} solved no run within the cutoff: its hazard ratio is not estimable "
                            "(it would be 0); its counts say it all")
    cox, method = _cox(df, treatments, reference, confidence, warnings)
    logrank = _logrank(df, treatments, warnings)
    repeated = "instance" in df and df.groupby(["treatment", "instance"]).size().max() > 1
    if repeated and logrank.get("p") is not None:
        warnings.append("the log-rank test counts every run as independent: with several runs per instance its p "
                        "is too small; the Cox intervals and p allow for runs on one instance being alike")
    return CensoredResult(cutoff=cutoff, reference=reference, confidence=float(confidence), runs=int(len(df)),
                          blocks=int(df["block"].nunique()),
                          instances=int(df["instance"].nunique()) if "instance" in df else None,
                          per_treatment=per, cox=cox, cox_method=method, logrank=logrank, warnings=warnings)


def _cox(df: pd.DataFrame, treatments: list[str], reference: str, confidence: float,
         warnings: list[str]) -> tuple[list[dict], dict]:
    """Hazard ratios of solving against the reference, from one Cox model stratified by block."""
    from scipy import stats

    clustered = "instance" in df.columns
    method = {"model": "Cox proportional hazards, stratified by block", "ties": "efron",
              "variance": "robust, clustered by instance" if clustered else "model-based",
              "proportional_check": "Grambsch-Therneau, Schoenfeld residuals against the rank of time"}
    solved = df.groupby("treatment")["solved"].sum()
    others = [t for t in treatments if t != reference]
    empty = {"hazard_ratio": None, "ci_low": None, "ci_high": None, "p": None, "p_adjusted": None,
             "proportional_p": None, "estimable": False}
    if solved.get(reference, 0) == 0:
        if df["solved"].any():
            warnings.append(f"the reference {reference} solved no run within the cutoff: no hazard ratio against "
                            "it is estimable; compare the solved counts, or choose another reference")
        return [{"treatment": t, **empty} for t in others], method
    fit_on = [t for t in others if solved.get(t, 0) > 0]
    rows = {t: {"treatment": t, **empty} for t in others}
    if fit_on:
        est = _cox_fit(df[df["treatment"].isin([reference, *fit_on])], reference, fit_on, clustered)
        z = stats.norm.ppf(0.5 + confidence / 2)
        for t, (beta, se, ph_p) in zip(fit_on, est):
            if beta is None:
                warnings.append(f"the hazard ratio of {t} against {reference} runs off to infinity (in every block "
                                "one of them solves all its runs before the other solves any): not estimable")
                continue
            p = float(2 * stats.norm.sf(abs(beta) / se)) if se and se > 0 else None
            rows[t].update(hazard_ratio=math.exp(beta), ci_low=math.exp(beta - z * se) if se else None,
                           ci_high=math.exp(beta + z * se) if se else None, p=p, proportional_p=ph_p, estimable=True)
        _holm([rows[t] for t in fit_on])
        bad = [t for t in fit_on if rows[t]["proportional_p"] is not None and rows[t]["proportional_p"] < CHECK_LEVEL]
        for t in bad:
            warnings.append(f"proportional hazards do not hold for {t} against {reference} (Schoenfeld residuals trend "
                            f"with time, {_fmt_p(rows[t]['proportional_p'])}): its hazard ratio averages an effect that "
                            "changes over time; read the solved-fraction curves")
        events = int(df[df["treatment"].isin([reference, *fit_on])]["solved"].sum())
        if events < EVENTS_PER_COEFFICIENT * len(fit_on):
            warnings.append(f"{events} solved runs for {len(fit_on)} hazard ratios: fewer than "
                            f"{EVENTS_PER_COEFFICIENT} per ratio, so the Cox estimates are rough")
        if clustered and df["instance"].nunique() < FEW_CLUSTERS:
            warnings.append(f"only {df['instance'].nunique()} instances: the Cox intervals, which allow for runs on one "
                            "instance being alike, rest on few instances and may be too narrow")
    return [rows[t] for t in others], method


def _cox_fit(df: pd.DataFrame, reference: str, fit_on: list[str], clustered: bool):
    """[(coefficient, standard error, proportional-hazards p)] per treatment in `fit_on`; a
    coefficient is None where the likelihood has no maximum (it runs past LARGEST_COEFFICIENT;
    the others still converge to their estimates), or all are when the fit failed otherwise."""
    order = {reference: 0, **{t: j + 1 for j, t in enumerate(fit_on)}}
    fit = cox_treatments(df["time"].to_numpy(float), df["solved"].to_numpy(bool),
                         df["treatment"].map(order).to_numpy(np.int64), pd.factorize(df["block"])[0],
                         pd.factorize(df["instance"])[0] if clustered else None)
    b_all = np.asarray(fit["params"], dtype=float)
    runaway = bool(np.any(~np.isfinite(b_all) | (np.abs(b_all) > LARGEST_COEFFICIENT)))
    out = []
    for j in range(len(fit_on)):
        b, se = fit["params"][j], fit["se"][j]
        if not (fit["converged"] or runaway) or not np.isfinite(b) or abs(b) > LARGEST_COEFFICIENT \
                or not np.isfinite(se):
            out.append((None, None, None))
        else:
            out.append((float(b), float(se), fit["proportional_p"][j]))
    return out


def cox_treatments(time, event, group, strata, clusters=None, max_iter: int = 50) -> dict:
    """A Cox model of one treatment factor (group 0 the reference; one coefficient per other
    group), stratified, with Efron's ties, fitted by Newton-Raphson with step halving.

    Returns params, cov (the inverse information, or with `clusters` the robust sandwich
    I^-1 (sum over clusters of U U') I^-1, U the summed score residuals), se, loglik,
    converged, schoenfeld (per event row), and proportional_p (Grambsch-Therneau, see
    `_proportional_p`). The sums over risk sets are cumulative sums over the runs sorted by
    stratum and time, so the work grows with the runs, not with runs times solve times;
    statsmodels' PHReg gives the same numbers (the tests hold them side by side) but loops over
    every solve time in Python (a minute for 100 000 runs). The score residuals take the
    Breslow form at tied times, as statsmodels' do.
    """
    t = np.asarray(time, dtype=float)
    e = np.asarray(event, dtype=bool)
    g = np.asarray(group, dtype=np.int64)
    s = np.asarray(strata, dtype=np.int64)
    k = int(g.max()) + 1
    p = k - 1
    idx = np.lexsort((t, s))  # by stratum, then time
    t, e, g, s = t[idx], e[idx], g[idx], s[idx]
    n = len(t)
    onehot = np.zeros((n, k))
    onehot[np.arange(n), g] = 1.0
    # the first row of each (stratum, time) run of rows, and of each stratum
    new_tie = np.r_[True, (s[1:] != s[:-1]) | (t[1:] != t[:-1])]
    tie_start = np.maximum.accumulate(np.where(new_tie, np.arange(n), 0))
    new_stratum = np.r_[True, s[1:] != s[:-1]]
    stratum_start = np.maximum.accumulate(np.where(new_stratum, np.arange(n), 0))
    stratum_end = np.r_[np.flatnonzero(new_stratum)[1:], n][np.cumsum(new_stratum) - 1]
    # event tie groups: one per (stratum, time) with a solve; ev rows in sorted order
    ev = np.flatnonzero(e)
    ev_group_start = tie_start[ev]
    first_of_group = np.r_[True, ev_group_start[1:] != ev_group_start[:-1]]
    group_id = np.cumsum(first_of_group) - 1
    groups_start = ev_group_start[first_of_group]
    d = np.bincount(group_id).astype(float)
    position = np.arange(len(ev)) - np.flatnonzero(first_of_group)[group_id]
    share = position / d[group_id]  # Efron: l / d for the l-th of d tied solves
    x_ev = onehot[ev, 1:]
    groups_end = stratum_end[groups_start]

    def sums(b):
        lin = np.r_[0.0, b]
        w = np.exp(lin - lin.max())
        z = onehot * w[g][:, None]
        c = np.vstack([np.zeros(k), np.cumsum(z, axis=0)])
        risk = c[groups_end] - c[groups_start]  # per event group: sums over the risk set, per treatment
        tied = np.zeros((len(groups_start), k))
        np.add.at(tied, group_id, z[ev])
        return w, risk, tied

    def evaluate(b):
        w, risk, tied = sums(b)
        num = risk[group_id] - share[:, None] * tied[group_id]
        den = num.sum(axis=1)
        m = num[:, 1:] / den[:, None]
        lin = np.r_[0.0, b]  # the weights were scaled by exp(-max lin): put it back in each log
        loglik = float(np.sum(lin[g[ev]]) - np.sum(np.log(den)) - len(ev) * lin.max())
        grad = x_ev.sum(axis=0) - m.sum(axis=0)
        info = np.diag(m.sum(axis=0)) - m.T @ m
        return loglik, grad, info, w, risk

    b = np.zeros(p)
    loglik, grad, info, w, risk = evaluate(b)
    converged = False
    for _ in range(max_iter):
        try:
            step = np.linalg.solve(info, grad)
        except np.linalg.LinAlgError:
            break
        for _halving in range(30):
            trial = b + step
            new = evaluate(trial)
            if np.isfinite(new[0]) and new[0] >= loglik - 1e-12 * abs(loglik):
                break
            step = step / 2
        else:
            break
        gain = new[0] - loglik
        b, (loglik, grad, info, w, risk) = trial, new
        if abs(gain) <= 1e-10 * max(1.0, abs(loglik)) and np.max(np.abs(step)) < 1e-7:
            converged = True
            break
    try:
        inv = np.linalg.inv(info)
    except np.linalg.LinAlgError:
        inv = np.full((p, p), np.nan)
        converged = False
    # Breslow means at each solve time, for the Schoenfeld and score residuals
    mean = risk[:, 1:] / risk.sum(axis=1)[:, None]
    schoenfeld = x_ev - mean[group_id]
    cov = inv
    if clusters is not None:
        c_sorted = np.asarray(clusters)[idx]
        a = d / risk.sum(axis=1)  # the Breslow hazard increment at each solve time
        ca = np.r_[0.0, np.cumsum(a)]
        cb = np.vstack([np.zeros(p), np.cumsum(mean * a[:, None], axis=0)])
        upto = np.searchsorted(groups_start, tie_start, side="right")  # solve times at or before each row's
        before = np.searchsorted(groups_start, stratum_start, side="left")  # solve times of earlier strata
        wr = w[g][:, None]
        score = -wr * (onehot[:, 1:] * (ca[upto] - ca[before])[:, None] - (cb[upto] - cb[before]))
        score[ev] += schoenfeld
        per_cluster = np.zeros((int(c_sorted.max()) + 1, p))
        np.add.at(per_cluster, c_sorted, score)
        cov = inv @ (per_cluster.T @ per_cluster) @ inv
    se = np.sqrt(np.clip(np.diag(cov), 0, None))
    return {"params": b, "cov": cov, "se": se, "loglik": loglik, "converged": converged,
            "schoenfeld": schoenfeld, "event_times": t[ev],
            "proportional_p": _proportional_p(schoenfeld, t[ev], inv)}


def _proportional_p(schoenfeld: np.ndarray, times: np.ndarray, naive: np.ndarray) -> list[float | None]:
    """Grambsch and Therneau's test per coefficient: the scaled Schoenfeld residuals (d V s) against
    the rank of the solve times, T = (sum g s*)^2 / (d V_jj sum g^2) on 1 df, g the centred ranks."""
    from scipy import stats

    d, p = schoenfeld.shape
    if d < 3 or not np.all(np.isfinite(naive)):
        return [None] * p
    scaled = d * schoenfeld @ naive
    g = stats.rankdata(times)
    g = g - g.mean()
    out = []
    for j in range(p):
        den = d * naive[j, j] * float(np.sum(g ** 2))
        if den <= 0:
            out.append(None)
            continue
        stat = float(np.sum(g * scaled[:, j])) ** 2 / den
        out.append(float(stats.chi2.sf(stat, 1)))
    return out


def _holm(rows: list[dict]) -> None:
    ps = [r["p"] for r in rows if r["p"] is not None]
    if not ps:
        return
    from statsmodels.stats.multitest import multipletests

    adj = iter(multipletests(np.asarray(ps, dtype=float), method="holm")[1])
    for r in rows:
        if r["p"] is not None:
            r["p_adjusted"] = float(next(adj))


def _logrank(df: pd.DataFrame, treatments: list[str], warnings: list[str]) -> dict:
    """The log-rank test of equal solving over all treatments, stratified by block."""
    from statsmodels.duration.survfunc import survdiff

    out = {"chi2": None, "df": len(treatments) - 1, "p": None, "stratified_by": "block"}
    if not df["solved"].any():
        return out
    group = df["treatment"].map({t: i for i, t in enumerate(treatments)}).to_numpy()
    try:
        with np.errstate(all="ignore"):
            chi2, p = survdiff(df["time"].to_numpy(float), df["solved"].to_numpy(int), group,
                               strata=pd.factorize(df["block"])[0])
    except np.linalg.LinAlgError:
        warnings.append("the log-rank test is undefined on these runs (no treatment differs from another at any "
                        "solve time in any block); read the counts")
        return out
    if math.isfinite(float(chi2)):
        out.update(chi2=float(chi2), p=float(p))
    return out
