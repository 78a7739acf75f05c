"""A file's cell summaries (schema.cell_stats rows), summed chunk by chunk with numpy.

A cell is one (solver, instance, host) of one import, per metric slot. Each chunk is reduced to
its cells at once (sorting by cell, then numpy's reduceat), and the reduced cells of successive
chunks are merged again whenever they pile up, so memory follows the number of cells, never the
number of runs. The rows are the ones store.cells.write_rows takes, column for column.
"""
from __future__ import annotations

import numpy as np

from ..store import cells

INTS = ("n", "n_ok", "n_fail", "n_fail_v", "id_sum", "id_max")
FLOATS = ("sum_ok", "sq_ok", "min_ok", "max_ok", "sum_fail_v")
MERGE_AT = 200_000  # reduced cell rows kept per slot before they are merged again


def _groups(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sort order, group starts and the distinct key rows of an (n, 3) int64 key table."""
    order = np.lexsort(keys.T[::-1])
    sk = keys[order]
    change = np.ones(len(sk), dtype=bool)
    change[1:] = np.any(sk[1:] != sk[:-1], axis=1)
    starts = np.flatnonzero(change)
    return order, starts, sk[starts]


class CellSums:
    def __init__(self):
        self.parts: dict[int, list[tuple[np.ndarray, dict[str, np.ndarray]]]] = {}
        self.sizes: dict[int, int] = {}

    def add(self, ids: np.ndarray, solver: np.ndarray, instance: np.ndarray, host: np.ndarray,
            status: np.ndarray, values: dict[int, np.ndarray]) -> None:
        """One chunk's written runs: ids, cell keys (host -1 for none), status codes, values per slot."""
        if len(ids) == 0:
            return
        keys = np.stack([solver.astype(np.int64), instance.astype(np.int64), host.astype(np.int64)], axis=1)
        order, starts, cell_keys = _groups(keys)
        ok_status = (status == 0)[order]
        bad = ~ok_status
        ids_o = ids.astype(np.int64)[order]
        common = {
            "n": np.diff(np.append(starts, len(order))).astype(np.int64),
            "n_fail": np.add.reduceat(bad.astype(np.int64), starts),
            "id_sum": np.add.reduceat(ids_o, starts),
            "id_max": np.maximum.reduceat(ids_o, starts),
        }
        for slot, v in values.items():
            v = np.asarray(v, dtype=np.float64)[order]
            has = ~np.isnan(v)
            ok = ok_status & has
            failed_v = bad & has
            v0 = np.where(has, v, 0.0)
            stats = dict(common)
            stats.update(
                n_ok=np.add.reduceat(ok.astype(np.int64), starts),
                n_fail_v=np.add.reduceat(failed_v.astype(np.int64), starts),
                sum_ok=np.add.reduceat(np.where(ok, v0, 0.0), starts),
                sq_ok=np.add.reduceat(np.where(ok, v0 * v0, 0.0), starts),
                min_ok=np.minimum.reduceat(np.where(ok, v0, np.inf), starts),
                max_ok=np.maximum.reduceat(np.where(ok, v0, -np.inf), starts),
                sum_fail_v=np.add.reduceat(np.where(failed_v, v0, 0.0), starts),
            )
            self.parts.setdefault(slot, []).append((cell_keys, stats))
            self.sizes[slot] = self.sizes.get(slot, 0) + len(cell_keys)
            if self.sizes[slot] > MERGE_AT and len(self.parts[slot]) > 1:
                self._merge(slot)

    def _merge(self, slot: int) -> None:
        parts = self.parts[slot]
        keys = np.concatenate([p[0] for p in parts])
        order, starts, cell_keys = _groups(keys)
        merged = {}
        for name in INTS + FLOATS:
            col = np.concatenate([p[1][name] for p in parts])[order]
            if name in ("min_ok",):
                merged[name] = np.minimum.reduceat(col, starts)
            elif name in ("max_ok", "id_max"):
                merged[name] = np.maximum.reduceat(col, starts)
            else:
                merged[name] = np.add.reduceat(col, starts)
        self.parts[slot] = [(cell_keys, merged)]
        self.sizes[slot] = len(cell_keys)

    def rows(self, campaign_id: int, import_id: int) -> list[tuple]:
        out: list[tuple] = []
        for slot in sorted(self.parts):
            self._merge(slot)
            keys, s = self.parts[slot][0]
            m = len(keys)

            def maybe(values: np.ndarray, present: np.ndarray) -> list:
                obj = values.astype(object)
                obj[~present] = None
                return obj.tolist()

            has_ok = s["n_ok"] > 0
            host = keys[:, 2]
            columns = {
                "campaign_id": [int(campaign_id)] * m, "import_id": [int(import_id)] * m,
                "solver_id": keys[:, 0].tolist(), "instance_id": keys[:, 1].tolist(),
                "host_id": maybe(host, host >= 0), "slot": [int(slot)] * m,
                "sum_ok": maybe(s["sum_ok"], has_ok), "sq_ok": maybe(s["sq_ok"], has_ok),
                "min_ok": maybe(s["min_ok"], has_ok), "max_ok": maybe(s["max_ok"], has_ok),
                "sum_fail_v": maybe(s["sum_fail_v"], s["n_fail_v"] > 0),
            }
            for name in INTS:
                columns[name] = s[name].tolist()
            out.extend(zip(*(columns[c] for c in cells.COLUMNS)))
        return out
