"""The modules of ``advisory`` import one another without a circle; reports import no run."""

from __future__ import annotations

import ast
from pathlib import Path

import advisory

ROOT = Path(advisory.__file__).resolve().parent


def _module_name(path: Path) -> str:
    parts = ("advisory", *path.relative_to(ROOT).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _runtime_nodes(tree: ast.AST):
    """Every node, but not those under ``if TYPE_CHECKING:`` (imports for the type checker only)."""
    todo = [tree]
    while todo:
        node = todo.pop()
        yield node
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            todo.extend(node.orelse)
            continue
        todo.extend(ast.iter_child_nodes(node))


def import_graph() -> dict[str, set[str]]:
    """Every module of ``advisory`` and the ``advisory`` modules it imports (at the top or inside a
    function; not for the type checker only): ``from a.b import c`` counts as importing ``a.b.c``
    when that is a module, else ``a.b``."""
    modules = {_module_name(p): p for p in ROOT.rglob("*.py")}
    graph: dict[str, set[str]] = {}
    for name, path in modules.items():
        package = name if path.name == "__init__.py" else name.rpartition(".")[0]
        edges: set[str] = set()
        for node in _runtime_nodes(ast.parse(path.read_text(), str(path))):
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                base = node.module or ""
                if node.level:
                    anchor = package.split(".")
                    anchor = anchor[:len(anchor) - (node.level - 1)]
                    base = ".".join([*anchor, base] if base else anchor)
                targets = [f"{base}.{a.name}" if f"{base}.{a.name}" in modules else base for a in node.names]
            else:
                continue
            for t in targets:
                while t and t not in modules:  # ``import a.b.c`` of a name below a module
                    t = t.rpartition(".")[0]
                if t and t != name:
                    edges.add(t)
        graph[name] = edges
    return graph


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """The strongly connected groups of more than one module (Tarjan), each sorted."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph.get(v, ())):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            group = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                group.append(w)
                if w == v:
                    break
            if len(group) > 1:
                found.append(sorted(group))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return found


def _reachable(graph: dict[str, set[str]], start: str) -> set[str]:
    seen, todo = set(), [start]
    while todo:
        for w in graph.get(todo.pop(), ()):
            if w not in seen:
                seen.add(w)
                todo.append(w)
    return seen


def test_the_graph_sees_imports_inside_functions():
    graph = import_graph()
    assert "advisory.runs.frost_night" in graph["advisory.runs.planned"]
    assert "advisory.notices.render" in graph["advisory.demo_heat"]  # imported inside demo_heat()


def test_no_import_circle_in_advisory():
    found = cycles(import_graph())
    assert not found, "import circles: " + "; ".join(" <-> ".join(c) for c in found)


def test_imports_for_the_type_checker_only_are_left_out():
    tree = ast.parse("from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    import x\nelse:\n    import y\n")
    assert {a.name for n in _runtime_nodes(tree) if isinstance(n, ast.Import) for a in n.names} == {"y"}


def test_a_circle_is_found_and_named():
    assert cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]


def test_reports_only_read_they_import_no_run_module():
    graph = import_graph()
    for reader in ("advisory.reports",):
        runs = sorted(m for m in _reachable(graph, reader) if m.startswith("advisory.runs"))
        assert not runs, f"{reader} imports {runs}"
