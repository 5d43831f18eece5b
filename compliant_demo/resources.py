"""Files the package ships beside its code: launch files and parameter files.

They live in the source tree's ``launch/`` and ``config/`` folders and, once installed, under
``share/compliant_demo`` of the installation prefix (the ament layout), so one lookup serves a
checkout, an editable install and a ROS 2 workspace alike.
"""

from __future__ import annotations

import sys
from pathlib import Path

from compliant_demo.exceptions import InvalidInputError

__all__ = ["package_file", "package_launch_file"]


def package_file(folder: str, name: str) -> Path:
    """A file of the package's ``launch/`` or ``config/``: in the source tree or installed under
    ``share/compliant_demo``."""
    candidates = [
        Path(__file__).resolve().parent.parent / folder / name,
        Path(sys.prefix) / "share" / "compliant_demo" / folder / name,
    ]
    for candidate in candidates:
        if candidate.is_file():
            return candidate
    raise InvalidInputError(
        f"{folder} file {name!r} not found (looked in {[str(c.parent) for c in candidates]})"
    )


def package_launch_file(name: str) -> Path:
    """A launch file of the package (see :func:`package_file`)."""
    return package_file("launch", name)
