"""Failures in blocktest and versus, end to end through the command line (SQLite and PostgreSQL);
the degenerate cases, --pairs nemenyi, the log scale read back, the performance profile with
failures, and the demo's weak variant.

The runs are made up inline. The expected numbers come from the same rows counted by hand here
(pandas) and tested by statsmodels (cochrans_q, mcnemar, multipletests) and scipy.stats.
"""
from __future__ import annotations

import math
import random

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.contingency_tables import cochrans_q, mcnemar
from statsmodels.stats.multitest import multipletests

from conftest import load_rows

HEADER = ["solver", "version", "family", "group", "instance", "seed", "status", "pallets", "seconds", "bins"]
LAYOUT = """
[metrics.pallets]
sense = "min"
unit = "pallets"

[metrics.seconds]
sense = "min"
unit = "s"

[metrics.bins]
sense = "min"
unit = "bins"
"""
EFFECT = {"1.4": 0.0, "1.5": -1.0, "1.6": 0.5}


def make_runs(seed: int = 5, fail: dict | None = None, versions=EFFECT, groups=4, instances=3, seeds=4) -> list[dict]:
    """Invented runs of stacker on two families: pallets = level of the group + version effect +
    noise. `fail` maps (version, family) to the share of runs that time out there."""
    rng = random.Random(seed)
    runs = []
    for version, effect in versions.items():
        for family in ("mixed-sku", "oversize"):
            for g in range(1, groups + 1):
                for i in range(1, instances + 1):
                    for s in range(1, seeds + 1):
                        bad = rng.random() < (fail or {}).get((version, family), 0.0)
                        pallets = 20 + 4 * g + (6 if family == "oversize" else 0) + effect + 0.3 * i + rng.gauss(0, 0.5)
                        runs.append(dict(solver="stacker", version=version, family=family, group=f"g{g}",
                                         instance=f"i{i}", seed=s, status="timeout" if bad else "ok",
                                         pallets="" if bad else round(pallets, 4),
                                         seconds=60.0 if bad else round(pallets / 3, 3), bins=3))
    return runs


def load(cli, tmp_path, runs, name="runs.csv", campaign="c1"):
    load_rows(cli, tmp_path, runs, HEADER, LAYOUT, name, campaign)


def by_hand(runs) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Runs and failed runs per treatment and instance, and the solved table (at least half of an
    instance's runs succeeded) over the instances every treatment ran."""
    df = pd.DataFrame(runs)
    df["treatment"] = "stacker@" + df["version"]
    df["key"] = df["family"] + "/" + df["group"] + "/" + df["instance"]
    cells = df.groupby(["treatment", "key"]).agg(runs=("seed", "size"), failed=("status", lambda s: int((s != "ok").sum())))
    cells = cells.reset_index()
    solved = (cells.assign(ok=(cells["runs"] - cells["failed"]) >= cells["runs"] / 2)
              .pivot(index="key", columns="treatment", values="ok").dropna().astype(int))
    return cells, solved


FAILING = {("1.6", "oversize"): 0.8}


@pytest.fixture
def failing(cli, tmp_path):
    runs = make_runs(fail=FAILING)
    load(cli, tmp_path, runs)
    return runs


def test_blocktest_counts_failures_and_tests_solving_like_statsmodels(failing, cli):
    doc = cli("blocktest", "--metric", "pallets", "--json").json()
    f = doc["failures"]
    cells, solved = by_hand(failing)
    totals = cells.groupby("treatment")[["runs", "failed"]].sum()
    assert [r["treatment"] for r in f["per_treatment"]] == ["stacker@1.4", "stacker@1.5", "stacker@1.6"]
    for r in f["per_treatment"]:
        assert r["runs"] == totals.loc[r["treatment"], "runs"] and r["failed"] == totals.loc[r["treatment"], "failed"]
        assert r["failed_share"] == pytest.approx(r["failed"] / r["runs"])
        assert r["unsolved"] == int((solved[r["treatment"]] == 0).sum()) and r["instances"] == len(solved) == 24
    ref = cochrans_q(solved[["stacker@1.4", "stacker@1.5", "stacker@1.6"]].to_numpy())  # statsmodels
    assert f["test"]["method"] == "cochran-q"
    assert f["test"]["statistic"] == pytest.approx(ref.statistic) and f["test"]["p"] == pytest.approx(ref.pvalue)
    assert f["follow_ups"] == [] and f["left_out"] == 0
    caution = next(w for w in doc["warnings"] if w.startswith("failure rates differ"))
    assert "stacker@1.6" in caution and "stacker@1.4" in caution and "successful runs only" in caution
    text = cli("blocktest", "--metric", "pallets").out
    assert "failures  on the 24 instances every treatment ran" in text
    assert "at least half of its runs there succeeded" in text
    assert "solving depends on the treatment: Cochran's Q" in text


def test_versus_follows_up_each_treatment_against_the_baseline(failing, cli):
    doc = cli("versus", "stacker@1.4", "--metric", "pallets", "--json").json()
    f = doc["failures"]
    _, solved = by_hand(failing)
    raw = []
    for row in f["follow_ups"]:
        t, b = solved[row["treatment"]], solved["stacker@1.4"]
        n10, n01 = int(((t == 1) & (b == 0)).sum()), int(((t == 0) & (b == 1)).sum())
        assert row["unsolved_only_by_treatment"] == n01 and row["unsolved_only_by_baseline"] == n10
        raw.append(mcnemar([[0, n10], [n01, 0]], exact=n10 + n01 < 25).pvalue)  # statsmodels
        assert row["p"] == pytest.approx(raw[-1])
    assert [r["treatment"] for r in f["follow_ups"]] == ["stacker@1.5", "stacker@1.6"]
    assert [r["p_adjusted"] for r in f["follow_ups"]] == pytest.approx(list(multipletests(raw, method="holm")[1]))
    assert f["follow_ups"][1]["p_adjusted"] < 0.05
    text = cli("versus", "stacker@1.4", "--metric", "pallets").out
    assert "against stacker@1.4: McNemar" in text and "fails more" in text


def test_a_treatment_whose_runs_all_fail_stays_in_the_failures_part(cli, tmp_path):
    runs = make_runs(versions={"1.4": 0.0, "1.5": -1.0, "1.7": 0.0}, fail={("1.7", "mixed-sku"): 1.0,
                                                                          ("1.7", "oversize"): 1.0})
    load(cli, tmp_path, runs)
    doc = cli("blocktest", "--metric", "pallets", "--json").json()
    assert "stacker@1.7" not in doc["treatment_names"]  # no value to analyse ...
    row = next(r for r in doc["failures"]["per_treatment"] if r["treatment"] == "stacker@1.7")
    assert row["failed"] == row["runs"] == 96 and row["unsolved"] == 24  # ... but counted here
    assert doc["failures"]["test"]["method"] == "cochran-q" and doc["failures"]["test"]["p"] < 0.001


def test_the_cell_summaries_and_the_runs_count_the_same_failures(failing, wh):
    from warehouse.analyses import run_blocktest, run_versus
    from warehouse.collapse.settings import Collapse
    from warehouse.select.slices import parse

    with wh.engine.connect() as conn:
        quick = run_blocktest(conn, parse(""), "pallets", Collapse()).to_dict()["failures"]
        runs = run_blocktest(conn, parse(""), "pallets", Collapse(), quick=False).to_dict()["failures"]
        seeds = run_versus(conn, parse("seed<=2"), "pallets", Collapse(), "stacker@1.4").to_dict()["failures"]
    assert quick == runs
    with wh.engine.connect() as conn:  # the quick one took the counts form: every treatment ran every instance
        from warehouse.collapse.observations import failure_counts
        counts = failure_counts(conn, parse(""), "pallets")
    assert counts is not None and len(counts["failing"]) and len(counts["failing"]) < len(counts["instances"]) * 3
    cells, _ = by_hand([r for r in failing if r["seed"] <= 2])  # a seed term: the runs are read
    assert {r["treatment"]: r["failed"] for r in seeds["per_treatment"]} == \
        cells.groupby("treatment")["failed"].sum().to_dict()


def test_mostly_imputed_values_are_cautioned(cli, tmp_path):
    runs = make_runs(fail={("1.6", "mixed-sku"): 0.7, ("1.6", "oversize"): 0.7})
    load(cli, tmp_path, runs)
    share = sum(r["status"] != "ok" for r in runs if r["version"] == "1.6") / 96
    doc = cli("blocktest", "--metric", "pallets", "--failures", "worst", "--json").json()
    caution = next(w for w in doc["warnings"] if "imputed failures" in w)
    # runs used by the analysis are those on instances every treatment has a value on: here all of them
    assert caution.startswith(f"stacker@1.6: {100 * share:.0f} % of its values are imputed failures")
    assert not any("imputed" in w for w in cli("blocktest", "--metric", "pallets", "--json").json()["warnings"])


def test_a_constant_metric_gives_no_pseudo_replication_and_no_p_beside_a_missing_f(cli, tmp_path):
    load(cli, tmp_path, make_runs())
    doc = cli("blocktest", "--metric", "bins", "--json").json()
    assert not any("identical results" in w for w in doc["warnings"])
    row = doc["anova"][0]
    assert row["f"] is None and row["p"] is None
    assert cli("blocktest", "--metric", "bins").code == 0


def test_two_treatments_say_the_spread_checks_cannot_tell(cli, tmp_path):
    load(cli, tmp_path, make_runs(versions={"1.4": 0.0, "1.5": -1.0}))
    doc = cli("blocktest", "--metric", "pallets", "--json").json()
    assert doc["diagnostics"]["fligner"]["p"] is None and doc["diagnostics"]["brown_forsythe"]["p"] is None
    assert "spread checks cannot tell anything" in cli("blocktest", "--metric", "pallets").out
    assert doc["failures"]["test"]["method"] == "mcnemar-exact"


def test_identical_ranks_in_every_block_are_said_in_words(cli, tmp_path):
    load(cli, tmp_path, make_runs(versions={"1.4": 0.0, "1.5": -3.0, "1.6": 3.0}))
    doc = cli("blocktest", "--metric", "pallets", "--json").json()
    fr = doc["friedman"]
    assert fr["statistic"] == pytest.approx(8 * 2)  # b (a-1): the largest Friedman chi2 (common practice)
    assert fr["iman_davenport"] is None and fr["p_f"] is None
    text = cli("blocktest", "--metric", "pallets").out
    assert "Iman-Davenport F not defined: the ranks are identical in every block" in text
    assert "= inf" not in text


# --- --pairs nemenyi and the log scale ----------------------------------------------------------

def collapsed_by_hand(runs) -> pd.DataFrame:
    df = pd.DataFrame(runs)
    df = df[df["status"] == "ok"]
    df["treatment"] = "stacker@" + df["version"]
    df["block"] = df["family"] + "/" + df["group"]
    per = df.groupby(["treatment", "block", "instance"], as_index=False)["pallets"].mean()
    return per.groupby(["treatment", "block"], as_index=False)["pallets"].mean().rename(columns={"pallets": "value"})


def test_pairs_nemenyi_on_the_command_line(cli, tmp_path):
    runs = make_runs()
    load(cli, tmp_path, runs)
    doc = cli("blocktest", "--metric", "pallets", "--pairs", "nemenyi", "--json").json()
    assert [p["method"] for p in doc["pairs"]] == ["nemenyi"]
    ne = doc["pairs"][0]
    wide = collapsed_by_hand(runs).pivot(index="block", columns="treatment", values="value")
    ranks = pd.DataFrame(stats.rankdata(wide.to_numpy(), axis=1), columns=wide.columns)  # scipy.stats
    a, b = 3, len(wide)
    # Demsar (2006): CD = q(a, inf) / sqrt 2 * sqrt(a (a+1) / (6 b)), q from scipy's studentized range
    cd = stats.studentized_range.ppf(0.95, a, np.inf) / math.sqrt(2) * math.sqrt(a * (a + 1) / (6 * b))
    assert ne["critical_difference"] == pytest.approx(cd, rel=1e-6)
    for p in ne["pairs"]:
        assert p["diff"] == pytest.approx(ranks[p["first"]].mean() - ranks[p["second"]].mean())
    both = cli("blocktest", "--metric", "pallets", "--pairs", "tukey,nemenyi", "--json").json()
    assert [p["method"] for p in both["pairs"]] == ["tukey", "nemenyi"]
    assert "Nemenyi after Friedman" in cli("blocktest", "--metric", "pallets", "--pairs", "nemenyi").out
    bad = cli("blocktest", "--metric", "pallets", "--pairs", "scheffe")
    assert bad.code == 2 and "--pairs scheffe: choose tukey, conover or nemenyi" in bad.err
    assert len(bad.err.strip().splitlines()) == 1 and "Traceback" not in bad.err


def test_log_scale_pairs_are_also_ratios_of_geometric_means(cli, tmp_path):
    runs = make_runs()
    load(cli, tmp_path, runs)
    doc = cli("blocktest", "--metric", "pallets", "--transform", "log", "--pairs", "tukey", "--json").json()
    table = collapsed_by_hand(runs)
    geo = {t: stats.gmean(g["value"]) for t, g in table.groupby("treatment")}  # scipy.stats
    means = {m["treatment"]: m["geometric_mean"] for m in doc["treatment_means"]}
    assert means == pytest.approx(geo)
    for p in doc["pairs"][0]["pairs"]:
        assert p["ratio"] == pytest.approx(geo[p["first"]] / geo[p["second"]])
        assert p["percent"] == pytest.approx(100 * (geo[p["first"]] / geo[p["second"]] - 1))
        assert p["ratio_low"] == pytest.approx(math.exp(p["ci_low"])) and p["ratio_high"] == pytest.approx(math.exp(p["ci_high"]))
    text = cli("blocktest", "--metric", "pallets", "--transform", "log", "--pairs", "tukey").out
    assert "geometric mean" in text and "ratio 95 % interval" in text


# --- the report ----------------------------------------------------------------------------------

def test_the_report_has_the_failures_part(failing, cli, tmp_path):
    aid = cli("versus", "stacker@1.4", "--metric", "pallets", "--json").json()["analysis_id"]
    out = tmp_path / "r.html"
    assert cli("export", str(aid), "--to", str(out)).code == 0
    page = out.read_text()
    assert "<h3>failures</h3>" in page and "solving depends on the treatment" in page
    assert "unsolved by the baseline only" in page


# --- performance profiles count a failure as never solved ---------------------------------------

def test_performance_ratios_count_a_failure_as_never_solved():
    from warehouse.present import figures as F

    # Dolan and More, Math. Programming 91 (2002): a solver that fails on a problem has an infinite
    # ratio there (their r_M), so it is never within any factor tau of the best
    cells = pd.DataFrame([("A", "p1", 1.0), ("B", "p1", 2.0), ("A", "p2", 4.0), ("B", "p2", np.nan),
                          ("A", "p3", np.nan), ("B", "p3", np.nan), ("A", "p4", 5.0)],
                         columns=["treatment", "instance", "value"])  # B never ran p4: left out
    r = F.performance_ratios(cells, "min")
    assert list(r.index) == ["p1", "p2", "p3"]
    assert r["A"].tolist() == [1.0, 1.0, math.inf] and r["B"].tolist() == [2.0, math.inf, math.inf]
    assert F.profile_share(r, 1e9).tolist() == pytest.approx([2 / 3, 1 / 3])
    taus, shares = F.profile_steps(r["B"])
    assert taus.tolist() == [1.0, 2.0] and shares.tolist() == pytest.approx([0.0, 1 / 3])
    line = F.performance_profile(cells, "min", "seconds").axes[0].get_lines()[1]
    assert max(line.get_ydata()) == pytest.approx(1 / 3)


def test_plot_performance_keeps_instances_a_treatment_failed(cli, tmp_path, wh):
    from warehouse.collapse.observations import collapse
    from warehouse.collapse.settings import Collapse
    from warehouse.present import figures as F
    from warehouse.select.slices import parse

    runs = make_runs(fail={("1.6", "oversize"): 1.0})  # 1.6 never solves an oversize instance
    load(cli, tmp_path, runs)
    with wh.engine.connect() as conn:
        every = collapse(conn, parse(""), "seconds", Collapse()).every_cell
    r = F.performance_ratios(every, "min")
    assert len(r) == 24 and int(np.isinf(r["stacker@1.6"]).sum()) == 12
    assert cli("plot", "performance", "--metric", "pallets", "--to", str(tmp_path / "p.png")).code == 0


# --- the demo ------------------------------------------------------------------------------------

def test_the_demo_catches_the_variant_that_times_out_on_oversize(tmp_path):
    from warehouse.demo.walk import run_demo

    done = run_demo(str(tmp_path / "yard"))
    versus = next(s for s in done.doc["steps"] if s["step"] == "versus")["result"]
    caution = next(w for w in versus["warnings"] if w.startswith("failure rates differ"))
    assert "stacker@1.6-greedy" in caution
    greedy = next(r for r in versus["failures"]["follow_ups"] if r["treatment"] == "stacker@1.6-greedy")
    assert greedy["p_adjusted"] < 0.05 and greedy["unsolved_only_by_treatment"] > greedy["unsolved_only_by_baseline"]
    assert "fails more" in done.text
