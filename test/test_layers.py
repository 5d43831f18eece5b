"""The layers import in one direction: the core starts no processes and draws no progress bars,
the nodes never reach into the command line or the workflow layer (checked with ``ast`` over
every module of the package)."""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parent.parent / "compliant_demo"
# What starts, signals or reports on processes belongs to the workflow layer and the faces.
PROCESS_MODULES = {"subprocess", "signal", "tqdm"}
OUTSIDE_CORE = {"app", "cli", "nodes"}


def _imported_modules(path: Path, package: Path = PACKAGE) -> set[str]:
    """Dotted names of every module ``path`` imports, and of the names it imports from them
    (relative imports resolved against ``package``)."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    package_parts = path.relative_to(package.parent).with_suffix("").parts[:-1]
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = ".".join(package_parts[: len(package_parts) - node.level + 1])
                module = f"{base}.{node.module}" if node.module else base
            else:
                module = node.module or ""
            names.add(module)
            # ``from compliant_demo import cli`` imports the subpackage itself.
            names.update(f"{module}.{alias.name}" for alias in node.names)
    return names


def _modules(under: Path) -> list[Path]:
    return sorted(under.rglob("*.py"))


def test_the_import_reader_sees_plain_relative_and_from_imports(tmp_path):
    package = tmp_path / "compliant_demo"
    probe = package / "nodes" / "probe.py"
    probe.parent.mkdir(parents=True)
    probe.write_text("import subprocess\nfrom signal import SIGINT\nfrom scipy import signal\n"
                     "from ..cli import common\nfrom . import recorder\n", encoding="utf-8")
    names = _imported_modules(probe, package)
    assert {"subprocess", "signal", "scipy", "compliant_demo.cli", "compliant_demo.cli.common",
            "compliant_demo.nodes.recorder"} <= names
    # scipy's signal module is not the standard library's process-signal module.
    assert "scipy.signal" in names and "scipy" in names


def test_core_modules_import_no_subprocess_signal_or_tqdm():
    offenders = []
    for path in _modules(PACKAGE):
        relative = path.relative_to(PACKAGE)
        if relative.parts[0] in OUTSIDE_CORE:
            continue
        found = {name for name in _imported_modules(path) if name in PROCESS_MODULES}
        if found:
            offenders.append(f"{relative}: {sorted(found)}")
    assert offenders == [], "core modules that start or signal processes or draw progress " \
                            f"bars: {offenders}"


def test_nodes_import_nothing_from_the_command_line_or_the_workflow_layer():
    forbidden = ("compliant_demo.cli", "compliant_demo.app")
    offenders = []
    for path in _modules(PACKAGE / "nodes"):
        found = {name for name in _imported_modules(path)
                 if any(name == f or name.startswith(f + ".") for f in forbidden)}
        if found:
            offenders.append(f"{path.relative_to(PACKAGE)}: {sorted(found)}")
    assert offenders == [], f"nodes importing the command line or the workflow layer: {offenders}"


def test_the_core_does_not_import_the_workflow_layer_or_the_command_line():
    forbidden = ("compliant_demo.cli", "compliant_demo.app", "compliant_demo.nodes")
    offenders = []
    for path in _modules(PACKAGE):
        relative = path.relative_to(PACKAGE)
        if relative.parts[0] in OUTSIDE_CORE:
            continue
        found = {name for name in _imported_modules(path)
                 if any(name == f or name.startswith(f + ".") for f in forbidden)}
        if found:
            offenders.append(f"{relative}: {sorted(found)}")
    assert offenders == [], f"core modules importing an upper layer: {offenders}"
