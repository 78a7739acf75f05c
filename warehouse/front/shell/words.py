"""The shell's own vocabulary: the prompt, the words that exist only in the shell (focus, collapse,
metric, help, exit, quit) with their help texts and parsers, the values completion offers for the
collapse options, the palette, where history is kept, and the parser whose errors are one line.

Nothing here touches a warehouse or a terminal; the rest of the shell reads its words from here.
"""
from __future__ import annotations

import argparse
import os
import re
import sys
from pathlib import Path

from ...errors import InputError

PROMPT = "blockyard> "
HISTORY_ENV = "BLOCKYARD_HISTORY"
LEAVE = ("exit", "quit")
# the shell's own words, in the order help lists them
SHELL_WORDS = {
    "focus": "set the slice every command works on; bare focus shows it, focus --clear clears it",
    "collapse": "show or set how runs become one value per treatment and block",
    "metric": "set the metric commands analyse; bare metric shows it and lists the known ones",
    "help": "list the commands, or show one command's arguments and example",
    "exit": "leave the shell (so do quit and Ctrl-D)",
    "quit": "leave the shell (so do exit and Ctrl-D)",
}
# the shell words that take arguments (and so have a parser of their own), with their help's example
WORD_EXAMPLES = {
    "focus": "focus solver=stacker version>=1.5 family=mixed-sku",
    "collapse": "collapse --replicates median --failures penalize:10",
    "metric": "metric pallets",
    "help": "help versus",
}
WORDS_WITH_ARGUMENTS = tuple(WORD_EXAMPLES)
NOT_IN_SHELL = ("shell",)
# commands after which the warehouse's names and counts may have changed
REFRESH_AFTER = ("load", "retract", "init", "upgrade")
COLLAPSE_VALUES = {
    "--replicates": ["mean", "median", "trimmed:0.1"],
    "--instances": ["mean", "median"],
    "--failures": ["drop", "penalize:10", "worst"],
    "--holes": ["drop", "keep"],
}
SLICE_KEYS_EXTRA = ("treatment",)  # value lists kept besides the slice keys
# one slice term, KEY OP VALUES: completion, highlighting and the unknown-word hint all read it
SLICE_TERM = re.compile(r"([A-Za-z_][A-Za-z0-9_]*)(!=|<=|>=|=|<|>|~)(.*)$", re.S)

# our own plain palette: keys, operators and values of slice terms, options, the toolbar
PALETTE = {
    "command": "bold",
    "unknown": "#af5f5f",
    "option": "#5f87af",
    "key": "#00875f",
    "op": "bold #af8700",
    "value": "#5f5faf",
    "treatment": "#875f87",
    "punct": "#8a8a8a",
    "badkey": "underline #d70000",
    "bottom-toolbar": "noreverse bg:#303030 #c6c6c6",
    "bar-label": "bg:#303030 #8a8a8a",
    "bar-value": "bg:#303030 #eeeeee",
}


class ShellArgError(InputError):
    """An argument the shell's parser refused (argparse would have exited)."""


class HelpShown(Exception):
    """--help was asked for and printed; nothing else to do."""


class ShellParser(argparse.ArgumentParser):
    """argparse that raises instead of exiting and prints help to the shell's stream."""

    def __init__(self, *a, out=None, **kw):
        kw["add_help"] = False
        super().__init__(*a, **kw)
        self.out = out
        self.add_argument("-h", "--help", action="help", help="show these arguments")

    def error(self, message):
        raise ShellArgError(f"{self.prog}: {message} (help {self.prog} shows its arguments)")

    def parse_args(self, args=None, namespace=None):
        a, extras = self.parse_known_args(args, namespace)
        if extras:  # a mistyped option gets the nearest real one, as on the command line
            from ...commands.registry import unknown_words

            self.error(unknown_words(self, extras))
        return a

    def exit(self, status=0, message=None):
        if message:
            (self.out or sys.stdout).write(message)
        raise HelpShown()

    def print_help(self, file=None):
        (file or self.out or sys.stdout).write(self.format_help())

    def print_usage(self, file=None):
        (file or self.out or sys.stdout).write(self.format_usage())


def word_parser(name: str, out) -> ShellParser:
    """The parser of one of WORDS_WITH_ARGUMENTS, printing its help to `out`."""
    p = ShellParser(prog=name, out=out, description=SHELL_WORDS[name] + ".", epilog=f"example: {WORD_EXAMPLES[name]}")
    if name == "focus":
        p.add_argument("slice", nargs="*", metavar="SLICE", help="slice terms, e.g. family=fragile-top host!=rack-b")
        p.add_argument("--clear", action="store_true", help="clear the focus (everything)")
    elif name == "collapse":
        from ...commands.analyse import add_collapse

        add_collapse(p)
        p.add_argument("--reset", action="store_true", help="back to the defaults (mean, mean, drop, drop)")
    elif name == "metric":
        p.add_argument("name", nargs="?", metavar="NAME", help="a metric of this warehouse")
        p.add_argument("--clear", action="store_true", help="no current metric")
    else:
        p.add_argument("command", nargs="?", metavar="COMMAND")
    return p


def history_path() -> Path:
    """$BLOCKYARD_HISTORY, else $XDG_DATA_HOME/blockyard/history, else ~/.local/share/blockyard/history."""
    env = os.environ.get(HISTORY_ENV)
    if env:
        return Path(env).expanduser()
    base = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return Path(base).expanduser() / "blockyard" / "history"


def shell_example(example: str) -> str:
    """A command-line example as typed in the shell: no 'blockyard', no -w."""
    text = re.sub(r"^\s*blockyard\s+", "", example)
    return re.sub(r"\s(-w|--warehouse)(\s+|=)\S+", "", text)


def sense_words(sense: str) -> str:
    return "higher is better" if sense == "max" else "lower is better"
