"""blocktest and versus with --cutoff, end to end through the command line (SQLite and PostgreSQL).

The runs are made up inline and loaded as a CSV file. The expected numbers come from the same
rows censored by hand here and handed to lifelines (CoxPHFitter with strata and clusters, its
log-rank test): an implementation independent of Blockyard's statsmodels one.
"""
from __future__ import annotations

import math
import random

import pandas as pd
import pytest

from conftest import load_rows

lifelines = pytest.importorskip("lifelines")
# lifelines calls pandas in ways pandas 3 announces it will drop: its noise, not ours
pytestmark = pytest.mark.filterwarnings("ignore:Starting with pandas version 4.0")

HEADER = ["solver", "version", "family", "group", "instance", "seed", "status", "seconds", "fill_pct"]
LAYOUT = """
[metrics.seconds]
sense = "min"
unit = "s"

[metrics.fill_pct]
sense = "max"
unit = "%"
"""
CUTOFF = 60.0
SPEED = {"1.4": 1.0, "1.5": 1.6, "1.6": 0.7}


def make_runs(seed: int = 3, families=("mixed-sku", "oversize"), groups=3, instances=3, seeds=3) -> list[dict]:
    """Invented runs of stacker: an instance's difficulty is shared by every version; a version's
    speed scales its time; runs past 60 s stop as timeouts at 60 s, and a few crash early."""
    rng = random.Random(seed)
    hard = {(f, g, i): rng.expovariate(1.0) * (1 + g) * (2.5 if f == "oversize" else 1.0)
            for f in families for g in range(groups) for i in range(instances)}
    runs = []
    for version, speed in SPEED.items():
        for (f, g, i), h in hard.items():
            for s in range(seeds):
                t = rng.expovariate(1.0) * 15 * h / speed
                status = "ok" if t < CUTOFF else "timeout"
                if rng.random() < 0.04:
                    status, t = "failed", rng.uniform(0, 5)
                runs.append(dict(solver="stacker", version=version, family=f, group=f"g{g}", instance=f"i{i}", seed=s,
                                 status=status, seconds=round(min(t, CUTOFF), 3), fill_pct=round(80 + rng.random(), 2)))
    return runs


def load(cli, tmp_path, runs, name="runs.csv", campaign="oct"):
    load_rows(cli, tmp_path, runs, HEADER, LAYOUT, name, campaign)


def by_hand(runs: list[dict], cutoff: float = CUTOFF) -> pd.DataFrame:
    """Censoring written out: solved when ok and below the cutoff; otherwise unsolved at it."""
    df = pd.DataFrame(runs)
    df["treatment"] = df["solver"] + "@" + df["version"]
    df["block"] = df["family"] + "/" + df["group"]
    df["instance_key"] = df["block"] + "/" + df["instance"]
    df["solved"] = (df["status"] == "ok") & (df["seconds"] < cutoff)
    df["time"] = df["seconds"].where(df["solved"], cutoff)
    return df


def lifelines_cox(df: pd.DataFrame, reference: str) -> pd.DataFrame:
    from lifelines import CoxPHFitter

    d = df[["time", "block", "instance_key"]].copy()
    d["event"] = df["solved"].astype(int)
    others = sorted(t for t in df["treatment"].unique() if t != reference)
    for t in others:
        d[t] = (df["treatment"] == t).astype(float)
    return CoxPHFitter().fit(d, "time", "event", strata=["block"], cluster_col="instance_key").summary


def test_blocktest_with_cutoff_matches_hand_censoring_and_lifelines(cli, tmp_path):
    runs = make_runs()
    load(cli, tmp_path, runs)
    r = cli("blocktest", "--metric", "seconds", "--cutoff", "60", "--json")
    assert r.code == 0, r
    cen = r.json()["censored"]
    df = by_hand(runs)
    assert cen["cutoff"] == 60 and cen["reference"] == "stacker@1.4" and cen["runs"] == len(df)
    for row in cen["per_treatment"]:
        part = df[df["treatment"] == row["treatment"]]
        assert row["runs"] == len(part) and row["solved"] == int(part["solved"].sum())
        assert row["censored"] == int((~part["solved"]).sum())
        assert row["failed"] == int((part["status"] != "ok").sum())
        solved = part.loc[part["solved"], "seconds"]
        assert row["mean_time_solved_only"] == pytest.approx(solved.mean(), rel=1e-9)
        # common practice: with all censoring at the cutoff, the restricted mean is mean(min(time, cutoff))
        assert row["restricted_mean_time"] == pytest.approx(part["time"].mean(), rel=1e-9)
    ref = lifelines_cox(df, "stacker@1.4")
    for row in cen["cox"]:
        t = row["treatment"]
        assert math.log(row["hazard_ratio"]) == pytest.approx(ref.loc[t, "coef"], abs=1e-5)
        assert row["ci_low"] == pytest.approx(ref.loc[t, "exp(coef) lower 95%"], rel=1e-4)
        assert row["ci_high"] == pytest.approx(ref.loc[t, "exp(coef) upper 95%"], rel=1e-4)
        assert row["p"] == pytest.approx(ref.loc[t, "p"], rel=1e-3, abs=1e-12)
    assert cen["logrank"]["df"] == 2 and cen["logrank"]["p"] is not None
    assert {"cutoff", "per_treatment", "cox", "logrank", "warnings"} <= set(cen)


def stratified_logrank(df: pd.DataFrame, groups: list[str]) -> float:
    """The stratified log-rank statistic written out from its textbook formula (Kalbfleisch and
    Prentice 2002): per block and solve time, observed minus expected solves per group and their
    hypergeometric covariance, summed over blocks; (O - E)' V^-1 (O - E) over all groups but one."""
    import numpy as np

    k = len(groups)
    o_e, var = np.zeros(k), np.zeros((k, k))
    for _, s in df.groupby("block"):
        for t in np.unique(s.loc[s["solved"], "time"]):
            risk = s[s["time"] >= t]
            n, d = len(risk), int(((risk["time"] == t) & risk["solved"]).sum())
            n_g = np.array([(risk["treatment"] == g).sum() for g in groups], float)
            d_g = np.array([((risk["treatment"] == g) & (risk["time"] == t) & risk["solved"]).sum() for g in groups],
                           float)
            o_e += d_g - d * n_g / n
            if n > 1:
                var += d * (n - d) / (n * n * (n - 1)) * (np.diag(n_g) * n - np.outer(n_g, n_g))
    return float(o_e[:-1] @ np.linalg.solve(var[:-1, :-1], o_e[:-1]))


def test_logrank_matches_lifelines_on_one_block_and_its_formula_on_several(cli, tmp_path):
    from lifelines.statistics import multivariate_logrank_test

    runs = make_runs(seed=5, families=("oversize",), groups=2, instances=6)
    load(cli, tmp_path, runs)
    df = by_hand(runs)
    groups = ["stacker@1.4", "stacker@1.5", "stacker@1.6"]
    doc = cli("versus", "stacker@1.4", "--metric", "seconds", "--cutoff", "60", "--json").json()
    assert doc["censored"]["logrank"]["chi2"] == pytest.approx(stratified_logrank(df, groups), rel=1e-9)
    one = df[df["block"] == "oversize/g1"]
    lr = multivariate_logrank_test(one["time"], one["treatment"], one["solved"])
    assert stratified_logrank(one, groups) == pytest.approx(lr.test_statistic, rel=1e-9)  # the formula itself


def test_versus_with_cutoff_compares_with_the_baseline_and_prints_the_part(cli, tmp_path):
    runs = make_runs()
    load(cli, tmp_path, runs)
    r = cli("versus", "stacker@1.5", "--metric", "seconds", "--cutoff", "60", "--json")
    assert r.code == 0, r
    doc = r.json()
    cen = doc["censored"]
    assert cen["reference"] == "stacker@1.5"
    assert [c["treatment"] for c in cen["cox"]] == ["stacker@1.4", "stacker@1.6"]
    ref = lifelines_cox(by_hand(runs), "stacker@1.5")
    for row in cen["cox"]:
        assert math.log(row["hazard_ratio"]) == pytest.approx(ref.loc[row["treatment"], "coef"], abs=1e-5)
    text = cli("versus", "stacker@1.5", "--metric", "seconds", "--cutoff", "60")
    assert text.code == 0, text
    assert "runtimes with a cutoff" in text.out and "hazard of solving against stacker@1.5" in text.out
    assert "mean (solved runs only)" in text.out and "log-rank test, stratified by block" in text.out
    assert "solves sooner" in text.out or "solves later" in text.out
    plain = cli("versus", "stacker@1.5", "--metric", "seconds", "--json")
    assert "censored" not in plain.json()
    assert "censored" not in cli("blocktest", "--metric", "seconds", "--json").json()


def test_a_version_that_always_fails_on_a_block_stays_in(cli, tmp_path):
    # the collapse (failures dropped) loses the block; counted as unsolved, it is an outcome
    runs = make_runs()
    for r in runs:
        if r["version"] == "1.6" and r["family"] == "oversize" and r["group"] == "g2":
            r["status"], r["seconds"] = "failed", 2.0
    load(cli, tmp_path, runs)
    doc = cli("blocktest", "--metric", "seconds", "--cutoff", "60", "--json").json()
    assert "oversize/g2" in [d["block"] for d in doc["dropped_blocks"]]
    cen = doc["censored"]
    assert cen["blocks"] == 6
    row = next(p for p in cen["per_treatment"] if p["treatment"] == "stacker@1.6")
    assert row["runs"] == 54 and row["failed"] >= 9


def test_runs_past_the_cutoff_and_timeouts_before_it(cli, tmp_path):
    runs = make_runs()
    load(cli, tmp_path, runs)
    doc = cli("blocktest", "--metric", "seconds", "--cutoff", "30", "--json").json()
    df = by_hand(runs, 30.0)
    row = doc["censored"]["per_treatment"][0]
    part = df[df["treatment"] == "stacker@1.4"]
    assert row["past_cutoff"] == int(((part["status"] == "ok") & (part["seconds"] >= 30)).sum()) > 0
    # the runs' own limit was 60 s: a cutoff of 90 would count timeouts as unsolved to a time they never ran to
    doc = cli("blocktest", "--metric", "seconds", "--cutoff", "90", "--json").json()
    assert any("timed-out runs stopped before the cutoff 90" in w for w in doc["censored"]["warnings"])


def test_instances_not_shared_are_left_out_and_said(cli, tmp_path):
    runs = make_runs()
    runs = [r for r in runs if not (r["version"] == "1.5" and r["instance"] == "i2" and r["group"] == "g0")]
    load(cli, tmp_path, runs)
    cen = cli("blocktest", "--metric", "seconds", "--cutoff", "60", "--json").json()["censored"]
    assert any("2 instances left out" in n for n in cen["notes"])
    assert cen["instances"] == 16


def test_cutoff_mistakes_are_one_line(cli, tmp_path):
    load(cli, tmp_path, make_runs())
    for bad in ("0", "-3", "soon", "inf"):
        r = cli("blocktest", "--metric", "seconds", "--cutoff", bad)
        assert r.code == 2 and r.err.count("\n") == 1 and "--cutoff" in r.err and "positive number" in r.err, r
    r = cli("versus", "stacker@1.4", "--metric", "fill_pct", "--cutoff", "60")
    assert r.code == 2 and "higher is better" in r.err and "Traceback" not in r.err, r


def test_plot_solved_from_a_stored_analysis_and_from_fresh_data(cli, tmp_path):
    load(cli, tmp_path, make_runs())
    aid = cli("versus", "stacker@1.4", "--metric", "seconds", "--cutoff", "60", "--json").json()["analysis_id"]
    png = tmp_path / "solved.png"
    r = cli("plot", "solved", "--analysis", str(aid), "--to", str(png))
    assert r.code == 0, r
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    svg = tmp_path / "fresh.svg"
    r = cli("plot", "solved", "--metric", "seconds", "--cutoff", "60", "--slice", "family=oversize", "--to", str(svg),
            "--json")
    assert r.code == 0 and r.json()["figure"] == "solved", r
    assert "share of runs solved" in svg.read_text()
    r = cli("plot", "solved", "--metric", "seconds", "--to", str(svg))
    assert r.code == 2 and "--cutoff" in r.err, r
    plain = cli("blocktest", "--metric", "seconds", "--json").json()["analysis_id"]
    r = cli("plot", "solved", "--analysis", str(plain), "--to", str(png))
    assert r.code == 2 and "without a cutoff" in r.err, r
    r = cli("plot", "solved", "--analysis", str(aid), "--cutoff", "60", "--to", str(png))
    assert r.code == 2 and "leave out" in r.err, r


def test_report_and_recheck_keep_the_cutoff(cli, tmp_path):
    load(cli, tmp_path, make_runs())
    doc = cli("blocktest", "--metric", "seconds", "--cutoff", "60", "--json").json()
    aid = doc["analysis_id"]
    out = tmp_path / "report.md"
    r = cli("export", str(aid), "--to", str(out))
    assert r.code == 0, r
    text = out.read_text()
    assert "runtimes with a cutoff" in text and "hazard of solving against stacker@1.4" in text
    assert (tmp_path / "report_files" / f"analysis-{aid}-solved.png").exists()
    r = cli("recheck", str(aid), "--json")
    assert r.code == 0, r
    again = r.json()
    assert again["status"] == "unchanged"
    assert again["new"]["censored"]["cox"] == doc["censored"]["cox"]
