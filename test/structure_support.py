"""Import graphs of the package read with ``ast`` (no module is imported) and a cycle finder, for
the structure tests."""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE_DIR = Path(__file__).resolve().parents[1] / "compliant_demo"


def module_name(path: Path, root: Path = PACKAGE_DIR) -> str:
    """Dotted name of the module at ``path`` (a package's ``__init__`` is the package)."""
    parts = list(path.relative_to(root.parent).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def package_graph(root: Path = PACKAGE_DIR) -> dict[str, set[str]]:
    """Every module of the package and the package modules it imports anywhere in its body
    (lazy and type-checking imports included). ``from pkg import name`` counts as importing
    ``pkg.name`` when that is a module, else ``pkg`` itself."""
    paths = sorted(root.rglob("*.py"))
    modules = {module_name(path, root) for path in paths}
    package = root.name
    graph: dict[str, set[str]] = {}
    for path in paths:
        name = module_name(path, root)
        found: set[str] = set()
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                if node.module.split(".")[0] != package:
                    continue
                for alias in node.names:
                    child = f"{node.module}.{alias.name}"
                    found.add(child if child in modules else node.module)
            elif isinstance(node, ast.Import):
                found.update(a.name for a in node.names if a.name.split(".")[0] == package)
        graph[name] = {m for m in found if m in modules} - {name}
    return graph


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import cycle of ``graph`` (a path that returns to its start), or None."""
    state: dict[str, int] = {}  # 1: on the current path, 2: finished
    path: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        path.append(node)
        for target in sorted(graph.get(node, ())):
            if state.get(target) == 1:
                return path[path.index(target) :] + [target]
            if target not in state and (found := visit(target)):
                return found
        path.pop()
        state[node] = 2
        return None

    for start in sorted(graph):
        if start not in state and (found := visit(start)):
            return found
    return None
