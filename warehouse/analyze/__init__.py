"""Statistics on collapsed observation tables (one value per treatment and block).

The analyze layer works on tidy pandas tables with the columns ``treatment``, ``block`` and
``value`` (and ``instance`` for the generalized design). It never reads the warehouse, never
prints and never formats tables; every function returns a dataclass with ``to_dict()`` (JSON-safe)
and ``table()`` (tidy pandas DataFrames).

Modules
-------
blocked   randomized complete block ANOVA with diagnostics and transforms, Friedman and Quade
          tests, incomplete and generalized block designs
baseline  many-to-one comparisons against a baseline (Dunnett, paired t, Wilcoxon), effect sizes,
          win / tie / loss counts
pairs     all-pairs comparisons (Tukey on the block model, Nemenyi and Conover after Friedman)
planning  power and number of blocks needed

Submodules are imported on demand so that ``import warehouse.analyze`` stays cheap.
"""
from __future__ import annotations

__all__ = ["blocked", "baseline", "pairs", "planning"]
