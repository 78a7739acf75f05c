"""The package's shape: no import cycle, layers import only the layers before them, and the
layout table in DEVELOPERS.md names every module of the tree.

The import graph is read from the source (every `import` and `from ... import`, at the top of a
module or inside a function alike: an import inside a function is still a dependency).
"""
from __future__ import annotations

import ast
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "warehouse"

# the layers in the order data flows (design.md); a module may import its own layer and those
# before it. The package root (version), errors and the migrations sit below every layer.
LAYERS = ["store", "ingest", "select", "collapse", "analyze", "analyses", "ledger", "present", "commands", "demo",
          "front"]
BASE = {"warehouse", "warehouse.errors", "warehouse.version", "warehouse.shown"}


def _modules() -> dict[str, Path]:
    found = {}
    for path in PACKAGE.rglob("*.py"):
        parts = path.relative_to(ROOT).with_suffix("").parts
        if parts[-1] == "__init__":
            parts = parts[:-1]
        found[".".join(parts)] = path
    return found


def import_graph() -> dict[str, set[str]]:
    mods = _modules()
    graph: dict[str, set[str]] = {}
    for name, path in mods.items():
        if name.startswith("warehouse.migrations"):
            continue
        package = name.split(".") if path.name == "__init__.py" else name.split(".")[:-1]
        deps = set()
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom):
                if node.level:
                    base = package[:len(package) - node.level + 1]
                    target = ".".join(base + ([node.module] if node.module else []))
                else:
                    target = node.module or ""
                for alias in node.names:
                    sub = f"{target}.{alias.name}"
                    if sub == "warehouse.migrations":  # the alembic revisions (top-level migrations/)
                        continue
                    deps.add(sub if sub in mods else target)
            elif isinstance(node, ast.Import):
                deps.update(a.name for a in node.names)
        graph[name] = {d for d in deps if d in mods and d != name}
    return graph


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan)."""
    index, low, stack, on, out, counter = {}, {}, [], set(), [], [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in graph.get(v, ()):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                out.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def _layer_name(module: str) -> str:
    name = module.split(".")[1]
    return "front" if name == "__main__" else name  # `python -m warehouse` is the command line


def _layer(module: str) -> int | None:
    if module in BASE or module.split(".")[1:2] == ["migrations"]:
        return None
    return LAYERS.index(_layer_name(module))


def test_the_cycle_finder_finds_a_cycle():
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
    assert _cycles({"a": {"b"}, "b": set()}) == []


def test_no_import_cycle_among_the_package_modules():
    assert _cycles(import_graph()) == []


def test_every_module_belongs_to_a_layer():
    strays = [m for m in import_graph() if m not in BASE and _layer_name(m) not in LAYERS]
    assert strays == [], "a module outside the layers: add it to a layer folder (and to DEVELOPERS.md)"


def test_layers_import_only_themselves_and_the_layers_before_them():
    wrong = []
    for module, deps in import_graph().items():
        here = _layer(module)
        for dep in deps:
            there = _layer(dep)
            if here is not None and there is not None and there > here:
                wrong.append(f"{module} -> {dep}")
    assert sorted(wrong) == sorted(KNOWN_UPWARD), "a layer imports one after it"


# Result objects render themselves (`render()`, `to_dict()`), and the text lives in present/: the
# analyses' and the ledger's result classes call the presentation layer, the one sanctioned
# exception to the one-way flow (present imports none of them back).
KNOWN_UPWARD = [
    "warehouse.analyses.blocktest -> warehouse.present.analysis",
    "warehouse.analyses.guard -> warehouse.present.guard",
    "warehouse.analyses.blocktest -> warehouse.present.text",
    "warehouse.analyses.noise -> warehouse.present.noise",
    "warehouse.analyses.plan -> warehouse.present.analysis",
    "warehouse.analyses.versus -> warehouse.present.analysis",
    "warehouse.analyses.versus -> warehouse.present.text",
]


def test_the_layout_table_in_developers_md_names_every_module():
    text = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    section = text.split("## Layout", 1)[1].split("\n## ", 1)[0]
    table = "\n".join(line for line in section.splitlines() if line.startswith("| "))
    named = set(re.findall(r"`([a-z_/]+\.py)`", table)) - {"__init__.py"}
    tree = {str(p.relative_to(PACKAGE)) for p in PACKAGE.rglob("*.py")
            if p.name != "__init__.py" and "migrations" not in p.parts}
    assert sorted(tree - named) == [], "modules missing from DEVELOPERS.md's layout table"
    assert sorted(named - tree) == [], "DEVELOPERS.md's layout table names modules that are gone"
