"""The module graph as read from the code's own imports (lazy ones inside functions included) has no cycle:
each stage depends only on the stages before it, and run-folder I/O has one home."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "alignrun"


def _module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def import_graph(package: Path = PACKAGE) -> dict[str, set[str]]:
    """module -> the project modules it imports anywhere in its file (`from pkg import sub` counts as pkg.sub
    when sub is a module)."""
    modules = {_module_name(p): p for p in package.rglob("*.py")}
    root = package.name
    graph: dict[str, set[str]] = {}
    for name, path in modules.items():
        deps: set[str] = set()
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                deps |= {a.name for a in node.names if a.name.split(".")[0] == root}
            elif isinstance(node, ast.ImportFrom) and node.module and node.module.split(".")[0] == root:
                subs = {f"{node.module}.{a.name}" for a in node.names} & modules.keys()
                deps |= subs or {node.module}
        graph[name] = {d for d in deps if d in modules and d != name}
    return graph


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Every strongly connected group of more than one module (Tarjan 1972), each sorted."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    found: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        for w in graph.get(v, ()):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            group = []
            while True:
                w = stack.pop()
                group.append(w)
                if w == v:
                    break
            if len(group) > 1:
                found.append(sorted(group))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return found


def test_cycle_finder_on_a_hand_made_graph() -> None:
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}, "e": {"e"}}
    assert cycles(graph) == [["a", "b", "c"]]
    assert cycles({"a": {"b"}, "b": set()}) == []


def test_the_package_has_no_import_cycle() -> None:
    graph = import_graph()
    assert {"alignrun.report", "alignrun.evaluation", "alignrun.compare", "alignrun.html_report"} <= graph.keys()
    assert cycles(graph) == []


@pytest.mark.parametrize(("module", "must_not_import"), [
    ("alignrun.report", {"alignrun.evaluation", "alignrun.models", "alignrun.trainer"}),  # it assembles, not computes
    ("alignrun.html_report", {"alignrun.compare", "alignrun.evaluation"}),
    ("alignrun.verdict", {"alignrun.evaluation", "alignrun.models"}),
    ("alignrun.runfolder", {"alignrun.report", "alignrun.models", "alignrun.trainer"}),
])
def test_layers(module: str, must_not_import: set[str]) -> None:
    assert not import_graph()[module] & must_not_import
