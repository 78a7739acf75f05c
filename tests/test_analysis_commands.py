"""peek, blocktest, versus and plan through the command line, checked against reference libraries.

The runs are made up inline; the expected numbers come from statsmodels (OLS and anova_lm),
scipy.stats and pandas computing on the same data, collapsed independently of Blockyard.
"""
from __future__ import annotations

import csv
import math
import random

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.stats.anova import anova_lm

HEADER = ["solver", "version", "family", "group", "instance", "seed", "status", "host", "instance_hash",
          "pallets", "seconds"]


def write_runs(path, runs: list[dict]) -> str:
    with open(path, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=HEADER)
        w.writeheader()
        for r in runs:
            w.writerow({k: r.get(k, "") for k in HEADER})
    return str(path)


def load(cli, tmp_path, name, runs, campaign):
    r = cli("load", write_runs(tmp_path / name, runs), "--campaign", campaign)
    assert r.code == 0, r
    return r


def make_runs(versions: dict[str, float], groups, rng, host="h1", instances=("i1", "i2"), seeds=(1, 2),
              hashes=None, noise=0.6) -> list[dict]:
    """Runs of solver stk: pallets = 20 + 3 g + effect + instance offset + noise; seconds follow."""
    runs = []
    for version, effect in versions.items():
        for g in groups:
            for k, inst in enumerate(instances):
                for seed in seeds:
                    pallets = 20 + 3 * g + effect + 0.5 * k + rng.gauss(0, noise)
                    runs.append(dict(solver="stk", version=version, family="f", group=f"g{g}", instance=inst,
                                     seed=seed, status="ok", host=host(version) if callable(host) else host,
                                     instance_hash=(hashes or {}).get((version, g, inst), ""),
                                     pallets=round(pallets, 4), seconds=round(pallets / 4 + rng.random(), 4)))
    return runs


def collapse_by_hand(runs: list[dict], metric="pallets") -> pd.DataFrame:
    """Mean over seeds, then mean over instances: one value per treatment and block."""
    df = pd.DataFrame(runs)
    df["treatment"] = df["solver"] + "@" + df["version"]
    df["block"] = df["family"] + "/" + df["group"]
    per_instance = df.groupby(["treatment", "block", "instance"], as_index=False)[metric].mean()
    return per_instance.groupby(["treatment", "block"], as_index=False)[metric].mean().rename(columns={metric: "value"})


def per_instance_by_hand(runs, metric="pallets") -> pd.DataFrame:
    df = pd.DataFrame(runs)
    df["treatment"] = df["solver"] + "@" + df["version"]
    df["block"] = df["family"] + "/" + df["group"]
    return df.groupby(["treatment", "block", "instance"], as_index=False)[metric].mean().rename(columns={metric: "value"})


def anova_rows(doc) -> dict:
    return {r["source"]: r for r in doc["anova"]}


def check_row(ours: dict, ref: pd.Series, with_test=True):
    assert ours["df"] == pytest.approx(ref["df"])
    assert ours["ss"] == pytest.approx(ref["sum_sq"], rel=1e-9)
    assert ours["ms"] == pytest.approx(ref["mean_sq"], rel=1e-9)
    if with_test:
        assert ours["f"] == pytest.approx(ref["F"], rel=1e-8)
        assert ours["p"] == pytest.approx(ref["PR(>F)"], rel=1e-6, abs=1e-300)


# --- blocktest ---------------------------------------------------------------------------------

EFFECTS = {"1.0": 0.0, "2.0": -1.2, "3.0": 0.4}


@pytest.fixture
def blocked(cli, tmp_path):
    runs = make_runs(EFFECTS, range(1, 8), random.Random(11))
    load(cli, tmp_path, "blocked.csv", runs, "c1")
    return runs


@pytest.mark.filterwarnings("ignore:The inplace keyword")  # inside pingouin
def test_blocktest_anova_equals_statsmodels_and_friedman_equals_scipy(blocked, cli):
    r = cli("blocktest", "--metric", "pallets", "--json")
    assert r.code == 0, r
    doc = r.json()
    for key in ("slice", "metric", "treatments", "blocks", "dropped_blocks", "anova", "friedman", "diagnostics",
                "warnings", "analysis_id"):
        assert key in doc, key
    assert [row["source"] for row in doc["anova"]] == ["treatment", "block", "residual"]
    assert doc["treatments"] == 3 and doc["blocks"] == 7 and doc["dropped_blocks"] == []
    assert doc["design"] == "complete"
    assert isinstance(doc["analysis_id"], int)
    table = collapse_by_hand(blocked)
    ref = anova_lm(smf.ols("value ~ C(treatment) + C(block)", data=table).fit(), typ=1)  # statsmodels
    rows = anova_rows(doc)
    check_row(rows["treatment"], ref.loc["C(treatment)"])
    check_row(rows["block"], ref.loc["C(block)"])
    check_row(rows["residual"], ref.loc["Residual"], with_test=False)
    assert rows["residual"]["df"] == (3 - 1) * (7 - 1)
    wide = table.pivot(index="block", columns="treatment", values="value")
    fr = stats.friedmanchisquare(*[wide[c] for c in wide.columns])  # scipy.stats
    assert doc["friedman"]["statistic"] == pytest.approx(fr.statistic)
    assert doc["friedman"]["p"] == pytest.approx(fr.pvalue)
    # pingouin's repeated-measures ANOVA (blocks as subjects) is the same F test, independently coded
    import pingouin

    rm = pingouin.rm_anova(data=table, dv="value", within="treatment", subject="block", detailed=True)
    assert rows["treatment"]["f"] == pytest.approx(float(rm.loc[rm["Source"] == "treatment", "F"].iloc[0]), rel=1e-6)
    pf = pingouin.friedman(data=table, dv="value", within="treatment", subject="block")  # pingouin
    assert doc["friedman"]["statistic"] == pytest.approx(float(pf["Q"].iloc[0]))
    # the checks ride along
    sw = stats.shapiro(smf.ols("value ~ C(treatment) + C(block)", data=table).fit().resid)  # scipy.stats
    assert doc["diagnostics"]["shapiro"]["p"] == pytest.approx(sw.pvalue, rel=1e-6)
    assert isinstance(doc["warnings"], list)


def test_blocktest_text_names_the_sources_of_variation(blocked, cli):
    r = cli("blocktest", "--metric", "pallets")
    assert r.code == 0, r
    for words in ("source of variation", "treatment", "block", "residual", "Friedman", "kept as analysis"):
        assert words in r.out


def test_blocktest_log_transform_says_so_and_analyses_the_logs(blocked, cli):
    r = cli("blocktest", "--metric", "pallets", "--transform", "log", "--json")
    assert r.code == 0, r
    doc = r.json()
    assert doc["transform"]["name"] == "log"
    table = collapse_by_hand(blocked)
    table["value"] = np.log(table["value"])
    ref = anova_lm(smf.ols("value ~ C(treatment) + C(block)", data=table).fit(), typ=1)  # statsmodels
    check_row(anova_rows(doc)["treatment"], ref.loc["C(treatment)"])
    text = cli("blocktest", "--metric", "pallets", "--transform", "log")
    assert "analysed on the log scale" in text.out


def test_blocktest_pairs_adds_tukey_intervals_from_the_studentized_range(blocked, cli):
    r = cli("blocktest", "--metric", "pallets", "--pairs", "--json")
    assert r.code == 0, r
    doc = r.json()
    methods = [p["method"] for p in doc["pairs"]]
    assert methods == ["tukey", "conover"]
    tukey = doc["pairs"][0]
    assert len(tukey["pairs"]) == 3  # 3 treatments, 3 pairs
    table = collapse_by_hand(blocked)
    mse = smf.ols("value ~ C(treatment) + C(block)", data=table).fit().mse_resid  # statsmodels
    q = stats.studentized_range.ppf(0.95, 3, 12)  # scipy.stats
    means = table.groupby("treatment")["value"].mean()
    for p in tukey["pairs"]:
        assert p["diff"] == pytest.approx(means[p["first"]] - means[p["second"]])
        assert (p["ci_high"] - p["ci_low"]) / 2 == pytest.approx(q * math.sqrt(mse / 7), rel=1e-6)


def test_blocktest_pairs_follow_the_transform_of_the_anova(blocked, cli):
    doc = cli("blocktest", "--metric", "pallets", "--transform", "log", "--pairs", "--json").json()
    tukey = doc["pairs"][0]
    table = collapse_by_hand(blocked)
    table["value"] = np.log(table["value"])
    mse = smf.ols("value ~ C(treatment) + C(block)", data=table).fit().mse_resid  # statsmodels, log scale
    q = stats.studentized_range.ppf(0.95, 3, 12)  # scipy.stats
    means = table.groupby("treatment")["value"].mean()
    for p in tukey["pairs"]:
        assert p["diff"] == pytest.approx(means[p["first"]] - means[p["second"]])
        assert (p["ci_high"] - p["ci_low"]) / 2 == pytest.approx(q * math.sqrt(mse / 7), rel=1e-6)
    assert any("log scale" in w for w in doc["warnings"])


def test_identical_groups_are_flagged_as_pseudo_replication(cli, tmp_path):
    rng = random.Random(2)
    runs = make_runs({"1.0": 0.0, "2.0": -1.0}, range(1, 7), rng)
    # g6 is g5 again: the same instance files (same content hashes) under another name
    for r in runs:
        if r["group"] in ("g5", "g6"):
            r["instance_hash"] = f"h-{r['instance']}"
    copy = [dict(r, group="g7") for r in runs if r["group"] == "g1"]  # identical results, no hashes
    load(cli, tmp_path, "pseudo.csv", runs + copy, "c1")
    peek = cli("peek", "--json").json()
    assert any("f/g5, f/g6" in w and "identical content hashes" in w for w in peek["warnings"])
    doc = cli("blocktest", "--metric", "pallets", "--json").json()
    assert any("f/g1, f/g7" in w and "identical results for every treatment" in w for w in doc["warnings"])


@pytest.fixture
def with_holes(cli, tmp_path):
    runs = make_runs(EFFECTS, range(1, 8), random.Random(5))
    runs = [r for r in runs if not (r["group"] == "g2" and r["version"] == "3.0")
            and not (r["group"] == "g5" and r["version"] == "1.0")]
    load(cli, tmp_path, "holes.csv", runs, "c1")
    return runs


def test_blocktest_drops_blocks_with_holes_by_default_and_says_which(with_holes, cli):
    r = cli("blocktest", "--metric", "pallets", "--json")
    assert r.code == 0, r
    doc = r.json()
    assert doc["blocks"] == 5
    assert doc["dropped_blocks"] == [{"block": "f/g2", "missing": ["stk@3.0"]}, {"block": "f/g5", "missing": ["stk@1.0"]}]
    assert any("2 blocks with holes were dropped" in w and "f/g2" in w and "f/g5" in w for w in doc["warnings"])
    table = collapse_by_hand(with_holes)
    table = table[~table["block"].isin(["f/g2", "f/g5"])]
    ref = anova_lm(smf.ols("value ~ C(treatment) + C(block)", data=table).fit(), typ=1)  # statsmodels
    check_row(anova_rows(doc)["treatment"], ref.loc["C(treatment)"])


def test_blocktest_incomplete_design_matches_sequential_ss_with_blocks_first(with_holes, cli):
    r = cli("blocktest", "--metric", "pallets", "--holes", "keep", "--design", "incomplete", "--json")
    assert r.code == 0, r
    doc = r.json()
    assert doc["design"] == "incomplete" and doc["blocks"] == 7
    table = collapse_by_hand(with_holes)
    assert len(table) == 19  # 21 cells less the two holes
    ref = anova_lm(smf.ols("value ~ C(block) + C(treatment)", data=table).fit(), typ=1)  # statsmodels, sequential
    rows = anova_rows(doc)
    check_row(rows["treatment"], ref.loc["C(treatment)"])  # adjusted for blocks
    check_row(rows["block"], ref.loc["C(block)"], with_test=False)  # unadjusted
    check_row(rows["residual"], ref.loc["Residual"], with_test=False)
    assert doc["balance"]["complete"] is False and doc["balance"]["bibd"] is False


def test_blocktest_generalized_design_keeps_instances_apart(blocked, cli):
    r = cli("blocktest", "--metric", "pallets", "--design", "generalized", "--json")
    assert r.code == 0, r
    doc = r.json()
    assert doc["design"] == "generalized"
    table = per_instance_by_hand(blocked)
    fit = smf.ols("value ~ C(block) + C(treatment) + C(treatment):C(block)", data=table).fit()
    ref = anova_lm(fit, typ=1)  # statsmodels
    rows = anova_rows(doc)
    check_row(rows["treatment"], ref.loc["C(treatment)"])
    check_row(rows["block"], ref.loc["C(block)"])
    check_row(rows["interaction"], ref.loc["C(treatment):C(block)"])
    check_row(rows["residual"], ref.loc["Residual"], with_test=False)
    # blocks as a random sample: treatment against the interaction mean square
    rb = doc["treatment_random_blocks"]
    f = ref.loc["C(treatment)", "mean_sq"] / ref.loc["C(treatment):C(block)", "mean_sq"]
    assert rb["f"] == pytest.approx(f)
    assert rb["p"] == pytest.approx(stats.f.sf(f, 2, 12))  # scipy.stats


@pytest.mark.parametrize("argv, words", [
    (["--transform", "square"], "--transform square: choose none, log, boxcox or rank"),
    (["--design", "latin"], "--design latin: choose"),
    (["--replicates", "trimmed:0.7"], "--replicates trimmed:0.7"),
    (["--failures", "skip"], "--failures skip"),
    (["--holes", "fill"], "--holes fill"),
    (["--metric", "palets"], "no metric 'palets'"),
    (["--slice", "vesion>=1"], "did you mean 'version'?"),
    (["--slice", "solver=stack"], "no solver 'stack'"),
    (["--design", "incomplete", "--pairs"], "--pairs needs a complete design"),
    (["--design", "incomplete", "--transform", "log"], "--transform applies to the complete design"),
    (["--design", "generalized", "--transform", "log"], "--transform applies to the complete design"),
    (["--slice", "stk@1.0"], "one treatment"),
])
def test_blocktest_bad_arguments_exit_2_with_one_line(blocked, cli, argv, words):
    if "--metric" not in argv:
        argv = [*argv, "--metric", "pallets"]
    r = cli("blocktest", *argv)
    assert r.code == 2, r
    assert r.err.count("\n") == 1 and r.err.startswith("blockyard: ")
    assert words in r.err
    assert r.out == ""


def test_blocktest_with_holes_and_design_complete_is_refused(with_holes, cli):
    r = cli("blocktest", "--metric", "pallets", "--holes", "keep", "--design", "complete")
    assert r.code == 2 and r.err.count("\n") == 1 and "the design has holes" in r.err


# --- versus across campaigns ----------------------------------------------------------------------

@pytest.fixture
def two_campaigns(cli, tmp_path):
    rng = random.Random(23)
    # last month's baseline on f/g1..g6 from host h1; this month's variants on g1..g7 from h1 and h2
    base = make_runs({"1.0": 0.0}, range(1, 7), rng, host="h1")
    new = make_runs({"2.0": -1.0, "2.1": 0.3}, range(1, 8), rng, host=lambda v: "h1" if v == "2.0" else "h2")
    load(cli, tmp_path, "base.csv", base, "oct-base")
    load(cli, tmp_path, "new.csv", new, "nov-new")
    return base, new


SLICE = "stk@1.0 campaign=oct-base | solver=stk campaign=nov-new"


def test_versus_on_common_blocks_gives_the_hand_computed_dunnett_numbers(two_campaigns, cli):
    base, new = two_campaigns
    r = cli("versus", "stk@1.0", "--slice", SLICE, "--metric", "pallets", "--json")
    assert r.code == 0, r
    doc = r.json()
    for key in ("baseline", "blocks", "dropped_blocks", "comparisons", "warnings", "analysis_id"):
        assert key in doc, key
    assert doc["baseline"] == "stk@1.0"
    assert doc["blocks"] == 6
    assert doc["dropped_blocks"] == [{"block": "f/g7", "missing": ["stk@1.0"]}]
    assert any("not in the baseline" in w and "f/g7" in w for w in doc["warnings"])
    table = collapse_by_hand(base + new)
    common = table[table["block"] != "f/g7"]
    wide = common.pivot(index="block", columns="treatment", values="value")
    mse = smf.ols("value ~ C(treatment) + C(block)", data=common).fit().mse_resid  # statsmodels OLS
    assert doc["residual_df"] == (3 - 1) * (6 - 1)
    assert doc["residual_ms"] == pytest.approx(mse)
    # Dunnett's table, two-sided 5 %: d(2 comparisons, 10 df) = 2.57 (from memory of the published tables)
    assert doc["critical_value"] == pytest.approx(2.57, abs=0.01)
    rows = {c["treatment"]: c for c in doc["comparisons"]}
    assert sorted(rows) == ["stk@2.0", "stk@2.1"]
    for t, row in rows.items():
        assert row["method"] == "dunnett"
        diff = (wide[t] - wide["stk@1.0"]).mean()  # mean of block differences, pandas
        assert row["diff"] == pytest.approx(diff)
        half = doc["critical_value"] * math.sqrt(2 * mse / 6)
        assert row["ci_low"] == pytest.approx(diff - half)
        assert row["ci_high"] == pytest.approx(diff + half)
        assert row["wins"] + row["ties"] + row["losses"] == 6
        assert row["wins"] == int((wide[t] < wide["stk@1.0"]).sum())  # fewer pallets is a win
        # relative change through the log scale: 100 (exp(mean log ratio) - 1)
        assert row["relative_pct"] == pytest.approx(100 * math.expm1(np.log(wide[t] / wide["stk@1.0"]).mean()))
        assert 0 <= row["p_adjusted"] <= 1
        for key in ("treatment", "diff", "ci_low", "ci_high", "p_adjusted", "method", "relative_pct", "wins", "ties", "losses"):
            assert key in row
    assert rows["stk@2.0"]["diff"] < 0 and rows["stk@2.0"]["p_adjusted"] < 0.05


def test_versus_one_sided_gives_open_intervals_in_strict_json(two_campaigns, cli):
    import json

    base, new = two_campaigns
    r = cli("versus", "stk@1.0", "--slice", SLICE, "--metric", "pallets", "--better", "lower", "--json")
    assert r.code == 0, r

    def refuse(constant):
        raise ValueError(f"not JSON: {constant}")

    doc = json.loads(r.out, parse_constant=refuse)  # no Infinity or NaN in the document
    assert doc["alternative"] == "less"
    common = collapse_by_hand(base + new)
    common = common[common["block"] != "f/g7"]
    mse = smf.ols("value ~ C(treatment) + C(block)", data=common).fit().mse_resid  # statsmodels OLS
    wide = common.pivot(index="block", columns="treatment", values="value")
    for row in doc["comparisons"]:
        assert row["ci_low"] is None  # the open end
        diff = (wide[row["treatment"]] - wide["stk@1.0"]).mean()
        assert row["ci_high"] == pytest.approx(diff + doc["critical_value"] * math.sqrt(2 * mse / 6))
    assert doc["critical_value"] < 2.57  # a one-sided bound needs a smaller multiplier than the two-sided one


def test_versus_paired_t_with_holm_matches_scipy_on_the_common_blocks(two_campaigns, cli):
    base, new = two_campaigns
    r = cli("versus", "stk@1.0", "--slice", SLICE, "--metric", "pallets", "--method", "paired-t", "--json")
    assert r.code == 0, r
    doc = r.json()
    wide = collapse_by_hand(base + new).pivot(index="block", columns="treatment", values="value").drop(index="f/g7")
    raw = {t: stats.ttest_rel(wide[t], wide["stk@1.0"]).pvalue for t in ("stk@2.0", "stk@2.1")}  # scipy.stats
    # Holm by hand: the smaller p times 2, the larger times 1, kept monotone
    lo, hi = sorted(raw, key=raw.get)
    holm = {lo: min(1, 2 * raw[lo])}
    holm[hi] = min(1, max(holm[lo], raw[hi]))
    for row in doc["comparisons"]:
        assert row["p_adjusted"] == pytest.approx(holm[row["treatment"]])


def test_time_metric_from_different_hosts_gets_the_host_caution(two_campaigns, cli):
    r = cli("versus", "stk@1.0", "--slice", SLICE, "--metric", "seconds", "--json")
    assert r.code == 0, r
    warnings = r.json()["warnings"]
    assert any(w.startswith("seconds was measured on h1 for the baseline but on h1, h2 for the others") for w in warnings)
    r = cli("versus", "stk@1.0", "--slice", SLICE, "--metric", "pallets", "--json")
    assert not any("was measured on" in w for w in r.json()["warnings"])  # pallets is not a time


def test_an_instance_whose_content_hash_changed_is_reported_and_not_compared(cli, tmp_path):
    rng = random.Random(3)
    base = make_runs({"1.0": 0.0}, range(1, 7), rng, hashes={("1.0", 1, "i1"): "aaa"})
    new = make_runs({"2.0": -1.0}, range(1, 7), rng, hashes={("2.0", 1, "i1"): "bbb"})
    load(cli, tmp_path, "base.csv", base, "oct-base")
    load(cli, tmp_path, "new.csv", new, "nov-new")
    r = cli("versus", "stk@1.0", "--slice", "stk@1.0 campaign=oct-base | stk@2.0 campaign=nov-new",
            "--metric", "pallets", "--json")
    assert r.code == 0, r
    doc = r.json()
    assert any("f/g1/i1" in w and "2 different content hashes" in w for w in doc["warnings"])
    # f/g1 rests on i2 alone, the only instance both sides ran with the same content
    by_hand = per_instance_by_hand(base + new)
    g1 = by_hand[(by_hand["block"] == "f/g1") & (by_hand["instance"] == "i2")].set_index("treatment")["value"]
    others = collapse_by_hand(base + new)
    others = others[others["block"] != "f/g1"].pivot(index="block", columns="treatment", values="value")
    expected = ((others["stk@2.0"] - others["stk@1.0"]).sum() + g1["stk@2.0"] - g1["stk@1.0"]) / 6
    assert doc["comparisons"][0]["diff"] == pytest.approx(expected)
    assert doc["blocks"] == 6
    peek = cli("peek", "--slice", "stk@1.0 campaign=oct-base | stk@2.0 campaign=nov-new", "--json").json()
    assert any("f/g1/i1" in w and "different content hashes" in w for w in peek["warnings"])


@pytest.mark.parametrize("argv, words", [
    (["stk"], "NAME@VERSION"),
    (["stk@9.9"], "baseline stk@9.9 is not in the slice"),
    (["stk@1.0", "--method", "sign"], "--method sign: choose dunnett, paired-t or wilcoxon"),
    (["stk@1.0", "--adjust", "none"], "--adjust none"),
    (["stk@1.0", "--better", "smaller"], "--better smaller"),
    (["stk@1.0", "--confidence", "1.5"], "--confidence 1.5"),
    (["stk@1.0", "--holes", "keep"], "common blocks only"),
    (["stk@1.0", "--margin", "abc"], "--margin abc"),
])
def test_versus_bad_arguments_exit_2_with_one_line(two_campaigns, cli, argv, words):
    r = cli("versus", *argv, "--slice", SLICE, "--metric", "pallets")
    assert r.code == 2, r
    assert r.err.count("\n") == 1 and words in r.err


# --- plan ----------------------------------------------------------------------------------------

def test_plan_half_an_sd_at_80_percent_power_needs_34_blocks(cli):
    from statsmodels.stats.power import TTestPower

    r = cli("plan", "--effect", "0.5", "--power", "0.8", "--json")
    assert r.code == 0, r
    doc = r.json()
    # Cohen, Statistical Power Analysis: d = 0.5, two-sided 5 %, power 0.8 needs n = 34 (from memory of the tables)
    assert doc["blocks_needed"] == 34
    # statsmodels TTestPower gives 33.37, rounded up to whole blocks
    n = TTestPower().solve_power(effect_size=0.5, alpha=0.05, power=0.8, alternative="two-sided")
    assert n == pytest.approx(33.37, abs=0.01) and math.ceil(n) == doc["blocks_needed"]
    assert doc["achieved_power"] >= 0.8


def test_plan_splits_alpha_over_comparisons(cli):
    from statsmodels.stats.power import TTestPower

    one = cli("plan", "--effect", "0.5", "--json").json()
    three = cli("plan", "--effect", "0.5", "--comparisons", "3", "--json").json()
    assert three["alpha_per_comparison"] == pytest.approx(0.05 / 3)  # Bonferroni
    n = TTestPower().solve_power(effect_size=0.5, alpha=0.05 / 3, power=0.8)  # statsmodels
    assert three["blocks_needed"] == math.ceil(n)
    assert three["blocks_needed"] > one["blocks_needed"]


def test_plan_takes_sigma_from_a_stored_analysis(blocked, cli):
    from statsmodels.stats.power import TTestPower

    bt = cli("blocktest", "--metric", "pallets", "--json").json()
    ms = bt["residual_ms"]
    r = cli("plan", "--delta", "0.5", "--from", str(bt["analysis_id"]), "--json")
    assert r.code == 0, r
    doc = r.json()
    assert doc["from"]["analysis_id"] == bt["analysis_id"]
    # block differences of two treatments have variance 2 sigma^2 under the block model
    assert doc["sd"] == pytest.approx(math.sqrt(2 * ms))
    n = TTestPower().solve_power(effect_size=0.5 / math.sqrt(2 * ms), alpha=0.05, power=0.8)  # statsmodels
    assert doc["blocks_needed"] == math.ceil(n)
    assert isinstance(doc["analysis_id"], int)  # a plan built on a stored analysis is stored too

    r = cli("plan", "--means", "40,39,38.5", "--from", str(bt["analysis_id"]), "--json")
    assert r.code == 0, r
    doc = r.json()
    assert doc["from"]["sigma"] == pytest.approx(math.sqrt(ms))
    assert doc["blocks_needed"] >= 2


def test_plan_errors_are_one_line(blocked, cli):
    r = cli("plan")
    assert r.code == 2 and r.err.count("\n") == 1 and "say what to plan for" in r.err
    r = cli("plan", "--means", "40,39", "--json")
    assert r.code == 2 and "--sigma" in r.err
    r = cli("plan", "--effect", "0.5", "--from", "99")
    assert r.code == 2 and r.err.count("\n") == 1 and "no analysis 99" in r.err
    first = cli("plan", "--effect", "0.5", "--from", str(cli("blocktest", "--metric", "pallets", "--json").json()["analysis_id"]), "--json")
    r = cli("plan", "--delta", "1", "--from", str(first.json()["analysis_id"]))
    assert r.code == 2 and "no residual mean square" in r.err


# --- peek ------------------------------------------------------------------------------------------

def test_peek_counts_runs_per_treatment_and_block(two_campaigns, cli):
    r = cli("peek", "--slice", SLICE, "--json")
    assert r.code == 0, r
    doc = r.json()
    assert doc["treatments"] == ["stk@1.0", "stk@2.0", "stk@2.1"]
    assert len(doc["blocks"]) == 7
    assert doc["holes"] == [{"block": "f/g7", "missing": ["stk@1.0"]}]
    assert {c["runs"] for c in doc["cells"]} == {4}  # 2 instances x 2 seeds
    text = cli("peek", "--slice", SLICE).out
    assert "f/g7" in text and "lacks stk@1.0" in text
