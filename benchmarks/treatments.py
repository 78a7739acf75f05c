"""Many treatments and cold starts (issue 19): every target as a ratio measured in the same run.

    python benchmarks/treatments.py                    # 1M runs at 5 and 170 treatments, 4M runs at 670
    python benchmarks/treatments.py --quick            # a tenth of the runs (for a laptop; not the targets)
    python benchmarks/treatments.py --workdir /work/t  # keep the files and warehouses for the next run

The workloads (benchmarks/common.write_campaign; 100 blocks each, one campaign per file):

  few     1,000,000 runs:   5 treatments x 20,000 instances x 10 seeds
  many    1,020,000 runs: 170 treatments x  1,200 instances x  5 seeds
  more    4,020,000 runs: 670 treatments x  1,200 instances x  5 seeds

Each file is loaded into a warehouse of its own (peak memory of each load is kept). Then, in
--rounds interleaved rounds, each a fresh process (the machine is shared: only ratios within a
round mean anything, and the median of the rounds' own ratios is printed beside the best):

  blockyard   `blockyard blocktest --slice campaign=C --metric pallets --json`, no resident
  pandas      pandas + statsmodels re-reading the CSV file (benchmarks/scale.py's script)
  duckdb      DuckDB collapsing the CSV file in SQL, then the same statsmodels fit and checks
              (needs the `bench` extra: pip install -e '.[bench]')

and in one process with the libraries imported (as the shell and the resident run it): the
analysis alone and the ledger's recording of it. Last, start-up: `blockyard --help` and
`blockyard inventory` against `python -c pass`. It prints; it never asserts.
"""
from __future__ import annotations

import argparse
import shutil
import statistics
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from common import PY, blockyard, peak_rss_mib, timed, write_campaign  # noqa: E402
from scale import NAIVE_ANALYSIS  # noqa: E402

DUCKDB_ANALYSIS = r'''
import sys
import duckdb
import scipy.stats as ss
import statsmodels.formula.api as smf
from statsmodels.stats.anova import anova_lm
campaign, files = sys.argv[1], sys.argv[2:]
con = duckdb.connect()
obs = con.execute("""
    WITH r AS (SELECT solver || '@' || CAST(version AS VARCHAR) AS treatment, family || '/' || "group" AS block,
                      instance, pallets
               FROM read_csv(?, header = true) WHERE campaign = ? AND status = 'ok'),
         cell AS (SELECT treatment, block, instance, avg(pallets) AS pallets FROM r GROUP BY ALL)
    SELECT treatment, block, avg(pallets) AS pallets FROM cell GROUP BY ALL ORDER BY ALL""",
    [files, campaign]).df()
fit = smf.ols("pallets ~ C(treatment) + C(block)", obs).fit()
print(anova_lm(fit))
print(ss.shapiro(fit.resid))
wide = obs.pivot(index="block", columns="treatment", values="pallets").dropna()
print(ss.friedmanchisquare(*[wide[c] for c in wide.columns]))
'''

# the analysis and its recording timed apart, in one process that has imported everything (the
# first run is not timed); the ledger's share is recording / analysis of the same run
WARM = r'''
import io, statistics, sys, time
from warehouse.front.cli import run
import warehouse.analyses as A
import warehouse.ledger as L
spent = {}
def timed(name, fn):
    def call(*a, **k):
        t = time.perf_counter()
        try:
            return fn(*a, **k)
        finally:
            spent[name] = time.perf_counter() - t
    return call
A.run_blocktest = timed("analysis", A.run_blocktest)
L.record = timed("record", L.record)
args = ["-w", sys.argv[1], "blocktest", "--slice", sys.argv[2], "--metric", "pallets", "--json"]
run(args, out=io.StringIO())
rows = []
for _ in range(int(sys.argv[3])):
    t = time.perf_counter()
    run(args, out=io.StringIO())
    rows.append((time.perf_counter() - t, spent["analysis"], spent["record"]))
print(min(r[0] for r in rows), statistics.median(r[2] / r[1] for r in rows))
'''

WORKLOADS = {  # name: (runs, treatments, seeds, night)
    "few": (1_000_000, 5, 10, 21),
    "many": (1_020_000, 170, 5, 22),
    "more": (4_020_000, 670, 5, 23),
}


def median(xs):
    return statistics.median(xs) if xs else float("nan")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="a tenth of the runs (the targets are for the full sizes)")
    ap.add_argument("--workdir", help="where to keep files and warehouses (default: a temporary folder, removed after)")
    ap.add_argument("--rounds", type=int, default=3, help="interleaved rounds of the whole-process comparisons")
    ap.add_argument("--repeat", type=int, default=3, help="runs of each analysis inside the warm process")
    a = ap.parse_args()
    scale = 10 if a.quick else 1
    work = Path(a.workdir) if a.workdir else Path(tempfile.mkdtemp(prefix="blockyard-treatments-"))
    work.mkdir(parents=True, exist_ok=True)
    try:
        import duckdb  # noqa: F401
        have_duckdb = True
    except ImportError:
        have_duckdb = False
        print("duckdb is not installed (pip install -e '.[bench]'): its reference is left out")

    files, dbs, mem = {}, {}, {}
    for name, (runs, treatments, seeds, night) in WORKLOADS.items():
        f = work / f"{name}-{runs // scale}.csv"
        if not f.exists():
            write_campaign(f, runs // scale, night, treatments=treatments, seeds=seeds)
        db = work / f"{name}-{runs // scale}.db"
        if not db.exists():
            blockyard("init", "-w", str(db))
            mem[name] = peak_rss_mib([PY, "-m", "warehouse", "load", str(f), "--campaign", f"night-{night}",
                                      "-w", str(db)])
        files[name], dbs[name] = f, db
    print(f"treatments benchmark: files and warehouses in {work}")

    # 1. cold blocktest against the two scripts, interleaved
    slice_of = {name: f"campaign=night-{WORKLOADS[name][3]}" for name in WORKLOADS}
    rounds: dict[str, list[tuple[float, float, float]]] = {"few": [], "many": []}
    more_cold = []
    for _ in range(max(1, a.rounds)):
        for name in ("few", "many"):
            camp = slice_of[name].split("=", 1)[1]
            t_by = blockyard("blocktest", "--slice", slice_of[name], "--metric", "pallets", "--json",
                             "-w", str(dbs[name]))[0]
            t_pd = timed([PY, "-c", NAIVE_ANALYSIS, camp, str(files[name])])[0]
            t_dd = timed([PY, "-c", DUCKDB_ANALYSIS, camp, str(files[name])])[0] if have_duckdb else float("nan")
            rounds[name].append((t_by, t_pd, t_dd))
        more_cold.append(blockyard("blocktest", "--slice", slice_of["more"], "--metric", "pallets", "--json",
                                   "-w", str(dbs["more"]))[0])
    print(f"\n1. cold blocktest (no resident), whole processes, {len(rounds['few'])} interleaved rounds")
    for name in ("few", "many"):
        runs, k = WORKLOADS[name][0] // scale, WORKLOADS[name][1]
        rs = rounds[name]
        best = [min(r[i] for r in rs) for i in range(3)]
        pd_r = [r[0] / r[1] for r in rs]
        dd_r = [r[0] / r[2] for r in rs]
        print(f"   {runs:,} runs, {k} treatments: blockyard {best[0]:5.2f} s, pandas script {best[1]:5.2f} s, "
              f"duckdb script {best[2]:5.2f} s")
        print(f"      / pandas + statsmodels: best {best[0] / best[1]:5.3f}, median of rounds {median(pd_r):5.3f} "
              f"({', '.join(f'{x:.2f}' for x in pd_r)})  (target <= 0.5)")
        print(f"      / duckdb + statsmodels: best {best[0] / best[2]:5.3f}, median of rounds {median(dd_r):5.3f} "
              f"({', '.join(f'{x:.2f}' for x in dd_r)})  (target <= 0.6)")

    # 2. growth with treatments: 170 -> 670 treatments, 1M -> 4M runs
    warm = {}
    for name in ("few", "many", "more"):
        out = timed([PY, "-c", WARM, str(dbs[name]), slice_of[name], str(a.repeat)])[2].split()
        warm[name] = (float(out[0]), float(out[1]))
    cold_many = min(r[0] for r in rounds["many"])
    cold_more = min(more_cold)
    runs_ratio = WORKLOADS["more"][0] / WORKLOADS["many"][0]
    print(f"\n2. whole-data blocktest, {WORKLOADS['many'][0] // scale:,} runs / 170 treatments -> "
          f"{WORKLOADS['more'][0] // scale:,} runs / 670 treatments ({runs_ratio:.2f}x the runs, "
          f"{670 / 170:.2f}x the treatment x block cells)")
    print(f"   cold process   {cold_many:6.2f} s -> {cold_more:6.2f} s   growth {cold_more / cold_many:5.2f}x  (target <= 4.4)")
    print(f"   warm process   {warm['many'][0]:6.2f} s -> {warm['more'][0]:6.2f} s   growth "
          f"{warm['more'][0] / warm['many'][0]:5.2f}x  (target <= 4.4)")

    # 3. the ledger's share
    print("\n3. recording the analysis in the ledger / the analysis (warm process, median of "
          f"{a.repeat} runs; target <= 0.1)")
    for name in ("few", "many", "more"):
        print(f"   {WORKLOADS[name][0] // scale:>9,} runs, {WORKLOADS[name][1]:3d} treatments: {warm[name][1]:6.3f}"
              f"   (the whole warm blocktest {warm[name][0]:5.2f} s)")

    # 4. start-up
    base, help_, inv = [], [], []
    for _ in range(7):
        base.append(timed([PY, "-c", "pass"])[0])
        help_.append(blockyard("--help")[0])
        inv.append(blockyard("inventory", "-w", str(dbs["many"]))[0])
    b = min(base)
    print(f"\n4. start-up, best of 7 interleaved, against python -c pass ({b * 1000:.0f} ms)")
    print(f"   blockyard --help      {min(help_) * 1000:5.0f} ms   ratio {min(help_) / b:4.2f}  (target <= 3)")
    print(f"   blockyard inventory   {min(inv) * 1000:5.0f} ms   ratio {min(inv) / b:4.2f}  (target <= 3)")

    # 5. load memory
    if mem:
        print("\n5. peak memory of the loads (a fresh warehouse each)")
        for name, mib in mem.items():
            print(f"   {WORKLOADS[name][0] // scale:>9,} runs, {WORKLOADS[name][1]:3d} treatments: {mib:5d} MiB")
        if "many" in mem and "more" in mem:
            d_runs = (WORKLOADS["more"][0] - WORKLOADS["many"][0]) // scale
            slope = (mem["more"] - mem["many"]) / (d_runs / 1e6)
            print(f"   ratio {mem['more'] / mem['many']:4.2f} for {runs_ratio:.2f}x the runs; slope "
                  f"{slope:.0f} MiB per million runs (target: within 1.15x and under 700 MiB)")
    else:
        print("\n5. peak memory of the loads: the warehouses were there already (remove them to measure)")
    if not a.workdir:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
