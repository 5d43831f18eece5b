"""The store package stays a tree of small modules: no import cycle among its modules (counting
every import, lazy or for type checking only), no module reaching into another object's private
members, and no file over 800 lines."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest
from structure_support import find_cycle

STORE = Path(__file__).resolve().parents[1] / "compliant_demo" / "store"
MAX_LINES = 800


def _imports(path: Path, modules: set[str]) -> set[str]:
    """Modules of the store package that ``path`` imports anywhere in its body."""
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module:
            if node.module == "compliant_demo.store":
                # ``from compliant_demo.store import _codec`` imports a module, any other name
                # comes from the package's __init__
                for alias in node.names:
                    found.add(alias.name if alias.name in modules else "__init__")
            elif node.module.startswith("compliant_demo.store."):
                found.add(node.module.split(".")[2])
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("compliant_demo.store."):
                    found.add(alias.name.split(".")[2])
                elif alias.name == "compliant_demo.store":
                    found.add("__init__")
    return found - {path.stem}


def _graph() -> dict[str, set[str]]:
    modules = {path.stem for path in STORE.glob("*.py")}
    return {path.stem: _imports(path, modules) for path in STORE.glob("*.py")}


def test_store_package_has_no_import_cycle():
    graph = _graph()
    assert find_cycle(graph) is None, " -> ".join(find_cycle(graph) or [])


def test_cycle_finder_finds_a_cycle():
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b"}, "b": set()}) is None


@pytest.mark.parametrize("path", sorted(STORE.glob("*.py")), ids=lambda p: p.name)
def test_store_module_is_short(path):
    lines = len(path.read_text(encoding="utf-8").splitlines())
    assert lines <= MAX_LINES, f"{path.name} has {lines} lines (at most {MAX_LINES})"


def _private_reaches(path: Path) -> list[str]:
    """``x._name`` in ``path`` where ``x`` is not ``self`` or ``cls``."""
    return [
        f"{path.name}:{node.lineno}: {ast.unparse(node)}"
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8")))
        if isinstance(node, ast.Attribute)
        and node.attr.startswith("_")
        and not node.attr.startswith("__")
        and not (isinstance(node.value, ast.Name) and node.value.id in ("self", "cls"))
    ]


def test_no_store_module_uses_private_members_of_another_object():
    found = [line for path in sorted(STORE.glob("*.py")) for line in _private_reaches(path)]
    assert found == []


def test_private_reach_finder_finds_one(tmp_path):
    probe = tmp_path / "probe.py"
    probe.write_text("def f(store):\n    return store._snapshot(), self._ok\n")
    assert _private_reaches(probe) == ["probe.py:2: store._snapshot"]
