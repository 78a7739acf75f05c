"""The demo: an invented parcel-logistics team tuning `stacker`, a pallet-loading heuristic.

Generates campaign files in two layouts (CSV from rack-a, JSON Lines from rack-b), loads them into a
SQLite warehouse and walks the main job. Every number here is invented for the demo only.
"""
from __future__ import annotations

import json
from pathlib import Path

FAMILIES = {"mixed-sku": 5, "uniform-cartons": 4, "fragile-top": 6, "oversize": 4}
INSTANCES_PER_GROUP = 3
SEEDS = 5
# multiplicative effect on pallets per variant (below 1: fewer pallets), and on seconds
VARIANTS = {"1.4": (1.000, 1.00), "1.5": (0.992, 1.05), "1.6": (0.955, 1.30), "1.6-greedy": (1.012, 0.45)}
# a variant that times out far more often on one family: the greedy build gives up on oversize
# loads (the share of its runs there that time out); the failures part of versus should catch it
WEAK_SPOT = {"1.6-greedy": ("oversize", 0.6)}

RACK_A_LAYOUT = '''# rack-a writes our own column names; this layout only declares the metrics
[metrics.pallets]
sense = "min"
unit = "pallets"

[metrics.fill_pct]
sense = "max"
unit = "%"

[metrics.seconds]
sense = "min"
unit = "s"
'''

RACK_B_LAYOUT = '''# rack-b's exporter writes its own names and status words
[columns]
algo = "solver"
release = "version"
path = "instance"
rng = "seed"
outcome = "status"
ended = "finished_at"
machine = "host"
pallets_used = "pallets"
fill = "fill_pct"
wall_s = "seconds"

[status]
SOLVED = "ok"
TIME_LIMIT = "timeout"
CRASH = "failed"

[group]
pattern = '^(?P<family>[^/]+)/(?P<group>[^/]+)/(?P<instance>.+)$'

[metrics.pallets]
sense = "min"
unit = "pallets"

[metrics.fill_pct]
sense = "max"
unit = "%"

[metrics.seconds]
sense = "min"
unit = "s"
'''


def _rows(rng, version: str, groups: dict, host: str, day: str, timeout_rate: float, bug: float = 1.0):
    pal_f, sec_f = VARIANTS[version]
    weak_family, weak_rate = WEAK_SPOT.get(version, (None, 0.0))
    host_f = 1.25 if host == "rack-b" else 1.0
    for family, n_groups in FAMILIES.items():
        fam_base = {"mixed-sku": 38, "uniform-cartons": 22, "fragile-top": 30, "oversize": 45}[family]
        for g in range(1, n_groups + 1):
            if (family, g) not in groups:
                continue
            size = fam_base * (0.6 + 0.25 * g)  # larger orders, more pallets
            for i in range(1, INSTANCES_PER_GROUP + 1):
                inst = f"{family}-g{g}-{i:02d}"
                inst_base = size * (1 + 0.04 * ((i * 7919 + g * 31) % 5 - 2))
                for seed in range(1, SEEDS + 1):
                    status = "ok"
                    # one draw per run whatever the rate, so the other runs keep their numbers
                    rate = weak_rate if family == weak_family else timeout_rate * (1.5 if family == "oversize" else 0.5)
                    if timeout_rate and rng.random() < rate:
                        status = "timeout"
                    pallets = round(inst_base * pal_f * bug * (1 + rng.normal(0, 0.015)))
                    fill = min(99.5, 100 * 0.82 * inst_base / max(pallets, 1) * (1 + rng.normal(0, 0.01)))
                    secs = 0.8 * size * sec_f * host_f * (1 + rng.normal(0, 0.08))
                    hh = 1 + (seed * 3 + i + g) % 20
                    yield dict(solver="stacker", version=version, family=family, group=f"g{g}",
                               instance=inst, seed=seed, status=status,
                               finished_at=f"{day}T{hh:02d}:{(seed * 11) % 60:02d}:00Z", host=host,
                               pallets=pallets if status == "ok" else "", fill_pct=round(fill, 2) if status == "ok" else "",
                               seconds=round(secs if status == "ok" else 60.0, 3))


def _all_groups(skip=()):
    return {(f, g) for f, n in FAMILIES.items() for g in range(1, n + 1)} - set(skip)


def _write_csv(path: Path, rows) -> int:
    import csv

    rows = list(rows)
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    return len(rows)


def _write_jsonl(path: Path, rows) -> int:
    n = 0
    status_word = {"ok": "SOLVED", "timeout": "TIME_LIMIT", "failed": "CRASH"}
    with open(path, "w", encoding="utf-8") as fh:
        for r in rows:
            rec = {"algo": r["solver"], "release": r["version"], "path": f"{r['family']}/{r['group']}/{r['instance']}",
                   "rng": r["seed"], "outcome": status_word[r["status"]], "ended": r["finished_at"],
                   "machine": r["host"], "pallets_used": r["pallets"] if r["pallets"] != "" else None,
                   "fill": r["fill_pct"] if r["fill_pct"] != "" else None, "wall_s": r["seconds"]}
            fh.write(json.dumps(rec) + "\n")
            n += 1
    return n


def generate(folder: Path) -> dict:
    """Write the demo's source files and layouts into folder/files; return what was written."""
    import numpy as np

    rng = np.random.default_rng(20261101)
    files = folder / "files"
    files.mkdir(parents=True, exist_ok=True)
    (files / "rack-a.toml").write_text(RACK_A_LAYOUT, encoding="utf-8")
    (files / "rack-b.toml").write_text(RACK_B_LAYOUT, encoding="utf-8")
    out = {}
    # October baseline: 1.4 on rack-a; fragile-top g5 and g6 were added to the suite later
    base_groups = _all_groups(skip=[("fragile-top", 5), ("fragile-top", 6)])
    out["oct-baseline.csv"] = _write_csv(files / "oct-baseline.csv",
                                         _rows(rng, "1.4", base_groups, "rack-a", "2026-10-14", 0.01))
    # November: 1.5 and 1.6 on rack-a (CSV); 1.6-greedy and a second 1.5 batch on rack-b (JSON Lines)
    nov = _all_groups()
    rows_a = list(_rows(rng, "1.5", {g for g in nov if g[0] in ("mixed-sku", "uniform-cartons")}, "rack-a", "2026-11-09", 0.02))
    rows_a += list(_rows(rng, "1.6", nov, "rack-a", "2026-11-10", 0.02))
    out["nov-rack-a.csv"] = _write_csv(files / "nov-rack-a.csv", rows_a)
    rows_b = list(_rows(rng, "1.6-greedy", nov, "rack-b", "2026-11-11", 0.05))
    out["nov-rack-b.jsonl"] = _write_jsonl(files / "nov-rack-b.jsonl", rows_b)
    # the batch that turns out to be buggy: 1.5 on rack-b, a build that mis-counted pallets
    rows_bug = list(_rows(rng, "1.5", {g for g in nov if g[0] in ("fragile-top", "oversize")}, "rack-b", "2026-11-12", 0.02, bug=0.93))
    out["nov-rack-b-extra.jsonl"] = _write_jsonl(files / "nov-rack-b-extra.jsonl", rows_bug)
    return out
