"""The whole package stays a tree of modules of readable length: no import cycle between any two
of its modules (lazy and type-checking imports counted too) and no file over 800 lines."""

from __future__ import annotations

import pytest
from structure_support import PACKAGE_DIR, find_cycle, package_graph

MAX_LINES = 800


def test_the_package_has_no_import_cycle():
    graph = package_graph()
    assert len(graph) > 50  # every module was read
    assert "compliant_demo.replay" in graph["compliant_demo.campaign"]  # edges were read
    cycle = find_cycle(graph)
    assert cycle is None, " -> ".join(cycle or [])


def test_the_graph_reader_sees_a_cycle(tmp_path):
    package = tmp_path / "compliant_demo"
    package.mkdir()
    (package / "__init__.py").write_text("")
    (package / "a.py").write_text("def f():\n    from compliant_demo.b import g\n")
    (package / "b.py").write_text("from compliant_demo import a\n")
    assert find_cycle(package_graph(package)) == ["compliant_demo.a", "compliant_demo.b",
                                                  "compliant_demo.a"]


@pytest.mark.parametrize("path", sorted(PACKAGE_DIR.rglob("*.py")),
                         ids=lambda p: str(p.relative_to(PACKAGE_DIR)))
def test_no_module_is_longer_than_800_lines(path):
    lines = len(path.read_text(encoding="utf-8").splitlines())
    assert lines <= MAX_LINES, f"{path.name} has {lines} lines (at most {MAX_LINES})"
