"""Checks of warehouse.analyze.tidy: the observation table's checks (one-line InputError or
DesignError) and the JSON form of results, through every analysis that uses them.
"""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from warehouse.analyze.anova import rcbd_anova
from warehouse.analyze.designs import generalized_anova, incomplete_anova
from warehouse.analyze.ranks import friedman, quade
from warehouse.errors import DesignError, InputError

from .kit import GRAFT, generalized_data, invented_rcbd, tidy


def test_single_treatment_is_a_design_error():
    obs = pd.DataFrame({"treatment": ["a"] * 3, "block": ["g1", "g2", "g3"], "value": [1.0, 2.0, 3.0]})
    for fn in (rcbd_anova, friedman, quade, incomplete_anova):
        with pytest.raises(DesignError, match="only one treatment"):
            fn(obs)


def test_single_block_and_holes_and_duplicates_are_design_errors():
    one_block = pd.DataFrame({"treatment": ["a", "b"], "block": ["g1", "g1"], "value": [1.0, 2.0]})
    with pytest.raises(DesignError, match="only one block"):
        rcbd_anova(one_block)
    holes = tidy(GRAFT).drop(index=3)
    with pytest.raises(DesignError, match="incomplete_anova"):
        rcbd_anova(holes)
    dups = pd.concat([tidy(GRAFT), tidy(GRAFT).iloc[[0]]])
    with pytest.raises(DesignError, match="one value per cell"):
        friedman(dups)


def test_bad_input_is_an_input_error():
    with pytest.raises(InputError, match="lack"):
        rcbd_anova(pd.DataFrame({"treatment": ["a"], "value": [1.0]}))
    bad = tidy(GRAFT)
    bad.loc[2, "value"] = np.nan
    with pytest.raises(InputError, match="not numbers"):
        rcbd_anova(bad)
    with pytest.raises(InputError, match="unknown transform"):
        rcbd_anova(tidy(GRAFT), transform="sqrt")


def test_to_dict_is_json_safe():
    obs = invented_rcbd(2)
    for res in (rcbd_anova(obs, "boxcox"), friedman(obs), quade(obs), incomplete_anova(obs),
                generalized_anova(generalized_data(3))):
        d = res.to_dict()
        text = json.dumps(d, allow_nan=False)
        assert json.loads(text) == d
    d = rcbd_anova(obs).to_dict()
    assert d["anova"][2]["f"] is None
    assert isinstance(d["residuals"], list) and set(d["residuals"][0]) >= {"treatment", "block", "residual"}
    assert isinstance(rcbd_anova(obs).table(), pd.DataFrame)
