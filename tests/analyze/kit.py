"""Tables the analyze tests share: tidy observation tables built from dicts and matrices, the
statsmodels ANOVA used as the reference, the vascular-graft example and invented designs.
"""
from __future__ import annotations

import numpy as np
import pandas as pd


def tidy(rows_by_treatment: dict[str, list[float]], block_prefix: str = "g") -> pd.DataFrame:
    """Treatment -> values in block order, as a tidy table."""
    return pd.DataFrame(
        [(t, f"{block_prefix}{j + 1}", float(v)) for t, vs in rows_by_treatment.items() for j, v in enumerate(vs)],
        columns=["treatment", "block", "value"])


def from_matrix(Y: np.ndarray) -> pd.DataFrame:
    """Treatments x blocks matrix as a tidy table (labels t0.., g0..)."""
    a, b = Y.shape
    return pd.DataFrame([(f"t{i}", f"g{j}", float(Y[i, j])) for i in range(a) for j in range(b)],
                        columns=["treatment", "block", "value"])


def sm_anova(obs: pd.DataFrame, formula: str, typ: int = 1) -> pd.DataFrame:
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    return anova_lm(smf.ols(formula, data=obs).fit(), typ=typ)


# Montgomery, Design and Analysis of Experiments, vascular-graft extrusion example:
# 4 extrusion pressures x 6 resin batches (data from memory of the book; the check below is that
# they reproduce the book's sums of squares).
GRAFT = {
    "8500": [90.3, 89.2, 98.2, 93.9, 87.4, 97.9],
    "8700": [92.5, 89.5, 90.6, 94.7, 87.0, 95.8],
    "8900": [85.5, 90.8, 89.6, 86.2, 88.0, 93.4],
    "9100": [82.5, 89.5, 85.6, 87.4, 78.9, 90.7],
}


def invented_rcbd(seed: int, a: int = 4, b: int = 8, block_sd: float = 3.0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    Y = (rng.normal(0, block_sd, size=b)[None, :] + np.linspace(0, 1.5, a)[:, None]
         + rng.normal(0, 1, size=(a, b)) + 50)
    return from_matrix(Y)


def generalized_data(seed: int, cells_min: int = 3, cells_max: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    rows = []
    b_eff = rng.normal(0, 2, 6)
    for i in range(3):
        for j in range(6):
            for k in range(int(rng.integers(cells_min, cells_max + 1))):
                rows.append((f"t{i}", f"g{j}", f"g{j}/i{k}", 5 + 0.7 * i + b_eff[j] + 0.3 * rng.normal() * i
                             + rng.normal()))
    return pd.DataFrame(rows, columns=["treatment", "block", "instance", "value"])
