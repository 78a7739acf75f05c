"""Checks of warehouse.analyze.censored against a published example and an independent library.

Published: the remission data of Freireich et al. (1963) as analysed by Gehan (1965), a classic of
survival texts. Independent implementation: lifelines (its Kaplan-Meier, CoxPHFitter with strata
and clusters, log-rank tests and proportional-hazards test), installed for the tests only; and the
stratified log-rank statistic written out below from its textbook formula.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from warehouse.analyze.censored import CURVE_POINTS, censor_at, compare_censored, cox_treatments, solved_curve
from warehouse.errors import DesignError, InputError

lifelines = pytest.importorskip("lifelines")
# lifelines calls pandas in ways pandas 3 announces it will drop: its noise, not ours
pytestmark = pytest.mark.filterwarnings("ignore:Starting with pandas version 4.0")

# Weeks in remission; 0 = still in remission at that time (censored). From memory of the
# remission table (Freireich et al. 1963) printed in Kleinbaum and Klein, Survival Analysis:
# A Self-Learning Text, chapter 2 (also MASS's gehan data).
MP_TIME = [6, 6, 6, 6, 7, 9, 10, 10, 11, 13, 16, 17, 19, 20, 22, 23, 25, 32, 32, 34, 35]
MP_EVENT = [1, 1, 1, 0, 1, 0, 1, 0, 0, 1, 1, 0, 0, 0, 1, 1, 0, 0, 0, 0, 0]
PLACEBO_TIME = [1, 1, 2, 2, 3, 4, 4, 5, 5, 8, 8, 8, 8, 11, 11, 12, 12, 15, 17, 22, 23]


def remission() -> pd.DataFrame:
    return pd.DataFrame({"treatment": ["placebo"] * 21 + ["6-MP"] * 21, "block": "all",
                         "time": [float(x) for x in PLACEBO_TIME + MP_TIME],
                         "solved": [True] * 21 + [bool(x) for x in MP_EVENT]})


def blocked_runs(seed: int, blocks: int = 6, instances: int = 5, seeds: int = 3, cutoff: float = 3.0,
                 speed=(1.0, 1.6, 0.8), ties: bool = False) -> pd.DataFrame:
    """Invented runs: block and instance difficulty, treatments that solve at different rates."""
    rng = np.random.default_rng(seed)
    rows = []
    for b in range(blocks):
        for i in range(instances):
            hard = rng.exponential(1.0) * (1 + 0.3 * b)
            for t, s in enumerate(speed):
                for _ in range(seeds):
                    v = rng.exponential(hard / s)
                    if ties:
                        v = round(v, 1)
                    ok = rng.random() > 0.05
                    rows.append((f"stacker@1.{t + 4}", f"g{b}", f"g{b}/i{i}", v, ok))
    df = pd.DataFrame(rows, columns=["treatment", "block", "instance", "value", "ok"])
    t, e = censor_at(df["value"], df["ok"], cutoff)
    return df.assign(time=t, solved=e)


# --------------------------------------------------------------------------- the published example


def test_kaplan_meier_of_the_remission_data():
    # from memory of Kleinbaum and Klein's KM table for the 6-MP group: S(t) at the failure times
    curve = solved_curve(MP_TIME, MP_EVENT)
    assert curve["time"].tolist() == [6, 7, 10, 13, 16, 22, 23]
    assert np.allclose(1 - curve["solved_fraction"], [0.857, 0.807, 0.753, 0.690, 0.627, 0.538, 0.448], atol=5e-4)


def test_medians_logrank_and_cox_of_the_remission_data():
    res = compare_censored(remission(), "placebo", cutoff=35)
    per = {r["treatment"]: r for r in res.per_treatment}
    # from memory of Kleinbaum and Klein: median remission 8 weeks (placebo) and 23 weeks (6-MP)
    assert per["placebo"]["median_time"] == 8 and per["6-MP"]["median_time"] == 23
    # from memory of the same text: log-rank chi-square 16.79 on 1 df
    assert res.logrank["chi2"] == pytest.approx(16.79, abs=0.005) and res.logrank["df"] == 1
    # from memory of the Efron-ties Cox fit of these data as usually printed: placebo against 6-MP
    # coefficient 1.572, standard error 0.412, hazard ratio 4.82; here 6-MP against placebo
    cox = res.cox[0]
    assert cox["treatment"] == "6-MP"
    assert -math.log(cox["hazard_ratio"]) == pytest.approx(1.572, abs=5e-4)
    assert 1 / cox["hazard_ratio"] == pytest.approx(4.82, abs=0.005)
    se = (math.log(cox["ci_high"]) - math.log(cox["ci_low"])) / (2 * 1.959964)
    assert se == pytest.approx(0.412, abs=5e-4)


def test_remission_data_against_lifelines():
    from lifelines import CoxPHFitter, KaplanMeierFitter
    from lifelines.statistics import logrank_test

    df = remission()
    res = compare_censored(df, "placebo", cutoff=35)
    mp = df[df["treatment"] == "6-MP"]
    km = KaplanMeierFitter().fit(mp["time"], mp["solved"])
    assert res.per_treatment[1]["median_time"] == km.median_survival_time_
    pl = df[df["treatment"] == "placebo"]
    lr = logrank_test(pl["time"], mp["time"], pl["solved"], mp["solved"])
    assert res.logrank["chi2"] == pytest.approx(lr.test_statistic, rel=1e-9)
    cph = CoxPHFitter().fit(df.assign(x=(df["treatment"] == "6-MP").astype(float))[["time", "solved", "x"]],
                            "time", "solved")
    assert math.log(res.cox[0]["hazard_ratio"]) == pytest.approx(cph.params_["x"], abs=1e-5)
    assert res.cox[0]["p"] == pytest.approx(cph.summary.loc["x", "p"], rel=1e-4)


# --------------------------------------------------------------------------- blocked, against lifelines


@pytest.mark.parametrize("seed", [1, 7])
def test_stratified_clustered_cox_matches_lifelines(seed):
    from lifelines import CoxPHFitter

    runs = blocked_runs(seed)
    res = compare_censored(runs, "stacker@1.4", cutoff=3.0)
    assert res.cox_method["variance"] == "robust, clustered by instance"
    d = runs[["time", "solved", "block", "instance"]].copy()
    d["solved"] = d["solved"].astype(int)
    for t in ("stacker@1.5", "stacker@1.6"):
        d[t] = (runs["treatment"] == t).astype(float)
    cph = CoxPHFitter().fit(d, "time", "solved", strata=["block"], cluster_col="instance")
    for row in res.cox:
        t = row["treatment"]
        assert math.log(row["hazard_ratio"]) == pytest.approx(cph.params_[t], abs=1e-5)
        assert row["ci_low"] == pytest.approx(cph.summary.loc[t, "exp(coef) lower 95%"], rel=1e-4)
        assert row["ci_high"] == pytest.approx(cph.summary.loc[t, "exp(coef) upper 95%"], rel=1e-4)
        assert row["p"] == pytest.approx(cph.summary.loc[t, "p"], rel=1e-3, abs=1e-12)


def test_tied_times_use_efron_like_lifelines():
    from lifelines import CoxPHFitter

    runs = blocked_runs(3, ties=True).drop(columns="instance")
    res = compare_censored(runs, "stacker@1.4", cutoff=3.0)
    assert res.cox_method["variance"] == "model-based"
    d = runs[["time", "solved", "block"]].assign(solved=runs["solved"].astype(int))
    for t in ("stacker@1.5", "stacker@1.6"):
        d[t] = (runs["treatment"] == t).astype(float)
    cph = CoxPHFitter().fit(d, "time", "solved", strata=["block"])  # lifelines handles ties by Efron's method
    for row in res.cox:
        assert math.log(row["hazard_ratio"]) == pytest.approx(cph.params_[row["treatment"]], abs=1e-5)
        assert row["p"] == pytest.approx(cph.summary.loc[row["treatment"], "p"], rel=1e-3, abs=1e-12)


@pytest.mark.parametrize("ties", [False, True])
def test_the_vectorized_cox_gives_statsmodels_phreg_numbers(ties):
    # statsmodels' PHReg, the reference the module was first written on (a minute for 100 000
    # runs): same coefficients, log likelihood, model-based and clustered covariance, residuals
    from statsmodels.duration.hazard_regression import PHReg

    rng = np.random.default_rng(21)
    n = 1200
    g, s, c = rng.integers(0, 4, n), rng.integers(0, 7, n), rng.integers(0, 60, n)
    t = rng.exponential((1 + s) / (1 + 0.4 * g))
    t = np.round(t, 1) if ties else t
    e = t < 2.0
    t = np.minimum(t, 2.0)
    X = np.column_stack([(g == j).astype(float) for j in (1, 2, 3)])
    model = PHReg(t, X, status=e.astype(int), strata=s, ties="efron")
    naive, robust = model.fit(), model.fit(groups=c)
    ours, ours_c = cox_treatments(t, e, g, s), cox_treatments(t, e, g, s, c)
    assert np.allclose(ours["params"], naive.params, atol=1e-9)
    assert ours["loglik"] == pytest.approx(naive.llf, rel=1e-12)
    assert np.allclose(ours["cov"], naive.cov_params(), rtol=1e-8)
    assert np.allclose(ours_c["cov"], robust.cov_params(), rtol=1e-8)
    sch = naive.schoenfeld_residuals
    got = np.sort(ours["schoenfeld"], axis=0)
    want = np.sort(sch[np.all(np.isfinite(sch), axis=1)], axis=0)
    assert np.allclose(got, want, atol=1e-10)


def test_a_block_where_nothing_solved_adds_nothing():
    # statsmodels marks such runs' score residuals undefined, and its clustered covariance with
    # them; they have no part in the partial likelihood, so here they count zero
    runs = blocked_runs(13)
    dead = runs["block"] == "g5"
    base = compare_censored(runs[~dead], "stacker@1.4", 3.0)
    runs.loc[dead, "time"], runs.loc[dead, "solved"] = 3.0, False
    res = compare_censored(runs, "stacker@1.4", 3.0)
    for a, b in zip(base.cox, res.cox):
        assert a["hazard_ratio"] == pytest.approx(b["hazard_ratio"], rel=1e-12)
        assert a["ci_low"] == pytest.approx(b["ci_low"], rel=1e-10)
    assert res.logrank["chi2"] == pytest.approx(base.logrank["chi2"], rel=1e-12)


def test_one_runaway_ratio_leaves_the_others_estimated():
    rng = np.random.default_rng(14)
    rows = []
    for b in range(4):
        for i in range(20):
            rows.append(("ref", f"g{b}", 5 + rng.uniform(0, 1), True))
            rows.append(("steady", f"g{b}", 4.5 + rng.uniform(0, 1.5), True))
            rows.append(("first", f"g{b}", rng.uniform(0, 1), True))  # always before every ref run
    res = compare_censored(pd.DataFrame(rows, columns=["treatment", "block", "time", "solved"]), "ref", 10.0)
    by = {r["treatment"]: r for r in res.cox}
    assert by["first"]["estimable"] is False and by["steady"]["estimable"] is True
    assert by["steady"]["hazard_ratio"] > 1


def _stratified_logrank(df: pd.DataFrame, groups: list[str]) -> float:
    """The textbook statistic, written out: per stratum and solve time the observed minus expected
    solves of each group and their hypergeometric covariance, summed over strata; then
    (O - E)' V^-1 (O - E) over all groups but the last (Kalbfleisch and Prentice 2002)."""
    k = len(groups)
    o_e, var = np.zeros(k), np.zeros((k, k))
    for _, s in df.groupby("block"):
        for t in np.unique(s.loc[s["solved"], "time"]):
            risk = s[s["time"] >= t]
            n = len(risk)
            d = int(((risk["time"] == t) & risk["solved"]).sum())
            n_g = np.array([(risk["treatment"] == g).sum() for g in groups], float)
            d_g = np.array([((risk["treatment"] == g) & (risk["time"] == t) & risk["solved"]).sum() for g in groups], float)
            o_e += d_g - d * n_g / n
            if n > 1:
                f = d * (n - d) / (n * n * (n - 1))
                var += f * (np.diag(n_g) * n - np.outer(n_g, n_g))
    return float(o_e[:-1] @ np.linalg.solve(var[:-1, :-1], o_e[:-1]))


@pytest.mark.parametrize("ties", [False, True])
def test_stratified_logrank_matches_its_formula(ties):
    runs = blocked_runs(11, ties=ties)
    res = compare_censored(runs, "stacker@1.4", cutoff=3.0)
    groups = ["stacker@1.4", "stacker@1.5", "stacker@1.6"]
    assert res.logrank["df"] == 2
    assert res.logrank["chi2"] == pytest.approx(_stratified_logrank(runs, groups), rel=1e-9)


def test_one_block_logrank_matches_lifelines_multivariate():
    from lifelines.statistics import multivariate_logrank_test

    runs = blocked_runs(5, blocks=1, instances=30, ties=True)
    res = compare_censored(runs, "stacker@1.4", cutoff=3.0)
    lr = multivariate_logrank_test(runs["time"], runs["treatment"], runs["solved"])
    assert res.logrank["chi2"] == pytest.approx(lr.test_statistic, rel=1e-9)
    assert res.logrank["p"] == pytest.approx(lr.p_value, rel=1e-9)


def test_kaplan_meier_per_treatment_matches_lifelines():
    from lifelines import KaplanMeierFitter

    runs = blocked_runs(2, ties=True)
    res = compare_censored(runs, "stacker@1.4", cutoff=3.0)
    for row in res.per_treatment:
        part = runs[runs["treatment"] == row["treatment"]]
        km = KaplanMeierFitter().fit(part["time"], part["solved"])
        sf = km.survival_function_["KM_estimate"]
        assert row["solved_fraction"] == pytest.approx(1 - sf.iloc[-1], abs=1e-12)
        assert row["median_time"] == km.median_survival_time_
        for t, f in row["curve"]:
            assert f == pytest.approx(1 - sf.loc[t], abs=1e-12)


def test_proportional_hazards_check_matches_lifelines():
    from lifelines import CoxPHFitter
    from lifelines.statistics import proportional_hazard_test

    runs = blocked_runs(4, blocks=1, instances=40).drop(columns="instance")
    res = compare_censored(runs, "stacker@1.4", cutoff=3.0)
    d = runs[["time", "solved"]].assign(solved=runs["solved"].astype(int))
    for t in ("stacker@1.5", "stacker@1.6"):
        d[t] = (runs["treatment"] == t).astype(float)
    cph = CoxPHFitter().fit(d, "time", "solved")
    test = proportional_hazard_test(cph, d, time_transform="rank")
    got = {r["treatment"]: r["proportional_p"] for r in res.cox}
    for name, p in zip(test.name, test.p_value):
        assert got[name] == pytest.approx(p, rel=1e-6)


def test_hazards_that_cross_are_cautioned():
    # invented: one treatment solves half its runs at once and the rest late, the other steadily;
    # their solved-fraction curves cross, so no single hazard ratio describes them
    rng = np.random.default_rng(9)
    rows = []
    for b in range(4):
        for i in range(60):
            rows.append(("stacker@1.4", f"g{b}", rng.uniform(0, 10), True))
            fast = rng.random() < 0.5
            rows.append(("stacker@1.6", f"g{b}", rng.uniform(0, 1) if fast else rng.uniform(9, 10), True))
    runs = pd.DataFrame(rows, columns=["treatment", "block", "time", "solved"])
    res = compare_censored(runs, "stacker@1.4", cutoff=10.0)
    assert res.cox[0]["proportional_p"] < 0.001
    assert any("proportional hazards do not hold for stacker@1.6" in w for w in res.warnings)


# --------------------------------------------------------------------------- censoring and edges


def test_censor_at_counts_failures_and_the_cutoff_as_unsolved():
    t, e = censor_at([1.0, 600.0, 700.0, 5.0, np.nan, 0.0], [True, True, True, False, True, True], 600)
    assert t.tolist() == [1.0, 600.0, 600.0, 600.0, 600.0, 0.0]
    assert e.tolist() == [True, False, False, False, False, True]
    with pytest.raises(InputError, match="negative time"):
        censor_at([-1.0], [True], 600)
    for bad in (0, -5, float("inf"), "soon"):
        with pytest.raises(InputError, match="positive number"):
            censor_at([1.0], [True], bad)


def test_restricted_mean_is_the_mean_with_unsolved_runs_at_the_cutoff():
    # common practice: with every censored run at the cutoff, the area under the unsolved fraction
    # up to the cutoff is the plain mean of min(time, cutoff)
    runs = blocked_runs(6)
    res = compare_censored(runs, "stacker@1.4", cutoff=3.0)
    for row in res.per_treatment:
        part = runs[runs["treatment"] == row["treatment"]]
        assert row["restricted_mean_time"] == pytest.approx(part["time"].mean(), rel=1e-12)
        assert row["mean_time_solved_only"] == pytest.approx(part.loc[part["solved"], "time"].mean(), rel=1e-12)
        assert row["runs"] == len(part) and row["solved"] + row["censored"] == len(part)


def test_counts_tell_failed_runs_from_runs_past_the_cutoff():
    runs = pd.DataFrame({"treatment": ["a"] * 4 + ["b"] * 4, "block": ["g1", "g1", "g2", "g2"] * 2,
                         "value": [1.0, 9.0, 2.0, 3.0, 2.0, 1.0, 4.0, 3.0],
                         "ok": [True, True, False, True, True, True, True, False]})
    t, e = censor_at(runs["value"], runs["ok"], 5.0)
    res = compare_censored(runs.assign(time=t, solved=e, failed=~runs["ok"]), "a", 5.0)
    a = res.per_treatment[0]
    assert (a["solved"], a["failed"], a["past_cutoff"], a["censored"]) == (2, 1, 1, 2)


def test_a_treatment_that_never_solves_is_counted_not_estimated():
    runs = blocked_runs(8)
    never = runs["treatment"] == "stacker@1.6"
    runs.loc[never, "time"], runs.loc[never, "solved"] = 3.0, False
    res = compare_censored(runs, "stacker@1.4", cutoff=3.0)
    row = {r["treatment"]: r for r in res.cox}
    assert row["stacker@1.6"]["estimable"] is False and row["stacker@1.6"]["hazard_ratio"] is None
    assert row["stacker@1.5"]["estimable"] is True
    assert any("stacker@1.6 solved no run" in w for w in res.warnings)
    assert res.per_treatment[2]["median_time"] is None and res.per_treatment[2]["solved_fraction"] == 0


def test_a_reference_that_never_solves_and_runs_that_never_solve():
    runs = blocked_runs(8)
    ref = runs["treatment"] == "stacker@1.4"
    runs.loc[ref, "time"], runs.loc[ref, "solved"] = 3.0, False
    res = compare_censored(runs, "stacker@1.4", cutoff=3.0)
    assert all(not r["estimable"] for r in res.cox)
    assert any("the reference stacker@1.4 solved no run" in w for w in res.warnings)
    runs["time"], runs["solved"] = 3.0, False
    res = compare_censored(runs, "stacker@1.4", cutoff=3.0)
    assert res.logrank["chi2"] is None and any("no run solved" in w for w in res.warnings)


def test_a_likelihood_without_maximum_is_not_estimable():
    # in every block the faster treatment solves all its runs before the slower solves any
    rows = [(t, f"g{b}", (1.0 + i) / 10 + (5 if t == "slow" else 0), True)
            for b in range(3) for t in ("fast", "slow") for i in range(5)]
    runs = pd.DataFrame(rows, columns=["treatment", "block", "time", "solved"])
    res = compare_censored(runs, "slow", cutoff=10.0)
    assert res.cox[0]["estimable"] is False
    assert any("runs off to infinity" in w for w in res.warnings)


def test_curves_are_thinned_but_stay_within_their_bound():
    rng = np.random.default_rng(12)
    n = 5000
    runs = pd.DataFrame({"treatment": ["a", "b"] * (n // 2), "block": "g1", "time": rng.uniform(0, 10, n),
                         "solved": True})
    res = compare_censored(runs, "a", 10.0)
    for row in res.per_treatment:
        kept = np.array(row["curve"])
        assert len(kept) <= CURVE_POINTS + 1
        full = solved_curve(runs.loc[runs["treatment"] == row["treatment"], "time"], np.ones(n // 2, bool))
        # the step drawn from the kept points at each exact step time
        idx = np.searchsorted(kept[:, 0], full["time"].to_numpy(), side="right") - 1
        drawn = np.where(idx >= 0, kept[np.clip(idx, 0, None), 1], 0.0)
        assert np.max(full["solved_fraction"].to_numpy() - drawn) < 1.0 / CURVE_POINTS + 1e-12
    small = compare_censored(remission(), "placebo", 35)
    assert [p[0] for p in small.per_treatment[1]["curve"]] == [6, 7, 10, 13, 16, 22, 23]


def test_the_document_is_json_safe_and_keeps_the_contract_keys():
    import json

    doc = compare_censored(blocked_runs(1), "stacker@1.4", 3.0).to_dict()
    json.dumps(doc, allow_nan=False)
    assert {"cutoff", "per_treatment", "cox", "logrank", "warnings"} <= set(doc)
    assert {"treatment", "runs", "solved", "censored", "median_time"} <= set(doc["per_treatment"][0])
    assert {"treatment", "hazard_ratio", "ci_low", "ci_high", "p"} <= set(doc["cox"][0])
    assert {"chi2", "df", "p"} <= set(doc["logrank"])


def test_refusals_are_one_line():
    runs = blocked_runs(1)
    with pytest.raises(InputError, match="reference stacker@9 has no runs"):
        compare_censored(runs, "stacker@9", 3.0)
    with pytest.raises(DesignError, match="only one treatment"):
        compare_censored(runs[runs["treatment"] == "stacker@1.4"], "stacker@1.4", 3.0)
    with pytest.raises(InputError, match="past the cutoff"):
        compare_censored(runs.assign(time=runs["value"]), "stacker@1.4", 3.0)
    with pytest.raises(InputError, match="lack the column"):
        compare_censored(runs.drop(columns="solved"), "stacker@1.4", 3.0)
