"""Re-loading the same bytes, and files that repeat runs already stored."""
from __future__ import annotations

from .kit import csv_text, everything, load_json, metric_values, query, runs, write

H = "solver,version,group,instance,seed,status,pallets\n"


def test_same_bytes_again_is_a_polite_duplicate(cli, location, tmp_path):
    path = write(tmp_path / "a.csv", csv_text(runs(4)))
    first = load_json(cli, path)
    before = everything(location)
    again = load_json(cli, path)
    assert again["status"] == "duplicate"
    assert again["import_id"] == first["import_id"]
    assert "already loaded into campaign c" in again["message"]
    assert everything(location) == before


def test_same_bytes_under_another_name_and_campaign_is_still_a_duplicate(cli, location, tmp_path):
    text = csv_text(runs(4))
    load_json(cli, write(tmp_path / "a.csv", text))
    before = everything(location)
    rep = load_json(cli, write(tmp_path / "copy-of-a.csv", text), campaign="other")
    assert rep["status"] == "duplicate" and rep["campaign"] == "c"
    assert everything(location) == before


def test_the_duplicate_text_output(cli, location, tmp_path):
    path = write(tmp_path / "a.csv", csv_text(runs(2)))
    cli("load", str(path), "--campaign", "c")
    res = cli("load", str(path), "--campaign", "c")
    assert res.code == 0 and res.err == ""
    assert res.out.startswith(f"skipped  {path}: already loaded into campaign c on ")


def test_overlapping_file_skips_stored_runs_and_never_overwrites(cli, location, tmp_path):
    load_json(cli, write(tmp_path / "a.csv", H + "s,1,g1,a,1,ok,10\ns,1,g1,a,2,ok,20\n"))
    # the second file repeats seed 2 with another value and adds seed 3
    rep = load_json(cli, write(tmp_path / "b.csv", H + "s,1,g1,a,2,ok,99\ns,1,g1,a,3,ok,30\n"))
    assert (rep["rows_read"], rep["rows_loaded"], rep["rows_skipped"], rep["rows_rejected"]) == (2, 1, 1, 0)
    assert any("line 2: this run" in w and "skipped" in w for w in rep["warnings"])
    assert metric_values(location, "pallets") == [10.0, 20.0, 30.0]  # seed 2 keeps 20, not 99
    imports = query(location, "SELECT rows_read, rows_loaded, rows_skipped FROM imports ORDER BY id")
    assert imports == [(2, 2, 0), (2, 1, 1)]


def test_the_same_runs_in_another_campaign_are_new_runs(cli, location, tmp_path):
    load_json(cli, write(tmp_path / "a.csv", H + "s,1,g1,a,1,ok,10\n"))
    rep = load_json(cli, write(tmp_path / "b.csv", H + "s,1,g1,a,1,ok,11\n"), campaign="other")
    assert rep["rows_loaded"] == 1 and rep["rows_skipped"] == 0
    assert everything(location)["runs"] == 2


def test_many_skipped_runs_are_summed_up(cli, location, tmp_path):
    body = "".join(f"s,1,g1,a,{k},ok,{k}\n" for k in range(10))
    load_json(cli, write(tmp_path / "a.csv", H + body))
    rep = load_json(cli, write(tmp_path / "b.csv", H + body + "s,1,g1,a,99,ok,1\n"))
    assert rep["rows_skipped"] == 10 and rep["rows_loaded"] == 1
    assert len([w for w in rep["warnings"] if "this run" in w]) == 3
    assert any(w.startswith("10 runs in all") for w in rep["warnings"])
