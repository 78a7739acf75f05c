"""Layout files: renames, constants, status words, group patterns, missing words, metrics, ignore."""
from __future__ import annotations

import pytest

from .kit import cli_at, everything, jsonl_text, load_json, module_warehouse, query, refusal, write

# made up in the spirit of the demo's rack-b exporter: its own names, words and a path-like instance
RACK_B = '''
[columns]
algo = "solver"
release = "version"
path = "instance"
rng = "seed"
outcome = "status"
ended = "finished_at"
pallets_used = "pallets"
wall_s = "seconds"

[constants]
host = "rack-b"

[status]
SOLVED = "ok"
TIME_LIMIT = "timeout"
CRASH = "failed"

[group]
pattern = '^(?P<family>[^/]+)/(?P<group>[^/]+)/(?P<instance>.+)$'

[missing]
words = ["-", "n/a"]

[metrics.pallets]
sense = "min"
unit = "pallets"

[metrics.seconds]
sense = "min"
unit = "s"

[ignore]
columns = ["comment"]
'''

RECORDS = [
    {"algo": "stacker", "release": "1.6-greedy", "path": "mixed-sku/g1/order-01", "rng": 1, "outcome": "SOLVED",
     "ended": "2026-11-11T06:11:00Z", "pallets_used": 31, "wall_s": 12.5, "comment": "fine"},
    {"algo": "stacker", "release": "1.6-greedy", "path": "mixed-sku/g2/order-07", "rng": 2, "outcome": "time_limit",
     "ended": "2026-11-11T07:00:00Z", "pallets_used": "-", "wall_s": 60, "comment": "slow"},
    {"algo": "stacker", "release": "1.6-greedy", "path": "oversize/g1/order-02", "rng": 1, "outcome": "CRASH",
     "ended": "2026-11-11T08:00:00Z", "pallets_used": None, "wall_s": "n/a", "comment": ""},
]


@pytest.fixture
def rack_b(tmp_path):
    return write(tmp_path / "rack-b.toml", RACK_B)


def test_rack_b_layout_maps_everything(cli, location, tmp_path, rack_b):
    path = write(tmp_path / "nov.jsonl", jsonl_text(RECORDS))
    checked = load_json(cli, path, "--layout", str(rack_b), "--dry-run")
    assert checked["ignored"] == ["comment"]
    assert checked["mapping"]["algo"] == "solver" and checked["mapping"]["wall_s"] == "seconds"
    rep = load_json(cli, path, "--layout", str(rack_b))
    assert (rep["rows_loaded"], rep["rows_rejected"]) == (3, 0)
    got = query(location, """
        SELECT s.name, s.version, f.name, g.name, i.name, r.seed, r.status, h.name
        FROM runs r JOIN solvers s ON s.id = r.solver_id JOIN instances i ON i.id = r.instance_id
        JOIN groups g ON g.id = i.group_id JOIN families f ON f.id = g.family_id JOIN hosts h ON h.id = r.host_id
        ORDER BY r.source_line""")
    # status codes: ok 0, timeout 1, failed 2 (schema.STATUS_CODES)
    assert got == [("stacker", "1.6-greedy", "mixed-sku", "g1", "order-01", 1, 0, "rack-b"),
                   ("stacker", "1.6-greedy", "mixed-sku", "g2", "order-07", 2, 1, "rack-b"),
                   ("stacker", "1.6-greedy", "oversize", "g1", "order-02", 1, 2, "rack-b")]
    assert query(location, "SELECT name, sense, unit FROM metrics ORDER BY name") == [("pallets", "min", "pallets"), ("seconds", "min", "s")]
    slot = dict(query(location, "SELECT name, slot FROM metrics"))
    vals = query(location, f"SELECT v{slot['pallets']}, v{slot['seconds']} FROM runs ORDER BY source_line")
    assert vals == [(31.0, 12.5), (None, 60.0), (None, None)]  # '-' and 'n/a' are missing words
    assert query(location, "SELECT layout FROM imports")[0][0] == RACK_B  # the layout is kept with the import


def test_metric_sense_max_and_unit(cli, location, tmp_path):
    lay = write(tmp_path / "l.toml", '[metrics.fill_pct]\nsense = "max"\nunit = "%"\n')
    path = write(tmp_path / "r.csv", "solver,group,instance,fill_pct\ns,g1,a,81.5\n")
    assert load_json(cli, path, "--layout", str(lay))["rows_loaded"] == 1
    assert query(location, "SELECT name, sense, unit FROM metrics") == [("fill_pct", "max", "%")]


def test_a_metric_keeps_its_sense(cli, location, tmp_path):
    load_json(cli, write(tmp_path / "a.csv", "solver,group,instance,fill_pct\ns,g1,a,81.5\n"),
              "--layout", str(write(tmp_path / "max.toml", '[metrics.fill_pct]\nsense = "max"\n')))
    before = everything(location)
    line = refusal(cli, write(tmp_path / "b.csv", "solver,group,instance,fill_pct\ns,g1,b,80\n"),
                   "--layout", str(write(tmp_path / "min.toml", '[metrics.fill_pct]\nsense = "min"\n')))
    assert "the layout says metric 'fill_pct' is min but the warehouse holds it as max" in line
    assert everything(location) == before


def test_constants_fill_fields_for_every_row(cli, location, tmp_path):
    lay = write(tmp_path / "l.toml", '[constants]\nsolver = "stacker"\nversion = "2.0"\ngroup = "g9"\nfamily = "oversize"\n')
    path = write(tmp_path / "r.csv", "instance,seed,pallets\na,1,3\nb,1,4\n")
    assert load_json(cli, path, "--layout", str(lay))["rows_loaded"] == 2
    got = query(location, "SELECT DISTINCT s.name, s.version, g.name, f.name FROM runs r JOIN solvers s ON s.id = r.solver_id "
                          "JOIN instances i ON i.id = r.instance_id JOIN groups g ON g.id = i.group_id JOIN families f ON f.id = g.family_id")
    assert got == [("stacker", "2.0", "g9", "oversize")]


def test_group_pattern_without_family_uses_the_default_family(cli, location, tmp_path):
    lay = write(tmp_path / "l.toml", "[group]\npattern = '^(?P<group>g[0-9]+)-'\n")
    path = write(tmp_path / "r.csv", "solver,instance,pallets\ns,g1-a,3\ns,g2-b,4\n")
    assert load_json(cli, path, "--layout", str(lay))["rows_loaded"] == 2
    got = query(location, "SELECT f.name, g.name, i.name FROM instances i JOIN groups g ON g.id = i.group_id "
                          "JOIN families f ON f.id = g.family_id ORDER BY i.name")
    assert got == [("default", "g1", "g1-a"), ("default", "g2", "g2-b")]


def test_group_column_wins_over_the_pattern_where_it_has_a_value(cli, location, tmp_path):
    lay = write(tmp_path / "l.toml", "[group]\npattern = '^(?P<group>g[0-9]+)-'\n")
    path = write(tmp_path / "r.csv", "solver,group,instance,pallets\ns,given,g1-a,3\ns,,g2-b,4\n")
    assert load_json(cli, path, "--layout", str(lay))["rows_loaded"] == 2
    assert query(location, "SELECT name FROM groups ORDER BY name") == [("g2",), ("given",)]


def test_instance_not_matching_the_pattern_is_refused_on_its_line(cli, location, tmp_path):
    lay = write(tmp_path / "l.toml", "[group]\npattern = '^(?P<group>g[0-9]+)-'\n")
    path = write(tmp_path / "r.csv", "solver,instance,pallets\ns,g1-a,3\ns,loose,4\n")
    line = refusal(cli, path, "--layout", str(lay))
    assert f"{path} line 3, field instance: 'loose' does not match the layout's [group] pattern" in line


def test_status_words_are_case_blind_and_layout_words_add_to_the_common_ones(cli, location, tmp_path):
    lay = write(tmp_path / "l.toml", '[status]\n"gave up" = "failed"\nNOSOL = "infeasible"\n')
    rows = ["s,g1,a,1,Solved,3", "s,g1,a,2,TIMEOUT,", "s,g1,a,3,gave up,", "s,g1,a,4,nosol,", "s,g1,a,5,,3"]
    path = write(tmp_path / "r.csv", "solver,group,instance,seed,status,pallets\n" + "\n".join(rows) + "\n")
    assert load_json(cli, path, "--layout", str(lay))["rows_loaded"] == 5
    # ok 0, timeout 1, failed 2, infeasible 3; an empty status is ok
    assert query(location, "SELECT status FROM runs ORDER BY seed") == [(0,), (1,), (2,), (3,), (0,)]


def test_ignore_leaves_a_numeric_column_out(cli, location, tmp_path):
    lay = write(tmp_path / "l.toml", '[ignore]\ncolumns = ["Rack_Temp"]\n')
    path = write(tmp_path / "r.csv", "solver,group,instance,rack_temp,pallets\ns,g1,a,21.5,3\n")
    rep = load_json(cli, path, "--layout", str(lay))
    assert rep["rows_loaded"] == 1
    assert query(location, "SELECT name FROM metrics") == [("pallets",)]


def test_without_a_layout_numeric_columns_are_metrics_and_text_columns_are_left_out(cli, location, tmp_path):
    path = write(tmp_path / "r.csv", "solver,group,instance,note,pallets,gap\ns,g1,a,fine,3,0.01\ns,g1,b,ok too,4,0.02\n")
    rep = load_json(cli, path, "--dry-run")
    assert rep["metrics"] == {"pallets": "min", "gap": "min"}
    assert rep["ignored"] == ["note"]


def test_twenty_five_metrics_are_one_too_many(cli, location, tmp_path):
    names = [f"m{k}" for k in range(25)]
    path = write(tmp_path / "r.csv", "solver,group,instance," + ",".join(names) + "\ns,g1,a," + ",".join("1" * 25) + "\n")
    before = everything(location)
    line = refusal(cli, path)
    assert "metric 'm24' would be the warehouse's 25th; a warehouse holds at most 24 metrics" in line
    assert everything(location) == before
    ok = write(tmp_path / "ok.csv", "solver,group,instance," + ",".join(names[:24]) + "\ns,g1,a," + ",".join("1" * 24) + "\n")
    assert load_json(cli, ok)["rows_loaded"] == 1
    assert everything(location)["metrics"] == 24


LAYOUT_ERRORS = [
    ("bad-toml", "[columns\nalgo = 'solver'\n", "not valid TOML"),
    ("unknown-section", "[colums]\nalgo = 'solver'\n", "unknown section [colums]"),
    ("bad-status-target", "[status]\nSOLVED = 'fine'\n", "[status] SOLVED = 'fine': must be one of ok, timeout, failed, infeasible"),
    ("bad-regex", "[group]\npattern = '^(?P<group>[^/]+'\n", "[group] pattern does not compile"),
    ("pattern-without-group", "[group]\npattern = '^(?P<family>[^/]+)/'\n", "[group] pattern needs a named group (?P<group>...)"),
    ("pattern-unknown-name", "[group]\npattern = '^(?P<group>[^/]+)/(?P<size>.+)'\n", "named group 'size'"),
    ("bad-sense", "[metrics.pallets]\nsense = 'lowest'\n", "[metrics.pallets] sense = 'lowest': must be min or max"),
    ("unknown-constant", "[constants]\nmachine = 'x'\n", "[constants] machine: unknown field"),
    ("constant-seed", "[constants]\nseed = 'one'\n", "[constants] seed = 'one': must be a whole number"),
    ("constant-status", "[constants]\nstatus = 'meh'\n", "[constants] status = 'meh' is not a status word"),
    ("not-a-table", "columns = 3\n", "[columns] must be a table"),
]


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    with module_warehouse(tmp_path_factory) as loc:
        yield loc, cli_at(loc)


@pytest.mark.parametrize("name,text,says", LAYOUT_ERRORS, ids=[e[0] for e in LAYOUT_ERRORS])
def test_layout_errors_are_one_line_naming_the_layout(shared, tmp_path, name, text, says):
    location, run = shared
    lay = write(tmp_path / f"{name}.toml", text)
    path = write(tmp_path / "r.csv", "solver,group,instance,pallets\ns,g1,a,3\n")
    before = everything(location)
    line = refusal(run, path, "--layout", str(lay))
    assert line.startswith(f"blockyard: layout {lay}: "), line
    assert says in line, line
    assert everything(location) == before


def test_missing_layout_file(cli, location, tmp_path):
    path = write(tmp_path / "r.csv", "solver,group,instance,pallets\ns,g1,a,3\n")
    assert f"layout {tmp_path / 'nope.toml'}: no such file" in refusal(cli, path, "--layout", str(tmp_path / "nope.toml"))
