"""Block designs beyond the complete one: blocks that miss treatments, and cells with several values.

:func:`incomplete_anova` takes blocks that miss treatments (at most one value per cell), adjusts
the treatments for blocks by least squares and reports the balance of the design;
:func:`generalized_anova` takes several values per treatment and block (one per instance) and
tests the treatment x block interaction. Both fit their models by least squares with numpy on
dummy-coded design matrices (the helpers at the top); statsmodels is used by the tests as the
reference.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from warehouse.analyze.tidy import (
    CHECK_LEVEL,
    FEW_BLOCKS,
    TINY_RESIDUAL_DF,
    _design_warnings,
    _f_test,
    _fmt_p,
    _labels,
    _one_per_cell,
    _prepare,
    _Result,
)
from warehouse.errors import DesignError


# --------------------------------------------------------------------------- least squares helpers


def _codes(series: pd.Series, levels: list[str]) -> np.ndarray:
    pos = {v: i for i, v in enumerate(levels)}
    return series.map(pos).to_numpy(dtype=int)


def _dummies(codes: np.ndarray, nlev: int) -> np.ndarray:
    """Treatment (reference) coding: columns for levels 1..nlev-1."""
    M = np.zeros((len(codes), max(nlev - 1, 0)))
    rows = np.nonzero(codes > 0)[0]
    M[rows, codes[rows] - 1] = 1.0
    return M


def _lsq(X: np.ndarray, y: np.ndarray) -> tuple[float, int, np.ndarray]:
    beta, _, rank, _ = np.linalg.lstsq(X, y, rcond=None)
    r = y - X @ beta
    return float(r @ r), int(rank), beta


def _components(treat_codes: np.ndarray, block_codes: np.ndarray, a: int, b: int) -> list[list[int]]:
    """Treatments connected through shared blocks (lists of treatment indices)."""
    parent = list(range(a + b))

    def find(x):
        while parent[x] != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        return x

    for t, bl in zip(treat_codes, block_codes):
        rt, rb = find(int(t)), find(a + int(bl))
        if rt != rb:
            parent[rt] = rb
    groups: dict[int, list[int]] = {}
    for t in range(a):
        groups.setdefault(find(t), []).append(t)
    return sorted(groups.values(), key=lambda g: g[0])


# --------------------------------------------------------------------------- incomplete blocks


@dataclass
class IncompleteResult(_Result):
    """Block design in which blocks may miss treatments (at most one value per cell).

    Fields
    ------
    treatments, blocks, observations   counts
    anova          rows {source, df, ss, ms, f, p}: block (unadjusted, entered first; f and p
                   None because blocks are not adjusted for treatments), treatment (adjusted for
                   blocks), residual
    r_squared, residual_ms, residual_df
    adjusted_means DataFrame treatment, n, raw_mean, adjusted_mean (least-squares mean: the
                   fitted value of the treatment averaged over all blocks)
    balance        dict complete, bibd, block_size (k or None), replication (r or None),
                   pair_lambda (lambda or None), efficiency (lambda a / (r k) for a BIBD, else None),
                   block_sizes (min, max), replications (min, max)
    residuals      DataFrame treatment, block, value, fitted, residual
    warnings
    """

    treatments: int
    blocks: int
    observations: int
    anova: list[dict]
    r_squared: float
    residual_ms: float
    residual_df: int
    adjusted_means: pd.DataFrame
    balance: dict
    residuals: pd.DataFrame
    warnings: list[str] = field(default_factory=list)

    def table(self) -> pd.DataFrame:
        return pd.DataFrame(self.anova, columns=["source", "df", "ss", "ms", "f", "p"])


def _balance(inc: np.ndarray) -> dict:
    """Balance of an incidence matrix (treatments x blocks, 0/1)."""
    a, b = inc.shape
    ks = inc.sum(axis=0)
    rs = inc.sum(axis=1)
    pairs = inc @ inc.T
    off = pairs[~np.eye(a, dtype=bool)]
    complete = bool((inc == 1).all())
    same_k = ks.min() == ks.max()
    same_r = rs.min() == rs.max()
    same_l = off.size > 0 and off.min() == off.max()
    bibd = bool(not complete and same_k and ks[0] < a and same_r and same_l and off.min() > 0)
    out = {"complete": complete, "bibd": bibd,
           "block_size": int(ks[0]) if same_k else None,
           "replication": int(rs[0]) if same_r else None,
           "pair_lambda": int(off[0]) if same_l else None,
           "efficiency": None,
           "block_sizes": [int(ks.min()), int(ks.max())],
           "replications": [int(rs.min()), int(rs.max())]}
    if bibd:
        out["efficiency"] = float(off[0] * a / (rs[0] * ks[0]))
    return out


def incomplete_anova(obs: pd.DataFrame) -> IncompleteResult:
    """ANOVA of a block design in which blocks may miss treatments.

    Model y = mu + block + treatment (additive), fitted by least squares. Sequential sums of
    squares with blocks entered first: SS_block is the unadjusted block SS and SS_treatment is
    the treatment SS adjusted for blocks (the reduction in residual SS when treatments are added
    to a blocks-only model), tested with F against the residual mean square on
    n - a - b + 1 df. Adjusted treatment means are least-squares means: the model's fitted
    value for the treatment in each block, averaged over all blocks (for a complete design they
    equal the raw means).

    Balance is reported: a balanced incomplete block design (BIBD) has every block of one size
    k < a, every treatment r times and every pair of treatments together in lambda blocks; its
    efficiency factor is lambda a / (r k).

    Raises DesignError when a cell has several rows, when the treatments are not connected
    through shared blocks (then their differences cannot be estimated), or when no residual
    degrees of freedom remain.

    Assumptions: as for the complete design (additivity, independent normal errors with one
    variance); missing cells are missing for reasons unrelated to the values.

    References: Yates (1936), Ann. Eugenics 7; Montgomery, Design and Analysis of Experiments,
    chapter on balanced incomplete block designs; Searle, Linear Models for Unbalanced Data (1987).

    Example::

        from warehouse.analyze.designs import incomplete_anova
        res = incomplete_anova(obs)
        res.table(); res.adjusted_means; res.balance["bibd"]
    """
    df = _prepare(obs)
    treatments, blocks = _labels(df)
    _one_per_cell(df)
    a, b, n = len(treatments), len(blocks), len(df)
    tc = _codes(df["treatment"], treatments)
    bc = _codes(df["block"], blocks)
    comps = _components(tc, bc, a, b)
    if len(comps) > 1:
        shown = "; ".join(", ".join(treatments[i] for i in g) for g in comps[:3])
        raise DesignError(
            f"the treatments fall into {len(comps)} groups that share no block ({shown}): differences "
            f"between groups cannot be estimated; add blocks that hold treatments from several groups")
    y = df["value"].to_numpy(dtype=float)
    one = np.ones((n, 1))
    Xb = np.hstack([one, _dummies(bc, b)])
    Xf = np.hstack([Xb, _dummies(tc, a)])
    rss0 = float(((y - y.mean()) ** 2).sum())
    rss_b, rank_b, _ = _lsq(Xb, y)
    rss_f, rank_f, beta = _lsq(Xf, y)
    df_b, df_t, df_e = rank_b - 1, rank_f - rank_b, n - rank_f
    if df_e < 1:
        raise DesignError(
            f"{n} observations leave no residual degrees of freedom for {a} treatments in {b} blocks: "
            f"add blocks")
    ss_b, ss_t, ss_e = rss0 - rss_b, rss_b - rss_f, rss_f
    ms_b, ms_t, ms_e = ss_b / df_b, ss_t / df_t, ss_e / df_e
    f_t, p_t = _f_test(ms_t, ms_e, df_t, df_e, rss0 / max(n - 1, 1))
    anova = [
        {"source": "block", "df": df_b, "ss": ss_b, "ms": ms_b, "f": None, "p": None},
        {"source": "treatment", "df": df_t, "ss": ss_t, "ms": ms_t, "f": f_t, "p": p_t},
        {"source": "residual", "df": df_e, "ss": ss_e, "ms": ms_e, "f": None, "p": None},
    ]
    # least-squares means: fitted value of each treatment in every block, averaged over blocks
    grid_b = np.repeat(np.arange(b), a)
    grid_t = np.tile(np.arange(a), b)
    Xg = np.hstack([np.ones((a * b, 1)), _dummies(grid_b, b), _dummies(grid_t, a)])
    pred = (Xg @ beta).reshape(b, a)
    lsm = pred.mean(axis=0)
    raw = df.groupby("treatment")["value"].agg(["mean", "size"]).reindex(treatments)
    means = pd.DataFrame({"treatment": treatments, "n": raw["size"].to_numpy(dtype=int),
                          "raw_mean": raw["mean"].to_numpy(dtype=float), "adjusted_mean": lsm})
    inc = np.zeros((a, b), dtype=int)
    inc[tc, bc] = 1
    bal = _balance(inc)
    fitted = Xf @ beta
    res_df = pd.DataFrame({"treatment": df["treatment"], "block": df["block"], "value": y,
                           "fitted": fitted, "residual": y - fitted})
    warnings = _design_warnings(a, b, df_e)
    if not bal["complete"] and not bal["bibd"]:
        warnings.append("the design is not balanced: treatments are compared with unequal precision")
    return IncompleteResult(treatments=a, blocks=b, observations=n, anova=anova,
                            r_squared=(1 - ss_e / rss0) if rss0 > 0 else float("nan"),
                            residual_ms=ms_e, residual_df=df_e, adjusted_means=means, balance=bal,
                            residuals=res_df, warnings=warnings)


# --------------------------------------------------------------------------- generalized blocks


@dataclass
class GeneralizedResult(_Result):
    """Generalized block design: several observations per treatment and block.

    Fields
    ------
    treatments, blocks, observations   counts
    cell_sizes            [smallest, largest] number of observations in a cell
    anova                 rows {source, df, ss, ms, f, p} for treatment, block, interaction,
                          residual; every F is against the residual (blocks fixed)
    residual_ms, residual_df, interaction_ms, interaction_df
    treatment_random_blocks   {f, df1, df2, p}: treatment tested against the interaction mean
                          square, the test to use when the blocks are a random sample
    treatment_means       DataFrame treatment, mean (average of the cell means), n
    warnings
    """

    treatments: int
    blocks: int
    observations: int
    cell_sizes: list[int]
    anova: list[dict]
    residual_ms: float
    residual_df: int
    interaction_ms: float
    interaction_df: int
    treatment_random_blocks: dict
    treatment_means: pd.DataFrame
    warnings: list[str] = field(default_factory=list)

    def table(self) -> pd.DataFrame:
        return pd.DataFrame(self.anova, columns=["source", "df", "ss", "ms", "f", "p"])


def generalized_anova(obs: pd.DataFrame) -> GeneralizedResult:
    """ANOVA of a generalized block design (several observations per treatment and block).

    Typical use: the instances of a group are kept apart instead of being averaged, so each
    treatment x block cell holds one value per instance. Model
    y = mu + treatment + block + treatment x block + e. Sequential sums of squares with blocks
    first, then treatments, then the interaction (for equal cell sizes the order does not
    matter). The interaction is tested against the residual (within-cell) mean square. The
    treatment effect is tested twice: against the residual mean square (blocks fixed: the
    conclusion holds for these blocks) and against the interaction mean square on
    (a-1) and (a-1)(b-1) df (blocks a random sample: the conclusion is meant to carry over to
    other blocks like them). With unequal cell sizes the second test is approximate.

    Needs every treatment in every block and at least one cell with two or more rows. When the
    column ``instance`` is present, a repeated (treatment, block, instance) raises DesignError
    (collapse seeds first).

    References: Montgomery, Design and Analysis of Experiments (factorial and random-effects
    chapters); Hinkelmann and Kempthorne, Design and Analysis of Experiments, vol. 1
    (generalized randomized block design).

    Example::

        from warehouse.analyze.designs import generalized_anova
        res = generalized_anova(obs)        # obs: treatment, block, instance, value
        res.table(); res.treatment_random_blocks["p"]
    """
    df = _prepare(obs, extra=("instance",))
    treatments, blocks = _labels(df)
    if "instance" in df.columns:
        dup = df.duplicated(["treatment", "block", "instance"])
        if dup.any():
            first = df[dup].iloc[0]
            raise DesignError(
                f"{int(dup.sum())} repeated row(s) for one treatment and instance (first: {first.treatment} on "
                f"{first.instance}): collapse replicates to one value per instance first")
    a, b, n = len(treatments), len(blocks), len(df)
    tc = _codes(df["treatment"], treatments)
    bc = _codes(df["block"], blocks)
    counts = np.zeros((a, b), dtype=int)
    np.add.at(counts, (tc, bc), 1)
    if (counts == 0).any():
        i, j = np.argwhere(counts == 0)[0]
        raise DesignError(
            f"block {blocks[j]} has no value for {treatments[i]}: the generalized design needs every treatment "
            f"in every block; drop the blocks with holes")
    if counts.max() < 2:
        raise DesignError("every treatment x block cell holds one value, so there is no within-cell variation to test the interaction against; use the complete design (--design complete)")
    y = df["value"].to_numpy(dtype=float)
    rss0 = float(((y - y.mean()) ** 2).sum())
    one = np.ones((n, 1))
    Xb = np.hstack([one, _dummies(bc, b)])
    Xf = np.hstack([Xb, _dummies(tc, a)])
    rss_b, rank_b, _ = _lsq(Xb, y)
    rss_f, rank_f, _ = _lsq(Xf, y)
    # full cell-means model: residual = within-cell variation
    cell = tc * b + bc
    sums = np.bincount(cell, weights=y, minlength=a * b)
    cmeans = sums / counts.ravel()
    rss_c = float(((y - cmeans[cell]) ** 2).sum())
    df_b, df_t = rank_b - 1, rank_f - rank_b
    df_i, df_e = a * b - rank_f, n - a * b
    ss_b, ss_t, ss_i, ss_e = rss0 - rss_b, rss_b - rss_f, rss_f - rss_c, rss_c
    ms_b, ms_t, ms_i, ms_e = ss_b / df_b, ss_t / df_t, ss_i / df_i, ss_e / df_e
    scale = rss0 / max(n - 1, 1)
    f_t, p_t = _f_test(ms_t, ms_e, df_t, df_e, scale)
    f_b, p_b = _f_test(ms_b, ms_e, df_b, df_e, scale)
    f_i, p_i = _f_test(ms_i, ms_e, df_i, df_e, scale)
    f_r, p_r = _f_test(ms_t, ms_i, df_t, df_i, scale)
    anova = [
        {"source": "treatment", "df": df_t, "ss": ss_t, "ms": ms_t, "f": f_t, "p": p_t},
        {"source": "block", "df": df_b, "ss": ss_b, "ms": ms_b, "f": f_b, "p": p_b},
        {"source": "interaction", "df": df_i, "ss": ss_i, "ms": ms_i, "f": f_i, "p": p_i},
        {"source": "residual", "df": df_e, "ss": ss_e, "ms": ms_e, "f": None, "p": None},
    ]
    cm = cmeans.reshape(a, b)
    means = pd.DataFrame({"treatment": treatments, "mean": cm.mean(axis=1), "n": counts.sum(axis=1)})
    warnings = []
    if b < FEW_BLOCKS:
        warnings.append(f"only {b} blocks: tests have little power, and the test with random blocks has only "
                        f"{df_i} denominator degrees of freedom")
    if df_e < TINY_RESIDUAL_DF:
        warnings.append(f"the design is tiny ({df_e} residual degrees of freedom): the error estimate is rough")
    if counts.min() != counts.max():
        warnings.append(f"cells hold between {counts.min()} and {counts.max()} values: with unequal cells "
                        f"the test against the interaction is approximate")
    if not math.isnan(p_i) and p_i < CHECK_LEVEL:
        warnings.append(f"treatment effects differ between blocks (interaction {_fmt_p(p_i)}): if the blocks "
                        f"stand for a wider population, use the treatment test against the interaction")
    return GeneralizedResult(treatments=a, blocks=b, observations=n,
                             cell_sizes=[int(counts.min()), int(counts.max())], anova=anova,
                             residual_ms=ms_e, residual_df=df_e, interaction_ms=ms_i, interaction_df=df_i,
                             treatment_random_blocks={"f": f_r, "df1": df_t, "df2": df_i, "p": p_r},
                             treatment_means=means, warnings=warnings)
