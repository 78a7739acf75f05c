"""recheck --renew (a stale analysis re-run, stored anew, its claims moved) and analysis ids that
are out of range or no ids at all, on SQLite and on PostgreSQL (BLOCKYARD_TEST_URL).

The scenario: a parcel-logistics team tunes `stacker`; 1.6 loads about two pallets fewer than 1.4
on every group of mixed-sku and fragile-top orders.
"""
from __future__ import annotations

import csv
import random
from html.parser import HTMLParser

import pytest
from sqlalchemy import func, select

from warehouse.store import schema as S

HEADER = ["solver", "version", "family", "group", "instance", "seed", "pallets"]


def _runs(version, shift, families=("mixed-sku", "fragile-top"), seeds=(1, 2), seed_rng=3):
    rng = random.Random(seed_rng)
    out = []
    for family in families:
        for g in range(1, 7):
            for inst in ("i1", "i2"):
                for seed in seeds:
                    out.append(["stacker", version, family, f"g{g}", f"{family}-g{g}-{inst}", seed,
                                round(30 + 2 * g + shift + rng.gauss(0, 0.3), 3)])
    return out


def _load(cli, tmp_path, name, rows):
    path = tmp_path / name
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(HEADER)
        w.writerows(rows)
    r = cli("load", str(path), "--campaign", "oct-tuning")
    assert r.code == 0, r


@pytest.fixture
def campaign(cli, tmp_path):
    _load(cli, tmp_path, "runs-oct.csv", _runs("1.4", 0.0) + _runs("1.6", -2.0, seed_rng=4))


def _json(cli, *argv):
    r = cli(*argv, "--json")
    assert r.code == 0, r
    return r.json()


def _blocktest(cli, slice_text="family=mixed-sku"):
    return _json(cli, "blocktest", "--slice", slice_text, "--metric", "pallets")["analysis_id"]


def _retract_some(cli):
    doc = _json(cli, "retract", "--slice", "family=mixed-sku stacker@1.6 seed=1", "--reason", "build mis-counted")
    assert doc["runs_retracted"] == 12  # 6 groups x 2 instances, seed 1


def _rows(wh, table, **where):
    with wh.engine.connect() as conn:
        q = select(table)
        for k, v in where.items():
            q = q.where(table.c[k] == v)
        return [dict(r._mapping) for r in conn.execute(q.order_by(table.c.id))]


def _count(wh, table) -> int:
    with wh.engine.connect() as conn:
        return conn.execute(select(func.count()).select_from(table)).scalar()


# --- recheck --renew ------------------------------------------------------------------------------

@pytest.mark.parametrize("kind", ["blocktest", "versus"])
def test_renew_stores_the_rerun_and_moves_the_claims(campaign, cli, wh, kind):
    if kind == "blocktest":
        old = _blocktest(cli)
    else:
        old = _json(cli, "versus", "stacker@1.4", "--slice", "family=mixed-sku", "--metric", "pallets")["analysis_id"]
    c1 = _json(cli, "keep", "1.6 needs about two pallets fewer on mixed-sku orders", "--analysis", str(old),
               "--tag", "paper", "--tag", "q4")["claim_id"]
    c2 = _json(cli, "keep", "the gain holds on every group", "--analysis", str(old))["claim_id"]
    claims_before = _rows(wh, S.claims)
    _retract_some(cli)
    row_before = _rows(wh, S.analyses, id=old)

    doc = _json(cli, "recheck", str(old), "--renew")
    assert doc["status"] in ("data-changed", "conclusion-changed") and doc["renew"] is True
    new = doc["stored_analysis"]
    assert isinstance(new, int) and new > old
    assert doc["claims_moved"] == [c1, c2] and doc["renewed_as"] == new

    # the old analysis stays in the ledger untouched
    assert _rows(wh, S.analyses, id=old) == row_before
    # the new one: same kind, slice, metric and settings, renewing the old one
    o, n = row_before[0], _rows(wh, S.analyses, id=new)[0]
    assert n["renewed_from_id"] == old and o["renewed_from_id"] is None
    assert (n["kind"], n["slice_text"], n["slice_parsed"], n["metric"]) == (o["kind"], o["slice_text"],
                                                                            o["slice_parsed"], o["metric"])
    recalled_old, recalled_new = _json(cli, "recall", str(old)), _json(cli, "recall", str(new))
    for key in ("collapse", "options"):
        assert recalled_new["settings"][key] == recalled_old["settings"][key]
    # claims: moved, with their text, tags and times as kept; they read fresh on the new analysis
    after = {c["id"]: c for c in _rows(wh, S.claims)}
    for c in claims_before:
        assert after[c["id"]] == dict(c, analysis_id=new)
    assert recalled_new["state"] == "fresh" and [c["id"] for c in recalled_new["claims"]] == [c1, c2]
    assert recalled_new["claims"][0]["tags"] == ["paper", "q4"]
    assert recalled_old["state"] == "stale" and recalled_old["claims"] == []
    # the chain both ways, in JSON and in text
    assert (recalled_new["renewed_from"], recalled_new["renewed_as"]) == (old, None)
    assert (recalled_old["renewed_from"], recalled_old["renewed_as"]) == (None, new)
    assert f"renewed from  analysis {old}" in cli("recall", str(new)).out
    assert f"renewed as    analysis {new}" in cli("recall", str(old)).out
    listed = {m["analysis_id"]: m for m in _json(cli, "recall")["matches"]}
    assert listed[new]["renewed_from"] == old and listed[old]["renewed_as"] == new
    table = cli("recall").out
    assert f"fresh; renewed from {old}" in table and f"stale; renewed as {new}" in table
    # a claim kept next, without --analysis, rests on the renewal
    assert _json(cli, "keep", "and on fragile-top too")["analysis_id"] == new


def test_renew_text_says_what_was_stored_and_which_claims_moved(campaign, cli):
    old = _blocktest(cli)
    c1 = _json(cli, "keep", "fewer pallets with 1.6", "--analysis", str(old))["claim_id"]
    _retract_some(cli)
    r = cli("recheck", str(old), "--renew")
    assert r.code == 0, r
    new = old + 1
    assert f"stored    analysis {new}, renewing analysis {old}" in r.out
    assert f"claim {c1} moved to it from analysis {old}" in r.out


def test_renewing_an_analysis_without_claims_says_so(campaign, cli):
    old = _blocktest(cli)
    _retract_some(cli)
    r = cli("recheck", str(old), "--renew")
    assert r.code == 0, r
    assert f"analysis {old} had no claims to move" in r.out


def test_renew_stores_nothing_when_the_analysis_is_unchanged(campaign, cli, wh):
    old = _blocktest(cli)
    _json(cli, "keep", "fewer pallets with 1.6", "--analysis", str(old))
    before = _count(wh, S.analyses)
    r = cli("recheck", str(old), "--renew")
    assert r.code == 0, r
    assert f"stored    nothing: analysis {old} is unchanged" in r.out
    doc = _json(cli, "recheck", str(old), "--renew")
    assert doc["status"] == "unchanged" and doc["stored_analysis"] is None and doc["claims_moved"] == []
    assert _count(wh, S.analyses) == before
    assert [c["analysis_id"] for c in _rows(wh, S.claims)] == [old]


def test_recheck_without_renew_stores_nothing_and_points_to_renew(campaign, cli, wh):
    old = _blocktest(cli)
    _json(cli, "keep", "fewer pallets with 1.6", "--analysis", str(old))
    _retract_some(cli)
    before = _count(wh, S.analyses)
    r = cli("recheck", str(old))
    assert r.code == 0, r
    assert f"blockyard recheck {old} --renew" in r.out
    doc = _json(cli, "recheck", str(old))
    assert doc["renew"] is False and doc["stored_analysis"] is None
    assert _count(wh, S.analyses) == before
    assert [c["analysis_id"] for c in _rows(wh, S.claims)] == [old]


def test_renewing_twice_is_refused_naming_the_newer(campaign, cli, wh):
    old = _blocktest(cli)
    _retract_some(cli)
    new = _json(cli, "recheck", str(old), "--renew")["stored_analysis"]
    before = _count(wh, S.analyses)
    r = cli("recheck", str(old), "--renew")
    assert r.code == 2 and r.err.count("\n") == 1, r
    assert f"already renewed as analysis {new}" in r.err and f"blockyard recheck {new} --renew" in r.err
    assert _count(wh, S.analyses) == before
    # a plain recheck of the old one names its renewal
    assert f"was renewed as analysis {new}" in cli("recheck", str(old)).out


def test_a_renewal_can_itself_be_renewed(campaign, cli):
    first = _blocktest(cli)
    _retract_some(cli)
    second = _json(cli, "recheck", str(first), "--renew")["stored_analysis"]
    _json(cli, "retract", "--slice", "family=mixed-sku stacker@1.4 seed=2", "--reason", "timer drift")
    third = _json(cli, "recheck", str(second), "--renew")["stored_analysis"]
    mid = _json(cli, "recall", str(second))
    assert (mid["renewed_from"], mid["renewed_as"]) == (first, third)


def test_a_failed_renewal_leaves_no_half_moved_claims(campaign, cli, wh, monkeypatch):
    from warehouse.ledger import rechecking as ledger_recheck

    old = _blocktest(cli)
    for text in ("fewer pallets with 1.6", "on every group"):
        _json(cli, "keep", text, "--analysis", str(old))
    _retract_some(cli)
    analyses_before, claims_before = _rows(wh, S.analyses), _rows(wh, S.claims)
    move = ledger_recheck._move_claims

    def move_then_fail(conn, old_id, new_id):
        move(conn, old_id, new_id)  # the claims have moved, the analysis is written ...
        raise OSError("the disk went away")  # ... and then the work fails before the commit

    monkeypatch.setattr(ledger_recheck, "_move_claims", move_then_fail)
    with pytest.raises(OSError):
        ledger_recheck.recheck(wh, old, renew=True)
    assert _rows(wh, S.analyses) == analyses_before
    assert _rows(wh, S.claims) == claims_before


def test_a_tampered_analysis_is_not_renewed(campaign, cli, wh):
    from sqlalchemy import update

    old = _blocktest(cli)
    _retract_some(cli)
    with wh.engine.begin() as conn:
        conn.execute(update(S.analyses).where(S.analyses.c.id == old).values(metric="seconds"))
    before = _count(wh, S.analyses)
    r = cli("recheck", str(old), "--renew")
    assert r.code == 2 and r.err.count("\n") == 1 and "tampered" in r.err, r
    assert _count(wh, S.analyses) == before


class _Text(HTMLParser):
    def __init__(self):
        super().__init__()
        self.parts = []

    def handle_data(self, data):
        self.parts.append(data)


def _section(html_text: str, heading: str) -> str:
    p = _Text()
    p.feed(html_text)
    text = "\n".join(p.parts)
    return text[text.index(heading):]


def test_the_renewal_rechecks_and_exports_with_the_chain(campaign, cli, tmp_path):
    old = _blocktest(cli)
    _json(cli, "keep", "fewer pallets with 1.6", "--analysis", str(old))
    _retract_some(cli)
    new = _json(cli, "recheck", str(old), "--renew")["stored_analysis"]
    assert _json(cli, "recheck", str(new))["status"] == "unchanged"

    for aid, words in ((new, f"analysis {old}"), (old, f"analysis {new}")):
        path = tmp_path / f"a{aid}.html"
        assert cli("export", str(aid), "--to", str(path)).code == 0
        prov = _section(path.read_text(encoding="utf-8"), "provenance")
        label = "renewed from" if aid == new else "renewed as"
        assert label in prov and words in prov.split(label, 1)[1].split("\n", 3)[1]
    md = tmp_path / "new.md"
    assert cli("export", str(new), "--to", str(md)).code == 0
    assert f"- **renewed from**: analysis {old}" in md.read_text(encoding="utf-8")


def test_a_plan_from_a_stale_analysis_renews_too(campaign, cli):
    # a plan re-runs its source on today's data: stored again as a renewal like any analysis
    src = _blocktest(cli)
    plan = _json(cli, "plan", "--delta", "0.5", "--from", str(src))["analysis_id"]
    assert _json(cli, "recheck", str(plan))["status"] == "unchanged"
    _retract_some(cli)
    doc = _json(cli, "recheck", str(plan), "--renew")
    assert doc["status"] in ("data-changed", "conclusion-changed")
    assert _json(cli, "recheck", str(doc["stored_analysis"]))["status"] == "unchanged"


# --- ids out of range, and no ids at all --------------------------------------------------------------

# PostgreSQL's INTEGER is 32-bit and SQLite's 64-bit (from memory of both manuals): 2**31 is one past
# the first, 2**63 one past the second, and the long one past both.
BEYOND = ["2147483648", "9223372036854775808", "99999999999999999999999"]


def _commands(aid: str, tmp_path) -> list[list[str]]:
    return [["recheck", aid], ["recheck", aid, "--renew"], ["recall", aid], ["keep", "a claim", "--analysis", aid],
            ["export", aid, "--to", str(tmp_path / "f.html")], ["plan", "--effect", "0.5", "--from", aid],
            ["plot", "profile", "--analysis", aid, "--to", str(tmp_path / "f.png")]]


@pytest.mark.parametrize("aid", BEYOND)
def test_ids_beyond_any_warehouse_are_one_line(campaign, cli, tmp_path, aid):
    latest = _blocktest(cli)
    for argv in _commands(aid, tmp_path):
        r = cli(*argv)
        assert r.code == 2 and r.err.count("\n") == 1, (argv, r)
        assert f"no analysis {aid}; the latest is {latest}" in r.err and "blockyard recall lists them" in r.err, argv
        assert "internal error" not in r.err and "Overflow" not in r.err
    assert not (tmp_path / "f.html").exists() and not (tmp_path / "f.png").exists()


@pytest.mark.parametrize("aid", ["-3", "abc", "1.5", "17x"])
def test_ids_that_are_no_ids_are_one_line(campaign, cli, tmp_path, aid):
    _blocktest(cli)
    for argv in _commands(aid, tmp_path):
        if argv[0] == "recall" and not aid.lstrip("-").isdigit():
            continue  # recall takes words as well: 'abc' is a search
        r = cli(*argv)
        assert r.code == 2 and r.err.count("\n") == 1, (argv, r)
        assert f"'{aid}': an analysis id is a whole number" in r.err, (argv, r.err)


def test_id_zero_and_ids_in_range_but_absent(campaign, cli):
    latest = _blocktest(cli)
    for aid in ("0", "2147483647"):
        r = cli("recheck", aid)
        assert r.code == 2 and f"no analysis {aid}; the latest is {latest}" in r.err, r


def test_retraction_ids_beyond_any_warehouse_are_one_line(campaign, cli):
    r = cli("retract", "--undo", "99999999999999999999999")
    assert r.code == 2 and r.err.count("\n") == 1 and "no retraction 99999999999999999999999" in r.err, r
