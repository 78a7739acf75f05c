"""The interactive shell, `blockyard shell [WAREHOUSE]`, in the order a typed line travels.

words.py       its own vocabulary: prompt, shell words and their parsers, palette, history path
loop.py        the Shell (one line at a time), the prompt loop, scripts, and the `shell` command
completion.py  completion and highlighting from the Shell's snapshot of names
toolkit.py     prompt_toolkit's completer and lexer over a Shell, imported only for a prompt
counting.py    the focus count for the toolbar (the shell's only queries of its own)
"""
