"""The package's import graph has no cycles (issue 10, item 6).

Every import inside ``contentlab/`` counts, at module level or inside a function, except those under
``if TYPE_CHECKING:`` (never run). A cycle means two modules each need the other's internals, which
DEVELOPERS.md's layering forbids: a module may use those to its left, never those to its right.
"""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "contentlab"


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _is_type_checking(node: ast.If) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def _imports(path: Path, modules: set[str]) -> set[str]:
    """The contentlab modules ``path`` imports (a name imported from a package counts as its submodule)."""
    name = _module_name(path)
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    found: set[str] = set()

    def visit(node: ast.AST) -> None:
        if isinstance(node, ast.If) and _is_type_checking(node):
            for child in node.orelse:
                visit(child)
            return
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name in modules)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            for alias in node.names:
                sub = f"{target}.{alias.name}"
                if sub in modules:
                    found.add(sub)
                elif target in modules:
                    found.add(target)
        for child in ast.iter_child_nodes(node):
            visit(child)

    visit(ast.parse(path.read_text(encoding="utf-8")))
    found.discard(name)
    return found


def _graph() -> dict[str, set[str]]:
    files = sorted(PACKAGE.rglob("*.py"))
    modules = {_module_name(p) for p in files}
    return {_module_name(p): _imports(p, modules) for p in files}


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    found, done, path = [], set(), []

    def walk(node: str) -> None:
        path.append(node)
        for nxt in sorted(graph[node]):
            if nxt in path:
                found.append(path[path.index(nxt):] + [nxt])
            elif nxt not in done:
                walk(nxt)
        path.pop()
        done.add(node)

    for node in sorted(graph):
        if node not in done:
            walk(node)
    return found


def test_the_cycle_finder_finds_a_planted_cycle():
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}
    assert ["a", "b", "c", "a"] in _cycles(graph)
    assert _cycles({"a": {"b"}, "b": set()}) == []


def test_the_graph_sees_function_level_imports():
    graph = _graph()
    # scoring imports slots inside a function; slots imports draftengine inside a function.
    assert "contentlab.slots" in graph["contentlab.scoring"]
    assert "contentlab.draftengine" in graph["contentlab.slots"]


def test_no_import_cycles_in_the_package():
    cycles = _cycles(_graph())
    assert cycles == [], "import cycles: " + "; ".join(" -> ".join(c) for c in cycles)
