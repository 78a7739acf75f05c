"""The command line: `blockyard COMMAND [options]`, a thin layer over warehouse.commands.

Its table is the catalog's commands plus the front ends' own: the shell and the resident."""
from __future__ import annotations

import argparse
import os
import sys


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("-w", "--warehouse", metavar="PATH_OR_URL", default=argparse.SUPPRESS,
                   help="warehouse file or postgresql:// URL (default: $BLOCKYARD_WAREHOUSE, else ./blockyard.db)")


class ArgumentMistake(Exception):
    """An argument the parser refused; the message is already one line."""


class _Parser(argparse.ArgumentParser):
    """argparse, but a mistake is one line naming the command and pointing at its help."""

    def error(self, message: str):
        import re

        _, _, cmd = self.prog.partition(" ")
        bad = re.match(r"argument COMMAND: invalid choice: '([^']*)'", message)
        if bad:
            from difflib import get_close_matches

            near = get_close_matches(bad.group(1), list(commands()), n=3)
            hint = f" (did you mean {' or '.join(near)}?)" if near else ""
            raise ArgumentMistake(f"blockyard: unknown command '{bad.group(1)}'{hint}; blockyard --help lists them")
        where = f"{cmd}: " if cmd else ""
        raise ArgumentMistake(f"blockyard: {where}{message} (see {self.prog} --help)")

    def parse_args(self, args=None, namespace=None):
        # argparse's own "unrecognized arguments" names neither the command nor the option meant
        a, extras = self.parse_known_args(args, namespace)
        if extras:
            from ..commands.registry import unknown_words

            command = getattr(a, "command", None)
            parser = self._command_parser(command) or self
            where = f"{command}: " if command else ""
            raise ArgumentMistake(f"blockyard: {where}{unknown_words(parser, extras)} (see {parser.prog} --help)")
        return a

    def _command_parser(self, name):
        for action in self._actions:
            if isinstance(action, argparse._SubParsersAction) and name in action.choices:
                return action.choices[name]
        return None


def commands() -> dict:
    """The command line's table: every command, by name, in the order help lists them."""
    from ..commands.catalog import commands as catalog
    from ..commands.registry import args, command
    from ..demo.walk import cmd_demo
    from .shell.loop import cmd_shell

    # declared here rather than at the top: this module is imported before any library, so that a
    # command handed to a resident process never waits for them
    resident = command("resident", "keep one warm Blockyard process that runs the analysis commands without "
                       "start-up time", "blockyard resident start --idle 60", needs_warehouse=False)(
        args(_resident_args)(_resident))
    return catalog(cmd_demo, cmd_shell, resident)


def build_parser(table: dict | None = None):
    from ..version import __version__

    parser = _Parser(
        prog="blockyard",
        description="Blockyard: a results warehouse and blocked-analysis shell for solver benchmarks.",
        epilog="Run 'blockyard COMMAND --help' for a command's options; 'blockyard demo' builds a demo warehouse.",
    )
    parser.add_argument("--version", action="version", version=f"blockyard {__version__}")
    _common(parser)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for cmd in (table or commands()).values():
        p = sub.add_parser(cmd.name, help=cmd.summary, description=f"{cmd.summary}.",
                           epilog=f"example: {cmd.example}")
        _common(p)
        cmd.configure(p)
    return parser


def run(argv: list[str] | None = None, out=None, err=None) -> int:
    from ..commands.session import Session
    from ..errors import BlockyardError
    from ..present.text import json_document

    out = out or sys.stdout
    err = err or sys.stderr
    table = commands()
    parser = build_parser(table)
    try:
        a = parser.parse_args(argv)
    except ArgumentMistake as exc:
        err.write(f"{exc}\n")
        return 2
    except SystemExit as exc:  # --help and --version print and leave with 0
        return int(exc.code or 0) if exc.code in (0, None) else 2
    if not a.command:
        parser.print_help(out)
        return 0
    session = Session(location=getattr(a, "warehouse", None), commands=table)
    cmd = table[a.command]
    try:
        from ..commands.yard import Yard

        result = Yard(session=session).call(cmd, a)  # the one way a command runs (a notebook's too)
        if getattr(a, "json", False):
            out.write(json_document(result) + "\n")
        else:
            text = result.render()
            if text:
                out.write(text + "\n")
        status = getattr(result, "exit_status", 0)
        if status and not getattr(a, "json", False):
            for line in getattr(result, "errors", lambda: [])():
                err.write(f"blockyard: {_one_line(line)}\n")
        return status
    except BlockyardError as exc:
        err.write(f"blockyard: {_one_line(str(exc))}\n")
        return exc.exit_status
    except KeyboardInterrupt:
        err.write("blockyard: interrupted; nothing half-written was kept\n")
        return 130
    except Exception as exc:  # a defect of ours, not the user's: say so, keep the traceback on request
        if isinstance(exc, BrokenPipeError):  # output piped into head: main() leaves quietly
            raise
        from ..store.connect import database_trouble, shown

        trouble = database_trouble(exc, shown(session.where), session.read_only)
        if trouble is not None:
            err.write(f"blockyard: {_one_line(str(trouble))}\n")
            return trouble.exit_status
        if os.environ.get("BLOCKYARD_DEBUG"):
            raise
        err.write(f"blockyard: internal error ({type(exc).__name__}: {exc}); "
                  "rerun with BLOCKYARD_DEBUG=1 for the traceback and report it\n")
        return 1
    finally:
        session.close()


def _one_line(message: str) -> str:
    """A message stays one line whatever text of the user's it quotes (a file name with a newline)."""
    from ..select.slices import brief

    return brief(message, None)


def main() -> None:
    import time

    started = time.perf_counter()
    try:
        from .handoff import forward, suggestion

        code = forward(sys.argv[1:])  # a resident process runs it when one is up (blockyard resident)
        if code is None:
            if "load" in sys.argv[1:]:  # (any other command would only pay for importing it)
                # typing before the helper thread starts: were the thread first to import it, a
                # dataclass made meanwhile here would find it half made (dataclasses looks it up
                # in sys.modules). The other commands never import it at start-up at all.
                import typing  # noqa: F401

                from ..ingest.early import start_early

                start_early(sys.argv[1:])  # load: hash the files while the libraries are imported
            code = run()
            hint = suggestion(sys.argv[1:], time.perf_counter() - started, sys.stderr.isatty() and sys.stdout.isatty())
            if hint:
                sys.stderr.write(hint + "\n")
    except BrokenPipeError:  # output piped into head: not an error
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        code = 0
    _leave(code or 0)


def _leave(code: int) -> None:
    """End the process without taking the interpreter apart. Everything a command stores is
    committed and its connections closed before `run` returns; what is left is freeing every
    module and array one by one, a twentieth of a large load's time (measured in pairs). The
    output is flushed first; a reader that went away (head) is not an error."""
    try:
        sys.stdout.flush()
        sys.stderr.flush()
    except BrokenPipeError:
        pass
    os._exit(code)



# --- the `resident` command ---------------------------------------------------------------------

def _resident_args(p):
    from ..commands.registry import add_json
    from .handoff import DEFAULT_IDLE_MINUTES, FORWARDED

    p.add_argument("action", choices=["start", "stop", "status", "serve"],
                   help="start one in the background, stop it, say whether one runs, or serve in the foreground")
    p.add_argument("--idle", type=float, default=DEFAULT_IDLE_MINUTES, metavar="MINUTES",
                   help=f"stop after this many minutes without a command (default {DEFAULT_IDLE_MINUTES:g})")
    p.epilog = ("While a resident runs, blockyard hands it these commands and prints what it sends back: "
                f"{', '.join(sorted(FORWARDED))}. BLOCKYARD_RESIDENT=off keeps a command out of it. "
                "example: blockyard resident start --idle 60")
    add_json(p)


def _resident(session, a):
    import time

    from ..commands.registry import Done
    from ..errors import InputError, StorageError
    from . import handoff, resident

    if not 0 < a.idle < float("inf"):  # (NaN fails the comparison too)
        raise InputError(f"--idle {a.idle:g}: give a number of minutes above 0, e.g. 30")
    if a.action == "serve":
        code = resident.serve(run, a.idle)
        return Done("", {"stopped": True}, exit_status=code)
    if a.action == "start":
        try:
            doc = handoff.start(a.idle)
        except OSError as exc:
            raise StorageError(f"cannot start a resident process: {exc}") from None
        if doc.get("started"):
            text = (f"resident started (process {doc['pid']}, stops after {doc['idle_minutes']:g} idle minutes); "
                    "blockyard now hands it the analysis commands; stop it with: blockyard resident stop")
        else:
            text = f"a resident is running already (process {doc['pid']}, {_served(doc['served'])})"
        return Done(text, doc)
    if a.action == "stop":
        stopped = handoff.stop()
        return Done("resident stopped" if stopped else "no resident was running", {"stopped": stopped})
    doc = handoff.status()
    if doc.get("running"):
        since = time.strftime("%Y-%m-%d %H:%M", time.gmtime(doc["since"]))
        text = (f"resident running: process {doc['pid']} since {since} UTC, {_served(doc['served'])}, "
                f"stops after {doc['idle_minutes']:g} idle minutes; socket {doc['socket']}")
    else:
        text = "no resident running; start one with: blockyard resident start"
    return Done(text, doc)


def _served(n: int) -> str:
    return f"{n} {'command' if n == 1 else 'commands'} served"


if __name__ == "__main__":
    main()
