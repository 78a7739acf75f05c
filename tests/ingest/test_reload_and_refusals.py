"""Loading mistakes undone (`load --again`), the warehouse made by the first load, and one-line
refusals where a load used to fail with a foreign message or an internal error.

The source files are made up inline; every expected number is worked out by hand beside its check.
"""
from __future__ import annotations

import io
import re

import pytest

from conftest import ON_POSTGRES
from warehouse.ingest import reload, scan, sources

from .kit import csv_text, everything, load, load_json, query, refusal, runs, write
from .test_atomic import indexes

H = "solver,version,family,group,instance,seed,pallets,finished_at\n"


def rows(version: str, first_seed: int = 1, n: int = 2, hour: int = 10) -> str:
    """n runs of stacker@version on two groups; pallets = 30 + seed; finished on the given hour."""
    return "".join(f"stacker,{version},mixed-sku,g{1 + k % 2},i{1 + k % 2},{first_seed + k},{30 + first_seed + k},"
                   f"2026-11-09T{hour:02d}:{k:02d}:00Z\n" for k in range(n))


def retract(cli, slice_text: str) -> None:
    res = cli("retract", "--slice", slice_text, "--reason", "loaded with the wrong layout", "--json")
    assert res.code == 0, res


def live_imports(location) -> list[tuple]:
    return query(location, "SELECT import_id, count(*) FROM runs WHERE retraction_id IS NULL "
                           "GROUP BY import_id ORDER BY import_id")


# --- the first load makes the warehouse ---------------------------------------------------------

def _run(*argv: str):
    from conftest import CliResult
    from warehouse.front.cli import run

    out, err = io.StringIO(), io.StringIO()
    code = run(list(argv), out=out, err=err)
    return CliResult(code, out.getvalue(), err.getvalue())


def test_a_first_load_creates_the_sqlite_warehouse_a_server_still_needs_init(wh_location, tmp_path):
    path = write(tmp_path / "a.csv", H + rows("1.6"))
    res = _run("-w", wh_location, "load", str(path), "--campaign", "nov", "--json")
    if ON_POSTGRES:  # a database on a server is made by its owner: today's message, unchanged
        assert res.code == 2 and "has no Blockyard schema; create one with: blockyard init -w" in res.err, res
        return
    assert res.code == 0, res
    doc = res.json()
    assert doc["created_warehouse"] == wh_location
    assert doc["imports"][0]["rows_loaded"] == 2
    again = _run("-w", wh_location, "load", str(write(tmp_path / "b.csv", H + rows("1.4"))), "--campaign", "nov", "--json")
    assert "created_warehouse" not in again.json()  # made once
    assert everything(wh_location)["runs"] == 4


@pytest.mark.skipif(ON_POSTGRES, reason="a SQLite file path")
def test_the_text_says_the_warehouse_was_created(tmp_path):
    db = tmp_path / "yard.db"
    res = _run("-w", str(db), "load", str(write(tmp_path / "a.csv", H + rows("1.6"))), "--campaign", "nov")
    assert res.code == 0 and res.err == "", res
    assert res.out.splitlines()[0] == f"created warehouse {db}"
    assert res.out.splitlines()[1].startswith("loaded   ")
    assert _run("-w", str(db), "inventory", "--json").json()["runs"] == 2


@pytest.mark.skipif(ON_POSTGRES, reason="a SQLite file path")
def test_a_warehouse_in_a_folder_that_does_not_exist_is_one_line(tmp_path):
    db = tmp_path / "no-such-folder" / "yard.db"
    res = _run("-w", str(db), "load", str(write(tmp_path / "a.csv", H + rows("1.6"))), "--campaign", "nov")
    assert res.code == 2 and res.out == "", res
    assert res.err.strip().splitlines() == [
        f"blockyard: no folder {db.parent} for warehouse {db}; create the folder first, "
        "or give -w a path in a folder that exists"]
    assert not db.parent.exists()


@pytest.mark.skipif(ON_POSTGRES, reason="a SQLite file path")
def test_a_dry_run_makes_no_warehouse(tmp_path):
    db = tmp_path / "yard.db"
    res = _run("-w", str(db), "load", str(write(tmp_path / "a.csv", H + rows("1.6"))), "--campaign", "nov", "--dry-run")
    assert res.code == 0, res
    assert res.out.splitlines()[0] == f"no warehouse at {db} yet: checked against an empty one (a load without --dry-run creates it)"
    assert "would load 2 of 2 rows" in res.out
    assert not db.exists()


# --- options are checked before the duplicate check ---------------------------------------------

def test_a_bad_option_is_told_even_for_a_file_loaded_already(cli, location, tmp_path):
    path = write(tmp_path / "a.csv", H + rows("1.6"))
    load_json(cli, path, campaign="nov")
    before = everything(location)
    assert refusal(cli, path, campaign="") == "blockyard: --campaign needs a name"
    assert refusal(cli, path, campaign="nov\tb") == (
        "blockyard: --campaign 'nov\\tb' holds a control character; names may not hold tabs, line breaks or "
        "other control characters")
    folder = tmp_path / "rack-b.toml"
    folder.mkdir()
    line = refusal(cli, path, "--layout", str(folder), campaign="nov")
    assert line == f"blockyard: layout {folder}: is a folder, not a file; give the path of the layout's .toml file"
    assert everything(location) == before


# --- loading a file again ------------------------------------------------------------------------

def test_the_duplicate_says_how_much_of_the_earlier_import_is_retracted(cli, location, tmp_path):
    path = write(tmp_path / "a.csv", H + rows("1.6") + rows("1.4"))
    first = load_json(cli, path, campaign="nov")
    rep = load_json(cli, path, campaign="nov")
    assert rep["status"] == "duplicate" and rep["import_id"] == first["import_id"]
    assert re.fullmatch(r"already loaded into campaign nov on \d{4}-\d\d-\d\d \d\d:\d\d UTC \(import 1\); "
                        r"not retracted; nothing to do", rep["message"]), rep["message"]
    retract(cli, "stacker@1.4")  # 2 of its 4 runs
    rep = load_json(cli, path, campaign="nov")
    assert rep["status"] == "duplicate"
    assert rep["message"].endswith("(import 1); partly retracted (2 of 4 runs); nothing to do (to load it again, "
                                   "retract the rest of its runs first, then add --again)"), rep["message"]
    retract(cli, "campaign=nov")
    rep = load_json(cli, path, campaign="nov")
    assert rep["status"] == "duplicate"
    assert rep["message"].endswith("(import 1); wholly retracted; to load it again (with a corrected layout, say), "
                                   "add --again"), rep["message"]


def test_again_refuses_an_import_with_live_runs_and_names_the_retract_that_clears_it(cli, location, tmp_path):
    path = write(tmp_path / "a.csv", H + rows("1.6") + rows("1.4"))
    load_json(cli, path, campaign="nov")
    retract(cli, "stacker@1.4")
    before = everything(location)
    line = refusal(cli, path, "--again", campaign="nov-fixed")
    assert re.fullmatch(
        rf"blockyard: {re.escape(str(path))}: --again loads a file whose earlier imports are wholly retracted, but "
        r"import 1 \(campaign nov, loaded \d{4}-\d\d-\d\d \d\d:\d\d UTC\) is partly retracted \(2 of 4 runs\), with 2 "
        r'live runs; retract them first: blockyard retract --slice "campaign=nov" --reason "\.\.\."', line), line
    assert everything(location) == before
    # the command it names, as it names it, clears the way
    retract(cli, re.search(r'--slice "([^"]*)"', line).group(1))
    rep = load_json(cli, path, "--again", campaign="nov-fixed")
    assert rep["status"] == "loaded" and rep["rows_loaded"] == 4 and rep["replaces"] == 1


def test_the_retract_it_names_takes_that_import_only_when_the_campaign_has_others(cli, location, tmp_path):
    # two imports in one campaign, an hour apart: the campaign alone would take both, so the
    # slice adds the import's own time range (until is exclusive: one second past its last run)
    path = write(tmp_path / "a.csv", H + rows("1.6", hour=10))
    load_json(cli, path, campaign="nov")
    other = load_json(cli, write(tmp_path / "b.csv", H + rows("1.4", hour=12)), campaign="nov")
    retract(cli, "stacker@1.6 seed=1")
    line = refusal(cli, path, "--again", campaign="nov-fixed")
    assert line.endswith('retract them first: blockyard retract --slice "campaign=nov since=2026-11-09T10:00:00Z '
                         'until=2026-11-09T10:01:01Z" --reason "..."'), line
    retract(cli, re.search(r'--slice "([^"]*)"', line).group(1))
    assert live_imports(location) == [(other["import_id"], 2)]  # the other import keeps its runs
    assert load_json(cli, path, "--again", campaign="nov-fixed")["replaces"] == 1


def test_a_reload_into_another_campaign_replaces_the_import_and_writes_its_summaries(cli, location, tmp_path):
    path = write(tmp_path / "a.csv", H + rows("1.6") + rows("1.4"))
    load_json(cli, path, campaign="nov")
    retract(cli, "campaign=nov")
    res = load(cli, path, "--again", campaign="nov-fixed")
    assert res.code == 0 and res.out.strip() == (
        f"loaded   {path}: 4 runs loaded into campaign nov-fixed, in place of import 1 (wholly retracted)"), res
    assert query(location, "SELECT id, replaces_import_id, rows_loaded FROM imports ORDER BY id") == [(1, None, 4), (2, 1, 4)]
    # 2 solvers x 2 instances, one host (none), one metric: 4 cells; 2 solvers x 2 groups: 4 blocks
    assert query(location, "SELECT count(*), sum(n) FROM cell_stats WHERE import_id = 2") == [(4, 4)]
    assert query(location, "SELECT count(*), sum(n) FROM block_stats WHERE import_id = 2") == [(4, 4)]
    assert query(location, "SELECT count(*) FROM cell_stats WHERE import_id = 1") == [(0,)]
    assert live_imports(location) == [(2, 4)]


def test_a_reload_takes_the_corrected_layout(cli, location, tmp_path):
    # the exporter's columns: pallets_used (pallets) and wall_s (seconds); the first layout swaps them
    lines = ["solver,version,family,group,instance,seed,pallets_used,wall_s"]
    for version, base in (("1.4", 30), ("1.6", 27)):
        for g in (1, 2, 3):
            for seed in (1, 2):
                lines.append(f"stacker,{version},mixed-sku,g{g},i{g},{seed},{base + g + seed},{10 * g + seed}")
    path = write(tmp_path / "runs.csv", "\n".join(lines) + "\n")
    wrong = write(tmp_path / "wrong.toml", '[columns]\npallets_used = "seconds"\nwall_s = "pallets"\n')
    right = write(tmp_path / "right.toml", '[columns]\npallets_used = "pallets"\nwall_s = "seconds"\n')

    def means() -> dict:
        res = cli("blocktest", "--metric", "pallets", "--json")
        assert res.code == 0, res
        return {m["treatment"]: m["mean"] for m in res.json()["treatment_means"]}

    load_json(cli, path, "--layout", str(wrong), campaign="nov")
    # wall_s read as pallets: the mean of 10 g + seed over g = 1..3, seed = 1, 2 is 20 + 1.5 for both
    assert means() == {"stacker@1.4": 21.5, "stacker@1.6": 21.5}
    retract(cli, "campaign=nov")
    rep = load_json(cli, path, "--again", "--layout", str(right), campaign="nov-fixed")
    assert rep["replaces"] == 1
    # base + g + seed: 30 + 2 + 1.5 for 1.4, 27 + 2 + 1.5 for 1.6
    assert means() == {"stacker@1.4": 33.5, "stacker@1.6": 30.5}
    assert query(location, "SELECT layout FROM imports WHERE id = 2") == [(right.read_text(),)]


def test_a_reload_into_the_same_campaign_goes_in_beside_its_retracted_runs(cli, location, tmp_path):
    # the retracted runs of the import it replaces hold no keys for it, on both databases alike
    path = write(tmp_path / "a.csv", H + rows("1.6"))
    load_json(cli, path, campaign="nov")
    retract(cli, "campaign=nov")
    rep = load_json(cli, path, "--again", "--dry-run", campaign="nov")
    assert rep["message"] == "would load 2 runs into campaign nov, in place of import 1; nothing was stored", rep
    res = load(cli, path, "--again", campaign="nov")
    assert res.code == 0 and res.out.strip() == (
        f"loaded   {path}: 2 runs loaded into campaign nov, in place of import 1 (wholly retracted)"), res
    # each key twice: the retracted run of import 1 and the live run of the reload (PostgreSQL's
    # sequence gave the dry run an id too: the reload's is read back)
    (new,), = query(location, "SELECT id FROM imports WHERE replaces_import_id = 1")
    assert query(location, "SELECT import_id, seed, CASE WHEN retraction_id IS NULL THEN 0 ELSE 1 END FROM runs "
                           "ORDER BY id") == [(1, 1, 1), (1, 2, 1), (new, 1, 0), (new, 2, 0)]
    assert live_imports(location) == [(new, 2)]
    assert query(location, "SELECT count(*), sum(n) FROM cell_stats") == [(2, 2)]  # import 2's cells alone
    assert "blockyard_load_key" not in indexes(location)  # (SQLite's key for a load, dropped with it)


def test_a_same_campaign_reload_with_a_fixed_layout_is_all_the_analyses_see(cli, location, tmp_path):
    # the exporter's columns: pallets_used (pallets) and wall_s (seconds); the first layout swaps them
    lines = ["solver,version,family,group,instance,seed,pallets_used,wall_s"]
    for version, base in (("1.4", 30), ("1.6", 27)):
        for g in (1, 2, 3):
            for seed in (1, 2):
                lines.append(f"stacker,{version},mixed-sku,g{g},i{g},{seed},{base + g + seed + (g == 2) * seed},"
                             f"{10 * g + seed}")
    path = write(tmp_path / "runs.csv", "\n".join(lines) + "\n")
    wrong = write(tmp_path / "wrong.toml", '[columns]\npallets_used = "seconds"\nwall_s = "pallets"\n')
    right = write(tmp_path / "right.toml", '[columns]\npallets_used = "pallets"\nwall_s = "seconds"\n')

    def means() -> dict:
        res = cli("blocktest", "--slice", "campaign=nov", "--metric", "pallets", "--json")
        assert res.code == 0, res
        return {m["treatment"]: m["mean"] for m in res.json()["treatment_means"]}

    def diff() -> float:
        res = cli("versus", "stacker@1.4", "--slice", "campaign=nov", "--metric", "pallets", "--json")
        assert res.code == 0, res
        (row,) = res.json()["comparisons"]
        return row["diff"]

    load_json(cli, path, "--layout", str(wrong), campaign="nov")
    # wall_s read as pallets: the mean of 10 g + seed over g = 1..3, seed = 1, 2 is 20 + 1.5 for both
    assert means() == {"stacker@1.4": 21.5, "stacker@1.6": 21.5}
    assert diff() == pytest.approx(0.0)
    retract(cli, "campaign=nov")
    rep = load_json(cli, path, "--again", "--layout", str(right), campaign="nov")
    assert (rep["rows_loaded"], rep["rows_skipped"], rep["replaces"]) == (12, 0, 1)
    # base + g + seed (+ seed on g2): 30 + 2 + 1.5 + 0.5 for 1.4, 27 + 2 + 1.5 + 0.5 for 1.6
    assert means() == {"stacker@1.4": 34.0, "stacker@1.6": 31.0}
    assert diff() == pytest.approx(-3.0)  # 31 - 34, each block alike
    listing = cli("inventory", "imports", "--json").json()["imports_list"]
    assert [(r["import"], r["campaign"], r["replaces"]) for r in listing] == [(1, "nov", None), (2, "nov", 1)]
    text = cli("inventory", "imports").out.splitlines()
    assert text[2].split()[:4] == ["2", "nov", "runs.csv", "1"]


def test_a_reload_of_a_reload_into_the_same_campaign_passes_the_whole_chain(cli, location, tmp_path):
    # imports 1 and 2 (which replaced 1) are both retracted: neither holds a key against import 3
    path = write(tmp_path / "a.csv", H + rows("1.6"))
    load_json(cli, path, campaign="nov")
    retract(cli, "campaign=nov")
    assert load_json(cli, path, "--again", campaign="nov")["replaces"] == 1
    retract(cli, "campaign=nov")
    rep = load_json(cli, path, "--again", campaign="nov")
    assert (rep["rows_loaded"], rep["rows_skipped"], rep["replaces"]) == (2, 0, 2)
    assert query(location, "SELECT seed, count(*), count(retraction_id) FROM runs GROUP BY seed ORDER BY seed") == \
        [(1, 3, 2), (2, 3, 2)]
    assert live_imports(location) == [(3, 2)]


def test_a_retracted_run_of_another_import_still_holds_its_key_against_a_reload(cli, location, tmp_path):
    # seed 2 came first from another file (import 1), since retracted: it keeps its key, as for
    # any load; the reload's own retracted runs (import 2) do not
    body = rows("1.6", n=3)
    load_json(cli, write(tmp_path / "b.csv", H + body.splitlines(True)[1]), campaign="nov")
    retract(cli, "campaign=nov")
    path = write(tmp_path / "a.csv", H + body)
    rep = load_json(cli, path, campaign="nov")
    assert (rep["rows_loaded"], rep["rows_skipped"]) == (2, 1)
    retract(cli, "campaign=nov")
    rep = load_json(cli, path, "--again", campaign="nov")
    assert (rep["rows_loaded"], rep["rows_skipped"], rep["replaces"]) == (2, 1, 2)
    assert rep["warnings"] == [f"{path} line 3: this run (stacker@1.6, instance i2, seed 2, replicate 0) is already "
                               "in this campaign (a retracted run of import 1); skipped, the stored values are kept"]
    assert query(location, "SELECT seed FROM runs WHERE retraction_id IS NULL ORDER BY seed") == [(1,), (3,)]
    assert query(location, "SELECT import_id FROM runs WHERE seed = 2") == [(1,)]


def test_a_reload_whose_corrected_keys_differ_goes_into_the_same_campaign(cli, location, tmp_path):
    # the first layout took the job number for the seed; the retracted runs sit in the same cells
    # (a SQLite load then checks the exact way), but under other keys, so they block nothing
    text = "solver,group,instance,job,rng,pallets\n" + "".join(f"stacker,g1,i1,{100 + k},{k},{30 + k}\n" for k in range(3))
    path = write(tmp_path / "a.csv", text)
    load_json(cli, path, "--layout", str(write(tmp_path / "w.toml", '[columns]\njob = "seed"\n[ignore]\ncolumns = ["rng"]\n')),
              campaign="nov")
    retract(cli, "campaign=nov")
    rep = load_json(cli, path, "--again", "--layout",
                    str(write(tmp_path / "r.toml", '[columns]\nrng = "seed"\n[ignore]\ncolumns = ["job"]\n')), campaign="nov")
    assert (rep["rows_loaded"], rep["rows_skipped"], rep["replaces"]) == (3, 0, 1)
    assert query(location, "SELECT seed FROM runs WHERE retraction_id IS NULL ORDER BY seed") == [(0,), (1,), (2,)]


def test_live_runs_of_another_import_are_still_skipped_by_a_reload(cli, location, tmp_path):
    body = rows("1.6", n=3)
    path = write(tmp_path / "a.csv", H + body)
    load_json(cli, path, campaign="nov")
    retract(cli, "campaign=nov")
    # the target campaign holds seed 2 (line 3) already, live, from another file: kept, not stored twice
    load_json(cli, write(tmp_path / "b.csv", H + body.splitlines(True)[1]), campaign="dec")
    rep = load_json(cli, path, "--again", campaign="dec")
    assert (rep["rows_loaded"], rep["rows_skipped"], rep["replaces"]) == (2, 1, 1)
    assert any("line 3: this run" in w and "skipped" in w for w in rep["warnings"]), rep["warnings"]
    assert query(location, "SELECT count(*) FROM runs WHERE retraction_id IS NULL AND seed = 2") == [(1,)]


def test_a_second_reload_replaces_the_head_of_the_chain(cli, location, tmp_path):
    path = write(tmp_path / "a.csv", H + rows("1.6"))
    load_json(cli, path, campaign="a")
    retract(cli, "campaign=a")
    assert load_json(cli, path, "--again", campaign="b")["replaces"] == 1
    retract(cli, "campaign=b")
    assert load_json(cli, path, "--again", campaign="c")["replaces"] == 2
    assert query(location, "SELECT id, replaces_import_id FROM imports ORDER BY id") == [(1, None), (2, 1), (3, 2)]
    rep = load_json(cli, path, campaign="d")
    assert rep["status"] == "duplicate" and "(import 3); not retracted" in rep["message"]


def test_two_reloads_of_one_import_at_once_store_one(cli, location, tmp_path, monkeypatch):
    # a second process that read the imports before the first committed: the unique index on
    # (sha256, replaced import) turns it away, in one line
    path = write(tmp_path / "a.csv", H + rows("1.6"))
    load_json(cli, path, campaign="a")
    retract(cli, "campaign=a")
    from warehouse.store.connect import open_warehouse

    w = open_warehouse(location)
    try:
        seen = reload.earlier_imports(w, query(location, "SELECT sha256 FROM imports")[0][0])
    finally:
        w.close()
    assert load_json(cli, path, "--again", campaign="b")["replaces"] == 1
    monkeypatch.setattr(reload, "earlier_imports", lambda wh, sha: seen)  # the view before that commit
    before = everything(location)
    rep = load_json(cli, path, "--again", campaign="c")
    assert rep["status"] == "duplicate"
    assert rep["message"] == "another process loaded these bytes again just now; nothing to do"
    assert everything(location) == before


def test_again_on_bytes_never_loaded_loads_them_with_a_caution(cli, location, tmp_path):
    rep = load_json(cli, write(tmp_path / "a.csv", H + rows("1.6")), "--again", campaign="nov")
    assert rep["status"] == "loaded" and "replaces" not in rep
    assert rep["warnings"] == ["--again: these bytes were not loaded before; loaded as any new file"]


# --- paths that are not files -------------------------------------------------------------------

def test_layout_paths_that_cannot_be_read_are_one_line(cli, location, tmp_path):
    data = write(tmp_path / "a.csv", H + rows("1.6"))
    assert refusal(cli, data, "--layout", str(tmp_path / "none.toml")) == f"blockyard: layout {tmp_path / 'none.toml'}: no such file"
    through = tmp_path / "a.csv" / "l.toml"  # a path through a file
    line = refusal(cli, data, "--layout", str(through))
    assert line.startswith(f"blockyard: layout {through}: cannot be read ("), line


@pytest.mark.parametrize("name", ["runs.csv", "runs"])
def test_a_data_file_that_is_a_folder_is_one_line(cli, location, tmp_path, name):
    folder = tmp_path / name
    folder.mkdir()
    assert refusal(cli, folder) == f"blockyard: {folder}: is a folder, not a file; name the result files in it"


# --- a field longer than the reader's block ------------------------------------------------------

TEN_MB = 10 * 2**20


def long_note_csv(quoted_break: bool = False) -> str:
    """Five runs; the third carries a 10 MB note (more than pyarrow's 1 MB block: 'straddling object')."""
    out = ["solver,group,instance,seed,pallets,note"]
    for k in range(5):
        note = "x" * TEN_MB if k == 2 else ('"two\nlines"' if quoted_break and k == 0 else "short")
        out.append(f"stacker,g1,i{k},{k},{30 + k},{note}")
    return "\n".join(out) + "\n"


@pytest.mark.parametrize("quoted_break", [False, True], ids=["plain", "with-a-quoted-line-break"])
def test_a_10_mb_field_is_read(cli, location, tmp_path, quoted_break):
    rep = load_json(cli, write(tmp_path / "long.csv", long_note_csv(quoted_break)))
    assert (rep["rows_read"], rep["rows_loaded"]) == (5, 5)
    # line numbers still follow the physical lines (the quoted break makes the first record two lines)
    first = 3 if quoted_break else 2
    assert query(location, "SELECT source_line FROM runs ORDER BY seed") == [(2,)] + [(first + k,) for k in range(1, 5)]


def test_a_10_mb_field_reads_the_same_with_the_early_parse(tmp_path, monkeypatch, location):
    from .kit import stored_runs
    from .test_early import _load_both_ways

    (early, plain), taken = _load_both_ways(tmp_path, monkeypatch, location, long_note_csv().encode(), name="long.csv")
    assert taken[0] is True
    assert early[0] == plain[0] == 0, (early, plain)
    assert stored_runs(location) == stored_runs(str(tmp_path / "plain.db"))


def test_a_record_past_the_largest_block_is_refused_naming_line_and_field(cli, location, tmp_path, monkeypatch):
    monkeypatch.setattr(sources, "MAX_BLOCK_BYTES", 4 * 2**20)  # a record may then hold 2 MB
    before = everything(location)
    path = write(tmp_path / "long.csv", long_note_csv(quoted_break=True))
    assert refusal(cli, path) == (f"blockyard: {path} line 5, field note: the record is 10 MB long; a record may hold at "
                                  "most 2 MB; shorten that field, or leave its column out of the file")
    assert everything(location) == before


def test_the_longest_record_is_found_across_chunks_and_quotes(tmp_path):
    # the scan reads 4 MB at a time: a record of 5 MB starts in one chunk and ends in the next
    text = 'a,b,c\n1,"x\ny",2\n' + "3," + "z" * (5 * 2**20) + ",4\n" + "5,6,7"
    path = write(tmp_path / "s.csv", text)
    info = scan.first_pass(path, "s.csv")
    assert sources.longest_record(info) == (5 * 2**20 + 4, 4, 1)  # "3," + 5 MB + ",4"; line 4; column b


# --- numbers out of range and names with control characters -------------------------------------

@pytest.mark.parametrize("field,value,says", [
    ("seed", "18446744073709551616", "'18446744073709551616' is out of range; a seed is a whole number from "
                                     "-9223372036854775808 to 9223372036854775807"),
    ("seed", "-9223372036854775809", "'-9223372036854775809' is out of range"),
    ("seed", "1e19", "'1e19' is out of range"),
    ("replicate", "2147483648", "'2147483648' is out of range; a replicate is a whole number from -2147483648 to 2147483647"),
])
def test_whole_numbers_past_their_range_are_out_of_range(cli, location, tmp_path, field, value, says):
    # PostgreSQL documentation, numeric types: bigint is -9223372036854775808 .. 9223372036854775807,
    # integer (runs.replicate) -2147483648 .. 2147483647
    text = "solver,group,instance,seed,replicate,pallets\nstacker,g1,a,1,0,3\n"
    bad = {"seed": "1", "replicate": "0"}
    bad[field] = value
    path = write(tmp_path / "r.csv", text + f"stacker,g1,a,{bad['seed']},{bad['replicate']},3\n")
    before = everything(location)
    line = refusal(cli, path)
    assert line.startswith(f"blockyard: {path} line 3, field {field}: {says}"), line
    assert everything(location) == before


def test_a_seed_out_of_range_in_json_lines(cli, location, tmp_path):
    path = write(tmp_path / "r.jsonl", '{"solver": "s", "group": "g", "instance": "a", "seed": 1e30, "pallets": 3}\n')
    assert refusal(cli, path).startswith(f"blockyard: {path} line 1, field seed: '1e+30' is out of range")


CONTROL = [("tab", "\t"), ("line-feed", "\n"), ("unit-separator", "\x1f"), ("delete", "\x7f"), ("next-line-C1", "\x85")]


@pytest.mark.parametrize("field", ["solver", "version", "family", "group", "instance", "host"])
@pytest.mark.parametrize("what,char", CONTROL, ids=[c[0] for c in CONTROL])
def test_names_with_control_characters_are_refused(cli, location, tmp_path, field, what, char):
    # control characters: Unicode general category Cc (from memory of the Unicode Character
    # Database): U+0000..U+001F, U+007F and U+0080..U+009F
    cols = ["solver", "version", "family", "group", "instance", "host", "seed", "pallets"]
    good = {"solver": "stacker", "version": "1.6", "family": "mixed-sku", "group": "g1", "instance": "a",
            "host": "rack-a", "seed": "1", "pallets": "3"}
    bad = dict(good, seed="2", **{field: f'"x{char}y"'})
    text = ",".join(cols) + "\n" + ",".join(good[c] for c in cols) + "\n" + ",".join(bad[c] for c in cols) + "\n"
    path = write(tmp_path / "n.csv", text)
    assert refusal(cli, path) == (f"blockyard: {path} line 3, field {field}: {('x' + char + 'y')!r} holds a control "
                                  "character; names may not hold tabs, line breaks or other control characters")
    assert everything(location)["runs"] == 0


def test_white_space_controls_at_the_edges_are_trimmed_not_refused(cli, location, tmp_path):
    path = write(tmp_path / "t.csv", 'solver,group,instance,pallets\nstacker,g1,"\ta\t",3\n')
    assert load_json(cli, path)["rows_loaded"] == 1
    assert query(location, "SELECT name FROM instances") == [("a",)]


def test_a_name_with_a_control_character_is_set_aside_with_skip_bad(cli, location, tmp_path):
    path = write(tmp_path / "s.csv", "solver,group,instance,seed,pallets\nstacker,g1,a,1,3\nstacker,g1,\"b\x01c\",2,4\n")
    rep = load_json(cli, path, "--skip-bad")
    assert (rep["rows_loaded"], rep["rows_rejected"]) == (1, 1)
    rejected = (tmp_path / "s.csv.rejects.csv").read_text(encoding="utf-8")
    assert "field instance: 'b\\x01c' holds a control character" in rejected


def test_metric_names_with_control_characters_are_refused(cli, location, tmp_path):
    path = write(tmp_path / "m.csv", 'solver,group,instance,"pal\tlets"\nstacker,g1,a,3\n')
    assert refusal(cli, path) == (f"blockyard: {path} line 1: metric name 'pal\\tlets' holds a control character; names "
                                  "may not hold tabs, line breaks or other control characters; rename the column or map "
                                  "it in a layout's [columns]")
    js = write(tmp_path / "m.jsonl", '{"solver": "s", "group": "g", "instance": "a", "fill\\u0085pct": 3}\n')
    assert "metric name 'fill\\x85pct' holds a control character" in refusal(cli, js)


@pytest.mark.parametrize("text,says", [
    ('[constants]\nhost = "rack\\tb"\n', "[constants] host: 'rack\\tb' holds a control character"),
    ('[columns]\nfill = "fill\\npct"\n', "[columns] fill: 'fill\\npct' holds a control character"),
    ('[metrics."fill\\u0001pct"]\nsense = "max"\n', "[metrics]: 'fill\\x01pct' holds a control character"),
    ('[constants]\nreplicate = "4294967296"\n', "[constants] replicate = '4294967296' is out of range"),
])
def test_layout_names_with_control_characters_are_refused(cli, location, tmp_path, text, says):
    lay = write(tmp_path / "l.toml", text)
    line = refusal(cli, write(tmp_path / "a.csv", H + rows("1.6")), "--layout", str(lay))
    assert line.startswith(f"blockyard: layout {lay}: {says}"), line


def test_generated_runs_still_load_with_the_checks_on(cli, location, tmp_path):
    # (kit.runs: plain names, seeds from 1) nothing above refuses ordinary files
    rep = load_json(cli, write(tmp_path / "a.csv", csv_text(runs(40))))
    assert (rep["rows_loaded"], rep["rows_rejected"]) == (40, 0)
