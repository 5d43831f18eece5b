"""Package layout, the CI contract and the core/ROS import boundary."""

from __future__ import annotations

import ast
import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
CORE_PACKAGE = ROOT / "compliant_demo"


def test_package_xml_is_format_3_ament_python():
    # REP 149 (package format 3) and the ament_python build type, as ROS 2 tooling expects.
    root = ET.parse(ROOT / "package.xml").getroot()
    assert root.tag == "package"
    assert root.get("format") == "3"
    assert root.findtext("name") == "compliant_demo"
    assert root.find("export").findtext("build_type") == "ament_python"


def test_ament_marker_and_layout_exist():
    for relative in ["resource/compliant_demo", "setup.py", "setup.cfg", "launch", "config",
                     "bench", ".ci/run", "compliant_demo/py.typed"]:
        assert (ROOT / relative).exists(), relative


def test_ci_runs_exactly_the_readme_test_command():
    readme_blocks = re.findall(r"```bash\n(.*?)\n```", (ROOT / "README.md").read_text(), re.S)
    test_command = next(block for block in readme_blocks if "pytest" in block)
    ci_lines = [line for line in (ROOT / ".ci/run").read_text().splitlines()
                if line and not line.startswith("#")]
    assert test_command.strip() in ci_lines


def _core_modules() -> list[str]:
    modules = []
    for path in sorted(CORE_PACKAGE.rglob("*.py")):
        relative = path.relative_to(ROOT).with_suffix("")
        if "nodes" in relative.parts:
            continue
        modules.append(".".join(p for p in relative.parts if p != "__init__"))
    return modules


def test_core_imports_without_rclpy():
    # A meta-path blocker makes `import rclpy` fail as it would on a machine without ROS 2.
    code = (
        "import sys, importlib\n"
        "class Block:\n"
        "    def find_spec(self, name, path=None, target=None):\n"
        "        if name.split('.')[0] in ('rclpy', 'sensor_msgs', 'std_msgs', 'std_srvs',"
        " 'diagnostic_msgs'):\n"
        "            raise ImportError('blocked: ' + name)\n"
        "sys.meta_path.insert(0, Block())\n"
        f"for m in {_core_modules()!r}:\n"
        "    importlib.import_module(m)\n"
        "print('ok')\n"
    )
    result = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                            text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "ok"


def test_no_core_module_mentions_rclpy_in_imports():
    for path in CORE_PACKAGE.rglob("*.py"):
        if "nodes" in path.relative_to(CORE_PACKAGE).parts:
            continue
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            names = []
            if isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module:
                names = [node.module]
            assert not any(n.split(".")[0] == "rclpy" for n in names), path


def test_ruff_is_clean():
    result = subprocess.run([sys.executable, "-m", "ruff", "check", "compliant_demo", "test",
                             "bench"], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stdout + result.stderr


def test_mypy_is_clean():
    result = subprocess.run([sys.executable, "-m", "mypy", "compliant_demo"], cwd=ROOT,
                            capture_output=True, text=True, timeout=600)
    assert result.returncode == 0, result.stdout + result.stderr
