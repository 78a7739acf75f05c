"""White space around values, letter case of status words and times, and long names with
characters of several bytes: the loader looks at the edges of the values first and does the
full work only where it can change something; the stored runs must be the same as when it
always did.

References: the Unicode Character Database, PropList.txt, lists U+0009, U+0020, U+00A0 (no-break
space) and U+3000 (ideographic space) as White_Space (recalled from memory); RFC 3339 section 5.6
lets 't' and 'z' be lower case; a Python str's `strip()` removes the same characters and is the
reference for the expected names below.
"""
from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest

from warehouse.ingest import values as V
from warehouse.ingest.layout import NAME_LIMIT

from .kit import load_json, query, refusal, write

HEAD = "solver,group,instance,seed,status,finished_at,pallets\n"
NBSP, IDEO = "\u00a0", "\u3000"


def test_white_space_at_the_edges_is_trimmed_inside_is_kept(cli, location, tmp_path):
    rows = [
        f"stacker,g1,{NBSP}box a{IDEO},1,ok,2026-11-09T10:00:00Z,20",
        "stacker , g1 ,\tbox b , 2 , OK ,2026-11-09T10:00:00Z , 21 ",
        "stacker,g1,café crème,3,Ok,2026-11-09T10:00:00Z,22",
    ]
    path = write(tmp_path / "ws.csv", HEAD + "\n".join(rows) + "\n")
    assert load_json(cli, path)["rows_loaded"] == 3
    got = query(location, "SELECT i.name, r.seed, r.v1 FROM runs r JOIN instances i ON i.id = r.instance_id "
                          "ORDER BY r.seed")
    expected = [(f"{NBSP}box a{IDEO}".strip(), 1, 20.0), ("\tbox b ".strip(), 2, 21.0), ("café crème", 3, 22.0)]
    assert got == expected
    assert query(location, "SELECT DISTINCT name FROM solvers") == [("stacker",)]


def test_status_words_in_any_case(cli, location, tmp_path):
    rows = ["s,g1,a,1,OK,,3", "s,g1,a,2,Timeout,,", "s,g1,a,3,timeout,,", "s,g1,a,4,ok,,4"]
    path = write(tmp_path / "st.csv", HEAD + "\n".join(rows) + "\n")
    assert load_json(cli, path)["rows_loaded"] == 4
    codes = [r[0] for r in query(location, "SELECT status FROM runs ORDER BY seed")]
    assert codes[0] == codes[3] and codes[1] == codes[2] and codes[0] != codes[1]


def test_an_unknown_status_word_is_named_whatever_its_case(cli, location, tmp_path):
    path = write(tmp_path / "st.csv", HEAD + "s,g1,a,1,ok,,3\ns,g1,a,2,Exploded,,4\n")
    assert "line 3, field status: unknown status 'exploded'" in refusal(cli, path)


def test_lower_case_t_and_z_read_as_the_upper_case_time(cli, location, tmp_path):
    rows = ["s,g1,a,1,ok,2026-11-09t14:05:00z,3", "s,g1,a,2,ok,2026-11-09T14:05:00Z,4"]
    path = write(tmp_path / "t.csv", HEAD + "\n".join(rows) + "\n")
    assert load_json(cli, path)["rows_loaded"] == 2
    # 2026-11-09T00:00:00Z is 1,794,182,400 POSIX seconds (20,766 days x 86,400), worked by hand
    assert query(location, "SELECT finished_at FROM runs ORDER BY seed") == [(1794182400 + 50700,)] * 2


@pytest.mark.parametrize("seed,ok", [("0x10", False), ("+7", True), ("-3", True), ("007", True), ("1-2", False)])
def test_seeds_read_as_plain_whole_numbers_only(cli, location, tmp_path, seed, ok):
    path = write(tmp_path / "s.csv", HEAD + "s,g1,a,1,ok,,3\n" + f"s,g1,b,{seed},ok,,4\n")
    if ok:
        assert load_json(cli, path)["rows_loaded"] == 2
        assert query(location, "SELECT seed FROM runs ORDER BY id")[1] == (int(seed),)
    else:
        assert f"line 3, field seed: '{seed}' is not a whole number" in refusal(cli, path)


def test_name_length_counts_characters_not_bytes(cli, location, tmp_path):
    at_limit = "é" * NAME_LIMIT  # twice as many bytes as characters
    path = write(tmp_path / "n.csv", HEAD + f"s,g1,{at_limit},1,ok,,3\n")
    assert load_json(cli, path)["rows_loaded"] == 1
    over = write(tmp_path / "o.csv", HEAD + "s,g1,a,1,ok,,3\n" + f"s,g1,{at_limit}é,2,ok,,3\n")
    assert f"line 3, field instance: is {NAME_LIMIT + 1} characters long" in refusal(cli, over, campaign="d")


def _random_texts(rng, n):
    pool = ["a", "b", "é", " ", "\t", NBSP, IDEO, "\u2003", "x y", "", "7"]
    return ["".join(rng.choice(pool, size=rng.integers(0, 5))) for _ in range(n)]


@pytest.mark.parametrize("seed", range(5))
def test_as_text_equals_arrow_trim_on_every_value(seed):
    # reference: pyarrow's own utf8_trim_whitespace over every value, nulls read as ''
    rng = np.random.default_rng(seed)
    texts = _random_texts(rng, 400)
    arr = pa.array([None if k % 37 == 0 else t for k, t in enumerate(texts)], type=pa.string())
    for piece in (arr, arr.slice(13, 200), arr.slice(399, 1), arr.slice(0, 0)):
        expected = pc.utf8_trim_whitespace(pc.fill_null(piece, "")).to_pylist()
        assert V.as_text(piece).to_pylist() == expected


def test_as_text_leaves_values_without_edge_space_untouched():
    arr = pa.array(["stacker", "café", "", "1.5", "a b"])
    assert V.as_text(arr).to_pylist() == ["stacker", "café", "", "1.5", "a b"]
    assert V.byte_lengths(arr).tolist() == [7, 5, 0, 3, 3]  # é is two bytes in UTF-8
