"""guard end to end through the command line (SQLite and PostgreSQL): each verdict and exit status
on constructed campaigns, failures that overrule the values, the margin in units and in percent,
the bound against an independent Dunnett computation from the raw runs, the Markdown summary and
its command, the ledger (kept, recalled, rechecked), and the one-line refusals.

The runs are made up inline (simulated with a known truth). The reference numbers come from the
same rows collapsed here by hand (pandas), statsmodels' OLS for the block model's residual mean
square, and scipy.stats.dunnett for the one-sided critical value on the same degrees of freedom.
"""
from __future__ import annotations

import math
import random
import shlex

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from conftest import load_rows

HEADER = ["solver", "version", "family", "group", "instance", "seed", "status", "pallets", "fill_pct"]
LAYOUT = """
[metrics.pallets]
sense = "min"
unit = "pallets"

[metrics.fill_pct]
sense = "max"
unit = "%"
"""


def make_runs(effects: dict, groups: int = 7, instances: int = 2, seeds: int = 3, sd: float = 0.3, seed: int = 1,
              fail: dict | None = None) -> list[dict]:
    """Invented runs of stacker on one family: pallets = level of the group + version effect +
    noise; fill_pct falls as pallets rise. `fail` maps a version to the share of its runs that time
    out (1.0: every run)."""
    rng = random.Random(seed)
    runs = []
    for version, effect in effects.items():
        for g in range(1, groups + 1):
            for i in range(1, instances + 1):
                for s in range(1, seeds + 1):
                    bad = rng.random() < (fail or {}).get(version, 0.0)
                    pallets = 20 + 3 * g + 0.4 * i + effect + rng.gauss(0, sd)
                    runs.append(dict(solver="stacker", version=version, family="mixed-sku", group=f"g{g}",
                                     instance=f"i{i}", seed=s, status="timeout" if bad else "ok",
                                     pallets="" if bad else round(pallets, 5),
                                     fill_pct="" if bad else round(100 - pallets, 5)))
    return runs


def load(cli, tmp_path, runs, name="runs.csv", campaign="night1"):
    load_rows(cli, tmp_path, runs, HEADER, LAYOUT, name, campaign)


def collapsed(runs, metric="pallets") -> pd.DataFrame:
    """Treatments x blocks by hand: the successful runs' mean per instance, then per group."""
    df = pd.DataFrame(runs)
    df = df[df["status"] == "ok"].copy()
    df[metric] = df[metric].astype(float)
    df["treatment"] = "stacker@" + df["version"]
    per_instance = df.groupby(["treatment", "group", "instance"])[metric].mean().reset_index()
    return per_instance.groupby(["treatment", "group"])[metric].mean().unstack("group")


def verdicts(doc) -> dict:
    return {v["treatment"]: v["verdict"] for v in doc["verdicts"]}


def test_all_not_worse_exits_0(cli, tmp_path):
    load(cli, tmp_path, make_runs({"1.4": 0.0, "1.5": 0.0, "1.6": -0.5}))
    r = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "1", "--json")
    assert r.code == 0, r
    doc = r.json()
    assert verdicts(doc) == {"stacker@1.5": "not-worse", "stacker@1.6": "not-worse"}
    for v in doc["verdicts"]:
        assert {"treatment", "verdict", "difference", "bound", "more_blocks"} <= set(v)
        assert v["bound"] < 1 and v["more_blocks"] == 0
    assert doc["exit_status"] == 0 and doc["analysis_id"] is not None
    text = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "1")
    assert text.code == 0 and text.err == ""
    assert "not worse" in text.out and "verdict   2 not worse: exit status 0" in text.out


def test_a_worse_treatment_exits_3_and_says_so(cli, tmp_path):
    load(cli, tmp_path, make_runs({"1.4": 0.0, "1.5": 0.0, "1.6": 2.0}))
    r = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "0.5")
    assert r.code == 3, r
    assert "stacker@1.6" in r.err and "exit status 3" in r.err and r.err.count("\n") == 1
    doc = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "0.5", "--json")
    assert doc.code == 3
    got = {v["treatment"]: v for v in doc.json()["verdicts"]}
    assert got["stacker@1.6"]["verdict"] == "worse" and got["stacker@1.6"]["more_blocks"] == 0
    assert got["stacker@1.6"]["lower_bound"] > 0.5 and got["stacker@1.5"]["verdict"] == "not-worse"


def test_inconclusive_exits_4_with_an_estimate_of_the_blocks(cli, tmp_path):
    # 1.5 is worse by about the margin: three groups cannot tell
    load(cli, tmp_path, make_runs({"1.4": 0.0, "1.5": 0.5, "1.6": 0.0}, groups=4, sd=0.6, seed=4))
    r = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "0.5", "--json")
    assert r.code == 4, r
    got = {v["treatment"]: v for v in r.json()["verdicts"]}
    v = got["stacker@1.5"]
    assert v["verdict"] == "inconclusive" and v["lower_bound"] <= 0.5 <= v["bound"]
    assert isinstance(v["more_blocks"], int) and v["more_blocks"] > 0
    assert "estimate" in r.json()["more_blocks_basis"]
    text = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "0.5")
    assert text.code == 4 and "not settled against stacker@1.4: stacker@1.5" in text.err
    assert f"about {v['more_blocks']}" in text.out


def test_the_bound_agrees_with_an_independent_dunnett_from_the_raw_runs(cli, tmp_path):
    # 3 treatments x 7 blocks: residual df (3-1)(7-1) = 12, the df of a one-way design of 3 groups
    # of 5, on which scipy.stats.dunnett gives the one-sided critical value
    runs = make_runs({"1.4": 0.0, "1.5": 0.3, "1.6": -0.2}, groups=7, sd=0.5, seed=7)
    load(cli, tmp_path, runs)
    doc = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "0.4", "--json").json()
    wide = collapsed(runs)
    obs = wide.stack().rename("value").reset_index()
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    aov = anova_lm(smf.ols("value ~ C(treatment) + C(group)", data=obs).fit())  # statsmodels
    mse = float(aov.loc["Residual", "mean_sq"])
    assert doc["residual_df"] == 12 and doc["residual_ms"] == pytest.approx(mse, rel=1e-6)
    rng = np.random.default_rng(3)
    groups = [rng.normal(0, 1, 5) for _ in range(3)]
    ref = stats.dunnett(groups[1], groups[2], control=groups[0], alternative="greater",
                        rng=np.random.default_rng(9))  # scipy.stats.dunnett, one-sided
    pooled = np.mean([np.var(g, ddof=1) for g in groups])
    diff = np.array([groups[1].mean(), groups[2].mean()]) - groups[0].mean()
    c = float(((diff - ref.confidence_interval(0.95).low) / math.sqrt(2 * pooled / 5))[0])
    assert doc["critical_value"] == pytest.approx(c, abs=3e-3)
    for v in doc["verdicts"]:
        d = wide.loc[v["treatment"]].mean() - wide.loc["stacker@1.4"].mean()
        assert v["difference"] == pytest.approx(d, rel=1e-6)
        assert v["bound"] == pytest.approx(d + c * math.sqrt(2 * mse / 7), abs=5e-3)


def test_the_margin_in_percent_is_of_the_baseline_mean_on_common_blocks(cli, tmp_path):
    runs = make_runs({"1.4": 0.0, "1.5": 0.6, "1.6": 0.0}, groups=6, sd=0.2, seed=2)
    # 1.6 misses group g6: that block is dropped, and the baseline's mean is taken without it
    runs = [r for r in runs if not (r["version"] == "1.6" and r["group"] == "g6")]
    load(cli, tmp_path, runs)
    wide = collapsed(runs)
    base = wide.loc["stacker@1.4", ["g1", "g2", "g3", "g4", "g5"]].mean()
    doc = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "4%", "--json").json()
    assert doc["blocks"] == 5 and doc["margin"] == "4%"
    assert doc["margin_units"] == pytest.approx(0.04 * base, rel=1e-9)
    same = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", str(float(0.04 * base)), "--json").json()
    assert verdicts(same) == verdicts(doc)
    assert [v["bound"] for v in same["verdicts"]] == pytest.approx([v["bound"] for v in doc["verdicts"]])
    # about 1 pallet (4 % of about 27): 0.6 worse is inside; 1 % (about 0.27) is not
    assert verdicts(doc)["stacker@1.5"] == "not-worse"
    tight = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "1%", "--json")
    assert tight.code == 3 and verdicts(tight.json())["stacker@1.5"] == "worse"
    text = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "4%").out
    assert f"{0.04 * base:.4g} pallets (4% of the baseline's mean" in text


def test_a_metric_where_higher_is_better_reads_the_other_way(cli, tmp_path):
    # fill_pct = 100 - pallets: 1.6 has more pallets, so a lower (worse) fill
    load(cli, tmp_path, make_runs({"1.4": 0.0, "1.5": -1.0, "1.6": 1.5}))
    r = cli("guard", "stacker@1.4", "--metric", "fill_pct", "--margin", "0.5", "--json")
    assert r.code == 3
    doc = r.json()
    assert doc["worse_direction"] == "lower"
    got = {v["treatment"]: v for v in doc["verdicts"]}
    assert got["stacker@1.6"]["verdict"] == "worse" and got["stacker@1.6"]["difference"] < 0
    assert got["stacker@1.6"]["worse_by"] == pytest.approx(-got["stacker@1.6"]["difference"])
    assert got["stacker@1.5"]["verdict"] == "not-worse" and got["stacker@1.5"]["difference"] > 0


def test_failing_more_often_is_worse_whatever_the_values(cli, tmp_path):
    # 1.5 has the baseline's values where it succeeds, but times out on 70 % of its runs
    runs = make_runs({"1.4": 0.0, "1.5": 0.0, "1.6": 0.0}, groups=10, fail={"1.5": 0.7}, seed=5)
    load(cli, tmp_path, runs)
    r = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "1", "--json")
    assert r.code == 3, r
    doc = r.json()
    got = {v["treatment"]: v for v in doc["verdicts"]}
    v = got["stacker@1.5"]
    assert v["verdict"] == "worse" and v["on_failures"] == "fails more" and v["on_values"] != "worse"
    assert "fails more often than the baseline" in v["reason"] and "whatever its values" in v["reason"]
    assert got["stacker@1.6"]["verdict"] == "not-worse"
    follow = {f["treatment"]: f for f in doc["failures"]["follow_ups"]}
    assert follow["stacker@1.5"]["p_adjusted"] < 0.05
    text = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "1").out
    assert "stacker@1.5: fails more often than the baseline" in text
    assert "failures  on the" in text  # the failures table is shown


def test_a_treatment_that_fails_every_run_is_worse(cli, tmp_path):
    runs = make_runs({"1.4": 0.0, "1.5": 0.0, "1.6": 0.0}, groups=8, fail={"1.6": 1.0})
    load(cli, tmp_path, runs)
    r = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "1", "--json")
    assert r.code == 3, r
    got = {v["treatment"]: v for v in r.json()["verdicts"]}
    assert got["stacker@1.6"]["verdict"] == "worse" and got["stacker@1.6"]["difference"] is None
    assert got["stacker@1.5"]["verdict"] == "not-worse"


def test_markdown_summary_and_the_command_that_reproduces_it(cli, tmp_path):
    load(cli, tmp_path, make_runs({"1.4": 0.0, "1.5": 0.0, "1.6": 2.0}))
    md = tmp_path / "guard.md"
    r = cli("guard", "stacker@1.4", "--slice", "family=mixed-sku", "--metric", "pallets", "--margin", "3%",
            "--failures", "worst", "--markdown", str(md))
    assert r.code == 3
    text = md.read_text()
    assert text.startswith("## guard: a treatment is worse than stacker@1.4 on pallets")
    assert "| stacker@1.6 | worse |" in text and "| stacker@1.5 | not worse |" in text
    assert "Cautions:" in text
    command = text.split("```\n")[1].strip()
    words = shlex.split(command)
    assert words[:3] == ["blockyard", "guard", "stacker@1.4"]
    assert "--failures" in words and "worst" in words and "3%" in words
    assert words[words.index("-w") + 1]  # the warehouse it ran on (this test's own)
    del words[words.index("-w"):words.index("-w") + 2]
    # the command gives the same verdicts again
    again = cli(*words[1:], "--json")
    assert again.code == 3
    first = cli("guard", "stacker@1.4", "--slice", "family=mixed-sku", "--metric", "pallets", "--margin", "3%",
                "--failures", "worst", "--json").json()
    assert verdicts(again.json()) == verdicts(first)
    bad = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "1", "--markdown",
              str(tmp_path / "no-such-folder" / "x.md"))
    assert bad.code == 2 and bad.err.startswith("blockyard: --markdown") and bad.err.count("\n") == 1


def test_kept_in_the_ledger_and_rechecked(cli, tmp_path):
    load(cli, tmp_path, make_runs({"1.4": 0.0, "1.5": 0.0, "1.6": 2.0}))
    doc = cli("guard", "stacker@1.4", "--metric", "pallets", "--margin", "0.5", "--json").json()
    aid = doc["analysis_id"]
    got = cli("recall", str(aid), "--json").json()
    assert got["kind"] == "guard" and "stacker@1.6 worse" in got["headline"]
    assert cli("recall", "--solver", "stacker@1.6", "--json").code == 0
    rc = cli("recheck", str(aid), "--json").json()
    assert rc["status"] == "unchanged", rc
    # withdraw the worse treatment: the recheck says its verdict is gone
    assert cli("retract", "--slice", "version=1.6", "--reason", "a bad build").code == 0
    rc = cli("recheck", str(aid), "--json").json()
    assert rc["status"] == "conclusion-changed"
    assert any(c.startswith("stacker@1.6: was worse, now absent") for c in rc["changes"])
    assert cli("export", str(aid), "--to", str(tmp_path / "g.md")).code == 0
    assert "guard against the baseline" in (tmp_path / "g.md").read_text()


@pytest.mark.parametrize("argv, words", [
    (["--metric", "pallets"], "needs --margin"),
    (["--metric", "pallets", "--margin", "abc"], "--margin abc"),
    (["--metric", "pallets", "--margin", "-1"], "--margin -1"),
    (["--metric", "pallets", "--margin", "1", "--confidence", "1.2"], "--confidence"),
    (["--metric", "pallets", "--margin", "1", "--holes", "keep"], "common blocks only"),
])
def test_mistakes_are_one_line_and_exit_2(cli, tmp_path, argv, words):
    load(cli, tmp_path, make_runs({"1.4": 0.0, "1.5": 0.0}, groups=3))
    r = cli("guard", "stacker@1.4", *argv)
    assert r.code == 2 and words in r.err and r.err.count("\n") == 1, r


def test_a_baseline_not_in_the_slice_is_refused(cli, tmp_path):
    load(cli, tmp_path, make_runs({"1.4": 0.0, "1.5": 0.0}, groups=3))
    r = cli("guard", "stacker@1.3", "--metric", "pallets", "--margin", "1")
    assert r.code == 2 and "baseline stacker@1.3 is not in the slice" in r.err
    r = cli("guard", "stacker", "--metric", "pallets", "--margin", "1")
    assert r.code == 2 and "NAME@VERSION" in r.err


def test_help_names_the_exit_statuses(cli, capsys):
    r = cli("guard", "--help")
    said = " ".join((capsys.readouterr().out + r.out).split())
    assert r.code == 0
    assert "Exit status 0 when all are not-worse, 3 when any is worse, 4 when none is worse" in said
    assert "blockyard guard stacker@1.4" in said or "--margin" in said
