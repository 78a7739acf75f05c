"""Nothing changes what was analysed without a word in the text a person reads: notes of the
collapse, pooled campaigns and hosts, a baseline from another campaign, and a treatment's drift
against itself across campaigns (checked against scipy's paired t on the same block means)."""
from __future__ import annotations

import csv
import random

import pandas as pd
import pytest
from scipy import stats

HEADER = ["solver", "version", "family", "group", "instance", "seed", "status", "host", "pallets"]


def runs(version, shift, rng, host="rack-a", status="ok", groups=6):
    out = []
    for g in range(1, groups + 1):
        for inst in ("i1", "i2"):
            for seed in (1, 2):
                out.append(dict(solver="stacker", version=version, family="mixed-sku", group=f"g{g}",
                                instance=f"g{g}-{inst}", seed=seed, status=status, host=host,
                                pallets=round(30 + 2 * g + shift + rng.gauss(0, 0.4), 4)))
    return out


def load(cli, tmp_path, name, rows, campaign):
    path = tmp_path / name
    with open(path, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=HEADER)
        w.writeheader()
        w.writerows(rows)
    r = cli("load", str(path), "--campaign", campaign)
    assert r.code == 0, r
    return rows


@pytest.fixture
def two_weeks(cli, tmp_path):
    """Week 1: 1.0 and 2.0. Week 2 (every value 3 pallets higher: another machine load, say):
    2.0 again and 3.0. 2.0 ran in both weeks, so it measures the weeks' own difference."""
    rng = random.Random(11)
    wk1 = load(cli, tmp_path, "wk1.csv", runs("1.0", 0.0, rng) + runs("2.0", -1.0, rng), "wk1")
    wk2 = load(cli, tmp_path, "wk2.csv", runs("2.0", -1.0 + 3.0, rng, host="rack-b") + runs("3.0", -2.0 + 3.0, rng,
                                                                                             host="rack-b"), "wk2")
    return wk1, wk2


def block_means(rows, version):
    """Seeds -> mean per instance -> mean per block, by pandas, independently of the warehouse."""
    f = pd.DataFrame([r for r in rows if r["version"] == version])
    return f.groupby(["group", "instance"])["pallets"].mean().groupby("group").mean()


def test_drift_of_a_treatment_across_campaigns_matches_a_paired_t(two_weeks, cli):
    wk1, wk2 = two_weeks
    r = cli("versus", "stacker@1.0", "--slice", "stacker@1.0 campaign=wk1 | stacker@3.0 campaign=wk2",
            "--metric", "pallets", "--json")
    assert r.code == 0, r
    doc = r.json()
    assert len(doc["drift"]) == 0  # neither 1.0 nor 3.0 ran in both weeks
    r = cli("versus", "stacker@1.0", "--slice", "stacker@1.0 campaign=wk1 | solver=stacker campaign=wk2",
            "--metric", "pallets", "--json")
    doc = r.json()
    (drift,) = doc["drift"]
    assert drift["treatment"] == "stacker@2.0" and drift["campaigns"] == ["wk1", "wk2"]
    # reference: scipy's paired t interval on the block means computed by pandas from the files
    d = block_means(wk2, "2.0") - block_means(wk1, "2.0")
    ref = stats.ttest_rel(block_means(wk2, "2.0"), block_means(wk1, "2.0"))
    lo, hi = ref.confidence_interval(0.95)
    assert drift["blocks"] == 6
    assert drift["difference"] == pytest.approx(d.mean(), rel=1e-9)
    assert (drift["ci_low"], drift["ci_high"]) == (pytest.approx(lo, rel=1e-9), pytest.approx(hi, rel=1e-9))
    assert drift["p"] == pytest.approx(ref.pvalue, rel=1e-6)
    text = cli("versus", "stacker@1.0", "--slice", "stacker@1.0 campaign=wk1 | solver=stacker campaign=wk2",
               "--metric", "pallets").out
    assert "drift     stacker@2.0: wk2 against wk1 +3" in text
    assert "stacker@2.0 differs from itself between wk1 and wk2" in text
    assert "campaign is confounded with treatment" in text


def test_a_treatment_pooled_from_two_campaigns_and_hosts_is_named_with_counts(two_weeks, cli):
    text = cli("blocktest", "--slice", "solver=stacker", "--metric", "pallets").out
    assert "caution   stacker@2.0 pools runs from 2 campaigns: wk1 (24 runs), wk2 (24 runs)" in text
    assert "stacker@2.0 pools runs from 2 hosts: rack-a (24 runs), rack-b (24 runs)" in text
    assert "stacker@1.0 pools" not in text


def test_a_treatment_without_any_usable_value_is_named_in_the_text(two_weeks, cli, tmp_path):
    rng = random.Random(2)
    load(cli, tmp_path, "broken.csv", runs("9.9", 0.0, rng, status="failed"), "wk1b")
    for command in (["blocktest"], ["versus", "stacker@1.0"]):
        r = cli(*command, "--slice", "campaign=wk1,wk1b", "--metric", "pallets")
        assert r.code == 0, r
        assert "stacker@9.9 has runs in the slice but no usable pallets value" in r.out
        assert "24 failed runs dropped" in r.out


def test_versus_says_how_many_runs_it_used_of_the_slice(two_weeks, cli):
    text = cli("versus", "stacker@1.0", "--slice", "campaign=wk1", "--metric", "pallets").out
    assert "used      48 of 48 runs, 12 instances" in text


# --- pooling across periods (one campaign, runs finished weeks apart) ----------------------------

def _dated(rows, day):
    return [dict(r, finished_at=f"{day}T{10 + i % 8:02d}:00:00Z") for i, r in enumerate(rows)]


def _load_dated(cli, tmp_path, name, rows, campaign):
    path = tmp_path / name
    with open(path, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=HEADER + ["finished_at"])
        w.writeheader()
        w.writerows(rows)
    r = cli("load", str(path), "--campaign", campaign)
    assert r.code == 0, r


def test_a_treatment_whose_runs_span_weeks_in_one_campaign_is_said(cli, tmp_path):
    """Within one campaign, stacker@2.0's runs came in twice, 27 days apart: its result pools the
    two periods. (The two-week threshold is common practice for a benchmark machine's drift.)"""
    rng = random.Random(5)
    _load_dated(cli, tmp_path, "a.csv", _dated(runs("1.0", 0, rng) + runs("2.0", -1, rng, groups=3), "2026-10-01"),
                "autumn")
    _load_dated(cli, tmp_path, "b.csv", _dated([r for r in runs("2.0", -1, rng) if int(r["group"][1:]) > 3],
                                               "2026-10-28"), "autumn")
    text = cli("versus", "stacker@1.0", "--slice", "campaign=autumn", "--metric", "pallets").out
    assert ("caution   stacker@2.0 pools runs finished over 27 days (2026-10-01 to 2026-10-28, 2 imports)" in text
            or "caution   stacker@2.0 pools runs finished over 28 days (2026-10-01 to 2026-10-28, 2 imports)" in text), text
    assert "stacker@1.0 pools runs finished" not in text


def test_a_baseline_from_another_period_of_the_same_campaign_is_said(cli, tmp_path):
    rng = random.Random(6)
    _load_dated(cli, tmp_path, "a.csv", _dated(runs("1.0", 0, rng), "2026-10-01"), "autumn")
    _load_dated(cli, tmp_path, "b.csv", _dated(runs("2.0", -1, rng), "2026-10-09"), "autumn")
    text = cli("versus", "stacker@1.0", "--slice", "campaign=autumn", "--metric", "pallets").out
    assert ("the baseline stacker@1.0's runs finished 2026-10-01 to 2026-10-01 and the others' 2026-10-09 to "
            "2026-10-09: the period is confounded with treatment") in text, text
    # the same two treatments run on the same day: nothing to say
    _load_dated(cli, tmp_path, "c.csv", _dated(runs("1.0", 0, rng) + runs("2.0", -1, rng), "2026-11-02"), "winter")
    text = cli("versus", "stacker@1.0", "--slice", "campaign=winter", "--metric", "pallets").out
    assert "period is confounded" not in text and "pools runs finished" not in text
