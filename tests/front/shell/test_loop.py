"""The Shell and its loop (warehouse/front/shell/loop.py), driven in-process through
prompt_toolkit's pipe input: the same numbers as the command line, the session's state from line
to line, one-line mistakes, leaving, history, and the `shell` command.
"""
from __future__ import annotations

import io
import subprocess
import sys

import pytest
from prompt_toolkit.input import create_pipe_input
from prompt_toolkit.output import DummyOutput

from warehouse.commands.registry import Command
from warehouse.commands.session import Session
from warehouse.front.shell.loop import Shell, run_shell

from .kit import REGISTRY, documents, drive, shell_on, without_ids

# --- the same numbers as the command line --------------------------------------------------------

def test_scripted_session_matches_the_command_line(loaded, cli):
    text, sh = drive(loaded, [
        "focus family=fam-a,fam-b version>=1.4",
        "metric pallets",
        "peek --json",
        "blocktest --json",
        "versus stacker@1.4 --json",
    ])
    assert sh.failures == 0, text
    peek, blocktest, versus = documents(text)
    sl = ["--slice", "family=fam-a,fam-b version>=1.4", "--metric", "pallets"]
    assert peek == cli("peek", *sl, "--json").json()
    cli_bt = cli("blocktest", *sl, "--json").json()
    assert blocktest["anova"] == cli_bt["anova"]
    assert without_ids(blocktest) == without_ids(cli_bt)
    assert blocktest["treatments"] == 3 and blocktest["blocks"] == 6
    cli_vs = cli("versus", "stacker@1.4", *sl, "--json").json()
    assert without_ids(versus) == without_ids(cli_vs)
    assert {r["treatment"] for r in versus["comparisons"]} == {"stacker@1.5", "packer@2.0"}


def test_collapse_settings_carry_into_the_analysis(loaded, cli):
    text, sh = drive(loaded, ["collapse --replicates median --failures penalize:10", "collapse",
                              "blocktest --metric pallets --json"])
    assert sh.failures == 0, text
    assert "replicates  median" in text and "failures    penalize:10" in text
    (doc,) = documents(text)
    want = cli("blocktest", "--metric", "pallets", "--replicates", "median", "--failures", "penalize:10", "--json").json()
    plain = cli("blocktest", "--metric", "pallets", "--json").json()
    assert doc["anova"] == want["anova"]
    assert doc["anova"] != plain["anova"]  # the settings made a difference on these data


def test_keep_and_recall_after_an_analysis(loaded, cli):
    for name in ("keep", "recall"):
        if name not in REGISTRY:
            pytest.skip(f"{name} is not registered yet")
    text, sh = drive(loaded, ["metric pallets", "versus stacker@1.4 --json",
                              'keep "1.5 needs fewer pallets than 1.4" --tag shell --json', "recall --tag shell --json"])
    assert sh.failures == 0, text
    versus, kept, recalled = documents(text)
    assert kept["analysis_id"] == versus["analysis_id"]
    assert recalled == cli("recall", "--tag", "shell", "--json").json()
    assert any(m.get("analysis_id", m.get("id")) == versus["analysis_id"] for m in recalled["matches"])


# --- session state -------------------------------------------------------------------------------

def test_focus_shows_sets_and_clears(loaded):
    text, sh = drive(loaded, ["focus", "focus solver=stacker family=fam-a", "focus", "focus --clear"])
    assert sh.failures == 0, text
    blocks = text.split("focus  ")[1:]
    assert blocks[0].startswith("everything") and "3 treatments x 6 blocks, 72 runs" in blocks[0]
    assert blocks[1].startswith("solver=stacker family=fam-a") and "2 treatments x 3 blocks, 24 runs" in blocks[1]
    assert blocks[2].startswith("solver=stacker family=fam-a")
    assert blocks[3].startswith("everything")
    assert sh.session.focus == ""


def test_a_bad_slice_keeps_the_old_focus(loaded):
    text, sh = drive(loaded, ["focus family=fam-b", "focus vesion>=1.5", "focus family=fam-z", "focus"])
    assert "blockyard: slice term 1 'vesion>=1.5': unknown key 'vesion' (did you mean 'version'?)" in text
    assert "no family 'fam-z'" in text
    assert sh.failures == 2
    assert text.rstrip().splitlines()[-2] == "focus  family=fam-b"
    assert sh.session.focus == "family=fam-b"


def test_metric_is_checked_against_the_warehouse(loaded):
    text, sh = drive(loaded, ["metric palets", "metric", "metric fill_pct", "metric"])
    assert "blockyard: no metric 'palets' in this warehouse (did you mean 'pallets'?)" in text
    assert "known   fill_pct (max, %), pallets (min, pallets)" in text
    assert "metric  fill_pct (higher is better, %)" in text
    assert sh.failures == 1 and sh.session.metric == "fill_pct"


def test_bad_collapse_values_change_nothing(loaded):
    text, sh = drive(loaded, ["collapse --failures penalize:lots", "collapse --holes maybe", "collapse"])
    assert "blockyard: --failures penalize:lots: the factor must be a number" in text
    assert "blockyard: --holes maybe: choose drop or keep" in text
    assert sh.failures == 2
    assert sh.session.collapse.failures == "drop" and sh.session.collapse.holes == "drop"


def test_toolbar_shows_warehouse_focus_and_metric(loaded):
    sh = shell_on(loaded)
    bar = sh.toolbar_text()
    assert "focus everything (3 treatments x 6 blocks, 72 runs)" in bar
    assert "metric not set" in bar
    sh.execute("focus version=1.5 host=rack-a")
    sh.execute("metric pallets")
    bar = sh.toolbar_text()
    assert "focus version=1.5 host=rack-a (1 treatment x 6 blocks, 24 runs)" in bar
    assert "metric pallets" in bar
    if "://" not in loaded:
        assert "warehouse test.db" in bar
    sh.session.close()


def test_the_start_up_count_runs_in_the_background(loaded):
    sh = Shell(Session(location=loaded), out=io.StringIO())
    sh.start(background=True)
    assert sh._thread is not None and sh._thread.name == "blockyard-focus-count"
    sh.stop()  # waits for the count
    assert sh.summary == "3 treatments x 6 blocks, 72 runs"
    sh.session.close()


# --- mistakes keep the shell alive ---------------------------------------------------------------

def test_mistakes_print_one_line_and_the_shell_stays(loaded):
    text, sh = drive(loaded, [
        "peak",
        "blocktest --bogus",
        "plan --power lots",
        "versus",
        "peek --slice 'family=fam-a",
        "peek -w other.db",
        "solver=stacker",
        "peek --slice family=fam-a --json",
    ])
    probe = Session(location=loaded)
    shown = probe.warehouse().display
    probe.close()
    errors = [line.replace(shown, "WH") for line in text.splitlines() if line.startswith("blockyard: ")]
    assert errors == [
        "blockyard: unknown command 'peak' (did you mean 'peek'?); help lists the commands",
        "blockyard: blocktest: --bogus: no such option (help blocktest shows its arguments)",
        "blockyard: plan: argument --power: invalid float value: 'lots' (help plan shows its arguments)",
        "blockyard: versus: the following arguments are required: BASELINE (help versus shows its arguments)",
        "blockyard: no closing quotation: close the quote and try again",
        "blockyard: peek: inside the shell the warehouse is WH; leave out -w (start another shell for another warehouse)",
        "blockyard: unknown command 'solver=stacker' (to work on a slice, write: focus solver=stacker); help lists the commands",
    ]
    assert sh.failures == 7
    (peek,) = documents(text)  # the last line still ran
    assert peek["blocks"] == ["fam-a/g1", "fam-a/g2", "fam-a/g3"]


def test_help_lists_every_registered_command_and_shows_one(loaded, monkeypatch):
    def stall(session, a):
        raise KeyboardInterrupt

    table = dict(REGISTRY, stall=Command("stall", "a command that is interrupted", "blockyard stall",
                                         lambda p: None, stall))
    text, sh = drive(loaded, ["help", "help versus", "help focus", "peek --help", "stall", "focus family=fam-a"],
                     table=table)
    listing = text.split("help COMMAND")[0]
    for name in [*table, "focus", "collapse", "metric", "exit", "quit"]:
        if name != "shell":
            assert f"\n  {name} " in listing, name
    assert "usage: versus" in text and "BASELINE" in text and "example: versus stacker@1.4" in text
    assert "usage: focus" in text and "--clear" in text
    assert "usage: peek" in text
    # Ctrl-C during a command: one line, and the next command runs
    assert "blockyard: interrupted; nothing half-written was kept, and the shell is still here" in text
    assert sh.session.focus == "family=fam-a"
    assert sh.failures == 1


# --- leaving, interrupting, history --------------------------------------------------------------

@pytest.mark.parametrize("word", ["exit", "quit"])
def test_exit_and_quit_leave(loaded, word):
    text, sh = drive(loaded, ["focus family=fam-a", word, "focus family=fam-b"])
    assert sh.session.focus == "family=fam-a"
    assert "family=fam-b" not in text


def test_end_of_input_leaves(loaded):
    text, sh = drive(loaded, ["focus family=fam-b"], close=True)
    assert sh.session.focus == "family=fam-b" and sh.failures == 0


def test_ctrl_c_abandons_the_line(loaded):
    out = io.StringIO()
    session = Session(location=loaded)
    with create_pipe_input() as inp:
        inp.send_text("focus famly=oops\x03focus family=fam-a\nexit\n")
        sh = run_shell(session, input=inp, output=DummyOutput(), out=out)
    session.close()
    assert sh.failures == 0 and sh.session.focus == "family=fam-a"
    assert "famly" not in out.getvalue()


def test_history_is_kept_where_asked(loaded, tmp_path):
    drive(loaded, ["focus family=fam-a", "metric pallets"])
    hist = (tmp_path / "history" / "shell-history").read_text()
    assert "+focus family=fam-a" in hist and "+metric pallets" in hist


# --- the command and its start-up ----------------------------------------------------------------

def test_blockyard_shell_reads_piped_lines(loaded, cli, monkeypatch, capsys):
    monkeypatch.setattr(sys, "stdin", io.StringIO("focus family=fam-b\npeek --metric pallets --json\nexit\n"))
    r = cli("shell", loaded)
    captured = capsys.readouterr()
    assert r.code == 0, captured
    (doc,) = documents("\n" + captured.out)
    assert doc["slice"] == "family=fam-b" and doc["metric"] == "pallets"
    monkeypatch.setattr(sys, "stdin", io.StringIO("peek --bogus\n"))
    assert cli("shell", loaded).code == 2
    assert "--bogus: no such option" in capsys.readouterr().err


def test_start_up_and_completion_import_no_analysis_libraries(loaded):
    code = (
        "import sys, io\n"
        "from warehouse.front.cli import build_parser\n"
        "build_parser()\n"
        "from warehouse.front.shell.loop import Shell\n"
        "from warehouse.commands.session import Session\n"
        f"sh = Shell(Session({loaded!r}), out=io.StringIO()); sh.start(background=False)\n"
        "from prompt_toolkit.document import Document\n"
        "list(sh.completer.get_completions(Document('focus solver=st'), None))\n"
        "sh.execute('focus family=fam-a'); sh.execute('metric pallets'); sh.execute('help')\n"
        "sh.highlight('focus family=fam-a')\n"
        "print(sorted(m for m in ('pandas', 'scipy', 'statsmodels', 'matplotlib') if m in sys.modules))\n"
    )
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == "[]"
