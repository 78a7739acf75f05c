"""A run appears once per campaign: how a load keeps that, on either database.

Neither database keeps a key on the whole runs table. On PostgreSQL a load of a campaign with
no runs yet writes a partition of its own with no key, and proves its runs new the quick way
below (store/partitions.py); a load into a campaign that holds runs goes through the campaign
partition's own unique key on its live runs, made by the first such load and kept (revision
0013), and the runs writer moves each chunk in past the keys taken (write.py). SQLite holds
no index on the run key (revision 0007): a load proves its runs new instead, and lets SQLite
number the rows as they come:

- quick: none of the file's cells (solver, instance) already holds runs of the campaign, live
  or retracted (`StoredCells`, read from the cell summaries), and no key hash appears twice in
  the file (`RunHashes`, summed in the cell helper, sorted at the end). The retracted runs of
  the import chain a reload replaces hold no keys.
- exact, when a proof fails (`StartOver`: the load starts again) or the file is too large for
  the hashes: a unique index on the campaign's live run keys, made and dropped inside the
  load's transaction (`campaign_key`), refuses each run stored already, to be named or skipped
  one by one (write.report_conflicts); the keys of the campaign's retracted runs
  (`RetractedKeys`) keep those runs out before they are written.

`RunKey` is the one a load asks, chunk by chunk.
"""
from __future__ import annotations

import numpy as np
from sqlalchemy import select

from ..store import schema as S

QUICK_MAX_RUNS = 20_000_000  # above this a SQLite load checks its runs with a key index (hashes: 8 bytes a run)
LOAD_KEY = "blockyard_load_key"


class StartOver(Exception):
    """Internal: a quick load could not prove its runs new (`StoredCells`, `RunHashes`); load the
    file again the exact way, with the campaign's key index (`campaign_key`)."""


class RunKey:
    """One load's way of keeping each run once per campaign: quick (the two proofs) or exact
    (the key index, and the retracted keys) on SQLite. On PostgreSQL, quick for a campaign that
    holds no runs yet (its partition is filled with no key); otherwise nothing to do here, as
    the campaign partition's unique key refuses a taken key as the runs are moved in."""

    def __init__(self, conn, sqlite: bool, campaign_id: int, chain: tuple[int, ...], quick_allowed: bool, total: int,
                 fresh: bool = False):
        self.conn, self.campaign_id = conn, campaign_id
        # fresh (PostgreSQL): the campaign holds no runs and this load fills a partition of its own
        # with no key (store/partitions.py); the hashes prove the file names each run once
        self.quick = (sqlite and quick_allowed and total <= QUICK_MAX_RUNS) or fresh
        self.exact = sqlite and not self.quick  # with the campaign's key index for the transaction
        if self.exact:
            campaign_key(conn, campaign_id, create=True)
        self.stored = StoredCells(conn, campaign_id, chain) if self.quick else None
        self.hashes = RunHashes(total) if self.quick else None
        self.held = RetractedKeys(conn, campaign_id, chain) if self.exact else None

    def check(self, solver: np.ndarray, instance: np.ndarray, seed: np.ndarray, replicate: np.ndarray,
              summing) -> None:
        """A quick load: a chunk's cells must hold no stored runs; its key hashes are handed to
        the cell helper (`summing`), which hashes them off this thread."""
        if not self.quick:
            return
        if self.stored.overlaps(solver, instance):
            raise StartOver()  # runs of this campaign already sit in some of these cells
        summing.add_keys(self.hashes, solver, instance, seed, replicate)

    def free(self, solver: np.ndarray, instance: np.ndarray, seed: np.ndarray,
             replicate: np.ndarray) -> np.ndarray | None:
        """An exact load: the runs no retracted run holds the key of (None: all of them)."""
        return None if self.held is None else self.held.free(solver, instance, seed, replicate)

    def proved(self, summing) -> None:
        """A quick load, once the cell helper has seen every chunk: no key hash twice."""
        if self.quick and summing.repeated:
            raise StartOver()  # a run may appear twice in the file: find it exactly

    def close(self) -> None:
        """Before the commit: the key index goes (it was the load's alone)."""
        if self.exact:
            campaign_key(self.conn, self.campaign_id, create=False)


def campaign_key(conn, campaign_id: int, create: bool) -> None:
    """SQLite, an exact load: a unique index on the live run keys of this one campaign, made when
    the load starts and dropped before it commits (a partial index: the campaign's live runs
    only, so its cost follows the campaign, not the warehouse). INSERT OR IGNORE then leaves out
    each run the campaign holds already, and `write.report_conflicts` names them. Live runs only: a
    reload into its own campaign shares keys with its retracted runs (`load --again`), so the
    retracted runs could not be under a unique index; the load keeps their keys with
    `RetractedKeys` instead. Made and dropped inside the load's transaction: a load that fails
    or dies leaves no trace of it."""
    if create:
        conn.exec_driver_sql(f'CREATE UNIQUE INDEX "{LOAD_KEY}" ON runs (campaign_id, solver_id, instance_id, seed, '
                             f'replicate) WHERE campaign_id = {int(campaign_id)} AND retraction_id IS NULL')
    else:
        conn.exec_driver_sql(f'DROP INDEX "{LOAD_KEY}"')


class StoredCells:
    """The cells (solver, instance) of a campaign that hold runs already, live or retracted: a
    run of the file in one of them may be stored already, and the load then starts over exactly.
    The retracted runs of `chain` (the imports a reload replaces, all wholly retracted) hold no
    keys for the load and are left out. A campaign new to the warehouse holds none, and costs
    one query."""

    def __init__(self, conn, campaign_id: int, chain: tuple[int, ...] = ()):
        C, R = S.cell_stats, S.runs
        codes: list[np.ndarray] = []
        live = conn.execute(select(C.c.solver_id, C.c.instance_id).where(C.c.campaign_id == campaign_id).distinct()).all()
        gone = conn.execute(select(R.c.solver_id, R.c.instance_id)
                            .where(R.c.retraction_id.is_not(None), R.c.campaign_id == campaign_id,
                                   *([R.c.import_id.not_in(chain)] if chain else [])).distinct()).all()
        for rows in (live, gone):
            if rows:
                a = np.asarray(rows, dtype=np.int64)
                codes.append(self._code(a[:, 0], a[:, 1]))
        self.codes = np.unique(np.concatenate(codes)) if codes else None

    @staticmethod
    def _code(solver: np.ndarray, instance: np.ndarray) -> np.ndarray:
        return (solver.astype(np.int64) << 32) | instance.astype(np.int64)

    def overlaps(self, solver: np.ndarray, instance: np.ndarray) -> bool:
        if self.codes is None:
            return False
        return bool(np.isin(self._code(solver, instance), self.codes).any())


class RunHashes:
    """A 64-bit hash of each run's key (solver, instance, seed, replicate) as the file goes by;
    at its end, two equal hashes mean the same run may appear twice (or, once in a few billion
    billion pairs, two runs share a hash). Either way the exact load decides."""

    def __init__(self, expected: int = 0):
        # one array, filled as the file goes by and sorted in place at its end: 8 bytes a run
        # (the file's line count is known from the first pass; it grows if a file holds more)
        self.h = np.empty(max(int(expected), 1024), dtype=np.uint64)
        self.n = 0

    @staticmethod
    def _mix(z: np.ndarray) -> np.ndarray:
        # splitmix64's finalizer (constants from memory of Steele, Lea and Flood 2014; the tests only need
        # it to spread keys): each input bit moves every output bit
        z = z + np.uint64(0x9E3779B97F4A7C15)
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        return z ^ (z >> np.uint64(31))

    @classmethod
    def of(cls, solver: np.ndarray, instance: np.ndarray, seed: np.ndarray, replicate: np.ndarray) -> np.ndarray:
        """Each run's key hash."""
        with np.errstate(over="ignore"):
            h = cls._mix(np.asarray(solver).astype(np.uint64))
            for part in (instance, seed, replicate):
                h = cls._mix(h ^ np.asarray(part).astype(np.int64).view(np.uint64))
        return h

    def add(self, solver: np.ndarray, instance: np.ndarray, seed: np.ndarray, replicate: np.ndarray) -> None:
        h = self.of(solver, instance, seed, replicate)
        if self.n + len(h) > len(self.h):
            self.h = np.resize(self.h, max(2 * len(self.h), self.n + len(h)))
        self.h[self.n:self.n + len(h)] = h
        self.n += len(h)

    def repeated(self) -> bool:
        h = self.h[:self.n]
        h.sort()
        return bool((h[1:] == h[:-1]).any())


class RetractedKeys:
    """SQLite, an exact load: the keys the campaign's retracted runs hold (the runs of `chain`,
    the imports a reload replaces, hold none). The load's key index covers live runs only
    (`campaign_key`), so a run of the file under one of these keys is kept out before it is
    written, and reported skipped as one the index refused. Retracted runs are few
    (ix_runs_withdrawn finds them); a campaign with none costs one query. The keys are kept as
    numbers sorted by their hash (40 bytes a run), not as Python tuples: a reload's campaign may
    hold a large import's retracted runs."""

    def __init__(self, conn, campaign_id: int, chain: tuple[int, ...] = ()):
        R = S.runs
        found = conn.execute(select(R.c.solver_id, R.c.instance_id, R.c.seed, R.c.replicate).where(
            R.c.retraction_id.is_not(None), R.c.campaign_id == campaign_id,
            *([R.c.import_id.not_in(chain)] if chain else []))).all()
        self.hashes = self.keys = None
        if found:
            keys = np.asarray(found, dtype=np.int64)
            h = RunHashes.of(keys[:, 0], keys[:, 1], keys[:, 2], keys[:, 3])
            order = np.argsort(h, kind="stable")
            self.hashes, self.keys = h[order], keys[order]

    def free(self, solver: np.ndarray, instance: np.ndarray, seed: np.ndarray,
             replicate: np.ndarray) -> np.ndarray | None:
        """Which runs no retracted run holds the key of; None when that is all of them."""
        if self.hashes is None:
            return None
        h = RunHashes.of(solver, instance, seed, replicate)
        lo = np.searchsorted(self.hashes, h, side="left")
        hi = np.searchsorted(self.hashes, h, side="right")
        maybe = np.flatnonzero(hi > lo)
        if not len(maybe):
            return None
        # a hash met is checked on the key itself (two keys may share a hash, once in 10^19)
        mine = np.stack([np.asarray(a, dtype=np.int64)[maybe] for a in (solver, instance, seed, replicate)], axis=1)
        taken = (self.keys[lo[maybe]] == mine).all(axis=1)
        for j in np.flatnonzero(~taken & (hi[maybe] - lo[maybe] > 1)).tolist():
            taken[j] = bool((self.keys[lo[maybe[j]]:hi[maybe[j]]] == mine[j]).all(axis=1).any())
        if not taken.any():
            return None
        free = np.ones(len(h), dtype=bool)
        free[maybe[taken]] = False
        return free
