"""`blockyard noise` and `plan --noise / --budget-hours / --more` end to end: runs loaded through the
command line, the components checked against the statistics computed on the same runs by hand
(pandas) and by statsmodels MixedLM, the plan against the closed-form allocation, the ledger's
recheck and the report's figure."""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats

from conftest import load_rows

HEADER = ["solver", "version", "family", "group", "instance", "seed", "status", "pallets", "seconds"]
LAYOUT = """
[metrics.pallets]
sense = "min"
unit = "pallets"

[metrics.seconds]
sense = "min"
unit = "s"
"""


def make_runs(seed: int = 3, groups: int = 8, instances: int = 3, seeds: int = 4, versions=("1.4", "1.6"),
              fail: int = 0) -> list[dict]:
    """Simulated runs with known components (group 9, instance 1, seed 0.25; interactions 0.2 and
    0.1); every run takes 2 + version seconds. `fail` runs are timeouts without a value."""
    rng = np.random.default_rng(seed)
    rows = []
    for g in range(groups):
        G = rng.normal(0, 3)
        for i in range(instances):
            I = rng.normal(0, 1)
            for k, v in enumerate(versions):
                TG = rng.normal(0, math.sqrt(0.2))
                TI = rng.normal(0, math.sqrt(0.1))
                for s in range(seeds):
                    rows.append(dict(solver="stacker", version=v, family="mixed", group=f"g{g}", instance=f"i{i}",
                                     seed=s + 1, status="ok", pallets=round(40 + G + I + TG + TI - 0.5 * k
                                                                            + rng.normal(0, 0.5), 6),
                                     seconds=2.0 + k))
    for r in rows[:fail]:
        r["status"], r["pallets"] = "timeout", ""
    return rows


def by_hand(rows: list[dict]) -> dict:
    """The pooled nested ANOVA components, computed here from the raw rows with pandas."""
    df = pd.DataFrame(rows)
    df = df[df["status"] == "ok"].astype({"pallets": float})
    ss = {"group": 0.0, "instance": 0.0, "seed": 0.0}
    dfs = {"group": 0, "instance": 0, "seed": 0}
    for _, part in df.groupby("version"):
        cell = part.groupby(["group", "instance"])["pallets"].transform("mean")
        grp = part.groupby("group")["pallets"].transform("mean")
        g, n, r = part["group"].nunique(), part.groupby("group")["instance"].nunique().iloc[0], part.groupby(["group", "instance"]).size().iloc[0]
        ss["seed"] += ((part["pallets"] - cell) ** 2).sum()
        ss["instance"] += ((cell - grp) ** 2).sum()
        ss["group"] += ((grp - part["pallets"].mean()) ** 2).sum()
        dfs["group"] += g - 1
        dfs["instance"] += g * (n - 1)
        dfs["seed"] += g * n * (r - 1)
    ms = {k: ss[k] / dfs[k] for k in ss}
    return {"seed": ms["seed"], "instance": (ms["instance"] - ms["seed"]) / r,
            "group": (ms["group"] - ms["instance"]) / (n * r)}


def test_noise_balanced_matches_the_hand_computation_and_is_kept(cli, tmp_path):
    rows = make_runs()
    load_rows(cli, tmp_path, rows, HEADER, LAYOUT, "runs.csv", "nov")
    r = cli("noise", "--slice", "solver=stacker", "--metric", "pallets", "--json")
    assert r.code == 0, r
    doc = r.json()
    assert doc["method"] == "anova"
    comps = {c["level"]: c for c in doc["components"]}
    assert [c["level"] for c in doc["components"]] == ["group", "instance", "seed"]
    assert set(doc["components"][0]) == {"level", "variance", "share", "ci_low", "ci_high"}
    for level, value in by_hand(rows).items():
        assert comps[level]["variance"] == pytest.approx(max(value, 0.0), rel=1e-9), level
        assert comps[level]["ci_low"] <= comps[level]["variance"] <= comps[level]["ci_high"]
    assert sum(c["share"] for c in doc["components"]) == pytest.approx(1.0)
    assert [p["treatment"] for p in doc["per_treatment"]] == ["stacker@1.4", "stacker@1.6"]
    assert [c["level"] for c in doc["comparison_components"]["components"]] == [
        "treatment x group", "treatment x instance", "seed"]
    assert doc["run_seconds"] == pytest.approx(2.5) and doc["time_metric"] == "seconds"
    assert doc["analysis_id"] is not None
    # the text a person reads
    text = cli("noise", "--slice", "solver=stacker", "--metric", "pallets").out
    assert "pooled over the treatments" in text and "treatment x group" in text and "plan --noise" in text
    # kept like every analysis, and a recheck on the same runs finds nothing changed
    rc = cli("recheck", str(doc["analysis_id"]), "--json")
    assert rc.code == 0, rc
    assert rc.json()["status"] == "unchanged", rc.json()


def test_noise_unbalanced_uses_reml_like_statsmodels(cli, tmp_path):
    rows = make_runs(seed=9, fail=7)
    load_rows(cli, tmp_path, rows, HEADER, LAYOUT, "runs.csv", "nov")
    doc = cli("noise", "--slice", "solver=stacker", "--metric", "pallets", "--json").json()
    assert doc["method"] == "reml" and doc["runs_used"] == len(rows) - 7
    assert any("did not succeed" in n for n in doc["notes"])
    df = pd.DataFrame(rows)
    df = df[df["status"] == "ok"].astype({"pallets": float})
    df["tg"] = df["version"] + df["group"]
    df["ti"] = df["tg"] + df["instance"]
    # statsmodels MixedLM as the reference, fitted here on the raw rows
    fit = smf.mixedlm("pallets ~ C(version)", df, groups=df["tg"], re_formula="1",
                      vc_formula={"i": "0 + C(ti)"}).fit(reml=True)
    comps = {c["level"]: c["variance"] for c in doc["components"]}
    assert comps["group"] == pytest.approx(float(fit.cov_re.iloc[0, 0]), rel=1e-3)
    assert comps["instance"] == pytest.approx(float(fit.vcomp[0]), rel=1e-3)
    assert comps["seed"] == pytest.approx(float(fit.scale), rel=1e-3)


def test_plan_from_noise_power_and_budget(cli, tmp_path):
    load_rows(cli, tmp_path, make_runs(groups=10), HEADER, LAYOUT, "runs.csv", "nov")
    nid = cli("noise", "--slice", "solver=stacker", "--metric", "pallets", "--json").json()["analysis_id"]
    r = cli("plan", "--noise", str(nid), "--effect", "0.8", "--json")
    assert r.code == 0, r
    doc = r.json()
    a = doc["allocation"]
    assert set(a) == {"groups", "instances_per_group", "seeds_per_instance", "power", "cpu_hours"}
    assert a["power"] >= 0.8
    # only run time costs: one instance and one seed per group (the boundary), and it is said
    assert (a["instances_per_group"], a["seeds_per_instance"]) == (1, 1)
    assert any("only cost" in w for w in doc["warnings"])
    # cost = groups x n_i x n_s x treatments x mean run seconds (2.5 s, 2 treatments)
    assert a["cpu_hours"] == pytest.approx(a["groups"] * 2 * 2.5 / 3600)
    # a budget: the most power within it
    b = cli("plan", "--noise", str(nid), "--effect", "0.8", "--budget-hours", "0.01", "--max-groups", "10",
            "--json").json()
    assert b["allocation"]["cpu_hours"] <= 0.01 and b["allocation"]["groups"] <= 10
    text = cli("plan", "--noise", str(nid), "--effect", "0.8", "--max-groups", "10").out
    assert "the best few" in text and "around the allocation" in text and "treatment x group" in text
    # a plan on a noise analysis re-runs it on recheck
    rc = cli("recheck", str(doc["analysis_id"]), "--json")
    assert rc.code == 0 and rc.json()["status"] == "unchanged", rc.json()


def test_plan_more_on_a_versus(cli, tmp_path):
    load_rows(cli, tmp_path, make_runs(groups=6), HEADER, LAYOUT, "runs.csv", "nov")
    vid = cli("versus", "stacker@1.4", "--slice", "solver=stacker", "--metric", "pallets", "--json").json()["analysis_id"]
    r = cli("plan", "--more", str(vid), "--json")
    assert r.code == 0, r
    doc = r.json()
    assert doc["estimate"] is True and doc["blocks_held"] == 6
    (row,) = doc["more"]
    assert row["treatment"] == "stacker@1.6"
    cmp_ = cli("versus", "stacker@1.4", "--slice", "solver=stacker", "--metric", "pallets", "--json").json()
    (c,) = cmp_["comparisons"]
    z, crit = c["diff"] / c["se"], cmp_["critical_value"]
    assert row["z"] == pytest.approx(z)
    if c["p_adjusted"] < 0.05:
        assert row["more_blocks"] == 0 and row["state"] == "settled now"
    else:
        # conditional power at the current estimate (Lan and Wittes' B-value), written out here
        def cp(m):
            return stats.norm.cdf((abs(z) * math.sqrt((6 + m) / 6) - crit) / math.sqrt(m / (6 + m)))
        m = row["more_blocks"]
        assert cp(m) >= 0.8 > cp(m - 1)
    assert "estimate" in cli("plan", "--more", str(vid)).out


def test_mistakes_are_one_line(cli, tmp_path):
    load_rows(cli, tmp_path, make_runs(groups=4), HEADER, LAYOUT, "runs.csv", "nov")
    vid = cli("versus", "stacker@1.4", "--slice", "solver=stacker", "--metric", "pallets", "--json").json()["analysis_id"]
    for argv in (["plan", "--noise", str(vid), "--effect", "1"],  # not a noise analysis
                 ["plan", "--budget-hours", "3", "--effect", "0.5"],  # a budget needs --noise
                 ["noise", "--slice", "solver=stacker", "--metric", "pallets", "--method", "best"],
                 ["noise", "--slice", "solver=nobody", "--metric", "pallets"]):
        r = cli(*argv)
        assert r.code == 2, (argv, r)
        assert r.err.count("\n") == 1 and "Traceback" not in r.err, r.err


def test_the_report_of_a_noise_analysis_has_the_components_figure(cli, tmp_path):
    load_rows(cli, tmp_path, make_runs(), HEADER, LAYOUT, "runs.csv", "nov")
    nid = cli("noise", "--slice", "solver=stacker", "--metric", "pallets", "--json").json()["analysis_id"]
    out = tmp_path / "noise.html"
    r = cli("export", str(nid), "--to", str(out))
    assert r.code == 0, r
    html = out.read_text()
    assert "where the variance lies" in html and "data:image/png;base64" in html
