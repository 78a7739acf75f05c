"""A warehouse that can only be read; words for a mistyped option; values too large to analyse;
the inventory's solvers, campaigns and imports.

Read-only, really: the tests run as root, and root writes through file modes, so a read-only
file or folder is tried in a child process that has given up the capabilities that override
them (tests/faults, `without_permission_override`). A read-only mount and a full disk are
tmpfs file systems mounted for the test (remounted read-only, or filled up); a machine that does
not let the tests mount one skips those variants and says why. Each variant runs every reading
command and every writing command in one child process, whose own stderr must stay empty (no
warning from a library, no traceback).
"""
from __future__ import annotations

import contextlib
import errno
import hashlib
import io
import json
import os
import shutil
import sqlite3
import subprocess
from pathlib import Path

import pytest

from conftest import ON_POSTGRES
from faults import PYTHON, another_location, clean_env, in_process, one_line, runs_csv, sql, without_permission_override

sqlite_only = pytest.mark.skipif(ON_POSTGRES, reason="a SQLite file on a read-only or full medium")

BASELINE = "stacker@1.6"


# --- a stocked warehouse and what is run on it ---------------------------------------------------

@pytest.fixture
def stocked(cli, tmp_path) -> int:
    """2 solvers x 20 blocks x 3 seeds, a kept blocktest with a claim, and then a retraction that
    makes it stale (so that `recheck --renew` has a renewal to store). Returns the analysis id."""
    assert cli("load", str(runs_csv(tmp_path / "base.csv", 6_000, seed=11)), "--campaign", "base").code == 0
    res = cli("blocktest", "--metric", "pallets", "--json")
    assert res.code == 0, res
    aid = res.json()["analysis_id"]
    assert cli("keep", "stacker packs tighter than packer", "--analysis", str(aid)).code == 0
    assert cli("retract", "--slice", "seed=0", "--reason", "a bad seed").code == 0
    return aid


def reading(out: Path, aid: int) -> dict[str, list[str]]:
    return {
        "inventory": ["inventory", "--json"],
        "inventory-solvers": ["inventory", "solvers", "--json"],
        "peek": ["peek", "--metric", "pallets", "--json"],
        "blocktest": ["blocktest", "--metric", "pallets", "--json"],
        "blocktest-text": ["blocktest", "--metric", "pallets"],
        "versus": ["versus", BASELINE, "--metric", "pallets", "--json"],
        "recall-one": ["recall", str(aid), "--json"],
        "recall-list": ["recall", "--json"],
        "recheck": ["recheck", str(aid), "--json"],
        "plot": ["plot", "profile", "--analysis", str(aid), "--to", str(out / "profile.png"), "--json"],
        "export": ["export", str(aid), "--to", str(out / "report.html"), "--json"],
        "plan": ["plan", "--from", str(aid), "--effect", "0.5", "--json"],
    }


def writing(tmp: Path, aid: int) -> dict[str, list[str]]:
    more = tmp / "more.csv"
    if not more.exists():
        runs_csv(more, 600, instances=50, seed=31)
    return {
        "load": ["load", str(more), "--campaign", "more"],
        "keep": ["keep", "a claim that cannot be kept", "--analysis", str(aid)],
        "retract": ["retract", "--slice", "solver=packer", "--reason", "wrong build"],
        "recheck-renew": ["recheck", str(aid), "--renew"],
    }


DRIVER = r"""
import io, json, sys
from warehouse.front.cli import run
done = {}
for name, argv in json.loads(sys.argv[1]).items():
    out, err = io.StringIO(), io.StringIO()
    code = run(argv, out=out, err=err)
    done[name] = [code, out.getvalue(), err.getvalue()]
print(json.dumps(done))
"""


def run_all(location: str, commands: dict[str, list[str]], drop_override: bool = False) -> dict:
    """Every command against `location` in one child process; its own stderr must stay empty."""
    argvs = {name: ["-w", location, *argv] for name, argv in commands.items()}
    p = subprocess.run([PYTHON, "-c", DRIVER, json.dumps(argvs)], capture_output=True, text=True, env=clean_env(),
                       timeout=600, preexec_fn=without_permission_override() if drop_override else None)
    assert p.returncode == 0 and p.stderr == "", p.stderr[-3000:]
    return {name: Result(*r) for name, r in json.loads(p.stdout).items()}


class Result:
    def __init__(self, code, out, err):
        self.code, self.out, self.err = code, out, err

    def json(self):
        return json.loads(self.out)

    def __repr__(self):
        return f"Result({self.code}, out={self.out[:300]!r}, err={self.err[:300]!r})"


def reads_work(done: dict, runs: int) -> None:
    """Every reading command answered, and an analysis printed its numbers and said once that it
    was not kept."""
    for name, res in done.items():
        assert res.code == 0 and res.err == "", (name, res)
    assert done["inventory"].json()["runs"] == runs
    assert [r["treatment"] for r in done["inventory-solvers"].json()["solvers_list"]] == ["packer@1.6", "stacker@1.6"]
    assert done["recall-one"].json()["state"] == "stale"
    assert done["recheck"].json()["status"] in ("data-changed", "conclusion-changed")
    for name in ("blocktest", "versus", "plan"):
        doc = done[name].json()
        assert doc["analysis_id"] is None
        said = [w for w in doc["warnings"] if "not kept" in w]
        assert len(said) == 1 and said[0].startswith("the warehouse is read-only here ("), said
    assert any(r["source"] == "treatment" and r["f"] for r in done["blocktest"].json()["anova"])
    assert done["versus"].json()["comparisons"]
    text = done["blocktest-text"].out
    assert "source of variation" in text and "kept as analysis" not in text
    assert sum("not kept" in line for line in text.splitlines()) == 1
    assert Path(done["plot"].json()["file"]).stat().st_size > 0
    assert Path(done["export"].json()["file"]).stat().st_size > 0


def writes_refused(done: dict) -> None:
    for name, res in done.items():
        assert res.code == 2, (name, res)
        line = one_line(res.err)
        assert "read-only" in line, (name, line)


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def old_warehouse(path: Path) -> Path:
    """A warehouse at schema 0007, which `upgrade` would have to write."""
    from warehouse.store.connect import init_warehouse

    init_warehouse(str(path), revision="0007").close()
    return path


def upgrade_refused(res) -> None:
    assert res.code == 2, res
    line = one_line(res.err)
    assert "cannot upgrade" in line and "read-only" in line, line


# --- a read-only file and a read-only folder ------------------------------------------------------

@sqlite_only
@pytest.mark.parametrize("what", ["file", "folder"])
def test_a_read_only_file_or_folder_is_read_and_refuses_writes_in_one_line(location, tmp_path, stocked, what):
    assert not os.path.exists(location + "-wal")  # closed: SQLite folded its -wal back in
    place = tmp_path / f"read-only-{what}"
    place.mkdir()
    copy = place / "test.db"
    shutil.copy(location, copy)
    old = old_warehouse(place / "old.db")
    out = tmp_path / "out"
    out.mkdir()
    runs = in_process(location, "inventory", "--json").json()["runs"]
    before = {p: digest(p) for p in (copy, old)}
    if what == "file":
        for p in (copy, old):
            p.chmod(0o444)
    else:
        place.chmod(0o555)
    try:
        reads_work(run_all(str(copy), reading(out, stocked), drop_override=True), runs)
        writes_refused(run_all(str(copy), writing(tmp_path, stocked), drop_override=True))
        upgrade_refused(run_all(str(old), {"upgrade": ["upgrade"]}, drop_override=True)["upgrade"])
    finally:
        place.chmod(0o755)
        for p in (copy, old):
            p.chmod(0o644)
    assert {p: digest(p) for p in (copy, old)} == before
    if what == "folder":  # nothing was made beside it (it could not be)
        assert sorted(os.listdir(place)) == ["old.db", "test.db"]


# --- a read-only mount and a full disk ---------------------------------------------------------------

@contextlib.contextmanager
def tmpfs(where: Path, kib: int):
    """A tmpfs of `kib` KiB mounted at `where` for the test (root with CAP_SYS_ADMIN), or a skip."""
    if os.geteuid() != 0 or shutil.which("mount") is None:
        pytest.skip("mounting a tmpfs needs root and the mount command; this machine has neither")
    where.mkdir()
    p = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={kib}k", "blockyard-test", str(where)],
                       capture_output=True, text=True)
    if p.returncode != 0:
        pytest.skip(f"this machine does not let the tests mount a tmpfs ({p.stderr.strip() or p.returncode}); "
                    "it takes CAP_SYS_ADMIN")
    try:
        yield where
    finally:
        subprocess.run(["umount", "-l", str(where)], capture_output=True)


def remount_read_only(where: Path) -> None:
    subprocess.run(["mount", "-o", "remount,ro", str(where)], check=True, capture_output=True)


def fill(where: Path) -> None:
    """Write zeros until the file system says it is full (ENOSPC)."""
    with open(where / "filler", "wb") as fh:
        try:
            while True:
                fh.write(b"\0" * 65536)
                fh.flush()
        except OSError as exc:
            assert exc.errno == errno.ENOSPC, exc
    assert os.statvfs(where).f_bavail == 0


def size_kib(*paths: Path) -> int:
    return sum(p.stat().st_size for p in paths) // 1024 + 512


@sqlite_only
def test_a_read_only_mount_is_read_and_refuses_writes_in_one_line(location, tmp_path, stocked):
    assert not os.path.exists(location + "-wal")
    old = old_warehouse(tmp_path / "old.db")
    runs = in_process(location, "inventory", "--json").json()["runs"]
    out = tmp_path / "out"
    out.mkdir()
    with tmpfs(tmp_path / "mnt", size_kib(Path(location), old)) as mnt:
        shutil.copy(location, mnt / "test.db")
        shutil.copy(old, mnt / "old.db")
        remount_read_only(mnt)
        reads_work(run_all(str(mnt / "test.db"), reading(out, stocked)), runs)
        writes = run_all(str(mnt / "test.db"), writing(tmp_path, stocked))
        writes_refused(writes)
        assert "its file system is mounted read-only" in writes["keep"].err
        upgrade_refused(run_all(str(mnt / "old.db"), {"upgrade": ["upgrade"]})["upgrade"])
        assert sorted(os.listdir(mnt)) == ["old.db", "test.db"]


@sqlite_only
def test_a_read_only_mount_with_a_write_ahead_log_reads_the_changes_in_it(cli, location, tmp_path, stocked):
    """SQLite documentation, Write-Ahead Logging: changes committed to the -wal file are part of the
    database until a checkpoint copies them in; a reader with the -shm file beside it sees them.
    Without the -shm file (and no way to make it) they cannot be read, and Blockyard says so
    rather than read the file without them (immutable=1 ignores the -wal file)."""
    holder = sqlite3.connect(location)  # while it is open, the last commit stays in the -wal file
    try:
        holder.execute("SELECT count(*) FROM runs").fetchone()
        assert cli("keep", "a claim that lives in the -wal file", "--analysis", str(stocked)).code == 0
        assert os.path.getsize(location + "-wal") > 0 and os.path.exists(location + "-shm")
        files = [Path(location + suffix) for suffix in ("", "-wal", "-shm")]
        with tmpfs(tmp_path / "mnt", 2 * size_kib(*files)) as mnt:  # two copies
            (mnt / "with-shm").mkdir()
            (mnt / "without-shm").mkdir()
            for suffix in ("", "-wal", "-shm"):
                shutil.copy(location + suffix, mnt / "with-shm" / f"test.db{suffix}")
            for suffix in ("", "-wal"):
                shutil.copy(location + suffix, mnt / "without-shm" / f"test.db{suffix}")
            remount_read_only(mnt)
            done = run_all(str(mnt / "with-shm" / "test.db"), {"recall": ["recall", str(stocked), "--json"]})
            assert done["recall"].code == 0, done
            claims = [c["text"] for c in done["recall"].json()["claims"]]
            assert "a claim that lives in the -wal file" in claims
            refused = run_all(str(mnt / "without-shm" / "test.db"), {"inventory": ["inventory"]})["inventory"]
            assert refused.code == 2
            line = one_line(refused.err)
            assert "test.db-wal" in line and "read-only" in line, line
    finally:
        holder.close()


@sqlite_only
def test_a_full_disk_is_read_and_refuses_writes_in_one_line(location, tmp_path, stocked):
    assert not os.path.exists(location + "-wal")
    runs = in_process(location, "inventory", "--json").json()["runs"]
    out = tmp_path / "out"
    out.mkdir()
    with tmpfs(tmp_path / "mnt", size_kib(Path(location))) as mnt:
        copy = mnt / "test.db"
        shutil.copy(location, copy)
        fill(mnt)
        before = digest(copy)
        reads_work(run_all(str(copy), reading(out, stocked)), runs)
        done = run_all(str(copy), writing(tmp_path, stocked))
        writes_refused(done)
        assert "the disk under it is full" in done["keep"].err
        assert digest(copy) == before
        # with room again, the same warehouse takes writes
        (mnt / "filler").unlink()
        kept = in_process(str(copy), "keep", "kept once there is room", "--analysis", str(stocked))
        assert kept.code == 0, kept


# --- a read-only server session --------------------------------------------------------------------

def read_only_session(location: str) -> str:
    """PostgreSQL documentation, default_transaction_read_only: every transaction of the session is
    read-only, as on a hot standby; set here through libpq's options parameter."""
    return location + "%20-cdefault_transaction_read_only%3Don"


@pytest.mark.skipif(not ON_POSTGRES, reason="a PostgreSQL session setting")
def test_a_read_only_server_session_reads_and_refuses_writes_in_one_line(location, tmp_path, stocked):
    ro = read_only_session(location)
    runs = in_process(location, "inventory", "--json").json()["runs"]
    out = tmp_path / "out"
    out.mkdir()
    before = {t: sql(location, f"SELECT count(*) FROM {t}")[0][0] for t in ("runs", "analyses", "claims", "imports")}
    reads_work(run_all(ro, reading(out, stocked)), runs)
    done = run_all(ro, writing(tmp_path, stocked))
    writes_refused(done)
    assert "the server session is read-only" in done["keep"].err
    assert {t: sql(location, f"SELECT count(*) FROM {t}")[0][0] for t in before} == before
    with another_location(tmp_path, "old") as old:
        from warehouse.store.connect import init_warehouse

        init_warehouse(old, revision="0007").close()
        upgrade_refused(in_process(read_only_session(old), "upgrade"))


# --- a mistyped option ------------------------------------------------------------------------------

@pytest.mark.parametrize("argv, line", [
    (("blocktest", "--metirc", "pallets"), "blockyard: blocktest: --metirc: did you mean --metric?"),
    (("blocktest", "--metric=pallets", "--trasform=log"), "blockyard: blocktest: --trasform: did you mean --transform?"),
    (("versus", BASELINE, "--confidance", "0.9"), "blockyard: versus: --confidance: did you mean --confidence?"),
    (("inventory", "solvers", "--limt", "3"), "blockyard: inventory: --limt: did you mean --limit?"),
    (("peek", "--zzzzzz"), "blockyard: peek: --zzzzzz: no such option"),
    (("inventory", "solvers", "extra"), "blockyard: inventory: unexpected argument: extra"),
])
def test_a_mistyped_option_is_named_with_the_nearest_one(cli, argv, line):
    res = cli(*argv)
    assert res.code == 2 and res.out == ""
    assert one_line(res.err).startswith(line)


def test_a_mistyped_command_is_named_with_the_nearest_one(cli):
    res = cli("blocktst", "--metric", "pallets")
    assert res.code == 2
    assert "unknown command 'blocktst' (did you mean blocktest?)" in one_line(res.err)


def test_the_shell_names_the_nearest_option_too(location):
    from warehouse.commands.session import Session
    from warehouse.front.shell.loop import Shell

    out = io.StringIO()
    session = Session(location=location)
    try:
        shell = Shell(session, out=out)
        shell.execute("blocktest --metirc pallets")
        shell.execute("peek --slce family=mixed-sku")
    finally:
        session.close()
    assert out.getvalue().splitlines() == [
        "blockyard: blocktest: --metirc: did you mean --metric? (help blocktest shows its arguments)",
        "blockyard: peek: --slce: did you mean --slice? (help peek shows its arguments)",
    ]


# --- values too large for sums of squares -------------------------------------------------------------

# IEEE 754 binary64: the largest finite double is about 1.797e308; its square, and the sum of two
# of them, overflow.
HUGE = 1.79e308


def huge_csv(path: Path, seeds: int) -> Path:
    lines = ["solver,version,family,group,instance,seed,pallets"]
    for solver, shift in (("stacker", 0.0), ("packer", 1.0)):
        for g in range(1, 7):
            for seed in range(1, seeds + 1):
                value = HUGE if (solver, g) == ("stacker", 1) else 10 * g + shift + 0.1 * seed
                lines.append(f"{solver},1.6,mixed-sku,g{g},i{g},{seed},{value!r}")
    path.write_text("\n".join(lines) + "\n")
    return path


@pytest.mark.parametrize("seeds, why", [
    (1, "a value of 1.79e+308 is too large for sums of squares"),
    (2, "adding up its runs overflows"),  # the mean of two seeds overflows before any analysis
])
def test_a_value_near_the_largest_double_is_refused_in_one_line_without_warnings(location, tmp_path, seeds, why):
    """Through the real command line: the child process's stderr is exactly the one line."""
    from faults import blockyard

    path = huge_csv(tmp_path / "huge.csv", seeds)
    load = blockyard("load", path, "--campaign", "huge", "-w", location)
    assert load.code == 0 and load.err == "", load
    for argv in (("blocktest", "--metric", "pallets"), ("versus", BASELINE, "--metric", "pallets"),
                 ("blocktest", "--metric", "pallets", "--design", "generalized")):
        res = blockyard(*argv, "-w", location)
        assert res.code == 2, (argv, res)
        line = one_line(res.err)
        assert line.startswith("blockyard: metric pallets: ") and why in line, line
        assert "Warning" not in res.err


def test_large_values_below_the_limit_analyse_without_numeric_warnings():
    """Values of 1e45 (below the limit of 1e50) give the same F and p as the same values scaled
    down to ordinary sizes (F and p do not depend on the unit), and no overflow on the way: the
    Tukey non-additivity test once multiplied three values together."""
    import warnings

    import numpy as np
    import pandas as pd

    from warehouse.analyze.anova import rcbd_anova
    from warehouse.analyze.tidy import LARGEST_VALUE, refuse_overflow
    from warehouse.errors import DesignError

    rng = np.random.default_rng(3)
    rows = [(f"t{t}", f"b{b}", 10 + t + 2 * b + rng.normal()) for t in range(3) for b in range(8)]
    small = pd.DataFrame(rows, columns=["treatment", "block", "value"])
    big = small.assign(value=small["value"] * 1e44)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        a, b = rcbd_anova(small), rcbd_anova(big)
    row = lambda r, s: next(x for x in r.anova if x["source"] == s)  # noqa: E731
    assert row(b, "treatment")["f"] == pytest.approx(row(a, "treatment")["f"], rel=1e-9)
    assert b.diagnostics["nonadditivity"]["p"] == pytest.approx(a.diagnostics["nonadditivity"]["p"], rel=1e-6)
    with pytest.raises(DesignError, match=r"^metric m: a value of 2e\+50 is too large"):
        refuse_overflow([1.0, -2 * LARGEST_VALUE], "metric m")


# --- the inventory: solvers and treatments, campaigns' run times, imports replaced -------------------

def small_csv(path: Path, rows: list[tuple]) -> Path:
    lines = ["solver,version,family,group,instance,seed,finished_at,pallets"]
    lines += [",".join(map(str, r)) for r in rows]
    path.write_text("\n".join(lines) + "\n")
    return path


def test_inventory_tells_solvers_from_treatments(cli, tmp_path):
    rows = [(s, v, "mixed-sku", f"g{g}", f"i{g}", 1, "2026-11-02T03:00:00Z", 10 + g)
            for s, v in (("stacker", "1.10"), ("stacker", "1.9"), ("packer", "2.0")) for g in (1, 2)]
    assert cli("load", str(small_csv(tmp_path / "a.csv", rows)), "--campaign", "c").code == 0
    doc = cli("inventory", "--json").json()
    assert (doc["solvers"], doc["treatments"]) == (2, 3)
    assert "solvers    2 (3 treatments" in cli("inventory").out
    listing = cli("inventory", "solvers", "--json").json()["solvers_list"]
    # each solver with its versions in natural order (1.9 before 1.10); the keys listed before stay
    assert [(r["solver"], r["version"], r["treatment"]) for r in listing] == [
        ("packer", "2.0", "packer@2.0"), ("stacker", "1.9", "stacker@1.9"), ("stacker", "1.10", "stacker@1.10")]
    assert all({"treatment", "build", "parameters", "runs"} <= set(r) and r["runs"] == 2 for r in listing)
    text = cli("inventory", "solvers").out.splitlines()
    assert text[0].split()[:3] == ["solver", "version", "treatment"]
    res = cli("inventory", "treatments")
    assert res.code == 2 and "inventory solvers lists them" in one_line(res.err)


def test_inventory_campaigns_show_their_first_and_last_run_as_a_slice_takes_them(cli, tmp_path):
    early = [("stacker", "1.6", "mixed-sku", "g1", "i1", s, f"2026-11-0{s}T0{s}:15:07Z", 10 + s) for s in (1, 2)]
    late = [("stacker", "1.6", "mixed-sku", "g1", "i1", s, f"2026-11-0{s}T0{s}:15:07Z", 10 + s) for s in (5, 6)]
    untimed = [("stacker", "1.6", "mixed-sku", "g1", "i1", 1, "", 10)]
    assert cli("load", str(small_csv(tmp_path / "a.csv", early)), "--campaign", "nov").code == 0
    assert cli("load", str(small_csv(tmp_path / "b.csv", late)), "--campaign", "nov").code == 0
    assert cli("load", str(small_csv(tmp_path / "c.csv", untimed)), "--campaign", "untimed").code == 0
    rows = {r["campaign"]: r for r in cli("inventory", "campaigns", "--json").json()["campaigns_list"]}
    assert (rows["nov"]["first run"], rows["nov"]["last run"]) == ("2026-11-01T01:15:07Z", "2026-11-06T06:15:07Z")
    assert (rows["untimed"]["first run"], rows["untimed"]["last run"]) == (None, None)
    assert rows["nov"]["runs"] == 4 and "created" in rows["nov"]
    # the times are what since= and until= take: each bound takes in exactly its run
    first = cli("peek", "--slice", f"campaign=nov until={rows['nov']['first run']}", "--json")
    assert first.code == 2 and "no runs" in first.err  # until= is before, not at
    last = cli("peek", "--slice", f"campaign=nov since={rows['nov']['last run']}", "--json")
    assert last.code == 0 and sum(c["runs"] for c in last.json()["cells"]) == 1
    # a wholly retracted import no longer counts
    assert cli("retract", "--slice", "campaign=nov seed=5,6", "--reason", "late runs were wrong").code == 0
    rows = {r["campaign"]: r for r in cli("inventory", "campaigns", "--json").json()["campaigns_list"]}
    assert rows["nov"]["last run"] == "2026-11-02T02:15:07Z"
    assert "first run" in cli("inventory", "campaigns").out


def test_inventory_imports_show_the_import_each_replaces(cli, location, tmp_path):
    rows = [("stacker", "1.6", "mixed-sku", f"g{g}", f"i{g}", 1, "", 10 + g) for g in (1, 2)]
    assert cli("load", str(small_csv(tmp_path / "a.csv", rows)), "--campaign", "c").code == 0
    assert cli("load", str(small_csv(tmp_path / "b.csv", rows[:1])), "--campaign", "d").code == 0
    # what `load --again` writes (schema 0008), set here directly so that the listing is tested alone
    sql(location, "UPDATE imports SET replaces_import_id = 1 WHERE id = 2")
    listing = cli("inventory", "imports", "--json").json()["imports_list"]
    assert [(r["import"], r["replaces"]) for r in listing] == [(1, None), (2, 1)]
    assert {"campaign", "file", "read", "loaded", "rejected", "skipped", "loaded at", "sha256"} <= set(listing[0])
    text = cli("inventory", "imports").out.splitlines()
    assert "replaces" in text[0].split()
    assert text[2].split()[:4] == ["2", "d", "b.csv", "1"]
