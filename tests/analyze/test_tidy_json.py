"""A result's tables as JSON records (analyze/tidy._records): column by column, the very records
the value-by-value walk gave (the ledger's digests are made from them, so not one byte may move)."""
from __future__ import annotations

import math

import numpy as np
import pandas as pd

from warehouse.analyze.anova import rcbd_anova
from warehouse.analyze.tidy import _jsonable, _records


def walk(df: pd.DataFrame) -> list[dict]:
    """The walk _records replaced: every value of to_dict(orient="records") through _jsonable."""
    return [{str(k): _jsonable(v) for k, v in rec.items()} for rec in df.to_dict(orient="records")]


def same(a, b) -> bool:
    # equal values of equal types (1 == 1.0 == True in Python, but not in a JSON document)
    if type(a) is not type(b):
        return False
    if isinstance(a, dict):
        return list(a) == list(b) and all(same(a[k], b[k]) for k in a)
    if isinstance(a, list):
        return len(a) == len(b) and all(same(x, y) for x, y in zip(a, b))
    return a == b


def test_numbers_text_and_missing_values_as_the_walk_gives_them():
    df = pd.DataFrame({
        "treatment": pd.Series(["a", None, "c", "d"], dtype="str"),
        "value": [1.5, math.nan, math.inf, -math.inf],
        "single": np.array([0.1, 2.0, np.nan, 3.25], dtype=np.float32),
        "n": np.array([1, 2, 3, -4], dtype=np.int64),
        "small": np.array([1, 2, 3, 4], dtype=np.uint8),
        "ok": [True, False, True, False],
        7: [0.0, -0.0, 1e-300, 1e300],  # a column named by a number: its key is the text "7"
    })
    assert same(_records(df), walk(df))


def test_other_columns_go_the_whole_table_value_by_value():
    df = pd.DataFrame({"x": [1.0, math.nan], "o": pd.Series([np.float64(2.5), "z"], dtype=object),
                       "when": pd.to_datetime(["2026-11-01", None])})
    assert same(_records(df), walk(df))
    empty = pd.DataFrame({"a": pd.Series([], dtype=float), "b": pd.Series([], dtype="str")})
    assert _records(empty) == walk(empty) == []


def test_a_blocked_analysis_document_is_unchanged():
    rng = np.random.default_rng(5)
    rows = [(f"s@{t}", f"g{b}", 10 + t + 0.3 * b + rng.normal(0, 0.5)) for t in range(6) for b in range(12)]
    obs = pd.DataFrame(rows, columns=["treatment", "block", "value"])
    res = rcbd_anova(obs, transform="log")
    for table in (res.residuals, res.treatment_means):
        assert same(_records(table), walk(table))
    assert len(res.residuals) == 72
