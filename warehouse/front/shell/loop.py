"""The Shell and its loop: one Session carries the warehouse, the focus, the metric and the
collapse settings from line to line; run_shell puts a prompt in front of it, run_script feeds it a
file or pipe, and cmd_shell is the `shell` command that picks one of the two.

Every registered command takes the same arguments as on the command line (minus -w), and
--slice / --metric default to the focus and the metric. The shell's own words (words.py) are
focus, collapse, metric, help, exit and quit.

    from warehouse.commands.session import Session
    from warehouse.front.shell.loop import Shell, run_shell

    run_shell(Session("results.db"))                  # at a terminal
    sh = Shell(Session("results.db"), out=buffer)     # or line by line, e.g. from a notebook
    sh.start(); sh.execute("focus family=mixed-sku"); sh.execute("blocktest --metric pallets")

Start-up stays quick: prompt_toolkit is imported only when a prompt is built, the analysis
libraries only when a command needs them, and completion answers from one snapshot of the small
dimension tables (refreshed after load), never from a scan of runs. The focus summary in the
bottom toolbar is one counting query (counting.py), run when the focus changes (at start-up, in a
background thread so the first prompt does not wait for it).
"""
from __future__ import annotations

import difflib
import os
import re
import shlex
import sys
import threading
from pathlib import Path

from ...collapse.settings import Collapse
from ...commands.registry import Done, args, command
from ...commands.session import Session
from ...errors import BlockyardError, InputError
from .completion import Completing
from .counting import count_slice, in_words
from .words import (LEAVE, NOT_IN_SHELL, PALETTE, PROMPT, REFRESH_AFTER, SHELL_WORDS, SLICE_KEYS_EXTRA,
                    SLICE_TERM, WORDS_WITH_ARGUMENTS, HelpShown, ShellArgError, ShellParser, history_path,
                    sense_words, shell_example, word_parser)


class Shell(Completing):
    """The shell's state and behaviour, with no terminal attached (run_shell adds the prompt)."""

    def __init__(self, session: Session, out=None, err=None):
        if session.commands is None:  # no front end gave its table: the catalog's commands
            from ...commands.catalog import commands

            session.commands = commands(cmd_shell)
        self.session = session
        session.interactive = True
        self.out = out if out is not None else sys.stdout
        self.err = err if err is not None else (out if out is not None else sys.stderr)
        self.values: dict[str, list[str]] = {}  # slice key -> known values (the completion cache)
        self.metrics: dict[str, tuple[str, str]] = {}  # metric name -> (sense, unit)
        self.summary = ""  # the focus in a few words, for the toolbar
        self.failures = 0  # lines that ended in an error
        self.snapshots = 0  # how many times the completion cache was built
        self.warehouse_name = ""
        self._parsers: dict[str, tuple[object, ShellParser]] = {}
        self._generation = 0
        self._thread: threading.Thread | None = None
        self._lock = threading.Lock()
        self.app = None  # the prompt_toolkit application, when there is one

    # --- output -----------------------------------------------------------------------------

    def write(self, text: str) -> None:
        if text:
            self.out.write(text if text.endswith("\n") else text + "\n")
            if hasattr(self.out, "flush"):
                self.out.flush()

    def fail(self, message: str) -> None:
        self.failures += 1
        self.err.write(f"blockyard: {message}\n")
        if hasattr(self.err, "flush"):
            self.err.flush()

    # --- start, refresh, stop -----------------------------------------------------------------

    def start(self, background: bool = True, count: bool = True) -> None:
        """Open the warehouse, take the completion snapshot, count the focus (in a thread if background)."""
        self.warehouse_name = self._name()
        try:
            self.session.warehouse()
        except BlockyardError as exc:
            self.fail(str(exc))
            self.summary = "no warehouse open"
            return
        self.refresh()
        if count:
            self.summarize(background=background)

    def stop(self) -> None:
        t = self._thread
        if t is not None and t.is_alive():
            t.join(timeout=30)

    def shown(self) -> str:
        """The warehouse as a person may see it (a server's password hidden)."""
        wh = self.session._wh
        if wh is not None:
            return wh.display
        loc = self.session.where
        if "://" in loc:
            try:
                from sqlalchemy.engine import make_url

                return make_url(loc).render_as_string(hide_password=True)
            except Exception:
                return "a server"
        return loc

    def _name(self) -> str:
        loc = self.session.where
        if "://" in loc:
            try:
                from sqlalchemy.engine import make_url

                url = make_url(loc)
                return f"{url.host or 'localhost'}/{url.database or ''}"
            except Exception:
                return "server"
        return Path(loc).name

    def refresh(self, quiet: bool = True) -> None:
        """Rebuild the completion cache from the small dimension tables (after a load, say)."""
        from ...select.resolve import Dims
        from ...select.slices import KEYS

        try:
            wh = self.session.warehouse()
            with wh.engine.connect() as conn:
                dims = Dims.load(conn)
        except BlockyardError:
            self.values, self.metrics = {}, {}
            if quiet:
                return
            raise
        self.values = {k: dims.values(k) for k in (*KEYS, *SLICE_KEYS_EXTRA)}
        self.metrics = {name: (m[2], m[3]) for name, m in sorted(dims.metrics.items())}
        self.snapshots += 1
        self.warehouse_name = self._name()

    def summarize(self, background: bool = False) -> None:
        """Count the focus once (treatments x blocks, runs) for the toolbar."""
        with self._lock:
            self._generation += 1
            gen = self._generation
        text = self.session.focus

        def work():
            try:
                s = in_words(count_slice(self.session, text))
            except BlockyardError as exc:
                s = f"cannot count: {exc}"
            except Exception as exc:  # a lost connection must not kill the toolbar
                s = f"cannot count ({type(exc).__name__})"
            with self._lock:
                if gen == self._generation:
                    self.summary = s
            app = self.app
            if app is not None and getattr(app, "is_running", False):
                app.invalidate()

        if background:
            self.summary = "counting runs..."
            self._thread = threading.Thread(target=work, name="blockyard-focus-count", daemon=True)
            self._thread.start()
        else:
            work()

    # --- the toolbar --------------------------------------------------------------------------

    def toolbar_parts(self) -> list[tuple[str, str]]:
        focus = self.session.focus or "everything"
        if len(focus) > 40:
            focus = focus[:37] + "..."
        metric = self.session.metric or "not set"
        return [("class:bar-label", " warehouse "), ("class:bar-value", self.warehouse_name or "-"),
                ("class:bar-label", "   focus "), ("class:bar-value", focus),
                ("class:bar-label", f" ({self.summary})" if self.summary else ""),
                ("class:bar-label", "   metric "), ("class:bar-value", metric + " ")]

    def toolbar_text(self) -> str:
        return "".join(t for _, t in self.toolbar_parts()).strip()

    # --- commands -----------------------------------------------------------------------------

    def commands(self) -> dict:
        """The front end's commands usable in the shell."""
        return {n: c for n, c in self.session.commands.items() if n not in NOT_IN_SHELL and n not in SHELL_WORDS}

    def words(self) -> list[str]:
        return [*SHELL_WORDS, *self.commands()]

    def parser(self, name: str) -> ShellParser | None:
        """The argparse parser of a command or shell word, built once (-w is not among them)."""
        if name in WORDS_WITH_ARGUMENTS:
            key = name
        else:
            cmd = self.commands().get(name)
            if cmd is None:
                return None
            key = cmd
        hit = self._parsers.get(name)
        if hit is not None and hit[0] == key:
            return hit[1]
        p = self._build_parser(name)
        self._parsers[name] = (key, p)
        return p

    def _build_parser(self, name: str) -> ShellParser:
        if name in WORDS_WITH_ARGUMENTS:
            return word_parser(name, self.out)
        cmd = self.commands()[name]
        p = ShellParser(prog=name, out=self.out, description=f"{cmd.summary}.",
                        epilog=f"example: {shell_example(cmd.example)}")
        cmd.configure(p)
        return p

    def execute(self, line: str) -> bool:
        """Run one line. Returns False when the line asks to leave. Never raises for a user's mistake."""
        stripped = line.strip()
        if not stripped or stripped.startswith("#"):
            return True
        try:
            argv = shlex.split(stripped)
        except ValueError as exc:
            self.fail(f"{str(exc).lower()}: close the quote and try again")
            return True
        rest = re.sub(r"^\s*(blockyard\s+)?\S+\s*", "", stripped, count=1)
        if argv and argv[0] == "blockyard":
            argv = argv[1:]
            if not argv:
                return True
        word = argv[0]
        if word in LEAVE:
            return False
        try:
            if word == "help":
                self.help(argv[1:])
            elif word == "focus":
                self.focus(rest, argv[1:])
            elif word == "collapse":
                self.collapse(argv[1:])
            elif word == "metric":
                self.metric(argv[1:])
            elif word in self.commands():
                self.run_command(word, argv[1:])
            elif word in NOT_IN_SHELL:
                self.fail("this is the shell already; type help for its commands")
            else:
                self.unknown(word)
        except HelpShown:
            pass
        except KeyboardInterrupt:
            self.fail("interrupted; nothing half-written was kept, and the shell is still here")
        except BlockyardError as exc:
            self.fail(str(exc))
        except Exception as exc:  # a defect of ours: one line, and the shell stays
            from ...store.connect import database_trouble

            trouble = database_trouble(exc)
            if trouble is not None:
                self.fail(str(trouble))
                return True
            if os.environ.get("BLOCKYARD_DEBUG"):
                import traceback

                traceback.print_exc(file=self.err)
            self.fail(f"internal error ({type(exc).__name__}: {exc}); "
                      "rerun with BLOCKYARD_DEBUG=1 for the traceback and report it")
        return True

    def unknown(self, word: str) -> None:
        near = difflib.get_close_matches(word, self.words(), n=3, cutoff=0.6)
        hint = f" (did you mean {' or '.join(repr(n) for n in near)}?)" if near else ""
        if not near and (SLICE_TERM.match(word) or "@" in word):
            hint = f" (to work on a slice, write: focus {word})"
        self.fail(f"unknown command '{word}'{hint}; help lists the commands")

    def run_command(self, name: str, argv: list[str]) -> None:
        for a in argv:
            if a in ("-w", "--warehouse") or a.startswith("--warehouse="):
                raise InputError(f"{name}: inside the shell the warehouse is {self.shown()}; "
                                 "leave out -w (start another shell for another warehouse)")
        a = self.parser(name).parse_args(argv)
        cmd = self.commands()[name]
        try:
            from ...commands.yard import Yard

            result = Yard(session=self.session).call(cmd, a)
        finally:
            if name in REFRESH_AFTER:  # names and counts may have changed
                self.refresh()
                self.summarize()
        self.show(result, getattr(a, "json", False))

    def show(self, result, as_json: bool = False) -> None:
        from ...present.text import json_document

        if as_json:
            self.write(json_document(result))
        else:
            self.write(result.render())
        if getattr(result, "exit_status", 0):
            errors = [] if as_json else getattr(result, "errors", lambda: [])()
            for line in errors:
                self.fail(line)
            if not errors:
                self.failures += 1

    # --- the shell's own words ----------------------------------------------------------------

    def focus(self, rest: str, argv: list[str]) -> None:
        if any(a in ("-h", "--help") for a in argv):
            self.parser("focus").print_help()
            return
        if argv == ["--clear"]:
            self.session.focus = ""
            self.summarize()
            self.write(f"focus  everything\n       {self.summary}")
            return
        if argv and argv[0].startswith("--"):
            raise ShellArgError(f"focus: unknown option {argv[0]}; write focus SLICE, bare focus, or focus --clear")
        if not argv:
            self.stop()  # a start-up count still running: wait for it
            if not self.summary:
                self.summarize()
            self.write(f"focus  {self.session.focus or 'everything'}\n       {self.summary}")
            return
        text = rest.strip()
        if len(argv) == 1 and text[:1] in "'\"" and text[-1:] == text[:1]:
            text = argv[0]  # the whole slice in one pair of quotes
        from ...select.slices import parse

        sl = parse(text)
        counts = count_slice(self.session, sl.text)  # resolves every name, or raises SliceError
        with self._lock:
            self._generation += 1
            self.session.focus = sl.text
            self.summary = in_words(counts)
        note = "\n       no runs match it yet" if counts[2] == 0 else ""
        self.write(f"focus  {sl.text or 'everything'}\n       {self.summary}{note}")

    def collapse(self, argv: list[str]) -> None:
        a = self.parser("collapse").parse_args(argv)
        fields = ("replicates", "instances", "failures", "holes")
        if a.reset:
            self.session.collapse = Collapse()
        elif any(getattr(a, f) for f in fields):
            from ...collapse.observations import parse_settings

            c = self.session.collapse
            new = Collapse(**{f: getattr(a, f) or getattr(c, f) for f in fields})
            parse_settings(new)  # raises InputError for a value it cannot use
            self.session.collapse = new
        c = self.session.collapse
        self.write("\n".join([
            f"replicates  {c.replicates:<12} statistic over the seeds of one instance",
            f"instances   {c.instances:<12} statistic over the instances of one block",
            f"failures    {c.failures:<12} failed runs: drop, penalize:F (F x the value) or worst",
            f"holes       {c.holes:<12} blocks missing a treatment: drop, or keep (incomplete design)",
        ]))

    def metric(self, argv: list[str]) -> None:
        a = self.parser("metric").parse_args(argv)
        if a.clear:
            self.session.metric = None
        elif a.name:
            self.refresh(quiet=False)
            if a.name not in self.metrics:
                near = difflib.get_close_matches(a.name, list(self.metrics), n=3, cutoff=0.6)
                hint = f" (did you mean {' or '.join(repr(n) for n in near)}?)" if near else ""
                known = ", ".join(self.metrics) or "none yet; load some runs first"
                raise InputError(f"no metric '{a.name}' in this warehouse{hint}; known: {known}")
            self.session.metric = a.name
        lines = []
        m = self.session.metric
        if m:
            sense, unit = self.metrics.get(m, ("min", ""))
            lines.append(f"metric  {m} ({sense_words(sense)}{', ' + unit if unit else ''})")
        else:
            lines.append("metric  not set (commands ask for --metric when the warehouse holds several)")
        if self.metrics:
            known = ", ".join(f"{n} ({s}{', ' + u if u else ''})" for n, (s, u) in self.metrics.items())
            lines.append(f"known   {known}")
        self.write("\n".join(lines))

    def help(self, argv: list[str]) -> None:
        if not argv:
            cmds = self.commands()
            rows = [(w, s) for w, s in SHELL_WORDS.items()] + [(n, c.summary) for n, c in cmds.items()]
            w = max(len(n) for n, _ in rows)
            lines = ["shell words"] + [f"  {n.ljust(w)}  {s}" for n, s in rows[:len(SHELL_WORDS)]]
            lines += ["commands (the same arguments as on the command line, without -w; "
                      "--slice and --metric default to the focus and the metric)"]
            lines += [f"  {n.ljust(w)}  {s}" for n, s in rows[len(SHELL_WORDS):]]
            lines += ["help COMMAND shows its arguments and an example; Tab completes; Ctrl-C abandons a line; "
                      "Ctrl-D leaves"]
            self.write("\n".join(lines))
            return
        name = argv[0]
        if name in LEAVE:
            self.write(f"{name}: {SHELL_WORDS[name]}")
            return
        p = self.parser(name)
        if p is None:
            self.unknown(name)
            return
        self.write(p.format_help().rstrip())


def make_completer(session: Session):
    """A completer over a warehouse, for embedding (one snapshot of the names; no counting)."""
    import io

    shell = Shell(session, out=io.StringIO())
    shell.start(count=False)
    return shell.completer


def _history(shell: Shell):
    from prompt_toolkit.history import FileHistory, InMemoryHistory

    path = history_path()
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        with open(path, "a", encoding="utf-8"):
            pass
    except OSError as exc:
        shell.write(f"(history is not kept: cannot write {path}: {exc.strerror or exc})")
        return InMemoryHistory()
    return FileHistory(str(path))


def run_shell(session: Session, input=None, output=None, out=None, err=None) -> Shell:
    """Run the shell until exit, quit or end of input.

    input/output are prompt_toolkit objects (a terminal when None; in tests
    prompt_toolkit.input.create_pipe_input() and prompt_toolkit.output.DummyOutput()); command
    output goes to `out` (stdout when None), the one-line errors to `err` (else `out`, else stderr).
    Returns the Shell, whose .failures counts the lines that ended in an error.
    """
    from prompt_toolkit import PromptSession
    from prompt_toolkit.styles import Style

    shell = Shell(session, out=out, err=err)
    shell.start(background=True)
    shell.write(f"blockyard shell on {shell.shown()}; help lists the commands, Tab completes, Ctrl-D leaves")
    prompt = PromptSession(
        message=PROMPT, history=_history(shell), completer=shell.completer, lexer=shell.lexer,
        style=Style.from_dict(PALETTE), bottom_toolbar=shell.toolbar_parts, complete_while_typing=True,
        input=input, output=output,
    )
    shell.app = prompt.app
    try:
        while True:
            try:
                line = prompt.prompt()
            except KeyboardInterrupt:  # Ctrl-C at the prompt abandons the line
                continue
            except EOFError:  # Ctrl-D or the end of piped input
                break
            if not shell.execute(line):
                break
    finally:
        shell.app = None
        shell.stop()
    return shell


def run_script(session: Session, lines, out=None, err=None) -> Shell:
    """The shell without a terminal: one line at a time from a file or pipe, no prompt."""
    shell = Shell(session, out=out, err=err)
    shell.start(count=False)  # nothing shows the toolbar; bare focus counts when asked
    for line in lines:
        if not shell.execute(line.rstrip("\n")):
            break
    shell.stop()
    return shell


# --- the `shell` command ------------------------------------------------------------------------

def _shell_args(p):
    p.add_argument("where", nargs="?", metavar="WAREHOUSE",
                   help="warehouse file or postgresql:// URL (default: -w, $BLOCKYARD_WAREHOUSE, else ./blockyard.db)")


@command("shell", "the interactive shell: completion from the warehouse, history, help",
         "blockyard shell results.db", needs_warehouse=False)
@args(_shell_args)
def cmd_shell(session: Session, a) -> Done:
    if a.where:
        if session.location and session.location != a.where:
            raise InputError(f"shell: two warehouses given ({session.location} and {a.where}); give one")
        session.location = a.where
    if sys.stdin.isatty():
        shell = run_shell(session)
    else:  # piped or redirected input: run it as a script
        shell = run_script(session, sys.stdin)
    return Done("", {"failures": shell.failures}, exit_status=2 if shell.failures and not sys.stdin.isatty() else 0)
