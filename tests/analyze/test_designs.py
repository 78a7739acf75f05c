"""Checks of warehouse.analyze.designs against published examples and reference libraries.

Each check names its source. Invented data appear only where the result is compared with a
reference library (scipy, statsmodels) on the same data.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from warehouse.analyze.anova import rcbd_anova
from warehouse.analyze.designs import generalized_anova, incomplete_anova
from warehouse.errors import DesignError

from .kit import GRAFT, generalized_data, invented_rcbd, sm_anova, tidy


# --------------------------------------------------------------------------- incomplete designs


# Montgomery, Design and Analysis of Experiments, BIBD catalyst example: 4 catalysts in
# 4 batches of raw material, 3 per batch (data from memory of the book).
CATALYST = [("1", "b1", 73), ("1", "b2", 74), ("1", "b4", 71), ("2", "b2", 75), ("2", "b3", 67), ("2", "b4", 72),
            ("3", "b1", 73), ("3", "b2", 75), ("3", "b3", 68), ("4", "b1", 75), ("4", "b3", 72), ("4", "b4", 75)]


def catalyst() -> pd.DataFrame:
    return pd.DataFrame(CATALYST, columns=["treatment", "block", "value"]).astype({"value": float})


def test_bibd_catalyst_example():
    res = incomplete_anova(catalyst())
    rows = {r["source"]: r for r in res.anova}
    # Montgomery, catalyst BIBD: SS_treatments(adjusted) 22.75, SS_blocks 55.00, SS_E 3.25,
    # F = 11.67, p = 0.0107 (from memory of the book)
    assert rows["treatment"]["ss"] == pytest.approx(22.75, abs=1e-9)
    assert rows["block"]["ss"] == pytest.approx(55.00, abs=1e-9)
    assert rows["residual"]["ss"] == pytest.approx(3.25, abs=1e-9)
    assert rows["treatment"]["f"] == pytest.approx(11.67, abs=0.005)
    assert rows["treatment"]["p"] == pytest.approx(0.0107, abs=5e-5)
    assert res.balance["bibd"] is True
    # Montgomery: a = b = 4, k = 3, r = 3, lambda = 2 (from memory of the book)
    assert (res.balance["block_size"], res.balance["replication"], res.balance["pair_lambda"]) == (3, 3, 2)
    assert res.balance["efficiency"] == pytest.approx(2 * 4 / (3 * 3))


def test_incomplete_least_squares_means_match_statsmodels():
    obs = catalyst()
    res = incomplete_anova(obs)
    import statsmodels.formula.api as smf

    # reference: statsmodels OLS predictions for every treatment in every block, averaged
    fit = smf.ols("value ~ C(block) + C(treatment)", data=obs).fit()
    grid = pd.DataFrame([(t, b) for t in ["1", "2", "3", "4"] for b in ["b1", "b2", "b3", "b4"]],
                        columns=["treatment", "block"])
    lsm = grid.assign(p=fit.predict(grid)).groupby("treatment")["p"].mean()
    ours = res.adjusted_means.set_index("treatment")["adjusted_mean"]
    np.testing.assert_allclose(ours.loc[lsm.index], lsm.to_numpy(), rtol=1e-10)
    # Montgomery's intrablock estimates tau_i = k Q_i / (lambda a): -9/8, -7/8, -4/8, 20/8 around
    # the grand mean 72.5 (from memory of the book)
    np.testing.assert_allclose(ours.to_numpy(), 72.5 + np.array([-9, -7, -4, 20]) / 8, atol=1e-9)


def test_unbalanced_incomplete_matches_statsmodels_sequential_ss():
    rng = np.random.default_rng(31)
    rows = []
    for j in range(9):
        present = rng.choice(5, size=rng.integers(2, 5), replace=False)
        for i in present:
            rows.append((f"t{i}", f"g{j}", 10 + i * 0.5 + j + rng.normal()))
    obs = pd.DataFrame(rows, columns=["treatment", "block", "value"])
    res = incomplete_anova(obs)
    # statsmodels anova_lm typ 1 with blocks entered first (reference library)
    ref = sm_anova(obs, "value ~ C(block) + C(treatment)")
    rows_ = {r["source"]: r for r in res.anova}
    assert rows_["block"]["ss"] == pytest.approx(ref.loc["C(block)", "sum_sq"], rel=1e-9)
    assert rows_["treatment"]["ss"] == pytest.approx(ref.loc["C(treatment)", "sum_sq"], rel=1e-9)
    assert rows_["treatment"]["f"] == pytest.approx(ref.loc["C(treatment)", "F"], rel=1e-8)
    assert rows_["treatment"]["p"] == pytest.approx(ref.loc["C(treatment)", "PR(>F)"], rel=1e-7)
    assert rows_["residual"]["df"] == ref.loc["Residual", "df"]
    assert res.balance["bibd"] is False and res.balance["complete"] is False


def test_incomplete_on_complete_design_agrees_with_rcbd():
    obs = tidy(GRAFT)
    inc = incomplete_anova(obs)
    full = rcbd_anova(obs)
    rows = {r["source"]: r for r in inc.anova}
    # a complete design is a special case: same SS as the Montgomery example above
    assert rows["treatment"]["ss"] == pytest.approx(full.row("treatment")["ss"], rel=1e-10)
    assert inc.balance["complete"] is True and inc.balance["bibd"] is False
    np.testing.assert_allclose(inc.adjusted_means["adjusted_mean"], full.treatment_means["mean"], rtol=1e-12)


def test_disconnected_incomplete_design_is_refused():
    obs = pd.DataFrame([("a", "g1", 1.0), ("b", "g1", 2.0), ("a", "g2", 1.5), ("b", "g2", 2.5),
                        ("c", "g3", 3.0), ("d", "g3", 4.0), ("c", "g4", 3.2), ("d", "g4", 4.1)],
                       columns=["treatment", "block", "value"])
    with pytest.raises(DesignError, match="share no block"):
        incomplete_anova(obs)


# --------------------------------------------------------------------------- generalized designs


@pytest.mark.parametrize("cells", [(3, 3), (2, 4)])
def test_generalized_matches_statsmodels_with_interaction(cells):
    obs = generalized_data(41, *cells)
    res = generalized_anova(obs)
    # statsmodels anova_lm typ 1, blocks first, with the interaction (reference library)
    ref = sm_anova(obs, "value ~ C(block) + C(treatment) + C(block):C(treatment)")
    rows = {r["source"]: r for r in res.anova}
    pairs = [("block", "C(block)"), ("treatment", "C(treatment)"), ("interaction", "C(block):C(treatment)"),
             ("residual", "Residual")]
    for ours, key in pairs:
        assert rows[ours]["ss"] == pytest.approx(ref.loc[key, "sum_sq"], rel=1e-9)
        assert rows[ours]["df"] == ref.loc[key, "df"]
        if ours != "residual":
            assert rows[ours]["f"] == pytest.approx(ref.loc[key, "F"], rel=1e-8)
            assert rows[ours]["p"] == pytest.approx(ref.loc[key, "PR(>F)"], rel=1e-6)
    # random blocks: treatment against the interaction mean square (Montgomery, mixed model,
    # from memory); computed here from the statsmodels table
    ms_t = ref.loc["C(treatment)", "sum_sq"] / ref.loc["C(treatment)", "df"]
    ms_i = ref.loc["C(block):C(treatment)", "sum_sq"] / ref.loc["C(block):C(treatment)", "df"]
    rb = res.treatment_random_blocks
    assert rb["f"] == pytest.approx(ms_t / ms_i, rel=1e-9)
    assert rb["p"] == pytest.approx(stats.f.sf(ms_t / ms_i, 2, 10), rel=1e-8)
    assert (rb["df1"], rb["df2"]) == (2, 10)
    if cells[0] != cells[1]:
        assert any("approximate" in w for w in res.warnings)


def test_generalized_needs_replicated_cells_and_no_repeats():
    with pytest.raises(DesignError, match="no within-cell variation"):
        generalized_anova(invented_rcbd(1))
    obs = generalized_data(2)
    dup = pd.concat([obs, obs.iloc[[0]]], ignore_index=True)
    with pytest.raises(DesignError, match="collapse replicates"):
        generalized_anova(dup)
    with pytest.raises(DesignError, match="every treatment in every block"):
        generalized_anova(obs[~((obs.treatment == "t1") & (obs.block == "g2"))])
