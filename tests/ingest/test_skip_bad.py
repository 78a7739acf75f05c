"""--skip-bad, --rejects and --dry-run."""
from __future__ import annotations

import csv
import json

from .kit import everything, load, load_json, query, write

H = "solver,group,instance,seed,status,pallets,note\n"
TEXT = (H + "s,g1,a,1,ok,10,first\n"
        "s,g1,a,2,ok,n/a,second\n"          # line 3: not a number
        "s,g1,a,3,ok,12,third,extra\n"      # line 4: too many fields
        "s,g1,a,4,meh,13,fourth\n"          # line 5: unknown status
        "s,g1,a,1,ok,14,again\n"            # line 6: same run as line 2
        "s,g1,a,5,ok,15,fifth\n")


def read_rejects(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def test_skip_bad_loads_the_good_rows_and_writes_the_rest_beside_the_source(cli, location, tmp_path):
    path = write(tmp_path / "runs.csv", TEXT)
    rep = load_json(cli, path, "--skip-bad")
    assert (rep["rows_read"], rep["rows_loaded"], rep["rows_rejected"], rep["rows_skipped"]) == (6, 2, 4, 0)
    target = tmp_path / "runs.csv.rejects.csv"
    assert rep["rejects_file"] == str(target)
    rows = read_rejects(target)
    assert [r["line"] for r in rows] == ["3", "4", "5", "6"]
    assert list(rows[0])[0] == "line" and list(rows[0])[-1] == "reason"
    assert rows[0]["pallets"] == "n/a" and "field pallets: 'n/a' is not a number" in rows[0]["reason"]
    assert rows[1]["raw"] == "s,g1,a,3,ok,12,third,extra" and "has 8 fields where the header has 7" in rows[1]["reason"]
    assert "field status: unknown status 'meh'" in rows[2]["reason"]
    assert "lines 2 and 6 hold the same run" in rows[3]["reason"] and rows[3]["note"] == "again"
    assert sorted(query(location, "SELECT seed, v1 FROM runs")) == [(1, 10.0), (5, 15.0)]
    assert query(location, "SELECT rows_read, rows_loaded, rows_rejected FROM imports") == [(6, 2, 4)]


def test_rejects_option_names_the_file(cli, location, tmp_path):
    path = write(tmp_path / "runs.csv", TEXT)
    target = tmp_path / "elsewhere" / "bad-rows.csv"
    target.parent.mkdir()
    rep = load_json(cli, path, "--skip-bad", "--rejects", str(target))
    assert rep["rejects_file"] == str(target)
    assert len(read_rejects(target)) == 4
    assert not (tmp_path / "runs.csv.rejects.csv").exists()


def test_skip_bad_with_nothing_bad_writes_no_rejects_file(cli, location, tmp_path):
    path = write(tmp_path / "ok.csv", H + "s,g1,a,1,ok,10,x\n")
    rep = load_json(cli, path, "--skip-bad")
    assert rep["rows_rejected"] == 0 and "rejects_file" not in rep
    assert not (tmp_path / "ok.csv.rejects.csv").exists()


def test_skip_bad_in_text_output(cli, location, tmp_path):
    res = load(cli, write(tmp_path / "runs.csv", TEXT), "--skip-bad")
    assert res.code == 0
    assert "2 runs loaded into campaign c, 4 rejected (see " in res.out


def test_dry_run_stores_nothing_and_shows_the_mapping(cli, location, tmp_path):
    before = everything(location)
    path = write(tmp_path / "ok.csv", "algo,group,instance,seed,pallets,notes\ns,g1,a,1,10,x\ns,g1,a,2,11,y\n")
    layout = write(tmp_path / "l.toml", '[columns]\nalgo = "solver"\n[ignore]\ncolumns = ["notes"]\n')
    rep = load_json(cli, path, "--dry-run", "--layout", str(layout))
    assert rep["status"] == "checked" and rep["import_id"] is None
    assert rep["mapping"] == {"algo": "solver", "group": "group", "instance": "instance", "seed": "seed", "pallets": "pallets"}
    assert rep["ignored"] == ["notes"]
    assert rep["metrics"] == {"pallets": "min"}
    assert rep["rows_loaded"] == 2
    assert rep["preview"][0]["solver"] == "s" and rep["preview"][1]["pallets"] == 11.0
    assert everything(location) == before
    text = load(cli, path, "--dry-run", "--layout", str(layout))
    assert text.code == 0
    assert "checked" in text.out and "algo" in text.out and "solver" in text.out
    # a real load afterwards is not a duplicate: the dry run kept no import
    assert load_json(cli, path, "--layout", str(layout))["status"] == "loaded"


def test_dry_run_still_refuses_bad_input(cli, location, tmp_path):
    before = everything(location)
    res = load(cli, write(tmp_path / "bad.csv", H + "s,g1,a,1,ok,1,x\ns,g1,a,2,ok,zz,x\n"), "--dry-run")
    assert res.code == 2 and "line 3, field pallets: 'zz' is not a number" in res.err
    assert everything(location) == before


def test_dry_run_with_skip_bad_writes_no_rejects(cli, location, tmp_path):
    path = write(tmp_path / "runs.csv", TEXT)
    rep = load_json(cli, path, "--dry-run", "--skip-bad")
    assert rep["rows_rejected"] == 4 and rep["status"] == "checked"
    assert not (tmp_path / "runs.csv.rejects.csv").exists()


def test_json_contract_keys(cli, location, tmp_path):
    res = load(cli, write(tmp_path / "ok.csv", H + "s,g1,a,1,ok,10,x\n"), "--json")
    doc = json.loads(res.out)
    rep = doc["imports"][0]
    for key in ("file", "rows_read", "rows_loaded", "rows_rejected", "status"):
        assert key in rep
