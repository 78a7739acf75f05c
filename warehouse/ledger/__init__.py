"""The ledger: every analysis kept with its exact inputs, claims tied to analyses, and the checks
that tell whether a kept analysis still holds (fresh, stale after a retraction, or tampered).

`kept` records and reads analyses and claims; `retraction` withdraws runs and undoes it; `rechecking`
re-runs a kept analysis on today's runs and renews it. The names below are the ledger's whole
public face: callers write `ledger.record(...)`, `ledger.recheck(...)`.
"""
from __future__ import annotations

from .kept import (MAX_ID, Stored, digest, get, keep, last_id, parse_id, recall, record, renewed_as, software,
                   stale_runs, treatments_of)
from .rechecking import Recheck, explain, note_source, recheck, rerun, verdicts_of
from .retraction import affected, retract, undo_retraction

__all__ = ["MAX_ID", "Recheck", "Stored", "affected", "digest", "explain", "get", "keep", "last_id",
           "note_source", "parse_id", "recall", "recheck", "record", "renewed_as", "rerun", "retract", "software",
           "stale_runs", "treatments_of", "undo_retraction", "verdicts_of"]
