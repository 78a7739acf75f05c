"""Completion and highlighting for the shell, answered from the Shell's snapshot of names.

`Completing` is mixed into the Shell (loop.py): complete() gives (text, start position, display,
meta) for the text before the cursor, highlight() gives (style class, text) fragments in the
palette of words.py. Neither runs a query: both read only what the Shell keeps, namely
`values` (slice key -> known values), `metrics` (name -> (sense, unit)), `words()`, `commands()`
and `parser(name)`. The prompt_toolkit objects over them are in toolkit.py.
"""
from __future__ import annotations

import argparse
import os
import re
from pathlib import Path

from .words import COLLAPSE_VALUES, NOT_IN_SHELL, SHELL_WORDS, SLICE_TERM

_OPS = ("=", "!=", "<", "<=", ">", ">=", "~")


def split_words(text: str) -> tuple[list[str], str]:
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


class Completing:
    """complete() and highlight() over the Shell's cached names (see the module's docstring)."""

    # --- completion ---------------------------------------------------------------------------

    def complete(self, text: str) -> list[tuple[str, int, str, str]]:
        """Completions for the text before the cursor: (text, start position, display, meta).

        Answers from the cached snapshot only; no query runs here.
        """
        words, current = split_words(text)
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
        from ...select.slices import EQ_ONLY, KEYS, ORDERED

        cut = max(current.rfind(c) for c in " |\"'") + 1
        term = current[cut:]
        m = SLICE_TERM.match(term)
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
        from ...select.slices import KEYS

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
            m = SLICE_TERM.match(part)
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
        # here, not at the top: prompt_toolkit is imported once a prompt or completer is asked for
        from .toolkit import ShellCompleter

        return ShellCompleter(self)

    @property
    def lexer(self):
        from .toolkit import ShellLexer

        return ShellLexer(self)
