"""Collapse: replicates to instances, instances to blocks, failures and holes by declared policy.

Every expected value below is hand arithmetic on the inline data (shown beside it), or
scipy.stats.trim_mean on the same numbers.
"""
from __future__ import annotations

import csv

import pytest
from scipy.stats import trim_mean

from warehouse.collapse.observations import collapse, parse_settings
from warehouse.errors import InputError
from warehouse.select.slices import parse
from warehouse.collapse.settings import Collapse


def write_runs(path, runs: list[dict]) -> str:
    cols = []
    for r in runs:
        cols += [k for k in r if k not in cols]
    with open(path, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=cols)
        w.writeheader()
        w.writerows(runs)
    return str(path)


def load(cli, tmp_path, name: str, runs: list[dict], campaign: str = "c1"):
    r = cli("load", write_runs(tmp_path / name, runs), "--campaign", campaign)
    assert r.code == 0, r
    return r


def seeds(solver, group, instance, values, metric="pallets", version="1", **extra) -> list[dict]:
    return [dict(solver=solver, version=version, family="f", group=group, instance=instance, seed=s + 1,
                 **{metric: v}, **extra) for s, v in enumerate(values)]


def observe(wh, slice_text="", metric="pallets", **settings):
    with wh.engine.connect() as conn:
        return collapse(conn, parse(slice_text), metric, Collapse(**settings))


def values(c) -> dict:
    return {(r.treatment, r.block): float(r.value) for r in c.obs.itertuples()}


# --- replicate statistics ------------------------------------------------------------------------

REPLICATED = {
    ("A", "g1", "i1"): [1, 2, 3, 4, 100],     # mean 22, median 3
    ("A", "g1", "i2"): [10, 10, 11, 13, 16],  # mean 12, median 11
    ("A", "g2", "i1"): [5, 6, 7, 8, 9],       # mean 7, median 7
    ("A", "g2", "i2"): [2, 4, 6, 8, 30],      # mean 10, median 6
    ("B", "g1", "i1"): [0, 1, 1, 1, 2],       # mean 1, median 1
    ("B", "g1", "i2"): [3, 3, 3, 3, 3],       # mean 3, median 3
    ("B", "g2", "i1"): [10, 20, 30, 40, 50],  # mean 30, median 30
    ("B", "g2", "i2"): [1, 2, 3, 4, 5],       # mean 3, median 3
}


@pytest.fixture
def replicated(cli, tmp_path):
    runs = []
    for (s, g, i), vals in REPLICATED.items():
        runs += seeds(s, g, i, vals)
    load(cli, tmp_path, "rep.csv", runs)


def test_mean_of_replicates_then_mean_of_instances(replicated, wh):
    c = observe(wh)
    # A g1 = (22 + 12) / 2 = 17; A g2 = (7 + 10) / 2 = 8.5; B g1 = (1 + 3) / 2 = 2; B g2 = (30 + 3) / 2 = 16.5
    assert values(c) == pytest.approx({("A@1", "f/g1"): 17.0, ("A@1", "f/g2"): 8.5,
                                       ("B@1", "f/g1"): 2.0, ("B@1", "f/g2"): 16.5})
    assert c.treatments == ["A@1", "B@1"] and c.blocks == ["f/g1", "f/g2"]
    # one observation per treatment and block; the runs behind each are counted (common practice)
    assert len(c.obs) == 4
    assert set(c.obs["instances"]) == {2} and set(c.obs["runs"]) == {10}
    assert c.runs_in_slice == c.runs_used == 40
    assert c.instances_used == 4
    assert c.dropped_blocks == [] and c.complete


def test_median_of_replicates(replicated, wh):
    c = observe(wh, replicates="median")
    # A g1 = (3 + 11) / 2 = 7; A g2 = (7 + 6) / 2 = 6.5; B g1 = (1 + 3) / 2 = 2; B g2 = (30 + 3) / 2 = 16.5
    assert values(c) == pytest.approx({("A@1", "f/g1"): 7.0, ("A@1", "f/g2"): 6.5,
                                       ("B@1", "f/g1"): 2.0, ("B@1", "f/g2"): 16.5})


def test_trimmed_mean_of_replicates_agrees_with_scipy(replicated, wh):
    c = observe(wh, replicates="trimmed:0.2")
    expected = {}
    for t in ("A", "B"):
        for g in ("g1", "g2"):
            per_instance = [trim_mean(REPLICATED[(t, g, i)], 0.2) for i in ("i1", "i2")]  # scipy.stats.trim_mean
            expected[(f"{t}@1", f"f/{g}")] = sum(per_instance) / 2
    assert values(c) == pytest.approx(expected)
    # by hand for one cell: A g1 i1 trims 1 and 100 -> (2+3+4)/3 = 3; i2 trims 10 and 16 -> 34/3
    assert expected[("A@1", "f/g1")] == pytest.approx((3 + 34 / 3) / 2)
    assert c.settings["replicates"] == "trimmed" and c.settings["trim"] == 0.2


def test_median_of_instances(cli, tmp_path, wh):
    runs = []
    for inst, (a, b) in {"i1": (1.0, 2.0), "i2": (2.0, 2.5), "i3": (9.0, 3.0)}.items():
        runs += seeds("A", "g1", inst, [a]) + seeds("B", "g1", inst, [b])
        runs += seeds("A", "g2", inst, [a + 1]) + seeds("B", "g2", inst, [b + 1])
    load(cli, tmp_path, "inst.csv", runs)
    c = observe(wh, instances="median")
    # medians over instances: A g1 of 1, 2, 9 is 2; B g1 of 2, 2.5, 3 is 2.5; g2 one more each
    assert values(c) == pytest.approx({("A@1", "f/g1"): 2.0, ("B@1", "f/g1"): 2.5,
                                       ("A@1", "f/g2"): 3.0, ("B@1", "f/g2"): 3.5})
    c = observe(wh)
    # means: A g1 = 12 / 3 = 4; B g1 = 7.5 / 3 = 2.5
    assert values(c)[("A@1", "f/g1")] == pytest.approx(4.0)
    assert values(c)[("B@1", "f/g1")] == pytest.approx(2.5)


@pytest.mark.parametrize("bad", [
    dict(replicates="trimmed:0.5"), dict(replicates="trimmed:x"), dict(replicates="mode"),
    dict(instances="max"), dict(failures="penalize:-1"), dict(failures="penalize:x"), dict(failures="ignore"),
    dict(holes="fill"),
])
def test_bad_settings_are_input_errors(bad):
    with pytest.raises(InputError):
        parse_settings(Collapse(**bad))


# --- failed runs ---------------------------------------------------------------------------------

def _failure_runs() -> list[dict]:
    def run(solver, inst, seed, status, value):
        return dict(solver=solver, version="1", family="f", group="g1", instance=inst, seed=seed,
                    status=status, seconds="" if value is None else value)
    return [
        # instance i1: A has two successes, a timeout that recorded 60 s, and a crash with no value
        run("A", "i1", 1, "ok", 10), run("A", "i1", 2, "ok", 20),
        run("A", "i1", 3, "timeout", 60), run("A", "i1", 4, "failed", None),
        run("B", "i1", 1, "ok", 30), run("B", "i1", 2, "ok", 40), run("B", "i1", 3, "ok", 50), run("B", "i1", 4, "ok", 80),
        # instance i2: A never succeeds (two timeouts at 60 s), B does
        run("A", "i2", 1, "timeout", 60), run("A", "i2", 2, "timeout", 60),
        run("B", "i2", 1, "ok", 5), run("B", "i2", 2, "ok", 7),
    ]


@pytest.fixture
def failures(cli, tmp_path):
    load(cli, tmp_path, "fail.csv", _failure_runs())


def test_drop_policy_leaves_failed_runs_out_and_says_how_many(failures, wh):
    c = observe(wh, metric="seconds")
    # A i1 = (10 + 20) / 2 = 15; A i2 has no success, so i2 leaves the block for both treatments;
    # B i1 = (30 + 40 + 50 + 80) / 4 = 50
    assert values(c) == pytest.approx({("A@1", "f/g1"): 15.0, ("B@1", "f/g1"): 50.0})
    assert "4 failed runs dropped" in c.notes
    assert "1 cells (treatment x instance) had no successful run and are missing" in c.notes
    assert any(n.startswith("1 instances left out") for n in c.notes)
    assert c.runs_in_slice == 12
    assert c.runs_used == 6  # the successes on i1: 2 of A and 4 of B


def test_peek_counts_the_failed_runs_by_status(failures, cli):
    doc = cli("peek", "--metric", "seconds", "--json").json()
    assert doc["failures"] == {"timeout": 3, "failed": 1, "infeasible": 0}
    cell = next(c for c in doc["cells"] if c["treatment"] == "A@1")
    assert cell["runs"] == 6 and cell["failed"] == 4 and cell["timeouts"] == 3 and cell["crashes"] == 1
    text = cli("peek", "--metric", "seconds").out
    assert "6!" in text  # the cell with failures is marked


def test_penalize_policy_counts_failures_at_a_factor_of_their_value(failures, wh):
    c = observe(wh, metric="seconds", failures="penalize:10")
    # A i1 = (10 + 20 + 10*60 + 10*80) / 4 = 357.5, the crash without a value counted at 10 x the
    #        slice's largest value (80); A i2 = (10*60 + 10*60) / 2 = 600; A g1 = (357.5 + 600) / 2
    # B i1 = 50, B i2 = (5 + 7) / 2 = 6; B g1 = 28
    assert values(c) == pytest.approx({("A@1", "f/g1"): 478.75, ("B@1", "f/g1"): 28.0})
    note = next(n for n in c.notes if "failed runs counted at 10" in n)
    assert note.startswith("4 failed runs") and note.endswith("in 2 cells")
    assert c.runs_used == 12
    assert c.settings["failures"] == "penalize" and c.settings["penalty"] == 10


def test_worst_policy_counts_failures_at_the_worst_value_on_their_instance(failures, wh):
    c = observe(wh, metric="seconds", failures="worst")
    # worst (largest, fewer seconds are better) success on i1 is 80, on i2 is 7
    # A i1 = (10 + 20 + 80 + 80) / 4 = 47.5; A i2 = (7 + 7) / 2 = 7; A g1 = 27.25; B g1 = (50 + 6) / 2 = 28
    assert values(c) == pytest.approx({("A@1", "f/g1"): 27.25, ("B@1", "f/g1"): 28.0})
    assert "4 failed runs counted at the worst value seen on their instance, in 2 cells" in c.notes
    assert c.runs_used == 12


@pytest.mark.parametrize("policy, a, b", [
    # medians: A i1 of 10, 20, 600, 800 is 310, A i2 is 600 -> 455; B i1 median of 30..80 is 45, B i2 is 6 -> 25.5
    ("penalize:10", 455.0, 25.5),
    # medians: A i1 of 10, 20, 80, 80 is 50, A i2 is 7 -> 28.5; B as above
    ("worst", 28.5, 25.5),
    # medians of successes: A i1 = 15; i2 leaves the block; B i1 = 45
    ("drop", 15.0, 45.0),
])
def test_failure_policies_apply_under_the_median_too(failures, wh, policy, a, b):
    c = observe(wh, metric="seconds", replicates="median", failures=policy)
    assert values(c) == pytest.approx({("A@1", "f/g1"): a, ("B@1", "f/g1"): b})


def test_penalize_is_refused_where_higher_is_better(cli, tmp_path, wh):
    layout = tmp_path / "fill.toml"
    layout.write_text('[metrics.fill_pct]\nsense = "max"\nunit = "%"\n')
    runs = seeds("A", "g1", "i1", [80, 90], metric="fill_pct") + seeds("B", "g1", "i1", [70, 75], metric="fill_pct")
    r = cli("load", write_runs(tmp_path / "fill.csv", runs), "--campaign", "c", "--layout", str(layout))
    assert r.code == 0, r
    from warehouse.errors import DesignError

    with pytest.raises(DesignError, match="lower is better"):
        observe(wh, metric="fill_pct", failures="penalize:10")


# --- holes and instances not shared -----------------------------------------------------------

@pytest.fixture
def holes(cli, tmp_path):
    runs = (seeds("A", "g1", "i1", [1, 3]) + seeds("B", "g1", "i1", [5, 7])
            + seeds("A", "g2", "i1", [10, 12])  # g2: no B at all (a hole)
            + seeds("A", "g3", "i1", [2]) + seeds("B", "g3", "i1", [4]))
    load(cli, tmp_path, "holes.csv", runs)


def test_holes_drop_removes_the_block_and_says_which(holes, wh):
    c = observe(wh)
    assert c.blocks == ["f/g1", "f/g3"]
    assert c.dropped_blocks == [{"block": "f/g2", "missing": ["B@1"]}]
    # A g1 = (1 + 3) / 2 = 2; B g1 = 6; A g3 = 2; B g3 = 4
    assert values(c) == pytest.approx({("A@1", "f/g1"): 2.0, ("B@1", "f/g1"): 6.0,
                                       ("A@1", "f/g3"): 2.0, ("B@1", "f/g3"): 4.0})
    assert c.runs_used == 6 and c.runs_in_slice == 8
    assert c.complete


def test_holes_keep_leaves_the_incomplete_block_in(holes, wh):
    c = observe(wh, holes="keep")
    assert c.blocks == ["f/g1", "f/g2", "f/g3"]
    assert c.dropped_blocks == [{"block": "f/g2", "missing": ["B@1"]}]  # still reported
    assert values(c)[("A@1", "f/g2")] == pytest.approx(11.0)  # (10 + 12) / 2
    assert ("B@1", "f/g2") not in values(c)
    assert not c.complete


def test_peek_reports_the_hole(holes, cli):
    r = cli("peek", "--metric", "pallets", "--json")
    assert r.code == 0, r
    doc = r.json()
    assert doc["holes"] == [{"block": "f/g2", "missing": ["B@1"]}]
    assert {(c["treatment"], c["block"]): c["runs"] for c in doc["cells"]} == {
        ("A@1", "f/g1"): 2, ("B@1", "f/g1"): 2, ("A@1", "f/g2"): 2, ("A@1", "f/g3"): 1, ("B@1", "f/g3"): 1}


def test_instances_not_common_to_every_treatment_in_a_block_are_left_out(cli, tmp_path, wh):
    runs = (seeds("A", "g1", "i1", [1, 3]) + seeds("A", "g1", "i2", [100, 100])  # only A ran i2
            + seeds("B", "g1", "i1", [2, 2])
            + seeds("A", "g2", "i1", [4]) + seeds("B", "g2", "i1", [6]))
    load(cli, tmp_path, "common.csv", runs)
    c = observe(wh)
    # A g1 stands on i1 alone: (1 + 3) / 2 = 2, not (2 + 100) / 2
    assert values(c) == pytest.approx({("A@1", "f/g1"): 2.0, ("B@1", "f/g1"): 2.0,
                                       ("A@1", "f/g2"): 4.0, ("B@1", "f/g2"): 6.0})
    assert "1 instances left out because not every treatment in their block has a value on them" in c.notes
    assert c.instances_used == 2
    assert set(c.cells["instance"]) == {"i1"}
    assert c.runs_used == 6  # the two runs of A on i2 are not used


# --- retracted runs -----------------------------------------------------------------------------

def test_retracted_runs_leave_slices_unless_asked_for(replicated, cli, wh):
    r = cli("retract", "--slice", "solver=A seed=5", "--reason", "seed 5 mis-configured", "--json")
    assert r.code == 0, r
    assert r.json()["runs_retracted"] == 4
    c = observe(wh)
    assert c.runs_in_slice == 36
    # A g1 without seed 5: i1 = (1+2+3+4)/4 = 2.5, i2 = (10+10+11+13)/4 = 11 -> 6.75
    assert values(c)[("A@1", "f/g1")] == pytest.approx(6.75)
    assert values(c)[("B@1", "f/g1")] == pytest.approx(2.0)  # B untouched
    # retracted=yes brings exactly the withdrawn runs back in, retracted=any brings all
    only = observe(wh, "retracted=yes", holes="keep")
    assert only.runs_in_slice == 4 and only.treatments == ["A@1"]
    # the retracted seed-5 values: A g1 = (100 + 16) / 2 = 58
    assert values(only)[("A@1", "f/g1")] == pytest.approx(58.0)
    assert observe(wh, "retracted=any").runs_in_slice == 40
    # per arm: the baseline with its withdrawn runs, the other without
    mixed = observe(wh, "solver=A retracted=any | solver=B")
    assert mixed.runs_in_slice == 40
    assert values(mixed)[("A@1", "f/g1")] == pytest.approx(17.0)


# --- treatments that share a name and version ---------------------------------------------------

def test_parameter_sets_and_builds_of_one_version_stay_separate_treatments(cli, tmp_path, wh):
    runs = []
    for g in ("g1", "g2"):
        runs += seeds("A", g, "i1", [1, 3], params="fast") + seeds("A", g, "i1", [11, 13], params="slow")
        runs += seeds("A", g, "i1", [5, 5], build="b7") + seeds("A", g, "i1", [7, 7], build="b8")
    load(cli, tmp_path, "params.csv", runs)
    c = observe(wh)
    assert c.treatments == ["A@1+b7", "A@1+b8", "A@1[fast]", "A@1[slow]"]
    # fast = (1 + 3) / 2 = 2 and slow = (11 + 13) / 2 = 12: never averaged together into 7
    assert values(c)[("A@1[fast]", "f/g1")] == pytest.approx(2.0)
    assert values(c)[("A@1[slow]", "f/g1")] == pytest.approx(12.0)
    assert values(c)[("A@1+b8", "f/g2")] == pytest.approx(7.0)
    r = cli("peek", "--json")
    assert r.code == 0, r
    assert r.json()["treatments"] == c.treatments
    assert cli("peek").code == 0
    # the labels read back as slices: each names just its own treatment; NAME@VERSION names them all
    assert observe(wh, "A@1[slow] | A@1+b7", holes="keep").treatments == ["A@1+b7", "A@1[slow]"]
    assert observe(wh, "A@1").treatments == c.treatments
