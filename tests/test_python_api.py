"""The Python API (`warehouse.open`): every method on a real warehouse (SQLite, or PostgreSQL with
BLOCKYARD_TEST_URL), DataFrames with their columns and dtypes, the same one-line errors as the
command line, and the numbers checked against an independent computation (pandas over the raw
runs; statsmodels' ANOVA on the observations)."""
from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest

import warehouse
from warehouse.errors import BlockyardError, DesignError, InputError

NOV = "stacker@1.4 campaign=oct-baseline | solver=stacker campaign=nov-tuning"


@pytest.fixture
def files(tmp_path):
    """The demo scenario's generated source files (invented data: the fixture, not the check)."""
    from warehouse.demo.scenario import generate

    generate(tmp_path)
    return tmp_path / "files"


@pytest.fixture
def yard(location, files):
    with warehouse.open(location) as y:
        y.load(files / "oct-baseline.csv", "oct-baseline", layout=files / "rack-a.toml")
        y.load(files / "nov-rack-a.csv", "nov-tuning", layout=files / "rack-a.toml")
        y.load([files / "nov-rack-b.jsonl", files / "nov-rack-b-extra.jsonl"], "nov-tuning",
               layout=files / "rack-b.toml")
        yield y


def test_open_resolves_like_the_command_line(monkeypatch, tmp_path):
    monkeypatch.setenv("BLOCKYARD_WAREHOUSE", str(tmp_path / "env.db"))
    assert warehouse.open().location == str(tmp_path / "env.db")
    assert warehouse.open(tmp_path / "given.db").location == str(tmp_path / "given.db")
    assert warehouse.__version__


def test_runs_is_one_tidy_row_per_run(yard, files):
    runs = yard.runs("campaign=oct-baseline", metric="pallets")
    raw = pd.read_csv(files / "oct-baseline.csv")
    assert len(runs) == len(raw)  # every row of the file, once
    assert list(runs.columns[:16]) == ["run_id", "campaign", "solver", "version", "treatment", "family", "group",
                                       "block", "instance", "seed", "replicate", "status", "host", "finished_at",
                                       "import_id", "source_line"]
    assert list(runs.columns[16:]) == ["pallets"]
    assert runs["run_id"].dtype == np.int64 and runs["seed"].dtype == np.int64
    assert isinstance(runs["treatment"].dtype, pd.CategoricalDtype)
    assert str(runs["finished_at"].dtype).startswith("datetime64") and runs["pallets"].dtype == np.float64
    assert set(runs["campaign"]) == {"oct-baseline"}
    every = yard.runs()
    assert {"pallets"} < set(every.columns) and len(every) > len(runs)  # every metric, every run


def test_observations_match_pandas_over_the_runs(yard):
    """Independent computation: mean over seeds per instance, then over instances per block,
    from the runs table (failed runs dropped, the default)."""
    obs = yard.observations("family=mixed-sku", "pallets")
    assert list(obs.columns[:3]) == ["treatment", "block", "value"]
    runs = yard.runs("family=mixed-sku", "pallets")
    ok = runs[runs["status"] == "ok"]
    per_instance = ok.groupby(["treatment", "block", "instance"], observed=True)["pallets"].mean()
    per_block = per_instance.groupby(["treatment", "block"], observed=True).mean().reset_index()
    merged = obs.merge(per_block, on=["treatment", "block"])
    assert len(merged) == len(obs)
    assert np.allclose(merged["value"], merged["pallets"], rtol=1e-12)
    assert obs.attrs["metric"] == "pallets"


def test_blocktest_agrees_with_statsmodels_and_is_kept(yard):
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    res = yard.blocktest("family=mixed-sku", "pallets")
    assert res.analysis_id is not None
    anova = res.table("anova").set_index("source")
    obs = yard.observations("family=mixed-sku", "pallets")
    ref = anova_lm(smf.ols("value ~ C(treatment) + C(block)", data=obs).fit())  # statsmodels, type I
    assert anova.loc["treatment", "f"] == pytest.approx(ref.loc["C(treatment)", "F"], rel=1e-9)
    assert anova.loc["treatment", "p"] == pytest.approx(ref.loc["C(treatment)", "PR(>F)"], rel=1e-6)
    assert "anova" in res.table_names() and set(res.tables()) == set(res.table_names())
    assert str(res) == res.render() and "source of variation" in res.render()


def test_versus_keep_recall_recheck(yard):
    res = yard.versus("stacker@1.4", NOV, "pallets")
    comps = res.table("comparisons")
    assert {"treatment", "diff"} <= set(comps.columns) and "stacker@1.4" not in set(comps["treatment"])
    html = res._repr_html_()
    assert "Read these first" in html and "campaign is confounded" in html  # cautions first
    kept = yard.keep("1.6 uses fewer pallets than 1.4", tags=["paper"])
    assert kept.to_dict()["analysis_id"] == res.analysis_id  # the last analysis, as in the shell
    found = yard.recall(tags=["paper"])
    assert list(found["analysis_id"]) == [res.analysis_id]
    assert {"kind", "state", "claims"} <= set(found.columns)
    assert yard.analysis(res.analysis_id).to_dict()["analysis_id"] == res.analysis_id
    assert yard.recheck(res.analysis_id).to_dict()["status"] == "unchanged"
    out = yard.retract("campaign=nov-tuning host=rack-b version=1.5", "build mis-counted pallets")
    assert res.analysis_id in out.to_dict()["stale_analyses"]
    assert yard.recheck(res.analysis_id).to_dict()["status"] != "unchanged"


def test_plan_inventory_verify_plot_export(yard, tmp_path):
    plan = yard.plan(effect=0.5, power=0.8)
    from statsmodels.stats.power import TTestPower

    # reference: statsmodels' one-sample (paired) t power solved for n at d = 0.5, 80 %, 5 % two-sided
    assert plan.to_dict()["blocks_needed"] == math.ceil(TTestPower().solve_power(0.5, power=0.8, alpha=0.05))
    assert yard.inventory().to_dict()["runs"] > 0
    assert yard.verify().ok
    bt = yard.blocktest("family=mixed-sku", "pallets")
    fig = yard.plot("profile", analysis=bt.analysis_id)
    import matplotlib.figure

    assert isinstance(fig, matplotlib.figure.Figure)
    fig2 = yard.plot("qq", "family=mixed-sku", "pallets", to=tmp_path / "qq.png")
    assert (tmp_path / "qq.png").stat().st_size > 0 and isinstance(fig2, matplotlib.figure.Figure)
    rep = yard.export(bt.analysis_id, tmp_path / "r.html")
    assert (tmp_path / "r.html").read_text().startswith("<!DOCTYPE html>") and rep.to_dict()


def test_errors_are_the_command_lines_one_liners(yard, cli, files):
    with pytest.raises(InputError, match="no option trasform .did you mean transform"):
        yard.blocktest("family=mixed-sku", "pallets", trasform="log")
    with pytest.raises(DesignError) as caught:
        yard.versus("stacker@9", "family=mixed-sku", "pallets")
    r = cli("versus", "stacker@9", "--slice", "family=mixed-sku", "--metric", "pallets")
    assert r.code == 2 and r.err.strip() == f"blockyard: {caught.value}"
    with pytest.raises(InputError, match="no metric 'palets'.*did you mean pallets"):
        yard.runs(metric="palets")
    again = yard.load(files / "oct-baseline.csv", "oct-baseline", layout=files / "rack-a.toml")
    assert [i["status"] for i in again.to_dict()["imports"]] == ["duplicate"]  # loaded before: nothing to do
    with pytest.raises(BlockyardError, match="no-such.csv"):  # refused: the file is named, nothing stored
        yard.load(files / "no-such.csv", "oct-baseline", layout=files / "rack-a.toml")
    with pytest.raises(InputError, match="plot nonsense: choose one of"):
        yard.plot("nonsense", "family=mixed-sku", "pallets")
    with pytest.raises(InputError, match="no table 'nope' in this result; it has: anova"):
        yard.blocktest("family=mixed-sku", "pallets").table("nope")
    with pytest.raises(InputError, match="this result holds no table"):
        yard.plan(effect=0.5).table()


def test_the_command_line_and_the_object_give_the_same_document(yard, cli):
    a = yard.versus("stacker@1.4", NOV, "pallets").to_dict()
    b = cli("versus", "stacker@1.4", "--slice", NOV, "--metric", "pallets", "--json").json()
    for doc in (a, b):
        doc.pop("analysis_id")
    assert json.loads(json.dumps(a, default=str)) == json.loads(json.dumps(b, default=str))


def test_it_closes_and_reopens(location, files):
    y = warehouse.open(location)
    assert y.inventory().to_dict()["runs"] == 0
    y.close()
    assert y.inventory().to_dict()["runs"] == 0  # reopens on use
    y.close()


def test_init_peek_and_upgrade(wh_location, files):
    """A new warehouse made from Python, its coverage, and an upgrade that has nothing to do."""
    with warehouse.open(wh_location) as y:
        y.init()
        y.load(files / "oct-baseline.csv", "oct-baseline", layout=files / "rack-a.toml")
        cov = y.peek("family=mixed-sku", "pallets")
        assert cov.to_dict() and "mixed-sku" in str(cov)
        assert y.upgrade().render()
        with pytest.raises(InputError, match="unknown collapse option replicate"):
            y.observations("family=mixed-sku", "pallets", replicate="median")
        med = y.observations("family=mixed-sku", "pallets", replicates="median")
        mean = y.observations("family=mixed-sku", "pallets")
        assert len(med) == len(mean) and not np.allclose(med["value"], mean["value"])


def test_guard_from_python_gives_the_command_lines_verdicts(yard, cli):
    res = yard.guard("stacker@1.4", NOV, "pallets", margin="2%")
    doc = cli("guard", "stacker@1.4", "--slice", NOV, "--metric", "pallets", "--margin", "2%", "--json").json()
    assert [v["verdict"] for v in res.to_dict()["verdicts"]] == [v["verdict"] for v in doc["verdicts"]]
    assert res.exit_status in (0, 3, 4) and not res.table("verdicts").empty


def test_noise_and_its_plan_from_python(yard, cli):
    res = yard.noise("family=mixed-sku", "pallets")
    comps = res.table("components")
    assert list(comps["level"]) == ["group", "instance", "seed"]
    doc = cli("noise", "--slice", "family=mixed-sku", "--metric", "pallets", "--json").json()
    assert np.allclose(comps["variance"], [c["variance"] for c in doc["components"]])
    plan = yard.plan(noise=res.analysis_id, effect=1.0)
    assert set(plan.to_dict()["allocation"]) >= {"groups", "instances_per_group", "seeds_per_instance", "power",
                                                 "cpu_hours"}
