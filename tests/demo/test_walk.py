"""`blockyard demo`: the invented campaign is generated, loaded and walked end to end, and every
step it shows runs (the README's first command depends on it)."""
from __future__ import annotations

import io
import json

from warehouse.front.cli import run


def test_the_demo_walks_every_step_and_keeps_its_analyses(tmp_path):
    out, err = io.StringIO(), io.StringIO()
    code = run(["demo", str(tmp_path / "yard")], out=out, err=err)
    assert code == 0, err.getvalue()
    text = out.getvalue()
    for step in ("$ blockyard load", "$ blockyard inventory", "$ blockyard peek", "$ blockyard blocktest",
                 "$ blockyard versus", "$ blockyard guard", "$ blockyard noise",
                 "$ blockyard plan --noise", "$ blockyard keep", "$ blockyard recall", "$ blockyard retract",
                 "$ blockyard recheck", "$ blockyard export"):
        assert step in text, step
    assert (tmp_path / "yard" / "report.html").stat().st_size > 0
    out = io.StringIO()
    assert run(["-w", str(tmp_path / "yard" / "demo.db"), "recall", "--json"], out=out, err=io.StringIO()) == 0
    assert json.loads(out.getvalue())["matches"]
