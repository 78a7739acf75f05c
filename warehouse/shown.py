"""How every result shows itself besides its text and JSON: its parts as DataFrames, and a
notebook's HTML view.

A result class mixes in `Shown` and keeps its own `to_dict()` (the --json document), `render()`
(the text) and, where it has them, `warnings` (cautions). The tables are read off the document:
each list of records in it (at its top or one level down, named "outer.inner") is a table, so a
new part of a document is a new table without code here. The HTML view holds the same content as
the text, with the cautions first and marked, so that a notebook never shows a number without
what qualifies it. Standard library at the top; pandas is imported when a table is asked for.
"""
from __future__ import annotations

import html


def _records(value) -> bool:
    return isinstance(value, list) and bool(value) and all(isinstance(v, dict) for v in value)


class Shown:
    def _tables_doc(self) -> dict[str, list[dict]]:
        doc = self.to_dict()
        found: dict[str, list[dict]] = {}
        for key, value in doc.items():
            if _records(value):
                found[key] = value
            elif isinstance(value, dict):
                for inner, v in value.items():
                    if _records(v):
                        found[f"{key}.{inner}"] = v
        return found

    def table_names(self) -> list[str]:
        """The names `table()` takes."""
        return list(self._tables_doc())

    def table(self, name: str | None = None):
        """One part of the result as a DataFrame: `name` as `table_names()` lists it (default:
        the first). A name the result does not have is a one-line error listing those it has."""
        import pandas as pd

        from .errors import InputError

        found = self._tables_doc()
        if not found:
            raise InputError("this result holds no table; print it, or read result.to_dict()")
        if name is None:
            name = next(iter(found))
        if name not in found:
            raise InputError(f"no table '{name}' in this result; it has: {', '.join(found)}")
        return pd.DataFrame(found[name])

    def tables(self) -> dict:
        """Every part of the result as a DataFrame, by name."""
        return {name: self.table(name) for name in self._tables_doc()}

    def cautions(self) -> list[str]:
        return list(getattr(self, "warnings", None) or [])

    def _repr_html_(self) -> str:
        parts = ['<div class="blockyard-result">']
        cautions = self.cautions()
        if cautions:
            items = "".join(f"<li>{html.escape(str(c))}</li>" for c in cautions)
            parts.append('<div style="border-left:4px solid #a8861c;background:#fbf4df;padding:0.4em 0.8em;'
                         'margin:0 0 0.6em 0"><strong>Read these first</strong>'
                         f'<ul style="margin:0.3em 0">{items}</ul></div>')
        parts.append(f'<pre style="white-space:pre-wrap">{html.escape(self.render())}</pre></div>')
        return "".join(parts)

    def __str__(self) -> str:
        return self.render()
