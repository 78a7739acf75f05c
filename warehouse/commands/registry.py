"""How a command is declared: one function over a Session that the CLI, the shell and notebooks call.

A command's `run` returns a result object with `to_dict()` (the --json document) and `render()`
(the text a person reads). Arguments are declared once, for argparse; the shell reuses them.
"""
from __future__ import annotations

import argparse
from dataclasses import dataclass, field
from collections.abc import Callable

from .session import Session
from ..shown import Shown


@dataclass
class Command:
    name: str
    summary: str
    example: str
    configure: Callable[[argparse.ArgumentParser], None]
    run: Callable[[Session, argparse.Namespace], object]
    needs_warehouse: bool = True


def command(name: str, summary: str, example: str, needs_warehouse: bool = True):
    """Declare a command function: it carries its `Command` as `fn.command`. Nothing registers
    on import; `commands.catalog` lists the commands, and each front end builds its table."""
    def wrap(fn):
        fn.command = Command(name, summary, example, fn.configure, fn, needs_warehouse)
        return fn
    return wrap


def table(*functions) -> dict[str, Command]:
    """Commands by name, in the order given (the order help lists them)."""
    return {fn.command.name: fn.command for fn in functions}


def args(configure):
    """Attach an argument declaration to a command function."""
    def wrap(fn):
        fn.configure = configure
        return fn
    return wrap


@dataclass
class Done(Shown):
    """A plain result: a message and a JSON document."""

    text: str
    doc: dict = field(default_factory=dict)
    exit_status: int = 0

    def to_dict(self) -> dict:
        return self.doc

    def render(self) -> str:
        return self.text


def add_json(p: argparse.ArgumentParser) -> None:
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout instead of text")


def unknown_words(parser: argparse.ArgumentParser, extras: list[str]) -> str:
    """What a parser could not place, said in one line: the first mistyped option with the nearest
    real one ("--metirc: did you mean --metric?"). The CLI and the shell both say it this way."""
    from difflib import get_close_matches

    from ..select.slices import brief

    known = sorted({s for action in parser._actions for s in action.option_strings if s.startswith("--")})
    for word in extras:
        name = word.split("=", 1)[0]
        if not name.startswith("-") or _is_number(name):
            continue
        # the names are compared without their dashes, which would make every pair look alike
        bare = {k.lstrip("-"): k for k in known}
        near = [bare[k] for k in get_close_matches(name.lstrip("-"), list(bare), n=2)]
        if near:
            return f"{brief(name)}: did you mean {' or '.join(near)}?"
        return f"{brief(name)}: no such option"
    return f"unexpected {'argument' if len(extras) == 1 else 'arguments'}: {brief(' '.join(extras))}"


def _is_number(word: str) -> bool:
    try:
        float(word)
    except ValueError:
        return False
    return True
