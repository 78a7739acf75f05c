"""Failures as an outcome: how often each treatment fails, and whether solving depends on it.

The blocked analyses compare the values of successful runs; a treatment that fails often is then
judged on its easy runs only. This module counts the failures and tests them, with the instance
as the subject: every treatment ran on every instance taken, so the instance's own difficulty
cancels, as blocks do for the values.

An instance counts as *solved* by a treatment when at least half of its runs there succeeded
(``SOLVED_SHARE``); a run succeeded when its status is ok. Each instance then gives one yes / no
per treatment, and

- Cochran's Q tests whether the share of instances solved is the same for every treatment
  (three or more treatments);
- McNemar's test does it for two treatments, from the instances one solves and the other does
  not (the discordant instances): exact binomial when there are fewer than 25 of them, else the
  chi-square with the continuity correction;
- against a baseline, each treatment gets its own McNemar test, Holm adjusted.

Public functions
----------------
solved_matrix(cells, share=0.5)          instances x treatments, True where solved
failure_rates(cells)                     per treatment: runs, failed runs and their share
cochran_q(solved)                        Cochran's Q on a subjects x treatments 0/1 table
mcnemar(first, second, exact=None)       McNemar's test on two paired 0/1 columns
compare_solved(cells, baseline=None)     all of the above for one analysis

Assumptions
-----------
- Instances are independent of each other; the runs (seeds) of one instance are not counted as
  subjects, they decide the instance's yes / no.
- Only instances every treatment ran on are subjects (the tests are for complete, paired data).
- Cochran's Q is referred to chi-square on k - 1 df, a large-sample approximation: it wants a fair
  number of instances that separate the treatments (common practice: at least 4 such instances
  and 24 of their treatment x instance pairs; from memory of Tate and Brown 1970).

References
----------
Cochran (1950), The comparison of percentages in matched samples, Biometrika 37.
McNemar (1947), Note on the sampling error of the difference between correlated proportions or
percentages, Psychometrika 12; Edwards (1948) for the continuity correction.
Holm (1979), A simple sequentially rejective multiple test procedure, Scand. J. Statist. 6.
Siegel and Castellan (1988), Nonparametric Statistics for the Behavioral Sciences, for both tests
as used here.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from warehouse.analyze.lean import binom_cdf, chi2_sf
from warehouse.analyze.tidy import _fmt_p, _Result
from warehouse.errors import DesignError, InputError

#: an instance is solved by a treatment when at least this share of its runs there succeeded.
SOLVED_SHARE = 0.5
#: McNemar's test is exact (binomial) below this many discordant instances (common practice).
EXACT_BELOW = 25
#: the failures caution is raised below this p value (common practice).
LEVEL = 0.05
#: Cochran's chi-square approximation is rough with fewer separating instances or pairs than these
#: (common practice; from memory of Tate and Brown 1970).
FEW_SEPARATING = 4
FEW_SEPARATING_PAIRS = 24

RULE = "an instance counts as solved by a treatment when at least half of its runs there succeeded"


@dataclass
class SolvedTest(_Result):
    """One test of whether solving depends on the treatment.

    method       "cochran-q", "mcnemar-exact", "mcnemar-chi2", or "none" (fewer than two treatments)
    statistic    Q; McNemar chi-square (continuity corrected), or for the exact test the smaller
                 of the two discordant counts; None when it cannot be computed
    df           chi-square degrees of freedom (None for the exact test)
    p            None whenever the statistic is None
    instances    subjects (instances every treatment ran on)
    separating   instances solved by some treatments and not by others
    note         why there is no statistic, or how rough it is ("" when neither)
    """

    method: str
    statistic: float | None
    df: int | None
    p: float | None
    instances: int
    separating: int
    note: str = ""

    def to_dict(self) -> dict:
        d = super().to_dict()
        if d["statistic"] is None:  # no p value beside a statistic that could not be computed
            d["p"] = None
        return d


@dataclass
class FailuresResult(_Result):
    """Failure rates per treatment and the test of whether solving depends on the treatment.

    rule            the solved rule, in words
    per_treatment   rows treatment, runs, failed, failed_share, instances, unsolved, unsolved_share
                    (over the instances every treatment ran on)
    test            SolvedTest (Cochran's Q for three or more treatments, McNemar for two)
    baseline        the treatment of the follow-ups, or None
    follow_ups      rows treatment, baseline, unsolved_only_by_treatment, unsolved_only_by_baseline,
                    method, statistic, p, p_adjusted (Holm over the follow-ups)
    instances       subjects; left_out: instances of the slice not run by every treatment
    warnings        plain sentences: the rates differ, the test is rough
    """

    rule: str
    per_treatment: list[dict]
    test: SolvedTest
    baseline: str | None
    follow_ups: list[dict]
    instances: int
    left_out: int
    warnings: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        d = super().to_dict()
        d["test"] = self.test.to_dict()
        return d

    @property
    def any_failed(self) -> bool:
        return any(r["failed"] for r in self.per_treatment)


# --------------------------------------------------------------------------- the tables


def _cells(cells) -> pd.DataFrame:
    if not isinstance(cells, pd.DataFrame):
        raise InputError("cells must be a pandas DataFrame with columns treatment, instance, runs and failed")
    missing = [c for c in ("treatment", "instance", "runs", "failed") if c not in cells.columns]
    if missing:
        raise InputError(f"cells lack the column(s) {', '.join(missing)}: pass treatment, instance, runs and failed")
    df = cells[["treatment", "instance", "runs", "failed"]].copy()
    df["treatment"] = df["treatment"].astype(str)  # the instance is a key only: any labels or ids
    for c in ("runs", "failed"):
        v = pd.to_numeric(df[c], errors="coerce")
        if v.isna().any() or (v < 0).any():
            raise InputError(f"cells: the column {c} must hold counts (whole numbers, 0 or more)")
        df[c] = v.astype(np.int64)
    if (df["failed"] > df["runs"]).any():
        raise InputError("cells: a cell has more failed runs than runs")
    # one row per treatment and instance (two solvers under one label add up)
    return df.groupby(["treatment", "instance"], as_index=False, sort=False)[["runs", "failed"]].sum()


def _order(df: pd.DataFrame, treatments: list[str] | None) -> list[str]:
    seen = list(pd.unique(df["treatment"]))
    if treatments is None:
        return seen
    return [t for t in treatments if t in set(seen)] + [t for t in seen if t not in set(treatments)]


def solved_matrix(cells, share: float = SOLVED_SHARE, treatments: list[str] | None = None) -> tuple[pd.DataFrame, int]:
    """Instances x treatments, True where the treatment solved the instance (at least `share` of
    its runs there succeeded), over the instances every treatment ran on; also the number of
    instances left out because some treatment has no run there."""
    df = _cells(cells)
    df = df[df["runs"] > 0]
    names = _order(df, treatments)
    ok = (df["runs"] - df["failed"]) >= share * df["runs"]
    wide = df.assign(solved=ok).pivot(index="instance", columns="treatment", values="solved").reindex(columns=names)
    full = wide.notna().all(axis=1)
    return wide[full].astype(bool), int((~full).sum())


def failure_rates(cells, treatments: list[str] | None = None) -> pd.DataFrame:
    """Per treatment: runs, failed runs and their share (None when it has no runs)."""
    df = _cells(cells)
    g = df.groupby("treatment", sort=False)[["runs", "failed"]].sum().reindex(_order(df, treatments))
    out = g.reset_index()
    out["failed_share"] = [f / r if r else None for f, r in zip(out["failed"], out["runs"])]
    return out


# --------------------------------------------------------------------------- the tests


def cochran_q(solved) -> SolvedTest:
    """Cochran's Q: is the share of subjects with a yes the same under every treatment?

    With a subjects x treatments table of 0/1 (k treatments, column totals C_j, row totals R_i,
    N = sum of all), Q = (k-1) (k sum C_j^2 - N^2) / (k N - sum R_i^2), referred to chi-square on
    k - 1 df. Subjects with the same answer under every treatment add nothing to Q (they add as
    much to k N as to sum R_i^2); when every subject is like that the statistic is 0 / 0 and
    is not computed.

    Assumptions: independent subjects, each measured under every treatment; the chi-square
    reference is a large-sample approximation.

    References: Cochran (1950), Biometrika 37; Siegel and Castellan (1988), section 7.2.

    Example::

        from warehouse.analyze.failures import cochran_q
        cochran_q([[1, 1, 0], [1, 0, 0], [1, 1, 1]]).p
    """
    X = np.asarray(solved, dtype=float)
    if X.ndim != 2 or X.shape[1] < 2:
        raise DesignError("Cochran's Q needs a subjects x treatments table with two or more treatments")
    if not np.isin(X, (0.0, 1.0)).all():
        raise InputError("Cochran's Q takes 0 / 1 (not solved / solved) values only")
    n, k = X.shape
    rows = X.sum(axis=1)
    separating = int(((rows > 0) & (rows < k)).sum())
    cols = X.sum(axis=0)
    total = float(X.sum())
    denom = k * total - float((rows ** 2).sum())
    if n == 0 or denom <= 0:
        return SolvedTest("cochran-q", None, k - 1, None, n, 0,
                          "every instance is solved by all treatments or by none: there is nothing to compare")
    q = (k - 1) * (k * float((cols ** 2).sum()) - total ** 2) / denom
    note = ""
    if separating < FEW_SEPARATING or separating * k < FEW_SEPARATING_PAIRS:
        note = (f"only {separating} instances separate the treatments: the chi-square reference of Cochran's Q "
                "is rough")
    return SolvedTest("cochran-q", float(q), k - 1, float(chi2_sf(q, k - 1)), n, separating, note)


def mcnemar(first, second, exact: bool | None = None, correction: bool = True) -> SolvedTest:
    """McNemar's test for two paired 0/1 columns (solved by the first / by the second treatment).

    Only the discordant subjects count: n10 solved by the first only, n01 by the second only.
    Under the null each discordant subject is a fair coin. Exact (the default below 25 discordant
    subjects): p = min(1, 2 P(X <= min(n10, n01))) for X ~ Binomial(n10 + n01, 1/2), statistic
    min(n10, n01). Otherwise chi-square on 1 df of (|n10 - n01| - 1)^2 / (n10 + n01) (Edwards'
    continuity correction; without it, (n10 - n01)^2 / (n10 + n01)). With no discordant subject the
    exact test gives p = 1: nothing separates the two.

    Assumptions: independent subjects, each measured under both treatments.

    References: McNemar (1947), Psychometrika 12; Edwards (1948), Psychometrika 13; Agresti, An
    Introduction to Categorical Data Analysis, section on comparing dependent proportions.

    Example::

        from warehouse.analyze.failures import mcnemar
        mcnemar([1, 1, 0, 1], [1, 0, 0, 0]).p
    """
    a = np.asarray(first, dtype=float).ravel()
    b = np.asarray(second, dtype=float).ravel()
    if a.shape != b.shape:
        raise InputError("McNemar's test needs the same subjects in both columns")
    if not (np.isin(a, (0.0, 1.0)).all() and np.isin(b, (0.0, 1.0)).all()):
        raise InputError("McNemar's test takes 0 / 1 (not solved / solved) values only")
    n10 = int(((a == 1) & (b == 0)).sum())
    n01 = int(((a == 0) & (b == 1)).sum())
    return mcnemar_counts(n10, n01, len(a), exact, correction)


def mcnemar_counts(n10: int, n01: int, subjects: int | None = None, exact: bool | None = None,
                   correction: bool = True) -> SolvedTest:
    """McNemar's test from the two discordant counts (see :func:`mcnemar`)."""
    if n10 < 0 or n01 < 0:
        raise InputError("McNemar's test needs counts of 0 or more")
    d = n10 + n01
    subjects = d if subjects is None else subjects
    if exact is None:
        exact = d < EXACT_BELOW
    if exact:
        p = 1.0 if d == 0 else min(1.0, 2.0 * float(binom_cdf(min(n10, n01), d, 0.5)))
        return SolvedTest("mcnemar-exact", float(min(n10, n01)), None, p, subjects, d)
    if d == 0:
        return SolvedTest("mcnemar-chi2", None, 1, None, subjects, 0,
                          "no instance is solved by one and not the other: there is nothing to compare")
    diff = abs(n10 - n01) - (1.0 if correction else 0.0)
    chi2 = max(diff, 0.0) ** 2 / d
    return SolvedTest("mcnemar-chi2", float(chi2), 1, float(chi2_sf(chi2, 1)), subjects, d)


def _holm(ps: list[float | None]) -> list[float | None]:
    """Holm's step-down adjustment of the p values that exist (None stays None)."""
    have = [(p, i) for i, p in enumerate(ps) if p is not None]
    out: list[float | None] = [None] * len(ps)
    m, running = len(have), 0.0
    for rank, (p, i) in enumerate(sorted(have)):
        running = max(running, min(1.0, (m - rank) * p))
        out[i] = running
    return out


# --------------------------------------------------------------------------- one analysis


def compare_solved(cells, baseline: str | None = None, treatments: list[str] | None = None,
                   share: float = SOLVED_SHARE) -> FailuresResult:
    """Failure rates and the test of whether solving depends on the treatment.

    `cells` has one row per treatment and instance with the columns treatment, instance, runs and
    failed (runs that did not succeed). The subjects are the instances every treatment ran on;
    the rates are counted on them too, so that they and the test speak of the same runs. Cochran's
    Q for three or more treatments, McNemar for two; with `baseline`, every other treatment
    against it by McNemar, Holm adjusted. `treatments` fixes the order of the rows.

    A caution names the treatments and their rates when the test finds p < 0.05.

    Example::

        from warehouse.analyze.failures import compare_solved
        res = compare_solved(cells, baseline="stacker@1.4")
        res.per_treatment, res.test.p, res.follow_ups
    """
    if not 0 < share <= 1:
        raise InputError(f"share {share!r}: give the share of runs that must succeed, above 0 and at most 1")
    df = _cells(cells)
    names = _order(df, treatments)
    if baseline is not None and baseline not in names:
        raise DesignError(f"baseline {baseline} has no runs among the cells; treatments there: {', '.join(names)}")
    wide, left_out = solved_matrix(df, share, names)
    subjects = set(wide.index)
    on = df[df["instance"].isin(subjects)]
    rates = failure_rates(on, names) if len(on) else pd.DataFrame({"treatment": names, "runs": 0, "failed": 0,
                                                                     "failed_share": None})
    return _judged(names, wide, left_out, rates, baseline, share)


def compare_solved_counts(treatments: list[str], instances, runs, failed, failing, baseline: str | None = None,
                          share: float = SOLVED_SHARE) -> FailuresResult:
    """`compare_solved` from counts, for a slice in which every treatment ran every instance:
    what the database's cell summaries give without sending one row per cell.

    `treatments` in the order of the rows; `instances` the ids of the instances (each one run by
    every treatment); `runs` and `failed` the treatments' runs and failed runs on them (in the
    order of `treatments`); `failing` the cells with a failed run, with the columns treatment,
    instance, runs and failed. Every other cell had no failed run, so it is solved. The result is
    the one `compare_solved` gives on the full table of cells (tests/analyze/test_failures.py
    holds the two side by side)."""
    if not 0 < share <= 1:
        raise InputError(f"share {share!r}: give the share of runs that must succeed, above 0 and at most 1")
    names = list(treatments)
    if baseline is not None and baseline not in names:
        raise DesignError(f"baseline {baseline} has no runs among the cells; treatments there: {', '.join(names)}")
    inst = np.unique(np.asarray(instances, dtype=np.int64))  # in order, as the full table's rows
    solved = np.ones((len(inst), len(names)), dtype=bool)
    f = _cells(failing)
    if len(f):
        row = np.searchsorted(inst, f["instance"].to_numpy(dtype=np.int64))
        col = pd.Index(names).get_indexer(f["treatment"])
        if not len(inst) or (col < 0).any() or (row >= len(inst)).any() \
                or (inst[np.minimum(row, len(inst) - 1)] != f["instance"].to_numpy()).any():
            raise InputError("failing cells name an instance or treatment not among the counts")
        ok = (f["runs"] - f["failed"]).to_numpy() >= share * f["runs"].to_numpy()
        solved[row, col] = ok
    wide = pd.DataFrame(solved, index=pd.Index(inst, name="instance"), columns=pd.Index(names, name="treatment"))
    r = np.asarray(runs, dtype=np.int64)
    fl = np.asarray(failed, dtype=np.int64)
    rates = pd.DataFrame({"treatment": names, "runs": r, "failed": fl,
                          "failed_share": [int(a) / int(b) if b else None for a, b in zip(fl, r)]})
    return _judged(names, wide, 0, rates, baseline, share)


def _judged(names: list[str], wide: pd.DataFrame, left_out: int, rates: pd.DataFrame, baseline: str | None,
            share: float) -> FailuresResult:
    """The failures result from the solved table (subjects x treatments) and the rates on it."""
    per = []
    for r in rates.itertuples(index=False):
        unsolved = int((~wide[r.treatment]).sum()) if len(wide) else 0
        per.append({"treatment": r.treatment, "runs": int(r.runs), "failed": int(r.failed),
                    "failed_share": None if r.failed_share is None or pd.isna(r.failed_share) else float(r.failed_share),
                    "instances": len(wide), "unsolved": unsolved,
                    "unsolved_share": unsolved / len(wide) if len(wide) else None})
    k = len(names)
    if k < 2:
        test = SolvedTest("none", None, None, None, len(wide), 0, "one treatment: there is nothing to compare")
    elif not len(wide):
        test = SolvedTest("cochran-q" if k > 2 else "mcnemar-exact", None, None, None, 0, 0,
                          "no instance was run by every treatment: there is nothing to compare")
    elif k == 2:
        test = mcnemar(wide[names[0]].to_numpy(), wide[names[1]].to_numpy())
    else:
        test = cochran_q(wide[names].to_numpy())
    follow = []
    if baseline is not None and len(wide) and k >= 2:
        for t in names:
            if t == baseline:
                continue
            mine, base = wide[t].to_numpy(), wide[baseline].to_numpy()
            m = mcnemar(mine, base)
            follow.append({"treatment": t, "baseline": baseline,
                           "unsolved_only_by_treatment": int((~mine & base).sum()),
                           "unsolved_only_by_baseline": int((mine & ~base).sum()),
                           "method": m.method, "statistic": m.statistic, "p": m.p if m.statistic is not None else None})
        for row, p in zip(follow, _holm([r["p"] for r in follow])):
            row["p_adjusted"] = p
    warnings = []
    if test.note and test.statistic is not None:
        warnings.append(test.note)
    if test.statistic is not None and test.p is not None and test.p < LEVEL:
        rates_text = ", ".join(f"{r['treatment']} {_share(r['failed_share'])}" for r in per)
        warnings.append(f"failure rates differ between treatments ({_test_name(test)}, {_fmt_p(test.p)}): "
                        f"{rates_text} of runs failed")
    return FailuresResult(rule=RULE if share == SOLVED_SHARE else
                          f"an instance counts as solved by a treatment when at least {share:g} of its runs there succeeded",
                          per_treatment=per, test=test, baseline=baseline, follow_ups=follow, instances=len(wide),
                          left_out=left_out, warnings=warnings)


def _share(x) -> str:
    if x is None:
        return "-"
    pct = 100 * float(x)
    return f"{pct:.0f} %" if pct >= 10 or pct == 0 else f"{pct:.1f} %"


def _test_name(t: SolvedTest) -> str:
    return {"cochran-q": "Cochran's Q", "mcnemar-exact": "McNemar, exact",
            "mcnemar-chi2": "McNemar"}.get(t.method, t.method)


def share_text(x) -> str:
    """A share as the text and the cautions write it (0.203 -> '20 %', 0.012 -> '1.2 %')."""
    return _share(x)


def method_words(method: str | None) -> str:
    """A test's method name in words ("cochran-q" -> "Cochran's Q")."""
    return _test_name(SolvedTest(method or "none", None, None, None, 0, 0))
