"""The slice language: parsing, normal form, dates, versions, errors, and values that stay data."""
from __future__ import annotations

import csv
from datetime import datetime, timezone

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from warehouse.errors import SliceError
from warehouse.select.slices import KEYS, OPS, Slice, Term, parse, parse_when
from warehouse.select.versions import compare, version_sort_key

# a fixed "now" for relative dates: 2026-11-15 12:00:00 UTC
NOW = datetime(2026, 11, 15, 12, 0, 0, tzinfo=timezone.utc).timestamp()


def terms(text: str) -> list[list[tuple]]:
    return [[(t.key, t.op, t.values) for t in arm] for arm in parse(text).arms]


# --- the examples of the design --------------------------------------------------------------

def test_design_example_one_arm_parses_term_by_term():
    text = "solver=stacker version>=1.5 family=mixed-sku,fragile-top since=2026-10-01 host!=lab-3"
    assert terms(text) == [[
        ("solver", "=", ("stacker",)),
        ("version", ">=", ("1.5",)),
        ("family", "=", ("mixed-sku", "fragile-top")),
        ("since", "=", ("2026-10-01",)),
        ("host", "!=", ("lab-3",)),
    ]]
    assert parse(text).text == text


def test_design_example_two_arms_parses_and_keeps_its_form():
    text = "stacker@1.6 since=7d | stacker@1.4 campaign=oct-baseline"
    assert terms(text) == [
        [("treatment", "=", ("stacker@1.6",)), ("since", "=", ("7d",))],
        [("treatment", "=", ("stacker@1.4",)), ("campaign", "=", ("oct-baseline",))],
    ]
    assert parse(text).text == text


def test_normal_form_has_one_space_between_terms_and_spaced_bars():
    messy = "  solver=stacker    version>=1.5|stacker@1.4\tcampaign=oct-baseline  "
    assert parse(messy).text == "solver=stacker version>=1.5 | stacker@1.4 campaign=oct-baseline"
    # the normal form parses to the same slice (it is a fixed point)
    assert parse(parse(messy).text) == parse(messy)


def test_key_names_are_case_insensitive_and_normalized_to_lower_case():
    assert parse("Solver=stacker HOST=rack-a").text == "solver=stacker host=rack-a"


def test_empty_slice_means_everything():
    assert parse("").is_empty() and parse("   ").is_empty() and parse(None).is_empty()
    assert parse("").text == ""


@pytest.mark.parametrize("text, key, op, values", [
    ("solver=stacker", "solver", "=", ("stacker",)),
    ("host!=lab-3", "host", "!=", ("lab-3",)),
    ("version<2.0", "version", "<", ("2.0",)),
    ("version<=2.0", "version", "<=", ("2.0",)),
    ("version>1.4", "version", ">", ("1.4",)),
    ("version>=1.5", "version", ">=", ("1.5",)),
    ("instance~mixed-*", "instance", "~", ("mixed-*",)),
    ("seed>=3", "seed", ">=", ("3",)),
    ("seed<10", "seed", "<", ("10",)),
    ("status!=ok", "status", "!=", ("ok",)),
    ("retracted=any", "retracted", "=", ("any",)),
])
def test_every_operator(text, key, op, values):
    assert terms(text) == [[(key, op, values)]]
    assert parse(text).text == text


def test_comma_is_or_inside_one_term():
    assert terms("family=mixed-sku,fragile-top,oversize") == [[("family", "=", ("mixed-sku", "fragile-top", "oversize"))]]
    assert terms("status=timeout,failed") == [[("status", "=", ("timeout", "failed"))]]


def test_name_at_version_names_one_treatment_each():
    assert terms("stacker@1.6-greedy") == [[("treatment", "=", ("stacker@1.6-greedy",))]]
    assert terms("stacker@1.4,stacker@1.6") == [[("treatment", "=", ("stacker@1.4", "stacker@1.6"))]]


def test_bars_join_arms_that_each_keep_their_terms():
    sl = parse("stacker@1.6 campaign=nov | stacker@1.4 campaign=oct | solver=other")
    assert len(sl.arms) == 3
    assert [len(a) for a in sl.arms] == [2, 2, 1]


@pytest.mark.parametrize("text, value, normal", [
    ('solver="pallet stacker"', "pallet stacker", 'solver="pallet stacker"'),
    ("solver='pallet stacker'", "pallet stacker", 'solver="pallet stacker"'),
    ('group="a|b"', "a|b", 'group="a|b"'),
    ('instance="x,y"', "x,y", 'instance="x,y"'),
    ('''solver="it's"''', "it's", '''solver="it's"'''),
    ("""solver='say "hi"'""", 'say "hi"', """solver='say "hi"'"""),
    ('host=""', "", 'host=""'),
])
def test_quoted_values_keep_spaces_commas_bars_and_quotes(text, value, normal):
    sl = parse(text)
    assert sl.arms[0][0].values == (value,)
    assert sl.text == normal
    assert parse(sl.text) == sl


def test_quoted_empty_value_may_stand_first_among_alternatives():
    assert terms('host="",rack-a') == [[("host", "=", ("", "rack-a"))]]


def test_value_with_both_kinds_of_quote_survives_the_normal_form():
    value = """a'b"c"""
    sl = Slice(((Term("solver", "=", (value,)),),))
    assert parse(sl.text).arms[0][0].values == (value,)


def test_value_that_starts_like_an_operator_survives_the_normal_form():
    # version<"=1" must not read back as version<=1
    sl = Slice(((Term("version", "<", ("=1",)),),))
    assert parse(sl.text).arms[0][0] == Term("version", "<", ("=1",))


# --- dates ---------------------------------------------------------------------------------------

def _iso(epoch: float) -> str:
    return datetime.fromtimestamp(epoch, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


@pytest.mark.parametrize("rel, seconds", [("7d", 7 * 86400), ("12h", 12 * 3600), ("2w", 14 * 86400)])
def test_relative_dates_count_back_from_now(rel, seconds):
    assert parse_when(rel, "since", now=NOW) == int(NOW) - seconds


def test_relative_dates_become_absolute_utc_times():
    sl = parse("stacker@1.6 since=7d | stacker@1.4 until=12h").absolute(now=NOW)
    # hand arithmetic: 2026-11-15 12:00 minus 7 days is 2026-11-08 12:00; minus 12 hours is 2026-11-15 00:00
    assert sl.text == "stacker@1.6 since=2026-11-08T12:00:00Z | stacker@1.4 until=2026-11-15T00:00:00Z"
    assert "7d" not in sl.to_json() and "12h" not in sl.to_json()
    # and the absolute slice means the same instant whenever it is read again
    later = parse(sl.text).absolute(now=NOW + 30 * 86400)
    assert later == sl
    assert parse_when(sl.arms[0][1].values[0], "since") == int(NOW) - 7 * 86400


def test_absolute_dates_pass_through_unchanged():
    sl = parse("since=2026-10-01 until=2026-10-31T18:00:00Z")
    assert sl.absolute(now=NOW) == sl


def test_iso_dates_are_utc_and_until_a_day_runs_to_its_end():
    start = datetime(2026, 10, 1, tzinfo=timezone.utc).timestamp()
    assert parse_when("2026-10-01", "since") == start
    assert parse_when("2026-10-01", "until") == start + 86400  # the whole day is in
    assert parse_when("20261001", "until") == start + 86400  # the compact form of the same date
    assert parse_when("2026-10-01T06:30:00", "until") == start + 6.5 * 3600
    assert parse_when("2026-10-01T06:30:00+02:00", "since") == start + 4.5 * 3600


# --- errors: one line, at the term, with a suggestion --------------------------------------------

@pytest.mark.parametrize("text, term, hint", [
    ("solver=stacker vesion>=1.5", "slice term 2 'vesion>=1.5'", "did you mean 'version'?"),
    ("familly=mixed-sku", "slice term 1 'familly=mixed-sku'", "did you mean 'family'?"),
    ("solver=stacker | status=tmeout", "slice term 2 'status=tmeout'", "did you mean 'timeout'?"),
    ("campain=oct", "slice term 1 'campain=oct'", "did you mean 'campaign'?"),
])
def test_errors_point_at_the_term_and_suggest_the_nearest_key_or_value(text, term, hint):
    with pytest.raises(SliceError) as exc:
        parse(text)
    msg = str(exc.value)
    assert "\n" not in msg
    assert msg.startswith(term)
    assert hint in msg


@pytest.mark.parametrize("text, words", [
    ("solver=", "no value after '='"),
    ("solver=a,,b", "a value is empty"),
    ("family<3", "'<' does not apply to family"),
    ("version>=1.5,1.6", "takes one value"),
    ("since>7d", "since takes '=' only"),
    ("since=7d,8d", "takes one date"),
    ("since=yesterday", "not a date"),
    ("since=99999999999999d", "before any calendar date"),
    ("seed=three", "not a whole number"),
    ("seed=99999999999999999999", "out of range"),
    ("retracted=maybe", "yes, no or any"),
    ("retracted=yes,no", "yes, no or any"),
    ("stacker", "expected KEY=VALUE"),
    ("stacker@", "NAME@VERSION"),
    ("@1.6", "NAME@VERSION"),
    ("solver=a |", "an arm between '|' is empty"),
    ('solver="open', "never closed"),
])
def test_bad_terms_say_what_is_wrong_in_one_line(text, words):
    with pytest.raises(SliceError) as exc:
        parse(text)
    assert words in str(exc.value)
    assert "\n" not in str(exc.value)


def test_the_term_number_counts_across_arms():
    with pytest.raises(SliceError, match=r"^slice term 4 'seed=x'"):
        parse("solver=a version=1 | solver=b seed=x")


# --- versions ---------------------------------------------------------------------------------------

@pytest.mark.parametrize("older, newer", [
    ("2.9", "2.10"),  # natural order, not text order (common practice)
    ("1.9", "1.10"),
    ("1.0rc1", "1.0"),  # PEP 440: a release candidate comes before the release
    ("1.0a1", "1.0b1"),  # PEP 440: alpha before beta
    ("1.0.dev3", "1.0a1"),  # PEP 440: development releases before pre-releases
    ("1.0", "1.0.post1"),  # PEP 440: post-releases after the release
    ("1.6", "1.6-greedy"),  # not PEP 440: natural order, the longer name after
    ("build-9", "build-10"),  # not PEP 440: numbers inside names compare as numbers
])
def test_versions_compare_naturally(older, newer):
    assert compare(older, newer) == -1
    assert compare(newer, older) == 1
    assert compare(newer, newer) == 0


def test_versions_sort_naturally():
    assert sorted(["1.10", "1.2", "1.9", "1.0rc1", "1.0"], key=version_sort_key) == ["1.0rc1", "1.0", "1.2", "1.9", "1.10"]


# --- junk never breaks the parser ----------------------------------------------------------------

PIECES = st.sampled_from([*KEYS, *OPS, "@", ",", "|", "'", '"', " ", "  ", "7d", "12h", "2026-10-01", "x", "1.5",
                          "yes", "ok", "-", "*", "stacker", "\t", "=", "seed", "99999999999999999999999", "0d"])


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.one_of(st.text(max_size=60), st.lists(PIECES, max_size=12).map("".join)))
def test_junk_text_raises_nothing_but_slice_error(text):
    try:
        sl = parse(text)
    except SliceError as exc:
        assert "\n" not in str(exc)
        return
    # what parses has a normal form that parses to the same slice, and can be made absolute
    assert parse(sl.text) == sl
    assert parse(sl.absolute(now=NOW).text) == sl.absolute(now=NOW)


FREE_KEYS = ("solver", "version", "campaign", "family", "group", "instance", "host")
# characters that mean something to the slice language, mixed with any others
VALUE_TEXT = st.one_of(st.text(alphabet="a1'\" ,|=<>!~@\t", min_size=1, max_size=8), st.text(min_size=1, max_size=12))


@settings(max_examples=400, deadline=None)
@given(st.sampled_from(FREE_KEYS), st.sampled_from(["=", "!=", "~"]), st.lists(VALUE_TEXT, min_size=1, max_size=3))
def test_any_value_survives_the_normal_form(key, op, values):
    sl = Slice(((Term(key, op, tuple(values)),),))
    assert parse(sl.text) == sl


@settings(max_examples=200, deadline=None)
@given(st.sampled_from(["<", "<=", ">", ">="]), VALUE_TEXT)
def test_any_version_bound_survives_the_normal_form(op, value):
    sl = Slice(((Term("version", op, (value,)),),))
    assert parse(sl.text) == sl


# --- through the warehouse: values are data, names are suggested, versions order ------------------

HEADER = ["solver", "version", "family", "group", "instance", "seed", "pallets"]
EVIL = "x'; DROP TABLE runs; --"


def _write(path, rows):
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(HEADER)
        w.writerows(rows)
    return str(path)


def _rows(solver, version, offset):
    out = []
    for g in range(1, 4):
        for seed in (1, 2):
            out.append([solver, version, "fam", f"g{g}", f"i{g}", seed, 10 * g + offset + 0.1 * seed])
    return out


def test_injection_text_is_loaded_sliced_and_reported_as_data(cli, location, tmp_path):
    from conftest import run_counts

    f = _write(tmp_path / "evil.csv", _rows(EVIL, "1", 0.0) + _rows("safe", "1", 1.0))
    r = cli("load", f, "--campaign", "c'; DELETE FROM campaigns; --")
    assert r.code == 0, r
    before = run_counts(location)
    assert before["runs"] == 12

    r = cli("peek", "--slice", f'solver="{EVIL}"', "--json")
    assert r.code == 0, r
    doc = r.json()
    assert doc["treatments"] == [f"{EVIL}@1"]
    assert sum(c["runs"] for c in doc["cells"]) == 6

    # the same name through a glob, a campaign named like an attack, and a treatment term
    r = cli("peek", "--slice", "solver~\"x'*\" campaign=\"c'; DELETE FROM campaigns; --\"", "--json")
    assert r.code == 0, r
    assert r.json()["treatments"] == [f"{EVIL}@1"]
    r = cli("blocktest", "--slice", f'"{EVIL}@1",safe@1', "--metric", "pallets", "--json")
    assert r.code == 0, r
    doc = r.json()
    assert doc["treatment_names"] == [f"{EVIL}@1", "safe@1"] or doc["treatment_names"] == ["safe@1", f"{EVIL}@1"]
    assert doc["treatments"] == 2 and doc["blocks"] == 3

    # nothing was dropped or deleted: the runs table is there with every run
    after = run_counts(location)
    assert after == before
    assert after["campaigns"] == 1
    from sqlalchemy import text

    from warehouse.store.connect import open_warehouse

    w = open_warehouse(location)
    try:
        with w.engine.connect() as c:
            assert c.execute(text("SELECT count(*) FROM runs")).scalar() == 12
            assert c.execute(text("SELECT name FROM campaigns")).scalar() == "c'; DELETE FROM campaigns; --"
    finally:
        w.close()


def test_unknown_names_are_one_line_errors_with_the_nearest_known_value(cli, tmp_path):
    cli("load", _write(tmp_path / "a.csv", _rows("stacker", "1.4", 0.0)), "--campaign", "oct-baseline")
    r = cli("peek", "--slice", "solver=stakcer")
    assert r.code == 2
    assert r.err.count("\n") == 1
    assert "slice term 1 'solver=stakcer'" in r.err and "did you mean 'stacker'?" in r.err
    r = cli("peek", "--slice", "campaign=oct-basline")
    assert r.code == 2 and "did you mean 'oct-baseline'?" in r.err
    r = cli("peek", "--slice", "solver=stacker vesion>=1.5")
    assert r.code == 2 and r.err.count("\n") == 1
    assert "slice term 2 'vesion>=1.5': unknown key 'vesion' (did you mean 'version'?)" in r.err


# --- whatever a term holds, its error stays one line -------------------------------------------

LONG = 10_000  # characters: a value pasted by mistake
NASTY_SLICES = [
    pytest.param('solver="a\nb"', id="quoted-newline"),
    pytest.param("solver=a\nb", id="bare-newline"),
    pytest.param('solver~"a\nb"', id="glob-newline-no-runs"),
    pytest.param("solver=a\tb", id="tab"),
    pytest.param('solver="\x1b[31mred\x1b[0m"', id="terminal-escape"),
    pytest.param('status="ok\r\nfailed"', id="carriage-return"),
    pytest.param('host="bell\x07\x00nul"', id="bell-and-nul"),
    pytest.param('group="g1\x85"', id="next-line-character"),
    pytest.param('solver="pallets\u2028stacker"', id="unicode-line-separator"),
    pytest.param('solver="\u202eevil"', id="bidi-override"),
    pytest.param('solver="\udcff"', id="lone-surrogate"),  # what undecodable bytes in argv become
    pytest.param('solver="日本語 パレット"', id="unicode-letters"),
    pytest.param("""solver="it's \\"odd\\"" campaign='"'""", id="quotes"),
    pytest.param('solver="' + "x" * LONG + '"', id="long-quoted"),
    pytest.param("solver=" + "y" * LONG, id="long-bare"),
    pytest.param("solver~" + "z" * LONG, id="long-glob-no-runs"),
    pytest.param("k" * LONG + "=1", id="long-key"),
    pytest.param("seed=" + "9" * LONG, id="long-seed"),
    pytest.param("seed=" + "0" * LONG + "1", id="long-seed-of-zeros"),
    pytest.param("since=" + "7" * LONG + "x", id="long-date"),
    pytest.param('"' + "q" * LONG, id="long-unclosed-quote"),
    pytest.param('"stacker@1.4\n"', id="treatment-with-newline"),
    pytest.param("since=\"2026-11-01\n\"", id="date-with-newline"),
]


@pytest.mark.parametrize("text", NASTY_SLICES)
def test_a_slice_error_is_one_short_line_whatever_the_term_holds(cli, tmp_path, text):
    """Through the command line: one line on stderr, exit 2, the term escaped (no raw control or
    line-breaking character: str.splitlines knows them all) and cut to a few dozen characters."""
    assert cli("load", _write(tmp_path / "a.csv", _rows("stacker", "1.4", 0.0) + _rows("packer", "1.4", 1.0)),
               "--campaign", "oct").code == 0
    for argv in (("peek", "--slice", text), ("blocktest", "--slice", text, "--metric", "pallets")):
        res = cli(*argv)
        assert res.code == 2 and res.out == "", res
        assert len(res.err.splitlines()) == 1 and res.err.endswith("\n"), res
        line = res.err.rstrip("\n")
        assert line.startswith("blockyard: ") and "internal error" not in line, line
        assert line.isprintable(), line  # no control, format or separator character, no lone surrogate
        assert len(line) < 600, len(line)  # a 10 kB term is cut (with '...')


def test_version_ranges_select_in_natural_order(cli, tmp_path):
    rows = []
    for v in ("1.9", "1.10", "2.0rc1", "2.0"):
        rows += _rows("stacker", v, 0.0)
    cli("load", _write(tmp_path / "v.csv", rows), "--campaign", "c")
    r = cli("peek", "--slice", "version>=1.10", "--json")
    assert r.code == 0, r
    assert r.json()["treatments"] == ["stacker@1.10", "stacker@2.0rc1", "stacker@2.0"]
    r = cli("peek", "--slice", "version<2.0", "--json")
    assert r.json()["treatments"] == ["stacker@1.9", "stacker@1.10", "stacker@2.0rc1"]
    r = cli("peek", "--slice", "stacker@1.9 | version>2.0rc1", "--json")
    assert r.json()["treatments"] == ["stacker@1.9", "stacker@2.0"]


# --- date slices through the imports' time ranges (revision 0004) -------------------------------

def _timed(path, rows):
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["solver", "version", "family", "group", "instance", "seed", "finished_at", "pallets"])
        w.writerows(rows)
    return str(path)


def _night(day: int, solver: str, seeds=(1, 2), hour: int = 2, blank_time: bool = False):
    return [[solver, "1", "fam", f"g{g}", f"i{g}", seed,
             "" if blank_time and seed == seeds[0] else f"2026-11-{day:02d}T{hour + g:02d}:{seed * 7:02d}:00Z",
             10 * g + seed] for g in range(1, 4) for seed in seeds]


DATE_SLICES = ["since=2026-11-03", "until=2026-11-03", "since=2026-11-02T04:00:00Z", "until=2026-11-02T04:14:00Z",
               "since=2026-11-02T04:14:00Z", "since=2026-11-01 until=2026-11-02", "since=2026-12-01",
               "until=2026-10-01", "since=2026-11-05 | until=2026-11-01", "stacker@1 since=2026-11-04",
               "since=2026-11-02 retracted=yes", "since=2026-11-02 retracted=any",
               # on an import's own first and last times
               "since=2026-11-01T05:14:00Z", "until=2026-11-02T03:14:00Z", "until=2026-11-02T03:14:01Z"]


def test_date_slices_take_exactly_the_runs_whose_time_meets_the_test(cli, location, tmp_path, monkeypatch):
    """The imports' id and time ranges only narrow where to look: the reference is the plain
    test of every run's finished_at (the definition of the slice keys, docs/slices.md)."""
    from sqlalchemy import func, select

    from warehouse.select import resolve
    from warehouse.store import ranges
    from warehouse.select.slices import parse
    from warehouse.store import schema as S
    from warehouse.store.connect import open_warehouse

    files = [_timed(tmp_path / "n1.csv", _night(1, "stacker")),
             _timed(tmp_path / "n2.csv", _night(2, "stacker", blank_time=True)),  # some runs have no time
             _timed(tmp_path / "n4.csv", _night(4, "stacker") + _night(5, "packwell")),
             # already stored runs come again with new ones: skipped, so the id ranges overlap
             _timed(tmp_path / "n4b.csv", _night(4, "stacker") + _night(3, "stacker", seeds=(3,)))]
    for f in files:
        assert cli("load", f, "--campaign", "nightly").code == 0
    assert cli("load", _write(tmp_path / "untimed.csv", _rows("tetra", "1", 0.0)), "--campaign", "nightly").code == 0
    assert cli("retract", "--slice", "since=2026-11-05", "--reason", "rack swap").code == 0

    w = open_warehouse(location)
    try:
        with w.engine.connect() as c:
            untimed = c.execute(select(S.imports.c.first_finished, S.imports.c.last_finished)
                                .where(S.imports.c.file_name == "untimed.csv")).one()
            assert tuple(untimed) == (None, None)
            dims = resolve.Dims.load(c)

            R = S.runs
            for text in DATE_SLICES:
                got = c.execute(select(func.count()).select_from(R).where(
                    resolve.condition(parse(text), dims, c))).scalar()
                # the same slice with the time tests alone, over every run
                expect = c.execute(select(func.count()).select_from(R).where(_plain(text, dims, c))).scalar()
                assert got == expect, text
                monkeypatch.setattr(ranges, "MAX_RANGES", 1)  # one range around them all: the same runs
                assert c.execute(select(func.count()).select_from(R).where(
                    resolve.condition(parse(text), dims, c))).scalar() == expect, text
                monkeypatch.setattr(ranges, "MAX_RANGES", 64)
            assert c.execute(select(func.count()).select_from(R).where(
                resolve.condition(parse("since=2026-11-02"), dims, c))).scalar() > 0
    finally:
        w.close()


def _plain(text, dims, conn):
    """A slice's condition with since/until as bare tests of finished_at (no id ranges)."""
    from sqlalchemy import and_, or_

    from warehouse.select import resolve
    from warehouse.select.slices import parse, parse_when
    from warehouse.store import schema as S

    R = S.runs
    sl = parse(text)
    arms = []
    for arm in sl.arms:
        parts, want = [], "no"
        for term in arm:
            if term.key == "since":
                parts.append(R.c.finished_at >= parse_when(term.values[0], "since"))
            elif term.key == "until":
                parts.append(R.c.finished_at < parse_when(term.values[0], "until"))
            elif term.key == "retracted":
                want = term.values[0]
            else:
                parts.append(resolve._term_condition(term, 1, dims, conn))
        if want == "no":
            parts.append(R.c.retraction_id.is_(None))
        elif want == "yes":
            parts.append(R.c.retraction_id.is_not(None))
        arms.append(and_(*parts))
    return arms[0] if len(arms) == 1 else or_(*arms)


# --- campaign slices on the runs through the imports' id ranges (revision 0007) ----------------

CAMPAIGN_SLICES = ["campaign=nightly", "campaign=weekly", "campaign=nightly,weekly", "campaign!=nightly",
                   "campaign~week*", "campaign=nightly seed=2", "campaign=weekly | campaign=nightly seed=1",
                   "campaign=nightly retracted=any", "campaign=nightly retracted=yes", "campaign=nightly since=2026-11-03",
                   "stacker@1 campaign=weekly", "campaign=spare"]


def test_campaign_slices_on_the_runs_take_exactly_the_campaigns_runs(cli, location, tmp_path):
    """SQLite keeps no index on the runs' campaign; a campaign term reads its imports' id ranges.
    The reference is the plain test of every run's campaign."""
    from sqlalchemy import and_, func, or_, select

    from warehouse.select import resolve
    from warehouse.select.slices import parse
    from warehouse.store import schema as S
    from warehouse.store.connect import open_warehouse

    # the campaigns' imports interleave, one campaign's runs skip stored ones, one campaign has none
    plan = [("nightly", _night(1, "stacker")), ("weekly", _night(2, "stacker")),
            ("nightly", _night(3, "stacker") + _night(4, "packwell")),
            ("weekly", _night(2, "stacker") + _night(5, "stacker", seeds=(3,))),  # two stored, skipped
            ("nightly", _night(6, "stacker", seeds=(4,)))]
    for k, (camp, rows) in enumerate(plan):
        r = cli("load", _timed(tmp_path / f"c{k}.csv", rows), "--campaign", camp)
        assert r.code == 0, r
    assert cli("init", "-w", str(tmp_path / "unused.db")).code == 0
    assert cli("retract", "--slice", "campaign=nightly seed=2 group=g1", "--reason", "rack swap").code == 0
    w = open_warehouse(location)
    try:
        with w.engine.begin() as c:  # a campaign with no runs at all
            c.execute(S.campaigns.insert().values(name="spare", created_at=0))
        with w.engine.connect() as c:
            dims = resolve.Dims.load(c)
            R = S.runs
            for text in CAMPAIGN_SLICES:
                got = c.execute(select(func.count()).select_from(R).where(resolve.condition(parse(text), dims, c))).scalar()
                arms = []
                for arm in parse(text).arms:
                    parts, want = [], "no"
                    for term in arm:
                        if term.key == "campaign":
                            ids = resolve._ids(dims.campaigns, term, 1, "campaign")
                            plain = R.c.campaign_id.in_(ids or [-1])
                            parts.append(~plain if term.op == "!=" else plain)
                        elif term.key == "retracted":
                            want = term.values[0]
                        else:
                            parts.append(resolve._term_condition(term, 1, dims, c))
                    if want != "any":
                        parts.append(R.c.retraction_id.is_(None) if want == "no" else R.c.retraction_id.is_not(None))
                    arms.append(and_(*parts))
                expect = c.execute(select(func.count()).select_from(R).where(or_(*arms))).scalar()
                assert got == expect, text
            assert c.execute(select(func.count()).select_from(R).where(
                resolve.condition(parse("campaign=weekly"), dims, c))).scalar() == 9  # 6, then 3 new (6 skipped)
    finally:
        w.close()
