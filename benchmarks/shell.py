"""How quickly the shell starts and completes on a large warehouse.

    python benchmarks/shell.py                      # builds a 1,000,000-run warehouse in a temp folder
    python benchmarks/shell.py --runs 200000
    python benchmarks/shell.py --warehouse big.db   # reuse it (built there first if it does not exist)

The warehouse is built through the real path: a generated campaign file, then `blockyard init`
and `blockyard load` as their own processes. Then, each as a fresh process, best of --repeat:

  python -c pass        the floor: an interpreter that does nothing
  blockyard --version   the command line's own start-up, for reference
  prompt ready          run_shell on the warehouse with a pipe as its terminal, until the first
                        prompt is drawn (the focus count runs behind it, in its thread)
  shell script          `blockyard shell WAREHOUSE` with `exit` piped in (no prompt, no count)

and, in this process, the completion latency: 50 get_completions calls for each of
`focus solver=`, `focus version>=` and `focus family=` (median and worst, ms), and the time of a
focus change (its one counting query, from the cell summaries where the slice allows, else on the
runs). It prints; it never asserts.
"""
from __future__ import annotations

import argparse
import io
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PY = sys.executable
ENV = {**os.environ, "PYTHONPATH": str(ROOT), "BLOCKYARD_HISTORY": os.devnull}


# the child that measures time to the first prompt: wall-clock stamp when the prompt app starts
PROMPT_READY = r"""
import sys, time
from prompt_toolkit import PromptSession
from prompt_toolkit.input import create_pipe_input
from prompt_toolkit.output import DummyOutput
stamp = []
original = PromptSession.prompt
def prompt(self, *a, **k):
    if not stamp:
        k["pre_run"] = lambda: stamp.append(time.time())
    return original(self, *a, **k)
PromptSession.prompt = prompt
import io
from warehouse.commands.session import Session
from warehouse.front.shell.loop import run_shell
with create_pipe_input() as inp:
    inp.send_text("exit\n")
    run_shell(Session(sys.argv[1]), input=inp, output=DummyOutput(), out=io.StringIO())
print(f"{stamp[0]:.6f}")
"""


def write_campaign(path: Path, runs: int, seed: int = 11) -> None:
    """`runs` runs: 12 treatments over 4 families x 6 groups x 40 instances, as many seeds as it takes."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.csv as pacsv

    rng = np.random.default_rng(seed)
    treatments = [(s, v) for s in ("stacker", "packwell", "tetra") for v in ("1.4", "1.5", "1.6", "2.0")]
    families = np.array(["mixed-sku", "uniform-cartons", "fragile-top", "oversize"])
    n_inst = 4 * 6 * 40
    idx = np.arange(runs, dtype=np.int64)
    per_seed = len(treatments) * n_inst
    seed_no = idx // per_seed + 1
    t = (idx % per_seed) // n_inst
    inst = idx % n_inst
    group = inst % 24
    status = np.where(rng.random(runs) < 0.02, "timeout", "ok")
    base = 20 + group * 0.7
    pallets = np.round(base * (1 - 0.005 * (t % 4)) + rng.normal(0, 0.6, runs), 2)
    pallets = np.where(status == "ok", pallets, np.nan)
    table = pa.table({
        "solver": np.array([s for s, _ in treatments])[t], "version": np.array([v for _, v in treatments])[t],
        "family": families[group % 4], "group": np.char.add("g", (group // 4 + 1).astype(str)),
        "instance": np.char.add("inst-", inst.astype(str)), "seed": seed_no, "status": status,
        "finished_at": np.full(runs, "2026-11-02T03:00:00Z"),
        "host": np.array(["rack-a", "rack-b", "rack-c"])[idx % 3],
        "pallets": pa.array(pallets, mask=np.isnan(pallets)),
        "fill_pct": np.round(80 + rng.normal(0, 3, runs), 2),
        "seconds": np.round(np.abs(rng.normal(10, 2, runs)), 3),
    })
    pacsv.write_csv(table, str(path), pacsv.WriteOptions(quoting_style="none"))


def blockyard(*argv: str, stdin: str | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([PY, "-m", "warehouse", *argv], capture_output=True, text=True, input=stdin,
                          cwd=ROOT, env=ENV)


def build(db: Path, runs: int) -> None:
    work = db.parent
    work.mkdir(parents=True, exist_ok=True)
    src, layout = work / "shell-bench.csv", work / "shell-bench.toml"
    print(f"building {db} with {runs:,} runs through blockyard load ...")
    t = time.perf_counter()
    write_campaign(src, runs)
    from warehouse.demo.scenario import RACK_A_LAYOUT  # the demo declares these three metrics already

    layout.write_text(RACK_A_LAYOUT)
    for argv in (["init", "-w", str(db)], ["load", str(src), "--campaign", "bench", "--layout", str(layout), "-w", str(db)]):
        r = blockyard(*argv)
        if r.returncode:
            raise SystemExit(f"benchmark: blockyard {argv[0]} failed: {(r.stderr or r.stdout).strip()[:400]}")
    src.unlink()
    print(f"  built in {time.perf_counter() - t:.1f} s")


def best_wall(cmd: list[str], repeat: int, stdin: str | None = None) -> float:
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        subprocess.run(cmd, capture_output=True, input=stdin, text=True, cwd=ROOT, env=ENV)
        times.append(time.perf_counter() - t)
    return min(times)


def prompt_ready(db: Path, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t = time.time()
        r = subprocess.run([PY, "-c", PROMPT_READY, str(db)], capture_output=True, text=True, cwd=ROOT, env=ENV)
        if r.returncode or not r.stdout.strip():
            print(f"  (prompt-ready child failed: {r.stderr.strip()[-300:]})")
            return float("nan")
        times.append(float(r.stdout.strip().splitlines()[-1]) - t)
    return min(times)


def completion_latency(db: Path) -> dict:
    from prompt_toolkit.document import Document

    from warehouse.commands.session import Session
    from warehouse.front.shell.loop import Shell

    session = Session(location=str(db))
    t = time.perf_counter()
    sh = Shell(session, out=io.StringIO())
    sh.start(count=False)
    started = time.perf_counter() - t
    completer = sh.completer
    rows = {}
    for text in ("focus solver=", "focus version>=", "focus family="):
        samples = []
        for _ in range(50):
            doc = Document(text, len(text))
            t = time.perf_counter()
            got = list(completer.get_completions(doc, None))
            samples.append((time.perf_counter() - t) * 1000)
        rows[text] = (statistics.median(samples), max(samples), len(got))
    t = time.perf_counter()
    sh.execute("focus solver=stacker family=oversize")
    focus = time.perf_counter() - t
    t = time.perf_counter()
    sh.execute("focus status=ok")
    on_runs = time.perf_counter() - t
    t = time.perf_counter()
    sh.session.focus = ""
    sh.summarize()
    count_all = time.perf_counter() - t
    session.close()
    return {"rows": rows, "start": started, "focus": focus, "on_runs": on_runs, "count_all": count_all}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=1_000_000, help="runs in the warehouse built (default 1,000,000)")
    ap.add_argument("--warehouse", help="use this warehouse (built there first when it does not exist)")
    ap.add_argument("--repeat", type=int, default=5, help="start-ups timed per measurement; the best is shown")
    a = ap.parse_args()

    tmp = None
    if a.warehouse:
        db = Path(a.warehouse).resolve()
        if not db.exists():
            build(db, a.runs)
    else:
        tmp = tempfile.TemporaryDirectory(prefix="blockyard-shell-bench-")
        db = Path(tmp.name) / "bench.db"
        build(db, a.runs)
    r = blockyard("inventory", "--json", "-w", str(db))
    runs = __import__("json").loads(r.stdout).get("runs", "?") if r.returncode == 0 else "?"
    print(f"warehouse {db} ({runs if isinstance(runs, str) else f'{runs:,}'} runs)")

    floor = best_wall([PY, "-c", "pass"], a.repeat)
    cli = best_wall([PY, "-m", "warehouse", "--version"], a.repeat)
    ready = prompt_ready(db, a.repeat)
    script = best_wall([PY, "-m", "warehouse", "shell", str(db)], a.repeat, stdin="exit\n")
    print("\nstart-up (best of %d, wall clock)" % a.repeat)
    print(f"  python -c pass          {floor * 1000:7.0f} ms")
    print(f"  blockyard --version     {cli * 1000:7.0f} ms   {cli / floor:5.1f} x python -c pass")
    print(f"  shell, prompt ready     {ready * 1000:7.0f} ms   {ready / floor:5.1f} x python -c pass")
    print(f"  shell, piped 'exit'     {script * 1000:7.0f} ms   {script / floor:5.1f} x python -c pass")

    lat = completion_latency(db)
    print("\ncompletion (50 get_completions calls each, from the cached snapshot)")
    for text, (med, worst, n) in lat["rows"].items():
        print(f"  {text:<18} median {med:6.3f} ms   worst {worst:6.3f} ms   ({n} candidates)")
    print("\nfocus counting (one query; at start-up it runs in a thread behind the prompt)")
    print(f"  Shell.start (snapshot of names)           {lat['start'] * 1000:6.0f} ms")
    print(f"  focus solver=stacker family=oversize      {lat['focus'] * 1000:6.0f} ms   (cell summaries)")
    print(f"  count of everything                       {lat['count_all'] * 1000:6.0f} ms   (cell summaries)")
    print(f"  focus status=ok                           {lat['on_runs'] * 1000:6.0f} ms   (on the runs: status is not in the cells)")
    if tmp is not None:
        tmp.cleanup()


if __name__ == "__main__":
    main()
