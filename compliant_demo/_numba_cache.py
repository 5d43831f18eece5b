"""Point numba's compiled-function cache at a per-user directory before numba is imported.

``numba.njit(cache=True)`` writes its cache files into ``__pycache__`` beside the source unless
``NUMBA_CACHE_DIR`` is set when numba is imported. Inside an installed package that folder outlives
``pip uninstall`` (the files are not in the wheel's record) and then shadows a later editable
install as a namespace package. The package ``__init__`` imports this module first, so every
numba import of the package sees the variable. A ``NUMBA_CACHE_DIR`` the user already set wins.

numba keys a cached function on its own source file only: a kernel that calls a function of
another module would keep the machine code of the callee as it was compiled, after an edit or
an upgrade that keeps file times. So the cache lives in a subdirectory named after a hash of
every package module that imports numba (:func:`compiled_sources_hash`): changed sources
compile afresh. Subdirectories of other hashes that no import used for ``PRUNE_AFTER_S``
(another install of the package may share the user's cache meanwhile) are removed, as are
numba's folders of the layout before them (``<folder>_<SHA-1>`` directly in the root) once
unchanged that long.
"""

from __future__ import annotations

import hashlib
import os
import re
import shutil
import stat
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

__all__ = ["CACHE_ENV", "PRUNE_AFTER_S", "compiled_sources_hash", "configure_numba_cache",
           "numba_cache_dir"]

CACHE_ENV = "NUMBA_CACHE_DIR"
PRUNE_AFTER_S = 7 * 86400.0  # a sources subdirectory unused for a week is removed, s
_SUBDIR = ("compliant_demo", "numba")
_PACKAGE = Path(__file__).resolve().parent
_IMPORTS_NUMBA = re.compile(rb"^[ \t]*(?:import|from)[ \t]+numba\b", re.MULTILINE)
_HASH_NAME = re.compile(r"[0-9a-f]{16}")
# numba's own folder per source directory (its name and the SHA-1 of its path), which this
# package's caches used directly under the root before the sources subdirectories
_OLD_LAYOUT_NAME = re.compile(r"\w+_[0-9a-f]{40}")


def compiled_sources_hash(package: Path = _PACKAGE) -> str:
    """Hash of the package's modules that import numba (their paths and bytes), 16 hex digits.

    Parameters
    ----------
    package : the package directory (default: this package)

    Returns
    -------
    str
        The first 16 hex digits of the SHA-256 over the sorted modules.
    """
    digest = hashlib.sha256()
    for path in sorted(package.rglob("*.py")):
        source = path.read_bytes()
        if _IMPORTS_NUMBA.search(source):
            digest.update(path.relative_to(package).as_posix().encode() + b"\0")
            digest.update(len(source).to_bytes(8, "little") + source)
    return digest.hexdigest()[:16]


def numba_cache_dir() -> Path:
    """The per-user numba cache: ``$XDG_CACHE_HOME`` (else ``~/.cache``)/compliant_demo/numba.

    Returns
    -------
    Path
        The directory; it is not created here.
    """
    cache_home = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(cache_home).joinpath(*_SUBDIR)


def _fallback_dir() -> Path:
    """A per-user directory in the system temporary directory, for a home that cannot be used."""
    return Path(tempfile.gettempdir()) / f"compliant_demo-numba-{os.getuid()}"


def _private_dir(locate: Callable[[], Path]) -> Path | None:
    """Create the located directory (mode 0700) and return it if only this user can write it.

    numba's cache files are pickles, loading them runs code: a directory another user can write
    (or owns, as a squatter in the temporary directory might) is refused.
    """
    try:
        path = locate()
        path.mkdir(mode=0o700, parents=True, exist_ok=True)
        info = path.stat()
    except (OSError, RuntimeError):
        # RuntimeError: Path.home() with neither HOME nor a passwd entry.
        return None
    private = info.st_uid == os.getuid() and not info.st_mode & (stat.S_IWGRP | stat.S_IWOTH)
    if private and os.access(path, os.W_OK | os.X_OK):
        return path
    return None


def _prune(root: Path, keep: str, now: float) -> None:
    """Remove the sources subdirectories of ``root`` other than ``keep``, and the folders of the
    layout before them, unused for ``PRUNE_AFTER_S`` (a sources subdirectory's time stamp is
    touched at every import that uses it)."""
    for entry in root.iterdir():
        if entry.name == keep or not (_HASH_NAME.fullmatch(entry.name)
                                      or _OLD_LAYOUT_NAME.fullmatch(entry.name)):
            continue
        try:
            info = entry.lstat()
            if stat.S_ISDIR(info.st_mode) and now - info.st_mtime > PRUNE_AFTER_S:
                shutil.rmtree(entry)
        except OSError:  # removed meanwhile by another process, or not ours to remove
            continue


def _sources_dir(root: Path) -> Path | None:
    """``root/<compiled_sources_hash()>``, mode 0700, marked as used now; older ones pruned."""
    try:
        name = compiled_sources_hash()
        path = root / name
        path.mkdir(mode=0o700, exist_ok=True)
        if path.is_symlink() or not path.is_dir():
            return None
        now = time.time()
        os.utime(path, (now, now))
        _prune(root, name, now)
    except OSError:
        return None
    return path


def configure_numba_cache() -> str | None:
    """Set ``NUMBA_CACHE_DIR`` to a per-user directory (mode 0700) unless it is already set.

    The directory is ``<per-user cache>/<compiled_sources_hash()>``, see the module docstring.

    Returns
    -------
    str or None
        The cache directory in effect, or None when no per-user directory could be created
        (numba then compiles without a usable user cache; its own fallback is the source tree).
    """
    preset = os.environ.get(CACHE_ENV)
    if preset:
        return preset
    for locate in (numba_cache_dir, _fallback_dir):
        root = _private_dir(locate)
        path = None if root is None else _sources_dir(root)
        if path is not None:
            os.environ[CACHE_ENV] = str(path)
            return str(path)
    return None


configure_numba_cache()
