"""Recording an analysis cheaply (ledger/kept.py): the observations as records column by column,
plain values passed through `clean` by their exact type, library versions read without importing
the libraries; every stored text is byte for byte what the walk before gave."""
from __future__ import annotations

import json
import math
import random

import numpy as np
import pandas as pd
from sqlalchemy import select

from warehouse.ledger.kept import canon, canon_records, clean, digest, records, software


def slow_clean(obj):
    """`clean` as it was before its fast paths (the reference the new one must equal)."""
    if isinstance(obj, dict):
        return {str(k): slow_clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [slow_clean(v) for v in obj]
    if hasattr(obj, "item") and not isinstance(obj, (str, bytes)):
        obj = obj.item()
    if isinstance(obj, float) and (math.isnan(obj) or math.isinf(obj)):
        return None
    return obj


def test_clean_equals_the_walk_it_replaced():
    doc = {"a": [1.0, 2.5, -0.0], "nan": [1.0, math.nan], "inf": [math.inf, 1.0], "ninf": [-math.inf],
           "mixed": [1, "x", None, True, 2.0], "numpy": [np.float64(1.5), np.int64(3), np.bool_(True), np.float64("nan")],
           "tuple": (1, 2.0), 3: {"nested": [[math.nan, 1.0], {"k": np.float32(0.25)}]}, "big": [1e308, 1e308, 1e308],
           "s": "text", "n": None, "b": False, "f": math.nan}
    got, want = clean(doc), slow_clean(doc)
    assert canon(got) == canon(want)
    assert got["big"] == [1e308] * 3  # a sum that overflows is checked value by value, not dropped
    assert got["nan"] == [1.0, None] and got["inf"] == [None, 1.0] and got["f"] is None


def test_records_equal_clean_of_to_dict():
    df = pd.DataFrame({"treatment": pd.Series(["a", None, "c"], dtype="str"), "block": ["f/g1", "f/g2", "f/g3"],
                       "value": [1.25, math.nan, math.inf], "instances": [2, 3, 4], "runs": np.array([1, 2, 3], dtype=np.int32),
                       "flag": [True, False, True]})
    assert canon(records(df)) == canon(clean(df.to_dict("records")))
    other = df.assign(o=pd.Series([np.float64(1.0), "x", None], dtype=object))  # pandas' own boxing then
    assert canon(records(other)) == canon(clean(other.to_dict("records")))


def test_canon_records_writes_the_text_json_dumps_writes():
    """The column-wise text against the standard library's json.dumps of the records (the
    reference: Python documentation, json.dumps with sort_keys and compact separators)."""
    df = pd.DataFrame({"treatment": pd.Series(["a\"b", None, "caf\u00e9 %s"], dtype="str"),
                       "block": ["f/g1", "f/g2", "ünï/🧱"], "value": [1.25, math.nan, -0.0],
                       "big": [1e308, -math.inf, 1e-320], "instances": [2, 3, 4],
                       "runs": np.array([1, 2, -3], dtype=np.int32), "flag": [True, False, True],
                       "100%": np.array([7, 8, 9], dtype=np.uint8)})
    assert canon_records(df) == canon(records(df))
    assert canon_records(df.iloc[:0]) == canon(records(df.iloc[:0])) == "[]"
    assert canon_records(df[["value"]]) == canon(records(df[["value"]]))
    other = df.assign(o=pd.Series([np.float64(1.0), "x", None], dtype=object))  # the general way
    assert canon_records(other) == canon(records(other))
    assert json.loads(canon_records(df))[2]["block"] == "ünï/🧱"


def test_software_names_the_installed_versions_without_importing_them():
    from importlib.metadata import version

    doc = software()
    for name in ("numpy", "pandas", "scipy", "statsmodels", "sqlalchemy"):
        assert doc[name] == version(name), name


def test_a_kept_blocktest_stores_what_the_old_walk_stored(cli, tmp_path, wh):
    # a complete design with some NaN-free cells and a failure, kept through the command line
    from warehouse.analyses import run_blocktest
    from warehouse.collapse.settings import Collapse
    from warehouse.select.slices import parse
    from warehouse.store import schema as S

    rng = random.Random(3)
    path = tmp_path / "runs.csv"
    with open(path, "w") as fh:
        fh.write("solver,version,family,group,instance,seed,status,pallets\n")
        for v in ("1.0", "1.1", "1.2"):
            for g in range(6):
                for i in range(2):
                    for seed in (1, 2):
                        bad = v == "1.2" and g == 0 and i == 0 and seed == 1
                        value = "" if bad else f"{30 + g + 0.5 * float(v[-1]) + rng.gauss(0, 0.3):.4f}"
                        fh.write(f"stk,{v},f1,g{g},i{g}-{i},{seed},{'timeout' if bad else 'ok'},{value}\n")
    assert cli("load", str(path), "--campaign", "c1").code == 0
    r = cli("blocktest", "--slice", "campaign=c1", "--metric", "pallets", "--json")
    assert r.code == 0, r
    aid = r.json()["analysis_id"]
    with wh.engine.connect() as conn:
        row = conn.execute(select(S.analyses).where(S.analyses.c.id == aid)).mappings().one()
        res = run_blocktest(conn, parse("campaign=c1").absolute(), "pallets", Collapse(), "none", "auto", False)
    from warehouse.analyze import tidy

    old_jsonable = tidy._jsonable

    def walk_jsonable(x):  # the to_dict walk before _records: every table value by value
        if isinstance(x, pd.DataFrame):
            return [{str(k): walk_jsonable(v) for k, v in rec.items()} for rec in x.to_dict(orient="records")]
        return old_jsonable(x)

    doc = res.to_dict()
    doc.pop("analysis_id", None)
    old_doc = json.loads(json.dumps(slow_clean(doc)))
    assert row["result"] == canon(old_doc)
    assert row["observations"] == canon(slow_clean(res.collapsed.obs.copy().to_dict("records")))
    assert row["result_digest"] == digest("blocktest", row["slice_text"], row["settings"], row["observations"],
                                          row["fingerprint"], row["result"])
    # the statistics' document without the per-observation residuals equals the full walk's keys
    full = {k: walk_jsonable(v) for k, v in ((f, getattr(res.stats, f)) for f in res.stats.__dataclass_fields__)}
    for key, value in res.stats_doc().items():
        assert canon(slow_clean(value)) == canon(slow_clean(full[key])), key
    assert "residuals" not in res.stats_doc() and "residuals" in full
