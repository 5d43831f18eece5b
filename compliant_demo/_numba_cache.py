"""Point numba's compiled-function cache at a per-user directory before numba is imported.

``numba.njit(cache=True)`` writes its cache files into ``__pycache__`` beside the source unless
``NUMBA_CACHE_DIR`` is set when numba is imported. Inside an installed package that folder outlives
``pip uninstall`` (the files are not in the wheel's record) and then shadows a later editable
install as a namespace package. The package ``__init__`` imports this module first, so every
numba import of the package sees the variable. A ``NUMBA_CACHE_DIR`` the user already set wins.
"""

from __future__ import annotations

import os
import stat
import tempfile
from collections.abc import Callable
from pathlib import Path

__all__ = ["CACHE_ENV", "configure_numba_cache", "numba_cache_dir"]

CACHE_ENV = "NUMBA_CACHE_DIR"
_SUBDIR = ("compliant_demo", "numba")


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


def configure_numba_cache() -> str | None:
    """Set ``NUMBA_CACHE_DIR`` to a per-user directory (mode 0700) unless it is already set.

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
        path = _private_dir(locate)
        if path is not None:
            os.environ[CACHE_ENV] = str(path)
            return str(path)
    return None


configure_numba_cache()
