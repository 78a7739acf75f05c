"""Property-based fuzzing of the loaders, the slice parser and every command's arguments, and
text that looks like SQL staying plain data.

Generated inputs come from hypothesis (a bounded number of examples, no deadline, no example
database, derandomized so that a run is repeatable). The outcome of any input is a clean result
(exit 0) or exit 2 with a one-line reason; never a traceback, never exit 1 (an internal error),
never a partial load.
"""
from __future__ import annotations

import argparse
import csv
import gzip
import io
import itertools
import json
import shlex

import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from conftest import run_counts

from . import fresh_warehouse, in_process, one_line, raw_engine, runs_csv, sql, table_counts

FUZZ = dict(deadline=None, database=None, derandomize=True,
            suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow,
                                   HealthCheck.data_too_large, HealthCheck.filter_too_much])


# the quick runs report the first failing example as found (reproducible, being derandomized);
# the slow runs also shrink it to a small one
QUICK = dict(FUZZ, phases=(Phase.explicit, Phase.reuse, Phase.generate))


def examples(quick: int, slow: int):
    return settings(max_examples=quick, **QUICK), settings(max_examples=slow, **FUZZ)


# --- the loaders -------------------------------------------------------------------------------

class Loads:
    """Loads fuzzed files into one warehouse and checks each outcome against the stored counts."""

    def __init__(self, location, folder):
        self.location, self.folder = location, folder
        self.engine = raw_engine(location)
        self.n = itertools.count()
        self.outcomes: dict[str, int] = {}

    def counts(self) -> tuple[int, int, int | None]:
        from sqlalchemy import text

        with self.engine.connect() as c:
            runs = c.execute(text("SELECT count(*) FROM runs")).scalar()
            imports = c.execute(text("SELECT count(*) FROM imports")).scalar()
            last = c.execute(text("SELECT rows_loaded FROM imports ORDER BY id DESC LIMIT 1")).scalar()
        return runs, imports, last

    def load(self, suffix: str, data: bytes, flags: tuple[str, ...] = ()) -> None:
        path = self.folder / f"f{next(self.n)}{suffix}"
        path.write_bytes(data)
        runs, imports, _ = self.counts()
        res = in_process(self.location, "load", str(path), "--campaign", "fuzz", *flags)
        assert "Traceback" not in res.err and "Traceback" not in res.out, res
        assert res.code in (0, 2), res
        after_runs, after_imports, last = self.counts()
        if "--json" in flags:
            assert res.out.strip(), res  # --json always answers with a document
            doc = res.json()["imports"][0]
            status = doc["status"]
            assert (res.code == 2) == (status == "refused"), res
            if status == "loaded":
                assert (after_runs, after_imports) == (runs + doc["rows_loaded"], imports + 1)
                assert last == doc["rows_loaded"]
            else:
                assert (after_runs, after_imports) == (runs, imports), res
        elif res.code == 2:
            status = "refused"
            one_line(res.err)
            assert (after_runs, after_imports) == (runs, imports), res
        elif after_imports == imports:
            status = "duplicate"
            assert after_runs == runs
        else:
            status = "loaded"
            assert after_imports == imports + 1
            assert after_runs == runs + last  # the whole of what the import says it loaded, no more
        self.outcomes[status] = self.outcomes.get(status, 0) + 1

    def close(self):
        self.engine.dispose()


@pytest.fixture
def loads(location, tmp_path):
    # a first campaign, so that fuzzed files meet stored solvers, instances and metrics
    first = in_process(location, "load", runs_csv(tmp_path / "base.csv", 200, instances=10, seed=1), "--campaign", "base")
    assert first.code == 0, first
    (tmp_path / "fz").mkdir()
    box = Loads(location, tmp_path / "fz")
    yield box
    box.close()


UNDERFLOW = ("defect: on PostgreSQL a metric value near 1e-200 is accepted by the loader, but SQL that squares "
             "it fails with 'value out of range: underflow' (PostgreSQL documentation, Floating-Point Types: "
             "values too small cause an error, where IEEE 754 arithmetic gives 0): a load that also meets already-stored runs is refused (and with "
             "--json prints no document at all), and blocktest --replicates median|trimmed:F fails")

FLAGS = st.sampled_from([(), ("--json",), ("--skip-bad",), ("--skip-bad", "--json")])
SUFFIX = st.sampled_from([".csv", ".tsv", ".jsonl", ".csv.gz", ".jsonl.gz", ".ndjson", ".tab"])


def _bytes_case():
    return st.tuples(SUFFIX, st.binary(max_size=400), st.booleans(), FLAGS)


def run_bytes_case(loads, case):
    suffix, data, compress, flags = case
    if suffix.endswith(".gz") and compress:
        data = gzip.compress(data)
    loads.load(suffix, data, flags)


QUICK_BYTES, SLOW_BYTES = examples(40, 600)


@QUICK_BYTES
@given(case=_bytes_case())
def test_random_bytes_load_cleanly_or_are_refused_in_one_line(loads, case):
    run_bytes_case(loads, case)


@pytest.mark.slow
@SLOW_BYTES
@given(case=_bytes_case())
def test_random_bytes_many(loads, case):
    run_bytes_case(loads, case)


COLUMNS = ["solver", "version", "family", "group", "instance", "seed", "replicate", "status", "finished_at",
           "host", "instance_hash", "pallets", "seconds", "notes"]
GOOD = {
    "solver": st.sampled_from(["stacker", "packer"]),
    "version": st.sampled_from(["1.4", "1.6", "2.10", ""]),
    "family": st.sampled_from(["fam0", "fam1", ""]),
    "group": st.sampled_from(["g0", "g1", "g2"]),
    "instance": st.sampled_from(["i0", "i1", "i2", "i3"]),
    "seed": st.integers(-2, 40).map(str),
    "replicate": st.integers(0, 2).map(str),
    "status": st.sampled_from(["ok", "timeout", "failed", "infeasible", "OK", "solved", "time_limit", ""]),
    "finished_at": st.sampled_from(["", "2026-11-09T10:00:00Z", "2026-11-09 10:00:00", "2026-11-09"]),
    "host": st.sampled_from(["rack-a", "rack-b", ""]),
    "instance_hash": st.sampled_from(["", "abc", "def"]),
    "pallets": st.floats(-1e6, 1e6, allow_nan=False).map(lambda v: f"{v:.6g}"),
    "seconds": st.floats(0, 1e4, allow_nan=False).map(lambda v: f"{v:.4f}"),
    "notes": st.text(max_size=6),
}
TRICKY = st.sampled_from([
    "", " ", "nan", "NaN", "inf", "-inf", "Infinity", "1e400", "-1e400", "9" * 25, "-0", "0x1f", "1,5", "1.5.2",
    '"', '""', "'", "\\", "\t", "\r", "\n", "\u00e9", "\u2028", "\ufeff", "NULL", "None", "true", "2026-02-30",
    "2026-11-09T25:00:00Z", "s" * 256, "x'; DROP TABLE runs; --", "=1+1", "@", "|", "solver",
]) | st.text(max_size=5)


@st.composite
def near_valid_csv(draw) -> tuple[str, bytes]:
    must = ["solver", "group", "instance", "pallets"]
    extra = draw(st.lists(st.sampled_from(COLUMNS), max_size=6))
    header = list(dict.fromkeys(must + extra))
    header = draw(st.permutations(header))
    if draw(st.integers(0, 9)) == 0:  # now and then a column left out, doubled or renamed
        header = draw(st.sampled_from([header[1:], header + [header[0]], [h.upper() for h in header],
                                       header[:-1] + ["unknown col"]]))
    n = draw(st.integers(0, 12))
    rows = []
    for _ in range(n):
        row = []
        for col in header:
            good = GOOD.get(col.lower())
            row.append(draw(TRICKY) if good is None or draw(st.integers(0, 15)) == 0 else draw(good))
        cut = draw(st.integers(0, 15))
        if cut == 0:
            row = row[:-1]
        elif cut == 1:
            row = row + ["surplus"]
        rows.append(row)
    if rows and draw(st.integers(0, 9)) == 0:
        rows.insert(draw(st.integers(0, len(rows))), list(header))  # the header once more
    if rows and draw(st.integers(0, 9)) == 0:
        rows.append(list(rows[0]))  # a run twice
    tsv = draw(st.booleans()) and not draw(st.booleans())
    delim = "\t" if tsv else ","
    eol = draw(st.sampled_from(["\n", "\r\n"]))
    if draw(st.booleans()):  # properly quoted (RFC 4180)
        buf = io.StringIO()
        w = csv.writer(buf, delimiter=delim, lineterminator=eol, quoting=csv.QUOTE_NONE if tsv else csv.QUOTE_MINIMAL,
                       escapechar="\\" if tsv else None)
        try:
            w.writerow(header)
            w.writerows(rows)
            text = buf.getvalue()
        except csv.Error:
            text = eol.join(delim.join(r) for r in [header] + rows) + eol
    else:  # naive joining: commas and quotes inside values break the rows
        text = eol.join(delim.join(r) for r in [header] + rows) + eol
    if draw(st.integers(0, 9)) == 0:
        text = text[: draw(st.integers(0, len(text)))]  # cut short
    data = text.encode("utf-8", errors="surrogatepass")
    if draw(st.integers(0, 19)) == 0:
        data = b"\xef\xbb\xbf" + data  # a byte order mark
    if draw(st.integers(0, 19)) == 0 and data:
        k = draw(st.integers(0, len(data) - 1))
        data = data[:k] + draw(st.sampled_from([b"\xe9", b"\x00", b"\xff\xfe", b"\x80"])) + data[k:]
    suffix = ".tsv" if tsv else ".csv"
    if draw(st.integers(0, 9)) == 0:
        data, suffix = gzip.compress(data), suffix + ".gz"
    return suffix, data


QUICK_CSV, SLOW_CSV = examples(60, 800)


@QUICK_CSV
@given(case=near_valid_csv(), flags=FLAGS)
def test_near_valid_csv_loads_whole_or_not_at_all(loads, case, flags):
    loads.load(case[0], case[1], flags)


@pytest.mark.slow
@SLOW_CSV
@given(case=near_valid_csv(), flags=FLAGS)
def test_near_valid_csv_many(loads, case, flags):
    loads.load(case[0], case[1], flags)


JSON_VALUE = st.one_of(
    st.none(), st.booleans(), st.integers(-(10 ** 30), 10 ** 30), st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=6), TRICKY, st.lists(st.integers(), max_size=2), st.dictionaries(st.text(max_size=2), st.integers(), max_size=1),
)


@st.composite
def near_valid_jsonl(draw) -> tuple[str, bytes]:
    lines = []
    for _ in range(draw(st.integers(0, 10))):
        obj = {}
        for col in draw(st.lists(st.sampled_from(COLUMNS), min_size=0, max_size=8, unique=True)) or ["solver"]:
            good = GOOD.get(col)
            if good is not None and draw(st.integers(0, 5)) > 0:
                v = draw(good)
                if col in ("seed", "replicate") and draw(st.booleans()):
                    v = int(v)
                elif col in ("pallets", "seconds") and draw(st.booleans()):
                    v = float(v)
            else:
                v = draw(JSON_VALUE)
            obj[col] = v
        for col in ("solver", "group", "instance", "pallets"):
            if col not in obj and draw(st.integers(0, 5)) > 0:
                obj[col] = draw(GOOD[col])
        # Python writes NaN and Infinity, which JSON does not allow (RFC 8259 section 6)
        text = json.dumps(obj)
        kind = draw(st.integers(0, 19))
        if kind == 0:
            text = text[: draw(st.integers(0, len(text)))]
        elif kind == 1:
            text = json.dumps(list(obj.values()), default=str)
        elif kind == 2:
            text = json.dumps(draw(JSON_VALUE))
        elif kind == 3:
            text = ""
        lines.append(text)
    data = ("\n".join(lines) + draw(st.sampled_from(["\n", "", "\r\n"]))).encode("utf-8", errors="surrogatepass")
    return ".jsonl", data


QUICK_JSONL, SLOW_JSONL = examples(40, 600)


@QUICK_JSONL
@given(case=near_valid_jsonl(), flags=FLAGS)
def test_near_valid_json_lines_load_whole_or_not_at_all(loads, case, flags):
    loads.load(case[0], case[1], flags)


@pytest.mark.slow
@SLOW_JSONL
@given(case=near_valid_jsonl(), flags=FLAGS)
def test_near_valid_json_lines_many(loads, case, flags):
    loads.load(case[0], case[1], flags)


def test_a_tiny_metric_value_loads_beside_runs_already_stored(cli, tmp_path):
    # found by test_near_valid_json_lines_many; 1e-200 is a finite IEEE 754 double (the smallest normal is
    # about 2.2e-308), and its square underflows
    first = tmp_path / "first.csv"
    first.write_text("solver,group,instance,seed,pallets\ns,g,z,2,3\n", encoding="utf-8")
    assert cli("load", str(first), "--campaign", "f").code == 0
    both = tmp_path / "both.csv"
    both.write_text("solver,group,instance,seed,pallets\ns,g,z,1,1e-200\ns,g,z,2,3\n", encoding="utf-8")
    res = cli("load", str(both), "--campaign", "f", "--json")
    assert res.code == 0, res
    doc = res.json()["imports"][0]
    assert (doc["status"], doc["rows_loaded"], doc["rows_skipped"]) == ("loaded", 1, 1)


@pytest.mark.parametrize("replicates", ["median", "trimmed:0.1"])
def test_a_tiny_metric_value_in_an_analysis(cli, tmp_path, replicates):
    path = tmp_path / "tiny.csv"
    rows = [f"{solver},g{g},a,{seed},{value}" for seed in (1, 2) for g in (1, 2)
            for solver, value in (("s", "1e-200" if g == 1 else "1"), ("t", "2"))]
    path.write_text("solver,group,instance,seed,pallets\n" + "\n".join(rows) + "\n", encoding="utf-8")
    assert cli("load", str(path), "--campaign", "g").code == 0
    res = cli("blocktest", "--metric", "pallets", "--replicates", replicates, "--json")
    assert res.code == 0, res


def test_the_fuzzers_reach_both_outcomes(loads):
    # a guard on the generators themselves: near-valid input must sometimes load and sometimes not
    import random

    rng = random.Random(4)
    for _ in range(30):
        rows = [f"stacker,g{rng.randrange(3)},i{rng.randrange(9)},{rng.randrange(1000)},{rng.choice(['1', '2', 'x'])}"
                for _ in range(3)]
        loads.load(".csv", ("solver,group,instance,seed,pallets\n" + "\n".join(rows) + "\n").encode())
    assert loads.outcomes.get("loaded") and loads.outcomes.get("refused"), loads.outcomes


# --- the slice parser --------------------------------------------------------------------------

SLICE_ALPHABET = st.sampled_from(list("solverinstgupcamfyhdzk=!<>~@,|'\" \t19.-*?:_") + ["since", "seed", "2026-11-01", "7d"])
SLICE_TEXT = st.one_of(st.lists(SLICE_ALPHABET, max_size=30).map("".join), st.text(max_size=30))


def check_slice_text(text: str) -> None:
    from warehouse.errors import SliceError
    from warehouse.select.slices import Slice, parse

    try:
        sl = parse(text)
    except SliceError as exc:
        assert str(exc) and "\n" not in str(exc)
        return
    assert isinstance(sl, Slice)
    again = parse(sl.text)  # the normalized text means the same slice
    assert again == sl, (text, sl.text)
    sl.absolute()
    Slice.from_dict(json.loads(sl.to_json()))


QUICK_SLICE, SLOW_SLICE = examples(400, 5000)


@QUICK_SLICE
@given(text=SLICE_TEXT)
def test_slice_text_parses_or_is_refused_in_one_line(text):
    check_slice_text(text)


@pytest.mark.slow
@SLOW_SLICE
@given(text=SLICE_TEXT)
def test_slice_text_many(text):
    check_slice_text(text)


NAME_KEYS = ("solver", "version", "campaign", "family", "group", "instance", "host")


def plain_name(s: str) -> bool:
    # NAME@VERSION: the name ends at the first '@'; a name holding an operator is the xfail below
    return "@" not in s and not any(c in s for c in "=!<>~")


@st.composite
def built_slice(draw):
    from warehouse.select.slices import Slice, Term

    arms = []
    for _ in range(draw(st.integers(1, 3))):
        terms = []
        for _ in range(draw(st.integers(1, 3))):
            if draw(st.integers(0, 4)) == 0:
                vals = tuple(f"{draw(st.text(min_size=1, max_size=6).filter(plain_name))}@"
                             f"{draw(st.text(min_size=1, max_size=6))}" for _ in range(draw(st.integers(1, 2))))
                terms.append(Term("treatment", "=", vals))
            else:
                key = draw(st.sampled_from(NAME_KEYS))
                op = draw(st.sampled_from(("=", "!=", "~") + (("<", "<=", ">", ">=") if key == "version" else ())))
                n = 1 if op in ("<", "<=", ">", ">=") else draw(st.integers(1, 3))
                vals = tuple(draw(st.text(min_size=1, max_size=8)) for _ in range(n))
                terms.append(Term(key, op, vals))
        arms.append(tuple(terms))
    return Slice(tuple(arms))


def check_built_slice(sl) -> None:
    from warehouse.select.slices import parse

    assert parse(sl.text) == sl, sl.text


@QUICK_SLICE
@given(sl=built_slice())
def test_any_slice_survives_its_own_text(sl):
    # whatever names a warehouse holds, a slice over them prints as text that parses back to it
    check_built_slice(sl)


@pytest.mark.slow
@SLOW_SLICE
@given(sl=built_slice())
def test_any_slice_survives_its_own_text_many(sl):
    check_built_slice(sl)


def test_a_quoted_treatment_keeps_operator_characters_in_its_name():
    from warehouse.select.slices import Slice, Term, parse

    sl = parse('"greedy~fast@1.0"')
    assert sl == Slice(((Term("treatment", "=", ("greedy~fast@1.0",)),),))
    assert parse(sl.text) == sl


# --- every command's arguments -----------------------------------------------------------------

SKIP_COMMANDS = {"demo": "builds a whole demo warehouse (seconds per call); the demo has tests of its own",
                 "resident": "starts, serves and stops a background process (serve blocks by design); "
                             "tests/test_resident.py has tests of its own"}


def registry():
    from warehouse.front.cli import commands

    return commands()  # the command line's whole table


def arguments(name: str) -> tuple[list, list]:
    p = argparse.ArgumentParser(add_help=False)
    registry()[name].configure(p)
    positional = [a for a in p._actions if not a.option_strings]
    optional = [a for a in p._actions if a.option_strings]
    return positional, optional


def safe_text(s: str) -> bool:
    # values may become file names (--to, --rejects, load FILE): keep them inside the test's folder
    return not s.startswith(("/", "~")) and ".." not in s and "\x00" not in s


VALUES = st.sampled_from([
    "1", "2", "3", "0", "-1", "99999", "1.5", "0.05", "0.8", "1e9", "nan", "inf", "", " ", "abc",
    "pallets", "seconds", "nosuch", "stk@1.0", "stk@2.0", "stk@9", "stk", "solvers", "campaigns", "imports",
    "family=f1", "family=f1,f2", "solver=stk version>=1.5", "stk@1.0 | stk@2.0", "since=7d", "seed=1",
    "status=ok", "retracted=yes", "solver=", "|", "'", '"', "x'; DROP TABLE runs; --",
    "mean", "median", "trimmed:0.1", "trimmed:2", "penalize:10", "penalize:x", "worst", "drop", "keep",
    "none", "log", "boxcox", "rank", "auto", "complete", "incomplete", "generalized", "dunnett", "paired-t",
    "wilcoxon", "holm", "bonferroni", "lower", "higher", "5%", "0.5", "-3%", "2026-11-01", "7d",
    "40,39.2,38.5", "40", "profile", "qq", "residuals", "differences", "performance",
    "out.html", "out.md", "out.png", "out.svg", "out.txt", "missing-folder/out.html", "runs.csv", "layout.toml",
    "nosuch.csv", "--json",
]) | st.text(max_size=12).filter(safe_text)


@st.composite
def argv_for(draw, name: str) -> list[str]:
    positional, optional = arguments(name)
    argv = [name]
    chosen = draw(st.lists(st.sampled_from(optional), max_size=6)) if optional else []
    for action in chosen:
        argv.append(draw(st.sampled_from(action.option_strings)))
        if action.nargs != 0:
            argv.append(draw(VALUES))
    for action in positional:
        if draw(st.integers(0, 9)) == 0:
            continue  # now and then a positional argument left out
        count = {None: 1, "?": draw(st.integers(0, 1)), "+": draw(st.integers(1, 3))}.get(action.nargs, 1)
        argv += [draw(VALUES) for _ in range(count)]
    if draw(st.booleans()):
        argv[1:] = draw(st.permutations(argv[1:]))
    return argv


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    """A small warehouse with two treatments on two families, a kept analysis of each kind, a claim,
    and the files a command might be pointed at; shared by the command fuzzers."""
    folder = tmp_path_factory.mktemp("commands")
    rows = ["solver,version,family,group,instance,seed,pallets,seconds"]
    for fam in ("f1", "f2"):
        for g in range(1, 5):
            for inst in ("a", "b"):
                for seed in (1, 2):
                    for ver, shift in (("1.0", 0.0), ("2.0", -2.0)):
                        rows.append(f"stk,{ver},{fam},g{g},{inst},{seed},{30 + 2 * g + shift + 0.1 * seed},{1.0 + g}")
    (folder / "runs.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    (folder / "layout.toml").write_text('[metrics.pallets]\nsense = "min"\n', encoding="utf-8")
    with fresh_warehouse(folder, "commands") as location:
        for argv in (("load", str(folder / "runs.csv"), "--campaign", "c1"), ("blocktest", "--metric", "pallets"),
                     ("versus", "stk@1.0", "--metric", "pallets"), ("keep", "2.0 is better", "--tag", "t"),
                     ("plan", "--effect", "0.5")):
            res = in_process(location, *argv)
            assert res.code == 0, res
        yield location, folder


@pytest.fixture
def stocked(shared, monkeypatch):
    """The shared warehouse, with the working folder set to its own (relative file names land there);
    afterwards every retraction a fuzzed command made is undone, so the next command finds the data."""
    location, folder = shared
    monkeypatch.chdir(folder)
    monkeypatch.setenv("BLOCKYARD_HISTORY", str(folder / "history"))
    monkeypatch.delenv("BLOCKYARD_WAREHOUSE", raising=False)
    yield location
    for (rid,) in sql(location, "SELECT id FROM retractions WHERE undone_at IS NULL ORDER BY id"):
        assert in_process(location, "retract", "--undo", str(rid)).code == 0
    assert sql(location, "SELECT count(*) FROM runs WHERE retraction_id IS NOT NULL") == [(0,)]


def run_argv(location: str, argv: list[str], stdin_lines: list[str] | None = None) -> None:
    import sys

    from warehouse.front.cli import run

    out, err = io.StringIO(), io.StringIO()
    saved = sys.stdin
    sys.stdin = io.StringIO("".join(line + "\n" for line in stdin_lines or []))
    try:
        code = run(["-w", location, *argv], out=out, err=err)
    finally:
        sys.stdin = saved
    # guard answers with its verdict too: 3 when a treatment is worse, 4 when not settled
    allowed = (0, 2, 3, 4) if argv and argv[0] == "guard" else (0, 2)
    assert code in allowed, (argv, code, err.getvalue())
    assert "Traceback" not in err.getvalue() and "internal error" not in err.getvalue(), (argv, err.getvalue())


COMMAND_NAMES = [n for n in sorted(registry()) if n not in SKIP_COMMANDS]
HEAVY = {"export": 6, "plot": 8}  # each call draws figures: fewer examples
FUZZ_DEFECTS: dict[str, str] = {}


@pytest.mark.parametrize("name", [pytest.param(n, marks=[pytest.mark.xfail(strict=True, reason=FUZZ_DEFECTS[n])]
                                               if n in FUZZ_DEFECTS else []) for n in COMMAND_NAMES])
def test_every_command_with_random_arguments_answers_0_or_2(stocked, name, capsys):
    n = HEAVY.get(name, 15)

    @settings(max_examples=n, **QUICK)
    @given(argv=argv_for(name), script=st.lists(st.sampled_from(COMMAND_NAMES).flatmap(argv_for), max_size=3))
    def check(argv, script):
        # the shell reads commands from its input when that is not a terminal: feed it some
        lines = [shlex.join(a) for a in script] if name == "shell" else None
        run_argv(stocked, argv, lines)

    check()


@pytest.mark.slow
@pytest.mark.parametrize("name", COMMAND_NAMES)
def test_every_command_with_random_arguments_many(stocked, name, capsys):
    @settings(max_examples=15 * HEAVY.get(name, 15), **FUZZ)
    @given(argv=argv_for(name), script=st.lists(st.sampled_from(COMMAND_NAMES).flatmap(argv_for), max_size=5))
    def check(argv, script):
        run_argv(stocked, argv, [shlex.join(a) for a in script] if name == "shell" else None)

    check()


@pytest.mark.parametrize("argv", [("recall", "pallets"), ("recall", "--solver", "stk"), ("recall", "1", "--stale")])
def test_recall_by_words_or_solver_with_a_kept_plan(cli, argv):
    assert cli("plan", "--effect", "0.5").code == 0
    res = cli(*argv)
    assert res.code in (0, 2), res
    assert "internal error" not in res.err


def test_every_command_is_fuzzed():
    # a guard: a new command joins the fuzzing unless it is named in SKIP_COMMANDS with a reason
    assert set(COMMAND_NAMES) | set(SKIP_COMMANDS) == set(registry())
    assert {"load", "blocktest", "versus", "retract", "recheck"} <= set(COMMAND_NAMES)


# --- text that looks like SQL stays data -------------------------------------------------------

EVIL_SOLVER = "x'; DROP TABLE runs; --"
EVIL_INSTANCE = '"; DELETE FROM imports; --'
EVIL_METRIC = 'pallets"); DROP TABLE metrics; --'
EVIL_CAMPAIGN = "c'); DELETE FROM campaigns; --"


def test_names_that_look_like_sql_load_slice_and_report_as_plain_names(cli, location, tmp_path):
    buf = io.StringIO()
    w = csv.writer(buf)  # RFC 4180 quoting, so the quotes and commas are part of the names
    w.writerow(["solver", "version", "group", "instance", "seed", EVIL_METRIC])
    n = 0
    for g in range(1, 5):
        for inst in (EVIL_INSTANCE, "plain"):
            for seed in (1, 2):
                for solver, shift in ((EVIL_SOLVER, 0.0), ("plain", 3.0)):
                    w.writerow([solver, "1", f"g{g}", inst, seed, 10 + g + shift + 0.01 * seed])
                    n += 1
    path = tmp_path / "evil.csv"
    path.write_text(buf.getvalue(), encoding="utf-8")
    res = cli("load", str(path), "--campaign", EVIL_CAMPAIGN, "--json")
    assert res.code == 0, res
    assert res.json()["imports"][0]["rows_loaded"] == n

    # the names are stored as they were written
    assert sorted(r[0] for r in sql(location, "SELECT name FROM solvers")) == sorted(["plain", EVIL_SOLVER])
    assert sorted(r[0] for r in sql(location, "SELECT name FROM instances")) == sorted([EVIL_INSTANCE, "plain"] * 4)
    assert [r[0] for r in sql(location, "SELECT name FROM metrics")] == [EVIL_METRIC]
    assert [r[0] for r in sql(location, "SELECT name FROM campaigns")] == [EVIL_CAMPAIGN]

    # slicing on them selects exactly their runs
    for slice_text, expect in (
        (f'solver="{EVIL_SOLVER}"', n // 2),
        (f"instance='{EVIL_INSTANCE}'", n // 2),
        (f'campaign="{EVIL_CAMPAIGN}" solver!="{EVIL_SOLVER}"', n // 2),
        (f'"{EVIL_SOLVER}@1"', n // 2),
    ):
        peek = cli("peek", "--slice", slice_text, "--metric", EVIL_METRIC, "--json")
        assert peek.code == 0, (slice_text, peek)
        assert f'"{EVIL_SOLVER}' not in peek.err
        count = sum(c["runs"] for c in cells_of(peek.json()))
        assert count == expect, (slice_text, peek.json())

    bt = cli("blocktest", "--slice", f"instance='{EVIL_INSTANCE}'", "--metric", EVIL_METRIC, "--json")
    assert bt.code == 0, bt
    doc = bt.json()
    assert sorted(doc["treatment_names"]) == sorted([f"{EVIL_SOLVER}@1", "plain@1"])
    assert doc["blocks"] == 4
    vs = cli("versus", "plain@1", "--slice", f'solver="{EVIL_SOLVER}",plain', "--metric", EVIL_METRIC, "--json")
    assert vs.code == 0, vs
    assert [c["treatment"] for c in vs.json()["comparisons"]] == [f"{EVIL_SOLVER}@1"]
    kept = cli("keep", EVIL_SOLVER + " wins", "--tag", EVIL_INSTANCE, "--json")
    assert kept.code == 0, kept
    found = cli("recall", "--tag", EVIL_INSTANCE, "--json")
    assert found.code == 0 and len(found.json()["matches"]) == 1, found
    text = cli("inventory", "solvers")
    assert EVIL_SOLVER in text.out

    # withdrawing by them touches only their runs, and a reason may hold anything
    ret = cli("retract", "--slice", f'solver="{EVIL_SOLVER}" instance=\'{EVIL_INSTANCE}\'', "--reason", EVIL_CAMPAIGN, "--json")
    assert ret.code == 0, ret
    assert ret.json()["runs_retracted"] == n // 4

    # every table is still there and holds what it should
    counts = table_counts(location)
    assert set(counts) >= {"runs", "imports", "campaigns", "metrics", "solvers", "instances", "analyses", "claims"}
    assert counts["runs"] == n and counts["imports"] == 1 and counts["campaigns"] == 1 and counts["metrics"] == 1
    assert run_counts(location)["runs"] == n - n // 4
    assert sql(location, "SELECT reason FROM retractions") == [(EVIL_CAMPAIGN,)]


def cells_of(doc: dict) -> list[dict]:
    """The per-treatment, per-block cells of a peek document (each with its run count)."""
    return doc["cells"]


def test_a_slice_value_that_looks_like_sql_matches_nothing_and_drops_nothing(cli, location, tmp_path):
    path = runs_csv(tmp_path / "r.csv", 400, instances=20, seed=2)
    assert cli("load", str(path), "--campaign", "c").code == 0
    before = table_counts(location)
    for text in ("solver=\"stacker' OR '1'='1\"", "instance=\"i1'; DROP TABLE runs; --\"", "host~\"%' --\""):
        res = cli("peek", "--slice", text, "--metric", "pallets", "--json")
        assert res.code in (0, 2), res
        if res.code == 2:
            line = one_line(res.err)
            assert "no " in line or "matches no" in line or "nothing" in line, line
        else:
            assert sum(c["runs"] for c in cells_of(res.json())) == 0, res.json()
    assert table_counts(location) == before
