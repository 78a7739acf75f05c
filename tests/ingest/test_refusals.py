"""Each kind of bad input: exit status 2, one line naming file, line and field, nothing stored."""
from __future__ import annotations

import gzip

import pytest

from .kit import cli_at, everything, load_json, module_warehouse, refusal, write

H = "solver,version,group,instance,seed,status,finished_at,pallets\n"
GOOD = "stacker,1.6,g1,a,1,ok,2026-11-09T10:00:00Z,30\n"


@pytest.fixture
def before(cli, location, tmp_path):
    """A warehouse that already holds one good import, so 'unchanged' means something."""
    load_json(cli, write(tmp_path / "first.csv", H + GOOD), campaign="base")
    return everything(location)


CASES = [
    # name, file text, what the one line must contain (after the file name)
    ("missing-group", "solver,instance,pallets\ns,a,3\n", " line 1: missing required column 'group'"),
    ("missing-solver", "group,instance,pallets\ng1,a,3\n", " line 1: missing required column 'solver'"),
    ("missing-instance", "solver,group,pallets\ns,g1,3\n", " line 1: missing required column 'instance'"),
    ("duplicate-column", "solver,group,instance,pallets,pallets\ns,g1,a,3,4\n", " line 1: column 'pallets' appears twice"),
    ("duplicate-column-case", "solver,Group,group,instance,pallets\ns,g1,g1,a,3\n", " line 1: column 'group' appears twice"),
    ("too-many-fields", H + GOOD + "stacker,1.6,g1,a,2,ok,,30,extra\n", " line 3: has 9 fields where the header has 8 (too many)"),
    ("too-few-fields", H + GOOD + GOOD.replace(",1,", ",2,") + "stacker,1.6,g1,a,3,ok\n", " line 4: has 6 fields where the header has 8 (too few)"),
    ("metric-not-a-number", H + GOOD + "stacker,1.6,g1,a,2,ok,,n/a\n", " line 3, field pallets: 'n/a' is not a number"),
    # a quoted header (RFC 4180 allows it; pandas writes one) changes no line number
    ("quoted-header", '"' + H.strip().replace(",", '","') + '"\n' + GOOD + '"stacker","1.6","g1","a",2,ok,,"n/a"\n',
     " line 3, field pallets: 'n/a' is not a number"),
    ("quoted-header-later-break", '"' + H.strip().replace(",", '","') + '"\n' + GOOD + GOOD.replace(",1,", ",2,")
     + 'stacker,1.6,g1,a,3,"ok\n",,30\n' + "stacker,1.6,g1,a,4,ok,,n/a\n", " line 6, field pallets: 'n/a' is not a number"),
    ("metric-infinite", H + GOOD + "stacker,1.6,g1,a,2,ok,,inf\n", " line 3, field pallets: 'inf' is not a finite number"),
    ("metric-nan", H + GOOD + "stacker,1.6,g1,a,2,ok,,NaN\n", " line 3, field pallets: 'NaN' is not a finite number"),
    ("metric-empty-on-ok", H + GOOD + "stacker,1.6,g1,a,2,ok,,\n", " line 3, field pallets: is empty on an ok run"),
    ("seed-fraction", H + GOOD + "stacker,1.6,g1,a,2.5,ok,,30\n", " line 3, field seed: '2.5' is not a whole number"),
    ("seed-word", H + GOOD + "stacker,1.6,g1,a,two,ok,,30\n", " line 3, field seed: 'two' is not a whole number"),
    ("seed-hex", H + GOOD + "stacker,1.6,g1,a,0x10,ok,,30\n", " line 3, field seed: '0x10' is not a whole number"),
    ("status-unknown", H + GOOD + "stacker,1.6,g1,a,2,meh,,30\n", " line 3, field status: unknown status 'meh' (known: "),
    ("solver-empty", H + GOOD + ",1.6,g1,a,2,ok,,30\n", " line 3, field solver: is empty"),
    ("header-repeated", H + GOOD + H, " line 3, field solver: this line repeats the header"),
    ("name-too-long", H + GOOD + "stacker,1.6,g1," + "x" * 256 + ",2,ok,,30\n", " line 3, field instance: is 256 characters long; names may have at most 255"),
    ("no-data-rows", H, ": the file has a header but no data rows"),
    ("empty-file", "", ": the file is empty"),
    ("only-blank-lines", "\n\r\n\n", ": the file is empty"),
    ("no-metric", "solver,group,instance\ns,g1,a\n", ": no metric columns found"),
    ("no-numeric-metric", "solver,group,instance,score\ns,g1,a,high\n",
     ": no metric columns found (columns: solver, group, instance, score); score holds text, not numbers"),
]


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    """One warehouse for all the cases below: each must leave it exactly as it was."""
    with module_warehouse(tmp_path_factory) as loc:
        run = cli_at(loc)
        first = tmp_path_factory.mktemp("first") / "first.csv"
        load_json(run, write(first, H + GOOD), campaign="base")
        yield loc, run


@pytest.mark.parametrize("name,content,says", CASES, ids=[c[0] for c in CASES])
def test_bad_csv_is_refused_whole(shared, tmp_path, name, content, says):
    location, run = shared
    before = everything(location)
    assert before["runs"] == 1
    path = write(tmp_path / f"{name}.csv", content)
    line = refusal(run, path)
    assert line.startswith(f"blockyard: {path}{says}"), line
    assert everything(location) == before


def test_unknown_status_says_how_to_map_more(cli, location, tmp_path, before):
    line = refusal(cli, write(tmp_path / "s.csv", H + "stacker,1.6,g1,a,2,meh,,30\n"))
    for word in ("ok", "timeout", "failed", "infeasible", "solved", "time_limit"):
        assert word in line
    assert "[status]" in line and "layout" in line


def test_empty_metric_on_a_timeout_run_is_fine(cli, location, tmp_path, before):
    path = write(tmp_path / "t.csv", H + GOOD + "stacker,1.6,g1,a,2,timeout,,\n")
    assert load_json(cli, path)["rows_loaded"] == 2


def test_name_of_255_characters_is_accepted(cli, location, tmp_path, before):
    # the limit is inclusive: 255 characters is the longest name (schema.NAME)
    path = write(tmp_path / "n.csv", H + "stacker,1.6,g1," + "é" * 255 + ",2,ok,,30\n")
    assert load_json(cli, path)["rows_loaded"] == 1


def test_text_that_is_not_utf8_names_its_line(cli, location, tmp_path, before):
    # RFC 3629 section 3: the byte E9 must begin a three-byte sequence; 'caf\xe9,' is malformed UTF-8
    path = write(tmp_path / "latin.csv", (H + GOOD).encode() + b"stacker,1.6,g1,caf\xe9,2,ok,,30\n")
    line = refusal(cli, path)
    assert line.startswith(f"blockyard: {path} line 3: bytes b'\\xe9,2,' are not UTF-8"), line
    assert everything(location) == before


def test_not_utf8_deep_in_a_large_file(cli, location, tmp_path, before):
    body = "".join(f"stacker,1.6,g1,i{k % 50},{k},ok,,30\n" for k in range(30_000))
    path = write(tmp_path / "deep.csv", H.encode() + body.encode() + b"stacker,1.6,g1,\xff\xfe,1,ok,,30\n")
    assert f"{path} line 30002: bytes" in refusal(cli, path)


def test_not_utf8_in_json_lines(cli, location, tmp_path, before):
    path = write(tmp_path / "bad.jsonl", b'{"solver": "s", "group": "g", "instance": "a", "pallets": 1}\n{"solver": "\xc3"}\n')
    assert f"{path} line 2: bytes" in refusal(cli, path)


def test_nul_byte_is_refused(cli, location, tmp_path, before):
    path = write(tmp_path / "nul.csv", (H + GOOD).encode() + b"stacker,1.6,g1,a\x00,2,ok,,30\n")
    assert f"{path} line 3: contains a NUL byte" in refusal(cli, path)


def test_truncated_gzip_is_refused(cli, location, tmp_path, before):
    # RFC 1952 section 2.3: a member ends with CRC32 and ISIZE; cut those off and the data is incomplete
    full = gzip.compress((H + GOOD * 3).encode())
    path = write(tmp_path / "cut.csv.gz", full[:-12])
    assert f"{path}: the compressed data is cut short (truncated gzip file)" in refusal(cli, path)
    assert everything(location) == before


def test_gzip_name_on_plain_bytes_is_refused(cli, location, tmp_path, before):
    path = write(tmp_path / "plain.csv.gz", H + GOOD)
    assert f"{path}: not readable as gzip" in refusal(cli, path)


def test_broken_json_line_names_its_line(cli, location, tmp_path, before):
    text = ('{"solver": "s", "group": "g1", "instance": "a", "pallets": 1}\n\n'
            '{"solver": "s", "group": "g1", "instance": "b", pallets: 2}\n')
    path = write(tmp_path / "broken.jsonl", text)
    line = refusal(cli, path)
    assert line.startswith(f"blockyard: {path} line 3: broken JSON"), line
    assert everything(location) == before


def test_json_line_that_is_not_an_object(cli, location, tmp_path, before):
    path = write(tmp_path / "arr.jsonl", '{"solver": "s", "group": "g1", "instance": "a", "pallets": 1}\n[1, 2]\n')
    assert f"{path} line 2: is an array; each line must be one JSON object" in refusal(cli, path)


def test_json_nested_value_names_line_and_field(cli, location, tmp_path, before):
    path = write(tmp_path / "nest.jsonl", '{"solver": "s", "group": "g1", "instance": "a", "pallets": {"n": 1}}\n')
    assert f"{path} line 1, field pallets: nested object" in refusal(cli, path)


def test_json_bad_value_names_its_physical_line(cli, location, tmp_path, before):
    text = ('{"solver": "s", "group": "g1", "instance": "a", "seed": 1, "pallets": 1}\n\n\n'
            '{"solver": "s", "group": "g1", "instance": "a", "seed": 2, "pallets": "lots"}\n')
    path = write(tmp_path / "v.jsonl", text)
    assert f"{path} line 4, field pallets: 'lots' is not a number" in refusal(cli, path)


def test_empty_json_lines_file(cli, location, tmp_path, before):
    path = write(tmp_path / "e.jsonl", "\n\n")
    assert f"{path}: the file holds no records" in refusal(cli, path)


def test_damaged_parquet_is_refused(cli, location, tmp_path, before):
    path = write(tmp_path / "d.parquet", b"PAR1 this is not really parquet")
    assert f"{path}: not a readable Parquet file" in refusal(cli, path)


def test_unknown_suffix_and_missing_file(cli, location, tmp_path, before):
    assert "cannot tell the format from the name" in refusal(cli, write(tmp_path / "runs.xlsx", "x"))
    assert f"{tmp_path / 'nope.csv'}: no such file" in refusal(cli, tmp_path / "nope.csv")


def test_same_run_twice_in_one_file_names_both_lines(cli, location, tmp_path, before):
    text = H + GOOD + "stacker,1.6,g1,b,1,ok,,31\n" + "stacker,1.6,g1,a,1,ok,,32\n"
    path = write(tmp_path / "twice.csv", text)
    line = refusal(cli, path, campaign="fresh")
    assert f"{path}: lines 2 and 4 hold the same run (stacker@1.6, instance a, seed 1, replicate 0)" in line
    assert everything(location) == before


def test_a_refused_file_among_good_ones_keeps_the_good_ones(cli, location, tmp_path, before):
    good = write(tmp_path / "good.csv", H + GOOD.replace(",a,", ",z,"))
    bad = write(tmp_path / "bad.csv", H + "stacker,1.6,g1,a,2,ok,,abc\n")
    res = cli("load", str(good), str(bad), "--campaign", "c")
    assert res.code == 2
    assert res.err.strip().splitlines() == [f"blockyard: {bad} line 2, field pallets: 'abc' is not a number; "
                                             "map it in a layout ([missing] words) or use --skip-bad"]
    after = everything(location)
    assert after["runs"] == before["runs"] + 1 and after["imports"] == before["imports"] + 1


def test_json_object_with_a_name_twice_is_refused(cli, location, tmp_path, before):
    # RFC 8259 section 4: the names within an object SHOULD be unique; readers disagree on which
    # value wins when they are not, so the line is refused instead of guessed at
    text = ('{"solver": "s", "group": "g1", "instance": "a", "seed": 1, "pallets": 3}\n'
            '{"solver": "s", "group": "g1", "instance": "a", "seed": 2, "pallets": 3, "pallets": 4}\n')
    path = write(tmp_path / "twice.jsonl", text)
    assert f"{path} line 2, field pallets: the name appears twice in this object" in refusal(cli, path)
    assert everything(location) == before


@pytest.mark.skipif(__import__("conftest").ON_POSTGRES, reason="a SQLite page limit stands in for a full disk")
@pytest.mark.parametrize("rows", [2_000, 60_000])
def test_a_full_disk_is_one_line_and_leaves_no_trace(location, tmp_path, before, rows):
    from sqlalchemy import event

    from warehouse.errors import StorageError
    from warehouse.ingest.load import load_file
    from warehouse.store.connect import open_warehouse

    body = "".join(f"stacker,1.6,g{k % 20},i{k % 300},{k // 300},ok,,{k % 50}\n" for k in range(rows))
    path = write(tmp_path / "more.csv", H + body)
    wh = open_warehouse(location)
    try:
        @event.listens_for(wh.engine, "connect")
        def limit(dbapi_conn, _record):  # no room beyond the pages the file has now
            n = dbapi_conn.execute("PRAGMA page_count").fetchone()[0]
            dbapi_conn.execute(f"PRAGMA max_page_count = {n + 2}")

        wh.engine.dispose()
        with pytest.raises(StorageError) as err:
            load_file(wh, path, "more")
        assert str(err.value).startswith(f"cannot write to warehouse {wh.display}: database or disk is full; "
                                         f"nothing from {path} was stored")
        assert "\n" not in str(err.value)
    finally:
        wh.close()
    assert everything(location) == before


def test_json_lines_that_only_join_into_objects_are_refused(cli, location, tmp_path, before):
    # each line must be one JSON object on its own (JSON Lines); these three lines would read as
    # three objects if they were joined with commas into one array, and none of them is one
    text = ('{"solver": "s", "group": "g1", "instance": "a", "pallets": 1},{"solver": "s", "group": "g1", "instance": "b", "pallets": 2}\n'
            '{"solver": "s", "group": "g1", "instance": "x}\n'
            '{", "pallets": 3}\n')
    r = cli("load", str(write(tmp_path / "joined.jsonl", text)), "--campaign", "j")
    assert r.code == 2, r
    assert "joined.jsonl line 1: broken JSON" in r.err and r.err.count("\n") == 1
    assert everything(location) == before
