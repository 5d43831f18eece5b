"""numba's compiled-function cache goes to a per-user directory, never into the package.

Each test runs a numba-compiled function in a fresh interpreter that imports a copy of the
package from a temporary directory, so a file written beside the sources would show up there.
"""

from __future__ import annotations

import ast
import os
import shutil
import stat
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pytest

from compliant_demo._numba_cache import (
    CACHE_ENV,
    PRUNE_AFTER_S,
    compiled_sources_hash,
    configure_numba_cache,
)

ROOT = Path(__file__).resolve().parents[1]

# Two short series through the DTW kernel (numba.njit(cache=True)); prints the cache dir in effect.
_RUN_NUMBA = (
    "import os, numpy as np\n"
    "from compliant_demo.alignment import dtw\n"
    "rng = np.random.default_rng(7)\n"
    "distance, path = dtw(rng.normal(size=(40, 1)), rng.normal(size=(30, 1)))\n"
    "assert np.isfinite(distance) and path.shape[1] == 2\n"
    "print(os.environ['NUMBA_CACHE_DIR'])\n"
)


def _package_copy(tmp_path: Path) -> Path:
    site = tmp_path / "site"
    shutil.copytree(ROOT / "compliant_demo", site / "compliant_demo",
                    ignore=shutil.ignore_patterns("__pycache__"))
    return site


def _files(tree: Path) -> set[Path]:
    return {p.relative_to(tree) for p in tree.rglob("*") if p.is_file()}


def _run(site: Path, env_changes: dict[str, str | None], cwd: Path) -> str:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(site)
    # Python's own bytecode cache would also land in the copy; it is not what is under test.
    env["PYTHONDONTWRITEBYTECODE"] = "1"
    for key, value in env_changes.items():
        if value is None:
            env.pop(key, None)
        else:
            env[key] = value
    result = subprocess.run([sys.executable, "-c", _RUN_NUMBA], env=env, cwd=cwd,
                            capture_output=True, text=True, timeout=300)
    assert result.returncode == 0, result.stderr
    return result.stdout.strip().splitlines()[-1]


@pytest.mark.parametrize("xdg", [True, False], ids=["XDG_CACHE_HOME", "home-dot-cache"])
def test_cache_files_go_to_the_user_cache_and_nothing_into_the_package(tmp_path, xdg):
    site = _package_copy(tmp_path)
    before = _files(site)
    home = tmp_path / "home"
    home.mkdir()
    cache_home = tmp_path / "xdg-cache"
    env = {"HOME": str(home), "NUMBA_CACHE_DIR": None,
           "XDG_CACHE_HOME": str(cache_home) if xdg else None}
    root = (cache_home if xdg else home / ".cache") / "compliant_demo" / "numba"
    expected = root / compiled_sources_hash(site / "compliant_demo")

    in_effect = _run(site, env, cwd=tmp_path)

    assert Path(in_effect) == expected
    assert _files(site) == before
    assert not list(site.rglob("__pycache__"))
    assert any(p.suffix in {".nbi", ".nbc"} for p in expected.rglob("*")), "no cache written"
    assert stat.S_IMODE(root.stat().st_mode) == 0o700
    assert stat.S_IMODE(expected.stat().st_mode) == 0o700


def test_a_numba_cache_dir_set_by_the_user_is_kept(tmp_path):
    site = _package_copy(tmp_path)
    before = _files(site)
    chosen = tmp_path / "my-numba-cache"
    home = tmp_path / "home"
    home.mkdir()
    env = {"HOME": str(home), "XDG_CACHE_HOME": None, "NUMBA_CACHE_DIR": str(chosen)}

    in_effect = _run(site, env, cwd=tmp_path)

    assert Path(in_effect) == chosen
    assert any(p.suffix == ".nbi" for p in chosen.rglob("*"))
    assert not (home / ".cache").exists()
    assert _files(site) == before


def test_an_unusable_home_falls_back_to_a_private_temp_dir(tmp_path):
    site = _package_copy(tmp_path)
    before = _files(site)
    blocker = tmp_path / "not-a-dir"
    blocker.write_text("a file where the cache home should be")
    temp_root = tmp_path / "tmp"
    temp_root.mkdir()
    env = {"HOME": str(tmp_path), "XDG_CACHE_HOME": str(blocker), "NUMBA_CACHE_DIR": None,
           "TMPDIR": str(temp_root)}

    in_effect = _run(site, env, cwd=tmp_path)

    root = temp_root / f"compliant_demo-numba-{os.getuid()}"
    expected = root / compiled_sources_hash(site / "compliant_demo")
    assert Path(in_effect) == expected
    assert stat.S_IMODE(root.stat().st_mode) == 0o700
    assert stat.S_IMODE(expected.stat().st_mode) == 0o700
    assert any(p.suffix == ".nbi" for p in expected.rglob("*"))
    assert _files(site) == before


def _numba_importers() -> list[str]:
    modules = []
    for path in sorted((ROOT / "compliant_demo").rglob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            names = ([alias.name for alias in node.names] if isinstance(node, ast.Import)
                     else [node.module or ""] if isinstance(node, ast.ImportFrom) else [])
            if any(name.split(".")[0] == "numba" for name in names):
                relative = path.relative_to(ROOT).with_suffix("")
                modules.append(".".join(p for p in relative.parts if p != "__init__"))
                break
    return modules


def test_every_numba_importer_sees_the_user_cache_dir(tmp_path):
    # numba reads NUMBA_CACHE_DIR once, at its import: each module that imports numba, imported
    # first in a fresh interpreter, must leave numba configured with the per-user directory.
    importers = _numba_importers()
    assert importers, "the package no longer uses numba; drop the cache set-up and this test"
    env = dict(os.environ, PYTHONPATH=str(ROOT), XDG_CACHE_HOME=str(tmp_path / "cache"))
    env.pop("NUMBA_CACHE_DIR", None)
    for module in importers:
        code = f"import {module}\nimport numba.core.config as c\nprint(c.CACHE_DIR)\n"
        result = subprocess.run([sys.executable, "-c", code], env=env, cwd=tmp_path,
                                capture_output=True, text=True, timeout=120)
        assert result.returncode == 0, result.stderr
        assert result.stdout.strip() == str(tmp_path / "cache" / "compliant_demo" / "numba"
                                            / compiled_sources_hash())


def test_the_sources_hash_follows_every_numba_module_and_nothing_else(tmp_path):
    package = _package_copy(tmp_path) / "compliant_demo"
    original = compiled_sources_hash(package)
    assert len(original) == 16 and int(original, 16) >= 0
    importers = _numba_importers()
    for module in importers:
        path = (package.parent / module.replace(".", "/")).with_suffix(".py")
        source = path.read_bytes()
        os.utime(path, (0, 0))  # a new time stamp alone changes nothing
        assert compiled_sources_hash(package) == original, module
        path.write_bytes(source + b"# edited\n")
        assert compiled_sources_hash(package) != original, module
        path.write_bytes(source)
    assert compiled_sources_hash(package) == original
    plain = package / "exceptions.py"
    assert "compliant_demo.exceptions" not in importers
    plain.write_bytes(plain.read_bytes() + b"# edited\n")
    assert compiled_sources_hash(package) == original


_CALLEE = "import numba\n\n\n@numba.njit(cache=True)\ndef value():\n    return {}\n"
_CALLER = ("import numba\n\nfrom compliant_demo._probe_callee import value\n\n\n"
           "@numba.njit(cache=True)\ndef call():\n    return value() + 0.5\n")
_RUN_PROBE = ("import os\nfrom compliant_demo._probe_caller import call\n"
              "print(call(), os.environ['NUMBA_CACHE_DIR'])\n")


def test_an_edited_callee_in_another_module_is_compiled_afresh(tmp_path):
    # numba keys a cached function on its own file: without the sources hash in the cache
    # directory the unchanged caller would load its old machine code with the old callee inlined
    package = _package_copy(tmp_path) / "compliant_demo"
    (package / "_probe_caller.py").write_text(_CALLER)
    callee = package / "_probe_callee.py"
    env = dict(os.environ, PYTHONPATH=str(package.parent), PYTHONDONTWRITEBYTECODE="1",
               XDG_CACHE_HOME=str(tmp_path / "cache"))
    env.pop(CACHE_ENV, None)
    seen = []
    for value in ("1.0", "2.0"):
        callee.write_text(_CALLEE.format(value))
        for _ in range(2):  # compiled, then loaded from the cache
            result = subprocess.run([sys.executable, "-c", _RUN_PROBE], env=env, cwd=tmp_path,
                                    capture_output=True, text=True, timeout=120)
            assert result.returncode == 0, result.stderr
            seen.append(result.stdout.split())
    assert [float(v) for v, _ in seen] == [1.5, 1.5, 2.5, 2.5]
    assert seen[0][1] == seen[1][1] != seen[2][1] == seen[3][1]
    for _, directory in seen:
        assert any(p.suffix == ".nbi" for p in Path(directory).rglob("*"))


def test_sources_directories_unused_for_a_week_are_pruned(tmp_path, monkeypatch):
    monkeypatch.setenv(CACHE_ENV, "restored-after-the-test")  # so the value set here is undone
    monkeypatch.delenv(CACHE_ENV)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path))
    root = tmp_path / "compliant_demo" / "numba"
    root.mkdir(parents=True, mode=0o700)
    stale = time.time() - PRUNE_AFTER_S - 60.0
    recent = time.time() - PRUNE_AFTER_S + 3600.0
    made = {}
    old_layout = "sim_" + "0123456789" * 4  # numba's folder per source directory, before
    old_recent = "compliant_demo_" + "abcdef0123" * 4
    for name, when in (("0123456789abcdef", stale), ("fedcba9876543210", recent),
                       ("not-a-hash", stale), (old_layout, stale), (old_recent, recent)):
        made[name] = root / name
        made[name].mkdir()
        (made[name] / "kernel.nbi").write_bytes(b"index")
        os.utime(made[name], (when, when))
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    (root / "00000000000000aa").symlink_to(elsewhere, target_is_directory=True)
    os.utime(root / "00000000000000aa", (stale, stale), follow_symlinks=False)
    (root / "00000000000000bb").write_bytes(b"a file, not a sources directory")
    os.utime(root / "00000000000000bb", (stale, stale))

    in_effect = configure_numba_cache()

    assert in_effect == os.environ[CACHE_ENV] == str(root / compiled_sources_hash())
    assert sorted(p.name for p in root.iterdir()) == sorted(
        ["00000000000000aa", "00000000000000bb", "fedcba9876543210", "not-a-hash",
         old_recent, compiled_sources_hash()])
    assert elsewhere.is_dir()
    assert time.time() - Path(in_effect).stat().st_mtime < 60.0  # marked as used


def test_a_sources_directory_that_is_not_a_directory_falls_back(tmp_path, monkeypatch):
    monkeypatch.setenv(CACHE_ENV, "restored-after-the-test")  # so the value set here is undone
    monkeypatch.delenv(CACHE_ENV)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "home-cache"))
    monkeypatch.setenv("TMPDIR", str(tmp_path))
    monkeypatch.setattr(tempfile, "tempdir", None)
    root = tmp_path / "home-cache" / "compliant_demo" / "numba"
    root.mkdir(parents=True, mode=0o700)
    (root / compiled_sources_hash()).write_bytes(b"in the way")

    in_effect = configure_numba_cache()

    assert in_effect == str(tmp_path / f"compliant_demo-numba-{os.getuid()}"
                            / compiled_sources_hash())
