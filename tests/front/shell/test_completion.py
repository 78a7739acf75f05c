"""Completion and highlighting (warehouse/front/shell/completion.py and toolkit.py): values from the
warehouse's snapshot, commands, options and metrics, the cache until a load, slice term colours.
"""
from __future__ import annotations

from prompt_toolkit.document import Document

from .kit import REGISTRY, completions, shell_on, write_campaign


def test_completion_offers_warehouse_values(loaded):
    sh = shell_on(loaded)
    assert completions(sh, "focus solver=st") == ["stacker"]
    assert completions(sh, "focus solver=") == ["packer", "stacker"]
    assert completions(sh, "focus solver=stacker,") == ["packer"]
    assert completions(sh, "peek --slice version>=") == ["1.4", "1.5", "2.0"]
    assert completions(sh, 'blocktest --slice "solver=stacker version>=1.') == ["1.4", "1.5"]
    assert completions(sh, "focus family=") == ["fam-a", "fam-b"]
    assert completions(sh, "focus solver=stacker family=fam-") == ["fam-a", "fam-b"]
    assert completions(sh, "focus host=") == ["rack-a"]
    assert completions(sh, "focus campaign=") == ["autumn"]
    assert "fam-a/g2" in completions(sh, "focus group=fam-a")
    assert completions(sh, "focus fam") == ["family="]
    assert "version>=" in completions(sh, "focus version")
    assert completions(sh, "focus stacker@") == ["stacker@1.4", "stacker@1.5"]
    sh.session.close()


def test_completion_of_commands_options_and_metrics(loaded):
    sh = shell_on(loaded)
    assert completions(sh, "pe") == ["peek"]
    assert set(completions(sh, "")) >= {"focus", "collapse", "metric", "help", "exit", "peek", "blocktest", "versus"}
    assert "shell" not in completions(sh, "sh")
    assert completions(sh, "blocktest --me") == ["--metric"]
    assert completions(sh, "blocktest --metric ") == ["fill_pct", "pallets"]
    assert completions(sh, "blocktest --metric=pa") == ["pallets"]
    assert completions(sh, "metric p") == ["pallets"]
    assert completions(sh, "blocktest --transform l") == ["log"]
    assert completions(sh, "collapse --failures p") == ["penalize:10"]
    assert completions(sh, "versus ") == ["packer@2.0", "stacker@1.4", "stacker@1.5"]
    assert completions(sh, "versus stacker@1.4 --metric pallets --slice fam") == ["family="]
    assert completions(sh, "help ver") == ["versus", "verify"]
    assert completions(sh, "inventory so") == ["solvers"]
    if "recall" in REGISTRY:
        assert completions(sh, "recall --solver pa") == ["packer", "packer@2.0"]
    sh.session.close()


def test_completion_answers_from_the_cache_until_a_load(loaded, cli, tmp_path):
    sh = shell_on(loaded)
    snapshots = sh.snapshots
    extra = write_campaign(tmp_path / "more.csv", [("tetra", "0.9", 0.3)], host="rack-b")
    # loaded behind the shell's back: the cache does not rescan on every keystroke
    assert cli("load", str(extra), "--campaign", "winter").code == 0
    assert completions(sh, "focus solver=") == ["packer", "stacker"]
    assert sh.snapshots == snapshots
    # a load inside the shell rebuilds it
    other = write_campaign(tmp_path / "more2.csv", [("layerup", "3.1", 0.1)], host="rack-c")
    assert sh.execute(f"load {other} --campaign winter")
    assert sh.failures == 0, sh.out.getvalue()
    assert sh.snapshots == snapshots + 1
    assert completions(sh, "focus solver=") == ["layerup", "packer", "stacker", "tetra"]
    assert completions(sh, "focus host=rack-") == ["rack-a", "rack-b", "rack-c"]
    assert "5 treatments x 6 blocks, 120 runs" in sh.toolbar_text()
    sh.session.close()


def test_slice_terms_are_highlighted(loaded):
    sh = shell_on(loaded)
    frags = sh.lexer.lex_document(Document("focus solver=stacker,packer vesion>=1.5 stacker@1.4"))(0)
    assert ("class:command", "focus") in frags
    assert [f for f in frags if f[0] in ("class:key", "class:op", "class:value")][:5] == [
        ("class:key", "solver"), ("class:op", "="), ("class:value", "stacker"), ("class:value", "packer"),
        ("class:op", ">=")]
    assert ("class:badkey", "vesion") in frags
    assert ("class:treatment", "stacker@1.4") in frags
    assert "".join(t for _, t in frags) == "focus solver=stacker,packer vesion>=1.5 stacker@1.4"
    frags = sh.highlight('peek --slice "family=fam-a host!=rack-b" --json')
    assert ("class:option", "--slice") in frags and ("class:option", "--json") in frags
    assert ("class:key", "host") in frags and ("class:op", "!=") in frags and ("class:value", "rack-b") in frags
    assert sh.highlight("peak")[0] == ("class:unknown", "peak")
    sh.session.close()
