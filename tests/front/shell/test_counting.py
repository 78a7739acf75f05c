"""The focus count (warehouse/front/shell/counting.py): from the cell summaries and on the runs alike."""
from __future__ import annotations

from warehouse.front.shell.counting import count_cells, count_runs

from .kit import REGISTRY, shell_on


def test_the_focus_count_from_cell_summaries_equals_the_count_on_runs(loaded, cli):
    from warehouse.select.resolve import Dims, condition
    from warehouse.select.slices import parse

    sh = shell_on(loaded)
    slices = ["", "family=fam-b", "solver=stacker host=rack-a", "stacker@1.5 | packer@2.0 group=g2",
              "campaign=autumn instance=fam-a-g1-1"]

    def both():
        with sh.session.warehouse().engine.connect() as conn:
            dims = Dims.load(conn)
            for text in slices:
                sl = parse(text)
                yield text, count_cells(conn, sl, dims), count_runs(conn, condition(sl, dims, conn))

    for text, cells, runs in both():
        assert cells == runs, text
    assert dict((t, r) for t, _, r in both())["family=fam-b"] == (3, 3, 36)
    if "retract" in REGISTRY:
        assert cli("retract", "--slice", "family=fam-b group=g1", "--reason", "bad batch").code == 0
        for text, cells, runs in both():
            assert cells == runs, text
        assert dict((t, r) for t, _, r in both())["family=fam-b"] == (3, 2, 24)
    # a term the cell summaries do not carry is counted on the runs
    with sh.session.warehouse().engine.connect() as conn:
        assert count_cells(conn, parse("status=ok"), Dims.load(conn)) is None
    sh.execute("focus status=timeout")
    assert sh.summary == "1 treatment x 1 block, 1 run"
    sh.session.close()
