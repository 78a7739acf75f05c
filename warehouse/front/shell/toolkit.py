"""prompt_toolkit's completer and lexer over a Shell: imported only when a prompt or a completer is
built, so that the command line and scripts never import prompt_toolkit.

Both take anything with the Shell's complete() and highlight() (completion.Completing).
"""
from __future__ import annotations

from prompt_toolkit.completion import Completer, Completion
from prompt_toolkit.lexers import Lexer


class ShellCompleter(Completer):
    """Commands, options, slice keys and the warehouse's values, from the shell's cache."""

    def __init__(self, shell):
        self.shell = shell

    def get_completions(self, document, complete_event):
        for text, start, display, meta in self.shell.complete(document.text_before_cursor):
            yield Completion(text, start_position=start, display=display, display_meta=meta or None)


class ShellLexer(Lexer):
    """Colours the command, options and slice terms in the shell's palette."""

    def __init__(self, shell):
        self.shell = shell

    def lex_document(self, document):
        lines = document.lines

        def line(i: int):
            return self.shell.highlight(lines[i]) if i < len(lines) else []

        return line
