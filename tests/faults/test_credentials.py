"""PostgreSQL credentials: a password is never printed, and a team member needs little privilege.

The test server trusts local connections, so a password in the URL is accepted and ignored;
what matters here is that it never reaches stdout, stderr or a written report. Credentials may
also come from where libpq looks for them (PostgreSQL documentation, libpq "Environment
Variables" PGPASSWORD and PGPASSFILE, and "The Password File": a file of
host:port:database:user:password lines that libpq ignores unless its mode is 0600 or less).

Roles made here are cluster-wide: each test makes its own with a random name and drops it.
"""
from __future__ import annotations

import os
import re
import uuid

import pytest
from sqlalchemy.engine import make_url

from conftest import ON_POSTGRES, TEST_URL

from . import blockyard, clean_env, fresh_warehouse, in_process, one_line, runs_csv, schema_of, sql

pytestmark = pytest.mark.skipif(not ON_POSTGRES, reason="PostgreSQL credentials: run with BLOCKYARD_TEST_URL=postgresql://...")

SECRET = "sekret-" + uuid.uuid4().hex[:10]


def with_password(location: str, password: str = SECRET, user: str | None = None, database: str | None = None,
                  port: int | None = None) -> str:
    url = make_url(location).set(password=password)
    if user:
        url = url.set(username=user)
    if database:
        url = url.set(database=database)
    if port:
        url = url.set(port=port)
    return url.render_as_string(hide_password=False)


def never_shown(res, secret: str = SECRET) -> None:
    assert secret not in res.out and secret not in res.err, res


def admin(statement: str) -> None:
    sql(TEST_URL, statement)


def stock(location, folder) -> int:
    """1000 runs and a kept analysis; returns the analysis id."""
    path = runs_csv(folder / "runs.csv", 1_000, instances=50, seed=21)
    assert in_process(location, "load", str(path), "--campaign", "base").code == 0
    bt = in_process(location, "blocktest", "--metric", "pallets", "--json")
    assert bt.code == 0, bt
    return bt.json()["analysis_id"]


@pytest.fixture
def stocked(location, tmp_path):
    return stock(location, tmp_path)


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    """(location, analysis id) of one stocked warehouse that the password cases share."""
    if not ON_POSTGRES:
        pytest.skip("PostgreSQL credentials")
    folder = tmp_path_factory.mktemp("credentials")
    with fresh_warehouse(folder, "cred") as location:
        yield location, stock(location, folder)


# --- a password in the URL -----------------------------------------------------------------------

HINT_LEAK = ("defect: the hint after an error repeats the raw -w text, password included "
             "('create one with: blockyard init -w postgresql://postgres:<password>@...')")

CASES = [
    pytest.param(lambda loc, tmp, aid: (with_password(loc), "inventory"), id="inventory"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc), "inventory", "--json"), id="inventory-json"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc), "inventory", "imports"), id="inventory-imports"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc), "init"), id="init-on-an-existing-warehouse"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc), "upgrade", "--json"), id="upgrade-current"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc), "load", str(runs_csv(tmp / "more.csv", 500, seed=22)),
                                        "--campaign", "more"), id="load"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc), "load", str(tmp / "missing.csv"), "--campaign", "x"),
                 id="load-refused"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc), "blocktest", "--metric", "nosuch"), id="analysis-error"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc), "recall", str(aid), "--json"), id="recall"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc), "recheck", str(aid)), id="recheck"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc), "nosuchcommand"), id="unknown-command"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc, database="blockyard_no_such_db"), "inventory"),
                 id="wrong-database-name"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc, database="blockyard_no_such_db"), "init"),
                 id="init-wrong-database-name"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc, port=1), "inventory"), id="nothing-listening"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc, user="blockyard_no_such_user"), "inventory"),
                 id="unknown-user"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc).replace("/test?", "/test?sslmode=nonsense&"), "inventory"),
                 id="bad-connection-option"),
    pytest.param(lambda loc, tmp, aid: (with_password(loc).replace("search_path%3D", "search_path%3Dno_such_"), "inventory"),
                 id="schema-without-warehouse"),
    pytest.param(lambda loc, tmp, aid: (with_password(_fresh_schema(loc)), "init"),
                 id="init-new-warehouse"),
    pytest.param(lambda loc, tmp, aid: (with_password(_old_schema(loc)), "inventory"),
                 id="older-schema"),
]

_made: list[str] = []


def _fresh_schema(location: str) -> str:
    name = "t_cred_" + uuid.uuid4().hex[:8]
    admin(f'CREATE SCHEMA "{name}"')
    _made.append(name)
    return location.replace(f"search_path%3D{schema_of(location)}", f"search_path%3D{name}")


def _old_schema(location: str) -> str:
    from warehouse.store.connect import init_warehouse

    there = _fresh_schema(location)
    init_warehouse(there, revision="0002").close()
    return there


@pytest.fixture
def drop_made_schemas():
    yield
    while _made:
        admin(f'DROP SCHEMA IF EXISTS "{_made.pop()}" CASCADE')


@pytest.mark.parametrize("case", CASES)
def test_a_password_in_the_url_is_never_printed(shared, tmp_path, drop_made_schemas, case, capfd):
    where, *argv = case(*shared[:1], tmp_path, shared[1])
    assert SECRET in where
    res = in_process(where, *argv)
    captured = capfd.readouterr()  # what libpq itself may write to the process's stderr
    never_shown(res)
    assert SECRET not in captured.out + captured.err
    assert res.code in (0, 2), res
    assert "Traceback" not in res.err
    if res.code:
        one_line(res.err)


def test_a_url_that_does_not_parse_is_one_line_without_the_password(location):
    # the test URL may or may not name a port: put a bad one in its place either way
    where = re.sub(r"@([^/:@]+)(:\d+)?/", r"@\1:notaport/", with_password(location), count=1)
    assert ":notaport/" in where, where
    res = in_process(where, "inventory")
    never_shown(res)
    assert res.code == 2, res
    one_line(res.err)


def test_a_report_written_from_a_url_with_a_password_does_not_hold_it(location, tmp_path, stocked):
    for name in ("report.html", "report.md"):
        res = in_process(with_password(location), "export", str(stocked), "--to", str(tmp_path / name))
        assert res.code == 0, res
        never_shown(res)
        for f in tmp_path.rglob("report*"):
            if f.is_file():
                assert SECRET.encode() not in f.read_bytes(), f


def test_the_stored_ledger_does_not_hold_the_password(location, tmp_path, stocked):
    res = in_process(with_password(location), "blocktest", "--metric", "seconds", "--json")
    assert res.code == 0, res
    never_shown(res)
    for table in ("analyses", "claims", "imports", "retractions"):
        for row in sql(location, f"SELECT * FROM {table}"):
            assert SECRET not in repr(row), table


# --- credentials from libpq's own places ------------------------------------------------------------

def test_a_password_from_pgpassword_works_and_is_never_printed(location, stocked):
    res = blockyard("-w", location, "inventory", "--json", env=clean_env(PGPASSWORD=SECRET))
    assert res.code == 0, res
    assert res.json()["runs"] == 1_000
    never_shown(res)


def test_a_password_file_works_and_its_content_is_never_printed(location, tmp_path, stocked):
    url = make_url(location)
    passfile = tmp_path / "pgpass"
    # PostgreSQL documentation, The Password File: hostname:port:database:username:password
    passfile.write_text(f"{url.host}:{url.port or 5432}:{url.database}:{url.username}:{SECRET}\n*:*:*:*:{SECRET}-any\n",
                        encoding="utf-8")
    os.chmod(passfile, 0o600)
    assert "@" in location and ":" not in url.render_as_string(hide_password=False).split("@")[0].split("//")[1]
    env = clean_env(PGPASSFILE=str(passfile))
    for argv in (("inventory", "--json"), ("recall", "--json"), ("blocktest", "--metric", "nosuch")):
        res = blockyard("-w", location, *argv, env=env)
        assert res.code in (0, 2), res
        never_shown(res)
    # a wrong database name: the error comes from the server, still without the file's content
    res = blockyard("-w", with_password(location, password="", database="blockyard_no_such_db").replace(":@", "@"),
                    "inventory", env=env)
    assert res.code == 2, res
    never_shown(res)
    assert "blockyard_no_such_db" in one_line(res.err)


# --- least privilege -----------------------------------------------------------------------------------

@pytest.fixture
def role():
    """A login role of this test's own, with a password; dropped with everything granted to it."""
    name = "by_" + uuid.uuid4().hex[:10]
    admin(f"CREATE ROLE {name} LOGIN PASSWORD '{SECRET}'")
    try:
        yield name
    finally:
        admin(f"DROP OWNED BY {name}")
        admin(f"DROP ROLE {name}")


def grant_member(role: str, location: str, leave_out: str = "") -> None:
    """What docs/reliability.md says a team member needs, and nothing more (less one grant, if asked)."""
    schema = schema_of(location)
    database = make_url(location).database
    table_rights = ", ".join(r for r in ("SELECT", "INSERT", "UPDATE") if r != leave_out)
    grants = {
        "connect": f'GRANT CONNECT, TEMPORARY ON DATABASE "{database}" TO {role}',
        "schema": f'GRANT USAGE ON SCHEMA "{schema}" TO {role}',
        "tables": f'GRANT {table_rights} ON ALL TABLES IN SCHEMA "{schema}" TO {role}',
        "sequences": f'GRANT USAGE ON ALL SEQUENCES IN SCHEMA "{schema}" TO {role}',
    }
    if sql(TEST_URL, "SELECT to_regclass(:t)", t=f'"{schema}".cell_stats')[0][0] is not None:  # from schema 0003 on
        grants["cells"] = f'GRANT DELETE ON "{schema}".cell_stats TO {role}'
    if sql(TEST_URL, "SELECT to_regclass(:t)", t=f'"{schema}".block_stats')[0][0] is not None:  # from schema 0006 on
        grants["blocks"] = f'GRANT DELETE ON "{schema}".block_stats TO {role}'
    for name, statement in grants.items():
        if name != leave_out:
            admin(statement)


def test_a_team_member_with_the_documented_privileges_can_do_the_daily_work(location, tmp_path, stocked, role):
    # PUBLIC holds CONNECT and TEMPORARY on a new database by default; the member's own grants are
    # the documented ones (PostgreSQL documentation, Privileges, default privileges of PUBLIC)
    grant_member(role, location)
    member = with_password(location, user=role)
    more = runs_csv(tmp_path / "more.csv", 1_000, instances=50, seed=23, version="1.7")
    # a second file into the campaign: the load makes the campaign partition's run key through
    # the owner's function (revision 0013), as the member
    later = runs_csv(tmp_path / "later.csv", 1_000, instances=50, seed=24, version="1.7", first_seed=100)
    steps = [
        ("load", str(more), "--campaign", "more", "--json"),
        ("load", str(later), "--campaign", "more", "--json"),
        ("inventory", "--json"),
        ("peek", "--metric", "pallets", "--json"),
        ("blocktest", "--metric", "pallets", "--json"),
        ("versus", "stacker@1.6", "--metric", "pallets", "--json"),
        ("keep", "1.7 holds up", "--tag", "member"),
        ("recall", "--json"),
        ("recheck", str(stocked), "--json"),
        ("retract", "--slice", "campaign=more solver=packer", "--reason", "wrong build", "--json"),
        ("retract", "--undo", "1", "--json"),
        ("export", str(stocked), "--to", str(tmp_path / "r.md")),
        ("upgrade", "--json"),  # at the current schema: nothing to do, nothing created
    ]
    for argv in steps:
        res = in_process(member, *argv)
        assert res.code == 0, (argv, res)
        never_shown(res)
    assert sql(location, "SELECT count(*) FROM runs")[0][0] == 3_000
    keys = sql(location, "SELECT count(*) FROM pg_indexes WHERE schemaname = current_schema() "
                         "AND indexdef LIKE 'CREATE UNIQUE INDEX runs_c%_key %'")[0][0]
    assert keys == 1


def test_a_members_grants_on_the_cell_summaries_outlive_the_upgrade_that_partitions_them(location, tmp_path, stocked,
                                                                                          role):
    """Revision 0014 replaces cell_stats by a table partitioned by campaign: the privileges others
    held on the old table are given on the new one, so a member granted at 0013 loads a new
    campaign and retracts (which deletes and rewrites cell summaries) after the upgrade, with no
    grant run again."""
    from alembic import command

    from warehouse.store.connect import _alembic_config, open_warehouse

    wh = open_warehouse(location)
    try:
        with wh.engine.connect() as conn, conn.begin():
            command.downgrade(_alembic_config(conn), "0013")
    finally:
        wh.close()
    grant_member(role, location)
    assert in_process(location, "upgrade").code == 0
    assert sql(location, "SELECT relkind FROM pg_class WHERE oid = 'cell_stats'::regclass") == [("p",)]
    assert sql(location, "SELECT has_table_privilege(:r, 'cell_stats', 'DELETE'), "
                         "has_table_privilege(:r, 'cell_stats', 'INSERT')", r=role) == [(True, True)]
    member = with_password(location, user=role)
    more = runs_csv(tmp_path / "more.csv", 500, instances=50, seed=31, version="1.7")
    for argv in (("load", str(more), "--campaign", "more"),
                 ("retract", "--slice", "campaign=more solver=packer", "--reason", "wrong build"),
                 ("verify",)):
        res = in_process(member, *argv)
        assert res.code == 0, (argv, res)
        never_shown(res)


def test_creating_a_warehouse_takes_create_which_a_member_lacks(location, role, drop_made_schemas):
    empty = _fresh_schema(location)
    admin(f'GRANT USAGE ON SCHEMA "{schema_of(empty)}" TO {role}')
    res = in_process(with_password(empty, user=role), "init")
    never_shown(res)
    assert res.code != 0, res
    assert "permission denied" in res.err, res
    assert sql(TEST_URL, "SELECT count(*) FROM pg_tables WHERE schemaname = :s", s=schema_of(empty)) == [(0,)]


@pytest.mark.parametrize("leave_out,argv", [
    ("UPDATE", ("load", "{more}", "--campaign", "more")),  # a load locks the runs table, which takes UPDATE
    ("INSERT", ("load", "{more}", "--campaign", "more")),
    ("sequences", ("blocktest", "--metric", "pallets")),  # a kept analysis draws its id from a sequence
    ("cells", ("retract", "--slice", "solver=packer", "--reason", "r")),  # retraction rebuilds cell summaries
    ("blocks", ("retract", "--slice", "solver=packer", "--reason", "r")),  # and the block summaries
])
def test_each_documented_privilege_is_needed(location, tmp_path, stocked, role, leave_out, argv):
    grant_member(role, location, leave_out=leave_out)
    before = {t: sql(location, f"SELECT count(*) FROM {t}")[0][0] for t in ("runs", "analyses", "retractions")}
    more = runs_csv(tmp_path / "more.csv", 300, instances=50, seed=25)
    res = in_process(with_password(location, user=role), *[a.format(more=more) for a in argv])
    never_shown(res)
    if argv[0] == "blocktest":
        # the numbers still stand for a member who may not keep them: they print, with a caution
        assert res.code == 0, res
        assert "not kept in the ledger" in res.out and "permission denied" in res.out, res
    else:
        assert res.code != 0, res
        assert "permission denied" in res.err, res
    assert {t: sql(location, f"SELECT count(*) FROM {t}")[0][0] for t in before} == before
    assert sql(location, "SELECT count(*) FROM runs WHERE retraction_id IS NOT NULL") == [(0,)]


def test_someone_who_only_looks_needs_only_select(location, tmp_path, stocked, role):
    schema = schema_of(location)
    admin(f'GRANT USAGE ON SCHEMA "{schema}" TO {role}')
    admin(f'GRANT SELECT ON ALL TABLES IN SCHEMA "{schema}" TO {role}')
    looker = with_password(location, user=role)
    for argv in (("inventory", "--json"), ("inventory", "solvers"), ("peek", "--metric", "pallets", "--json"),
                 ("recall", "--json"), ("recall", str(stocked), "--json"), ("recheck", str(stocked), "--json"),
                 ("export", str(stocked), "--to", str(tmp_path / "r.html"))):
        res = in_process(looker, *argv)
        assert res.code == 0, (argv, res)
        never_shown(res)


def test_a_read_only_member_is_told_in_one_line_that_it_may_not_write(location, tmp_path, stocked, role):
    schema = schema_of(location)
    admin(f'GRANT USAGE ON SCHEMA "{schema}" TO {role}')
    admin(f'GRANT SELECT ON ALL TABLES IN SCHEMA "{schema}" TO {role}')
    reader = with_password(location, user=role)
    inv = in_process(reader, "inventory", "--json")
    assert inv.code == 0 and inv.json()["runs"] == 1_000, inv  # looking is allowed
    before = sql(location, "SELECT count(*) FROM runs")[0][0]
    res = in_process(reader, "load", str(runs_csv(tmp_path / "more.csv", 500, seed=24)), "--campaign", "more")
    never_shown(res)
    assert res.code == 2, res
    line = one_line(res.err)
    assert "permission" in line or "privilege" in line or "cannot write" in line, line
    assert sql(location, "SELECT count(*) FROM runs")[0][0] == before


def test_upgrade_without_create_privilege_says_so_in_one_line(wh_location, role):
    from warehouse.store.connect import init_warehouse

    init_warehouse(wh_location, revision="0002").close()
    grant_member(role, wh_location)
    res = in_process(with_password(wh_location, user=role), "upgrade")
    never_shown(res)
    assert res.code == 2, res
    line = one_line(res.err)
    assert "permission" in line or "privilege" in line, line
    assert sql(wh_location, "SELECT version_num FROM alembic_version") == [("0002",)]
