"""What the analyses share: the observation table on the way in and the result type on the way out.

Every analysis takes a tidy table ``obs`` with the columns ``treatment`` (str), ``block`` (str)
and ``value`` (float); a treatment is a solver version, a block is an instance group.
:func:`_prepare` checks it (one-line InputError or DesignError for what a user can fix) and
:func:`_complete` turns a complete design into a treatments x blocks matrix. Every result is a
dataclass on :class:`_Result`, whose ``to_dict()`` gives JSON-safe values (NaN and infinity as
None). The thresholds of the checks, the F test with its zero-denominator rule and the warnings
about small designs live here too, because the complete, rank and incomplete analyses all use
them.
"""
from __future__ import annotations

import math
from dataclasses import fields

import numpy as np
import pandas as pd

from warehouse.analyze.lean import f_sf
from warehouse.errors import DesignError, InputError

#: p-value below which a diagnostic check counts as failed (common practice).
CHECK_LEVEL = 0.05
#: fewer blocks than this earn a "few blocks" warning (common practice for benchmark studies).
FEW_BLOCKS = 6
#: fewer residual degrees of freedom than this make the design "tiny" (common practice).
TINY_RESIDUAL_DF = 6

_EPS = 1e-12

#: values larger than this in size are refused. The checks raise values to powers up to 3 (Box-Cox)
#: and square them: (1e50)^6 = 1e300, so sums over millions of cells stay below the largest
#: double, about 1.8e308 (IEEE 754 binary64). A metric this large is a stand-in, not a measurement.
LARGEST_VALUE = 1e50


# --------------------------------------------------------------------------- the result type


def _jsonable(x):
    """Turn results into plain JSON-safe Python (floats, ints, str, None, lists, dicts)."""
    if isinstance(x, _Result):
        return x.to_dict()
    if isinstance(x, pd.DataFrame):
        return _records(x)
    if isinstance(x, pd.Series):
        return [_jsonable(v) for v in x.tolist()]
    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return [_jsonable(v) for v in x.tolist()]
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, (int, np.integer)):
        return int(x)
    if isinstance(x, (float, np.floating)):
        v = float(x)
        return v if math.isfinite(v) else None
    if x is None or isinstance(x, str):
        return x
    return str(x)


def _records(df: pd.DataFrame) -> list[dict]:
    """A table as JSON-safe records, column by column: numeric columns in one numpy pass each,
    text columns value by value. The same records as `_jsonable` of each value of
    `df.to_dict(orient="records")` (tests/analyze/test_tidy_json.py holds the two side by side),
    about five times faster on a 170-treatment result's tables."""
    cols = [str(k) for k in df.columns]
    values = []
    for i in range(df.shape[1]):
        col = df.iloc[:, i]
        dt = col.dtype
        if isinstance(dt, np.dtype) and dt.kind == "f":
            arr = col.to_numpy()
            out = arr.tolist()
            for j in np.flatnonzero(~np.isfinite(arr)).tolist():
                out[j] = None
        elif isinstance(dt, np.dtype) and dt.kind in "iub":
            out = col.to_numpy().tolist()
        elif isinstance(dt, pd.StringDtype) and isinstance(dt.na_value, float) and math.isnan(dt.na_value):
            out = [v if type(v) is str else _jsonable(v) for v in col.tolist()]
        else:  # any other kind of column: the whole table value by value, as pandas boxes them
            return [{str(k): _jsonable(v) for k, v in rec.items()} for rec in df.to_dict(orient="records")]
        values.append(out)
    if not cols:
        return [{} for _ in range(len(df))]
    return [dict(zip(cols, row)) for row in zip(*values)]


class _Result:
    """Mixin for result dataclasses: ``to_dict()`` and a default ``table()``."""

    def to_dict(self) -> dict:
        """JSON-safe dict: plain floats, None for NaN and infinite values, lists for tables."""
        return {f.name: _jsonable(getattr(self, f.name)) for f in fields(self)}

    def table(self) -> pd.DataFrame:  # pragma: no cover - overridden where a table exists
        row = {f.name: getattr(self, f.name) for f in fields(self)
               if not isinstance(getattr(self, f.name), (pd.DataFrame, list, dict, _Result))}
        return pd.DataFrame([row])


def _none_if_nan(x):
    if x is None:
        return None
    x = float(x)
    return None if math.isnan(x) else x


def _fmt_p(p) -> str:
    """'p = 0.003' or 'p < 0.001' for the plain sentences in warnings."""
    if p is None or (isinstance(p, float) and math.isnan(p)):
        return "p not available"
    if p < 0.001:
        return "p < 0.001"
    return f"p = {p:.3g}"


# --------------------------------------------------------------------------- the observation table


def _prepare(obs, extra: tuple[str, ...] = ()) -> pd.DataFrame:
    """Validate the tidy table and return a clean copy (str labels, float values)."""
    if not isinstance(obs, pd.DataFrame):
        raise InputError("observations must be a pandas DataFrame with columns treatment, block and value")
    need = ("treatment", "block", "value")
    missing = [c for c in need if c not in obs.columns]
    if missing:
        raise InputError(
            f"observations lack the column(s) {', '.join(missing)}: pass a table with treatment, block and value")
    cols = list(need) + [c for c in extra if c in obs.columns]
    df = obs[cols].copy()
    if df.empty:
        raise DesignError("there are no observations: widen the slice")
    if df["treatment"].isna().any() or df["block"].isna().any():
        raise InputError("some rows have no treatment or no block: fill or drop them before analysis")
    df["treatment"] = df["treatment"].astype(str)
    df["block"] = df["block"].astype(str)
    values = pd.to_numeric(df["value"], errors="coerce")
    bad = values.isna() | ~np.isfinite(values.to_numpy(dtype=float, na_value=np.nan))
    if bad.any():
        raise InputError(
            f"{int(bad.sum())} value(s) are missing, infinite or not numbers: drop or fill them before analysis")
    df["value"] = values.astype(float)
    refuse_overflow(df["value"])
    return df.reset_index(drop=True)


def refuse_overflow(values, what: str = "the values") -> None:
    """Refuse, in one line, values whose sums of squares would overflow a double (and print
    numpy's overflow warnings on the way to meaningless numbers). Infinite values mean that a sum
    over runs overflowed already (every stored value is finite)."""
    v = np.abs(np.asarray(values, dtype=float))
    v = v[~np.isnan(v)]
    if not v.size:
        return
    top = float(v.max())
    if top <= LARGEST_VALUE:
        return
    why = ("adding up its runs overflows the largest number a double holds (about 1.8e+308)" if math.isinf(top)
           else f"a value of {top:.3g} is too large for sums of squares (the analysis takes values up to {LARGEST_VALUE:.0e} in size)")
    raise DesignError(f"{what}: {why}; such a value is usually a stand-in for a failed run: mark those runs "
                      "failed in the source, or leave them out of the slice")


def _labels(df: pd.DataFrame) -> tuple[list[str], list[str]]:
    treatments = list(pd.unique(df["treatment"]))
    blocks = list(pd.unique(df["block"]))
    if len(treatments) < 2:
        raise DesignError(
            f"only one treatment ({treatments[0]}): a blocked comparison needs at least 2; widen the slice")
    if len(blocks) < 2:
        raise DesignError(
            f"only one block ({blocks[0]}): a blocked analysis needs at least 2 blocks; widen the slice")
    return treatments, blocks


def _one_per_cell(df: pd.DataFrame) -> None:
    """Refuse a second row for a treatment and block (the complete and incomplete designs take one)."""
    dup = df.duplicated(["treatment", "block"])
    if dup.any():
        first = df[dup].iloc[0]
        raise DesignError(
            f"{int(dup.sum())} extra row(s) for one treatment and block (first: {first.treatment} on "
            f"{first.block}): collapse to one value per cell, or use generalized_anova")


def _complete(obs) -> tuple[np.ndarray, list[str], list[str]]:
    """Check a complete design and return the values as a treatments x blocks matrix.

    Treatments and blocks keep the order of first appearance in ``obs``.
    """
    df = _prepare(obs)
    treatments, blocks = _labels(df)
    _one_per_cell(df)
    wide = df.pivot(index="treatment", columns="block", values="value").reindex(index=treatments, columns=blocks)
    holes = wide.isna().to_numpy()
    if holes.any():
        i, j = np.argwhere(holes)[0]
        raise DesignError(
            f"{int(holes.sum())} hole(s) in the design (block {blocks[j]} has no value for {treatments[i]}): "
            f"drop the blocks with holes or use incomplete_anova")
    return wide.to_numpy(dtype=float), treatments, blocks


# --------------------------------------------------------------------------- what the designs share


def _f_test(ms_num: float, ms_den: float, df1: float, df2: float, scale: float) -> tuple[float, float]:
    """F and upper-tail p. A zero denominator (perfect fit) leaves F undefined, and its p with it
    (NaN, reported as None): no p of 0 beside an F that could not be computed."""
    if df2 <= 0 or df1 <= 0:
        return float("nan"), float("nan")
    tiny = _EPS * max(scale, 1e-300)
    if ms_den <= tiny:
        return float("nan"), float("nan")
    f = ms_num / ms_den
    return float(f), float(f_sf(f, df1, df2))


def _design_warnings(a: int, b: int, df_e: int) -> list[str]:
    out = []
    if b < FEW_BLOCKS:
        out.append(f"only {b} blocks: tests have little power")
    if df_e < TINY_RESIDUAL_DF:
        out.append(f"the design is tiny ({a} treatments x {b} blocks, {df_e} residual degrees of freedom): "
                   f"the error estimate is rough")
    return out
