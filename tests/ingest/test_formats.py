"""Each source format, plain and gzipped, stores the same runs."""
from __future__ import annotations

import pytest

from .kit import csv_text, jsonl_text, load_json, parquet, runs, stored_runs, write

ROWS = runs(6)
# what the made-up rows above must become: status 0 is ok; finished_at as epoch seconds UTC
# (POSIX time: 2026-11-09T10:00:00Z is 20,766 days after 1970-01-01, 20,766 x 86,400 + 10 x 3,600 =
#  1,794,218,400 seconds)
EXPECTED = sorted(
    ("stacker", "1.6", "mixed-sku", r["group"], r["instance"], r["seed"], 0, 0,
     1794218400 + 3600 * (int(r["finished_at"][11:13]) - 10), "rack-a", float(r["pallets"]), r["seconds"])
    for r in ROWS
)


@pytest.mark.parametrize("name,maker", [
    ("runs.csv", lambda p: write(p, csv_text(ROWS))),
    ("runs.csv.gz", lambda p: write(p, csv_text(ROWS), gz=True)),
    ("runs.tsv", lambda p: write(p, csv_text(ROWS, delim="\t"))),
    ("runs.tsv.gz", lambda p: write(p, csv_text(ROWS, delim="\t"), gz=True)),
    ("runs.jsonl", lambda p: write(p, jsonl_text(ROWS))),
    ("runs.jsonl.gz", lambda p: write(p, jsonl_text(ROWS), gz=True)),
    ("runs.parquet", lambda p: parquet(p, ROWS)),
])
def test_each_format_stores_the_same_runs(cli, location, tmp_path, name, maker):
    path = maker(tmp_path / name)
    rep = load_json(cli, path)
    assert rep["status"] == "loaded"
    assert (rep["rows_read"], rep["rows_loaded"], rep["rows_rejected"]) == (6, 6, 0)
    assert sorted(stored_runs(location)) == EXPECTED


def test_parquet_with_typed_columns(cli, location, tmp_path):
    """Parquet keeps types: timestamps, integer seeds and missing floats come through as such."""
    import datetime as dt

    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.table({
        "solver": ["stacker", "stacker"], "group": ["g1", "g1"], "instance": ["a", "b"],
        "seed": pa.array([1, 2], pa.int32()), "status": ["ok", "timeout"],
        "finished_at": pa.array([dt.datetime(2026, 11, 9, 10, 0, tzinfo=dt.timezone.utc)] * 2, pa.timestamp("ms", tz="UTC")),
        "pallets": pa.array([21.0, None]),
    })
    pq.write_table(table, tmp_path / "typed.parquet")
    rep = load_json(cli, tmp_path / "typed.parquet")
    assert rep["rows_loaded"] == 2
    from .kit import query

    got = query(location, "SELECT seed, status, finished_at, v1 FROM runs ORDER BY seed")
    assert got == [(1, 0, 1794218400, 21.0), (2, 1, 1794218400, None)]


def test_gzip_of_several_members_is_read_whole(cli, location, tmp_path):
    """RFC 1952 section 2.2: a gzip file is a series of members; all of them hold data."""
    import gzip

    text = csv_text(ROWS)
    head, tail = text[: text.index("\n", 80) + 1], text[text.index("\n", 80) + 1:]
    path = tmp_path / "two.csv.gz"
    path.write_bytes(gzip.compress(head.encode()) + gzip.compress(tail.encode()))
    rep = load_json(cli, path)
    assert rep["rows_loaded"] == 6


def test_a_quoted_header_leaves_records_and_lines_one_to_one(tmp_path):
    # RFC 4180 allows any field in quotes, the header's too (pandas and pyarrow quote header
    # names); only a quoted field that holds a line break makes records and lines part ways
    from warehouse.ingest.scan import first_pass

    plain = tmp_path / "quoted-header.csv"
    plain.write_text('"solver","group","instance","seed","pallets"\nstk,g1,"i,1",1,3\nstk,g1,"say ""hi""",2,4\n')
    assert first_pass(plain, "x").spans_lines is False
    broken = tmp_path / "line-break.csv"
    broken.write_text('"solver","group","instance","seed","pallets"\nstk,g1,"two\nlines",1,3\nstk,g1,i2,2,4\n')
    assert first_pass(broken, "x").spans_lines is True


@pytest.mark.parametrize("values", [
    ["a", "b", ""], ["a", None, "c"], [1, 2, -3, 10**30], [1.0, 2.5, -0.0, 1e300, 1e-300],
    [1, None, 3], [1.5, None], [True, False, None], [1, 2.5, "x", None, True],
])
def test_json_values_become_the_same_text_by_every_road(values):
    # the quick roads for columns of one type must write what the general one writes
    # (RFC 8259 numbers; Python's repr of a float is its shortest round-tripping text)
    from warehouse.ingest.sources import _texts, _to_text

    assert _texts(values, set(map(type, values))) == [_to_text(v) for v in values]
