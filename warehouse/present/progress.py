"""A progress bar for long loads, drawn by prompt_toolkit on a terminal only."""
from __future__ import annotations


class FileProgress:
    def __init__(self, name: str):
        self.name = name
        self._bar = None
        self._counter = None
        self._done = 0

    def __enter__(self):
        from prompt_toolkit.shortcuts import ProgressBar

        self._bar = ProgressBar(title=f"loading {self.name}")
        self._bar.__enter__()
        return self

    def update(self, done: int, total: int) -> None:
        if self._counter is None:
            self._counter = self._bar(label="rows", total=total)
        self._counter.items_completed = done
        self._bar.invalidate()

    def __exit__(self, *exc):
        return self._bar.__exit__(*exc)
