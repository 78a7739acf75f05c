"""The analyses behind the commands, as functions of explicit inputs.

Each takes an open connection, a parsed slice, a metric, collapse settings and its own options,
and returns a result that knows its JSON document (`to_dict()`) and its text (`render()`). The
ledger re-runs these same functions to recheck a stored analysis. One module per analysis;
`common` holds what they share.
"""
from __future__ import annotations

from .blocktest import BlocktestResult, pair_methods, run_blocktest
from .common import censored_runtimes
from .guard import GuardResult, run_guard
from .noise import NoiseResult, run_noise
from .plan import PlanResult, run_plan
from .versus import VersusResult, campaign_drift, run_versus

__all__ = ["BlocktestResult", "GuardResult", "NoiseResult", "PlanResult", "VersusResult", "campaign_drift",
           "censored_runtimes", "pair_methods", "run_blocktest", "run_guard", "run_noise", "run_plan", "run_versus"]
