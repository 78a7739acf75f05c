"""The command line: `blockyard COMMAND [options]`, a thin layer over warehouse.commands."""
from __future__ import annotations

import argparse
import json
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

            from .commands import REGISTRY

            near = get_close_matches(bad.group(1), list(REGISTRY), n=3)
            hint = f" (did you mean {' or '.join(near)}?)" if near else ""
            raise ArgumentMistake(f"blockyard: unknown command '{bad.group(1)}'{hint}; blockyard --help lists them")
        where = f"{cmd}: " if cmd else ""
        raise ArgumentMistake(f"blockyard: {where}{message} (see {self.prog} --help)")

    def parse_args(self, args=None, namespace=None):
        # argparse's own "unrecognized arguments" names neither the command nor the option meant
        a, extras = self.parse_known_args(args, namespace)
        if extras:
            from .commands import unknown_words

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


def build_parser():
    from . import __version__
    from .commands import REGISTRY
    from . import commands_all  # noqa: F401  (registers the analysis, ledger and shell commands)

    parser = _Parser(
        prog="blockyard",
        description="Blockyard: a results warehouse and blocked-analysis shell for solver benchmarks.",
        epilog="Run 'blockyard COMMAND --help' for a command's options; 'blockyard demo' builds a demo warehouse.",
    )
    parser.add_argument("--version", action="version", version=f"blockyard {__version__}")
    _common(parser)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for cmd in REGISTRY.values():
        p = sub.add_parser(cmd.name, help=cmd.summary, description=f"{cmd.summary}.",
                           epilog=f"example: {cmd.example}")
        _common(p)
        cmd.configure(p)
    return parser


def run(argv: list[str] | None = None, out=None, err=None) -> int:
    from .commands import REGISTRY
    from .errors import BlockyardError
    from .session import Session

    out = out or sys.stdout
    err = err or sys.stderr
    parser = build_parser()
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
    session = Session(location=getattr(a, "warehouse", None))
    cmd = REGISTRY[a.command]
    try:
        result = cmd.run(session, a)
        if getattr(a, "json", False):
            out.write(json.dumps(result.to_dict(), indent=2, default=_json_default) + "\n")
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
        from .store.connect import database_trouble, shown

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
    from .select.slices import brief

    return brief(message, None)


def _json_default(o):
    import math

    try:
        import numpy as np

        if isinstance(o, np.integer):
            return int(o)
        if isinstance(o, np.floating):
            v = float(o)
            return None if math.isnan(v) or math.isinf(v) else v
        if isinstance(o, np.ndarray):
            return o.tolist()
    except ImportError:  # pragma: no cover
        pass
    return str(o)


def main() -> None:
    try:
        from .resident import forward

        code = forward(sys.argv[1:])  # a resident process runs it when one is up (blockyard resident)
        if code is None:
            from .ingest.scan import start_early

            start_early(sys.argv[1:])  # load: hash the files while the libraries are imported
            code = run()
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


if __name__ == "__main__":
    main()
