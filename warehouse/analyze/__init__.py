"""Statistics on collapsed observation tables (one value per treatment and block).

The analyze layer works on tidy pandas tables with the columns ``treatment``, ``block`` and
``value`` (and ``instance`` for the generalized design). It never reads the warehouse, never
prints and never formats tables; every function returns a dataclass with ``to_dict()`` (JSON-safe)
and ``table()`` (tidy pandas DataFrames).

Modules
-------
lean      the tests and tails a blocktest needs, with numpy and scipy.special only (Shapiro-Wilk,
          Fligner-Killeen, Brown-Forsythe, midranks, Brent's bounded minimum): no scipy.stats import
tidy      what they share: the observation table's checks, the result type, the F test
anova     randomized complete block ANOVA with diagnostics, transforms and relative efficiency
ranks     Friedman (with Iman-Davenport) and Quade rank tests
designs   incomplete and generalized block designs
baseline  many-to-one comparisons against a baseline (Dunnett, paired t, Wilcoxon), effect sizes,
          win / tie / loss counts
pairs     all-pairs comparisons (Tukey on the block model, Nemenyi and Conover after Friedman)
failures  failure rates: solved / not solved per instance, Cochran's Q, McNemar follow-ups
censored  runtimes with a cutoff as censored data: Kaplan-Meier, stratified Cox, stratified log-rank
planning  power and number of blocks needed

Submodules are imported on demand so that ``import warehouse.analyze`` stays cheap.
"""
from __future__ import annotations

__all__ = ["lean", "tidy", "anova", "ranks", "designs", "baseline", "pairs", "failures", "censored", "planning"]
