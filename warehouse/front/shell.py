"""The interactive shell: `blockyard shell [WAREHOUSE]`.

One Session carries the warehouse, the focus, the metric and the collapse settings from line to
line. Every registered command takes the same arguments as on the command line (minus -w), and
--slice / --metric default to the focus and the metric. The shell's own words are focus,
collapse, metric, help, exit and quit.

    from warehouse.session import Session
    from warehouse.shell import Shell, run_shell

    run_shell(Session("results.db"))                  # at a terminal
    sh = Shell(Session("results.db"), out=buffer)     # or line by line, e.g. from a notebook
    sh.start(); sh.execute("focus family=mixed-sku"); sh.execute("blocktest --metric pallets")

Start-up stays quick: prompt_toolkit is imported only when a prompt is built, the analysis
libraries only when a command needs them, and completion answers from one snapshot of the small
dimension tables (refreshed after load), never from a scan of runs. The focus summary in the
bottom toolbar is one counting query, run when the focus changes (at start-up, in a background
thread so the first prompt does not wait for it).
"""
from __future__ import annotations

import argparse
import difflib
import os
import re
import shlex
import sys
import threading
from pathlib import Path

from ..commands.registry import Done, args, command
from ..errors import BlockyardError, InputError
from ..collapse.settings import Collapse
from ..commands.session import Session

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
_TERM = re.compile(r"([A-Za-z_][A-Za-z0-9_]*)(!=|<=|>=|=|<|>|~)(.*)$", re.S)
_OPS = ("=", "!=", "<", "<=", ">", ">=", "~")

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


class _HelpShown(Exception):
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
            from ..commands.registry import unknown_words

            self.error(unknown_words(self, extras))
        return a

    def exit(self, status=0, message=None):
        if message:
            (self.out or sys.stdout).write(message)
        raise _HelpShown()

    def print_help(self, file=None):
        (file or self.out or sys.stdout).write(self.format_help())

    def print_usage(self, file=None):
        (file or self.out or sys.stdout).write(self.format_usage())


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


def _split_words(text: str) -> tuple[list[str], str]:
    """Finished words and the word being typed; quotes keep spaces (the quote chars stay)."""
    words, buf, quote = [], [], None
    for ch in text:
        if quote:
            buf.append(ch)
            if ch == quote:
                quote = None
        elif ch in "'\"":
            quote = ch
            buf.append(ch)
        elif ch.isspace():
            if buf:
                words.append("".join(buf))
                buf = []
        else:
            buf.append(ch)
    return words, "".join(buf)


def _sense_words(sense: str) -> str:
    return "higher is better" if sense == "max" else "lower is better"


class Shell:
    """The shell's state and behaviour, with no terminal attached (run_shell adds the prompt)."""

    def __init__(self, session: Session, out=None, err=None):
        if session.commands is None:  # no front end gave its table: the catalog's commands
            from ..commands.catalog import commands

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
        from ..select.resolve import Dims
        from ..select.slices import KEYS

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

    @staticmethod
    def _count_runs(conn, cond) -> tuple[int, int, int]:
        """(treatments, blocks, runs) of a slice, counted on the runs themselves."""
        from sqlalchemy import func, select

        from ..store import schema as S

        R = S.runs
        q = (select(func.count(), func.count(func.distinct(R.c.solver_id)),
                    func.count(func.distinct(S.instances.c.group_id)))
             .select_from(R.join(S.instances, S.instances.c.id == R.c.instance_id)).where(cond))
        runs, treatments, blocks = conn.execute(q).one()
        return int(treatments), int(blocks), int(runs)

    @staticmethod
    def _count_cells(conn, sl, dims) -> tuple[int, int, int] | None:
        """The same from the cell summaries (one metric slot per import counts its live runs), or
        None when they cannot answer: a term they do not carry, or a file with runs but no cells."""
        from sqlalchemy import and_, exists, func, select

        from ..select.resolve import cells_can_answer, condition
        from ..store import schema as S

        if not cells_can_answer(sl):
            return None
        cs, im = S.cell_stats, S.imports
        uncovered = conn.execute(select(func.count()).select_from(im).where(
            im.c.rows_loaded > 0, ~exists().where(cs.c.import_id == im.c.id))).scalar()
        if uncovered:
            return None
        first = select(cs.c.import_id, func.min(cs.c.slot).label("slot")).group_by(cs.c.import_id).subquery()
        q = (select(func.coalesce(func.sum(cs.c.n), 0), func.count(func.distinct(cs.c.solver_id)),
                    func.count(func.distinct(S.instances.c.group_id)))
             .select_from(cs.join(first, and_(first.c.import_id == cs.c.import_id, first.c.slot == cs.c.slot))
                          .join(S.instances, S.instances.c.id == cs.c.instance_id))
             .where(condition(sl, dims, conn, table=cs)))
        runs, treatments, blocks = conn.execute(q).one()
        return int(treatments), int(blocks), int(runs)

    def _summary_of(self, text: str) -> tuple[int, int, int]:
        from ..select.resolve import Dims, condition
        from ..select.slices import parse

        sl = parse(text)
        with self.session.warehouse().engine.connect() as conn:
            dims = Dims.load(conn)
            cond = condition(sl, dims, conn)  # resolves every name, or raises SliceError
            try:
                quick = self._count_cells(conn, sl, dims)
            except (ImportError, AttributeError):  # a warehouse layer without cell summaries
                quick = None
            return quick if quick is not None else self._count_runs(conn, cond)

    @staticmethod
    def _words(counts: tuple[int, int, int]) -> str:
        t, b, n = counts
        return f"{t} treatment{'s' * (t != 1)} x {b} block{'s' * (b != 1)}, {n} run{'s' * (n != 1)}"

    def summarize(self, background: bool = False) -> None:
        """Count the focus once (treatments x blocks, runs) for the toolbar."""
        with self._lock:
            self._generation += 1
            gen = self._generation
        text = self.session.focus

        def work():
            try:
                s = self._words(self._summary_of(text))
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
        if name in ("focus", "collapse", "metric", "help"):
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
        if name == "focus":
            p = ShellParser(prog="focus", out=self.out, description=SHELL_WORDS["focus"] + ".",
                            epilog="example: focus solver=stacker version>=1.5 family=mixed-sku")
            p.add_argument("slice", nargs="*", metavar="SLICE", help="slice terms, e.g. family=fragile-top host!=rack-b")
            p.add_argument("--clear", action="store_true", help="clear the focus (everything)")
            return p
        if name == "collapse":
            from ..commands.analyse import add_collapse

            p = ShellParser(prog="collapse", out=self.out, description=SHELL_WORDS["collapse"] + ".",
                            epilog="example: collapse --replicates median --failures penalize:10")
            add_collapse(p)
            p.add_argument("--reset", action="store_true", help="back to the defaults (mean, mean, drop, drop)")
            return p
        if name == "metric":
            p = ShellParser(prog="metric", out=self.out, description=SHELL_WORDS["metric"] + ".",
                            epilog="example: metric pallets")
            p.add_argument("name", nargs="?", metavar="NAME", help="a metric of this warehouse")
            p.add_argument("--clear", action="store_true", help="no current metric")
            return p
        if name == "help":
            p = ShellParser(prog="help", out=self.out, description=SHELL_WORDS["help"] + ".",
                            epilog="example: help versus")
            p.add_argument("command", nargs="?", metavar="COMMAND")
            return p
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
        except _HelpShown:
            pass
        except KeyboardInterrupt:
            self.fail("interrupted; nothing half-written was kept, and the shell is still here")
        except BlockyardError as exc:
            self.fail(str(exc))
        except Exception as exc:  # a defect of ours: one line, and the shell stays
            from ..store.connect import database_trouble

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
        if not near and (_TERM.match(word) or "@" in word):
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
            result = cmd.run(self.session, a)
        finally:
            if name in REFRESH_AFTER:  # names and counts may have changed
                self.refresh()
                self.summarize()
        self.show(result, getattr(a, "json", False))

    def show(self, result, as_json: bool = False) -> None:
        from ..present.text import json_document

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
        from ..select.slices import parse

        sl = parse(text)
        counts = self._summary_of(sl.text)  # resolves every name, or raises SliceError
        with self._lock:
            self._generation += 1
            self.session.focus = sl.text
            self.summary = self._words(counts)
        note = "\n       no runs match it yet" if counts[2] == 0 else ""
        self.write(f"focus  {sl.text or 'everything'}\n       {self.summary}{note}")

    def collapse(self, argv: list[str]) -> None:
        a = self.parser("collapse").parse_args(argv)
        fields = ("replicates", "instances", "failures", "holes")
        if a.reset:
            self.session.collapse = Collapse()
        elif any(getattr(a, f) for f in fields):
            from ..collapse.observations import parse_settings

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
            lines.append(f"metric  {m} ({_sense_words(sense)}{', ' + unit if unit else ''})")
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

    # --- completion ---------------------------------------------------------------------------

    def complete(self, text: str) -> list[tuple[str, int, str, str]]:
        """Completions for the text before the cursor: (text, start position, display, meta).

        Answers from the cached snapshot only; no query runs here.
        """
        words, current = _split_words(text)
        if words and words[0] == "blockyard":
            words = words[1:]
        if not words:
            cmds = self.commands()
            out = []
            for w in self.words():
                if w.startswith(current):
                    meta = SHELL_WORDS.get(w) or cmds[w].summary
                    out.append((w, -len(current), w, meta))
            return out
        name = words[0]
        if name == "help":
            return [(w, -len(current), w, "") for w in self.words() if w.startswith(current)] if len(words) == 1 else []
        if name == "focus":
            if current.startswith("-"):
                return self._from(["--clear"], current, "option")
            return self._slice(current)
        if name == "metric":
            if current.startswith("-"):
                return self._from(["--clear"], current, "option")
            return self._metrics(current) if len(words) == 1 else []
        p = self.parser(name)
        if p is None:
            return []
        options = {s: act for act in p._actions for s in act.option_strings}
        if current.startswith("--") and "=" in current:
            opt, _, val = current.partition("=")
            act = options.get(opt)
            return self._option_values(opt, act, val) if act is not None else []
        # walk the finished words: which option is waiting for a value, which positional is next
        pending, positional = None, 0
        for w in words[1:]:
            if pending is not None:
                pending = None
                continue
            if w.startswith("-") and len(w) > 1 and not w[1:2].isdigit():
                act = options.get(w.split("=", 1)[0])
                if act is not None and act.nargs != 0 and "=" not in w:
                    pending = w
                continue
            positional += 1
        if pending is not None:
            return self._option_values(pending, options[pending], current)
        if current.startswith("-"):
            used = set(words[1:])
            opts = [s for s in options if s.startswith("--") and s not in used] + \
                   [s for s in options if not s.startswith("--") and s not in used]
            metas = {s: (options[s].help or "").split(";")[0][:60] for s in opts}
            return [(s, -len(current), s, metas[s]) for s in opts if s.startswith(current)]
        act = self._positional(p, positional)
        return self._positional_values(act, current) if act is not None else []

    @staticmethod
    def _positional(p, index: int):
        i = 0
        for act in p._get_positional_actions():
            if act.nargs in ("+", "*", argparse.REMAINDER):
                return act
            n = act.nargs if isinstance(act.nargs, int) else 1
            if index < i + n:
                return act
            i += n
        return None

    @staticmethod
    def _from(candidates, current: str, meta: str = "") -> list[tuple[str, int, str, str]]:
        low = current.lower()
        return [(c, -len(current), c, meta) for c in candidates if c.lower().startswith(low)]

    def _metrics(self, current: str):
        return [(n, -len(current), n, f"{s}{', ' + u if u else ''}")
                for n, (s, u) in self.metrics.items() if n.lower().startswith(current.lower())]

    def _option_values(self, opt: str, act, current: str):
        if act is None:
            return []
        metavar = str(act.metavar or "")
        if act.dest == "slice" or metavar == "SLICE":
            return self._slice(current)
        if act.dest == "metric":
            return self._metrics(current)
        if opt in COLLAPSE_VALUES:
            return self._from(COLLAPSE_VALUES[opt], current, act.dest)
        if act.choices:
            return self._from([str(c) for c in act.choices], current, act.dest)
        if metavar in ("BASELINE", "TREATMENT") or act.dest in ("baseline", "treatment"):
            return self._from(self.values.get("treatment", []), current, "treatment")
        if act.dest == "solver":
            return self._from([*self.values.get("solver", []), *self.values.get("treatment", [])], current, "solver")
        if "FILE" in metavar or metavar.endswith(".toml") or act.dest in ("layout", "rejects", "to"):
            return self._paths(current)
        return []

    def _positional_values(self, act, current: str):
        metavar = str(act.metavar or "")
        if metavar == "SLICE" or act.dest == "slice":
            return self._slice(current)
        if act.choices:
            return self._from([str(c) for c in act.choices], current, act.dest)
        if metavar in ("BASELINE", "TREATMENT") or act.dest in ("baseline", "treatment"):
            return self._from(self.values.get("treatment", []), current, "treatment")
        if act.dest == "metric" or metavar == "METRIC":
            return self._metrics(current)
        if "FILE" in metavar or act.dest in ("files", "file", "folder"):
            return self._paths(current)
        return []

    @staticmethod
    def _paths(current: str):
        word = current.strip("'\"")
        folder, _, stem = word.rpartition("/")
        base = Path(folder or ".").expanduser()
        try:
            entries = sorted(os.scandir(base), key=lambda e: e.name)
        except OSError:
            return []
        out = []
        for e in entries:
            if e.name.startswith(stem) and (stem.startswith(".") or not e.name.startswith(".")):
                name = e.name + ("/" if e.is_dir() else "")
                out.append((name, -len(stem), name, ""))
            if len(out) >= 200:
                break
        return out

    def _slice(self, current: str):
        """Slice terms: keys (solver=), operators, treatments, and known values after KEY OP."""
        from ..select.slices import EQ_ONLY, KEYS, ORDERED

        cut = max(current.rfind(c) for c in " |\"'") + 1
        term = current[cut:]
        m = _TERM.match(term)
        if m and m.group(1).lower() in KEYS:
            key, vals = m.group(1).lower(), m.group(3)
            head, _, piece = vals.rpartition(",")
            taken = set(head.split(",")) if head else set()
            low = piece.lower()
            return [(v, -len(piece), v, key) for v in self.values.get(key, [])
                    if v.lower().startswith(low) and v not in taken]
        if "@" in term:
            head, _, piece = term.rpartition(",")
            return self._from(self.values.get("treatment", []), piece, "treatment")
        out = []
        low = term.lower()
        for k in KEYS:
            if k == low:
                ops = ("=",) if k in EQ_ONLY else _OPS if k in ORDERED else ("=", "!=", "~")
                out += [(k + op, -len(term), k + op, "slice key") for op in ops]
            elif k.startswith(low):
                out.append((k + "=", -len(term), k + "=", "slice key"))
        if term:
            out += self._from(self.values.get("treatment", []), term, "treatment")
        return out

    # --- highlighting -------------------------------------------------------------------------

    def highlight(self, line: str) -> list[tuple[str, str]]:
        """(style, text) fragments: the command, options, and slice terms (keys, operators, values)."""
        from ..select.slices import KEYS

        known = set(self.words()) | set(NOT_IN_SHELL)
        out: list[tuple[str, str]] = []
        first, is_focus = True, False
        slice_next = False  # the word after --slice is a slice
        in_quote = None  # inside a quoted slice that spans several words
        for m in re.finditer(r"\s+|\S+", line):
            tok = m.group()
            if tok.isspace():
                out.append(("", tok))
            elif first:
                first = tok == "blockyard"
                is_focus = tok == "focus"
                out.append(("class:command" if tok in known or first else "class:unknown", tok))
            elif in_quote is not None:
                out += self._term_styles(tok, True, KEYS)
                if tok.endswith(in_quote):
                    in_quote = None
            elif slice_next:
                slice_next = False
                if tok[:1] in "'\"" and not (len(tok) > 1 and tok.endswith(tok[0])):
                    in_quote = tok[0]
                out += self._term_styles(tok, True, KEYS)
            elif tok.startswith("-") and len(tok) > 1 and not tok[1:2].isdigit():
                opt, eq, val = tok.partition("=")
                out.append(("class:option", opt))
                if eq:
                    out.append(("class:punct", eq))
                    out += self._term_styles(val, opt == "--slice", KEYS)
                slice_next = opt == "--slice" and not eq
            else:
                out += self._term_styles(tok, is_focus, KEYS)
        return out

    @staticmethod
    def _term_styles(tok: str, strict: bool, keys) -> list[tuple[str, str]]:
        out: list[tuple[str, str]] = []
        for part in re.split(r"(\||'|\")", tok):
            if not part:
                continue
            if part in ("|", "'", '"'):
                out.append(("class:punct", part))
                continue
            m = _TERM.match(part)
            if m:
                key, op, vals = m.groups()
                if key.lower() in keys:
                    out.append(("class:key", key))
                elif strict:
                    out.append(("class:badkey", key))
                else:
                    out.append(("", part))
                    continue
                out.append(("class:op", op))
                for i, v in enumerate(vals.split(",")):
                    if i:
                        out.append(("class:punct", ","))
                    if v:
                        out.append(("class:value", v))
            elif "@" in part and not part.startswith("@"):
                for i, v in enumerate(part.split(",")):
                    if i:
                        out.append(("class:punct", ","))
                    if v:
                        out.append(("class:treatment", v))
            else:
                out.append(("", part))
        return out

    # --- prompt_toolkit adapters --------------------------------------------------------------

    @property
    def completer(self):
        return _toolkit()["ShellCompleter"](self)

    @property
    def lexer(self):
        return _toolkit()["ShellLexer"](self)


_TOOLKIT: dict = {}


def _toolkit() -> dict:
    """prompt_toolkit classes, defined on first use so the command line never imports it."""
    if _TOOLKIT:
        return _TOOLKIT
    from prompt_toolkit.completion import Completer, Completion
    from prompt_toolkit.lexers import Lexer

    class ShellCompleter(Completer):
        """Commands, options, slice keys and the warehouse's values, from the shell's cache."""

        def __init__(self, shell: Shell):
            self.shell = shell

        def get_completions(self, document, complete_event):
            for text, start, display, meta in self.shell.complete(document.text_before_cursor):
                yield Completion(text, start_position=start, display=display, display_meta=meta or None)

    class ShellLexer(Lexer):
        """Colours the command, options and slice terms in the shell's palette."""

        def __init__(self, shell: Shell):
            self.shell = shell

        def lex_document(self, document):
            lines = document.lines

            def line(i: int):
                return self.shell.highlight(lines[i]) if i < len(lines) else []

            return line

    _TOOLKIT.update(ShellCompleter=ShellCompleter, ShellLexer=ShellLexer)
    return _TOOLKIT


def __getattr__(name: str):
    if name in ("ShellCompleter", "ShellLexer"):
        return _toolkit()[name]
    raise AttributeError(name)


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
