"""Files a node reads from its parameters: the places they may come from, and errors without
their contents.

Any participant on a ROS domain can read a node's log (``/rosout``) and a service's answer, so a
file parameter may only name a file under one of :func:`allowed_config_dirs`, and a file that
fails to load is reported by parameter, file and field, never by a value read from it.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Callable
from pathlib import Path
from typing import TypeVar

from compliant_demo.exceptions import CompliantDemoError, InvalidInputError

__all__ = ["USER_CONFIG_ENV", "allowed_config_dirs", "confined_file", "load_file_parameter"]

PACKAGE = "compliant_demo"
USER_CONFIG_ENV = "COMPLIANT_DEMO_CONFIG_DIR"

LoadedT = TypeVar("LoadedT")

# Pydantic error kinds whose message is written by a validator from the file's own values.
_VALUE_MESSAGES = {"value_error", "assertion_error"}


def allowed_config_dirs() -> list[Path]:
    """Folders a file parameter may point into, resolved, in the order they are named.

    1. the package's installed ``share/compliant_demo/config`` (ament index, then
       ``<python prefix>/share/compliant_demo/config``);
    2. the ``config/`` folder of the source checkout this package is imported from;
    3. the user folder: ``$COMPLIANT_DEMO_CONFIG_DIR`` when set, else
       ``$XDG_CONFIG_HOME/compliant_demo`` (``~/.config/compliant_demo`` without it).
    """
    places: list[Path] = []
    try:
        from ament_index_python.packages import get_package_share_directory

        places.append(Path(get_package_share_directory(PACKAGE)) / "config")
    except (ImportError, LookupError, ValueError, OSError):
        pass  # not installed through an ament index: the other places still apply
    places.append(Path(sys.prefix) / "share" / PACKAGE / "config")
    checkout = Path(__file__).resolve().parent.parent.parent
    if (checkout / "package.xml").is_file() and (checkout / PACKAGE).is_dir():
        places.append(checkout / "config")
    user = os.environ.get(USER_CONFIG_ENV)
    if not user:
        try:
            base = os.environ.get("XDG_CONFIG_HOME") or str(Path.home() / ".config")
        except (RuntimeError, KeyError):  # no home folder known: no per-user folder either
            base = ""
        user = str(Path(base) / PACKAGE) if base else ""
    if user:
        places.append(Path(user))
    unique: list[Path] = []
    for place in places:
        resolved = place.resolve()
        if resolved not in unique:
            unique.append(resolved)
    return unique


def confined_file(parameter: str, value: str) -> Path:
    """The file parameter ``parameter`` = ``value`` resolved (links followed), if it lies in an
    allowed folder.

    Raises
    ------
    InvalidInputError
        The file lies elsewhere (after following links), or is not a regular file; the message
        names the parameter, the value and the allowed folders.
    """
    places = allowed_config_dirs()
    path = Path(value).expanduser().resolve()
    if not any(path.is_relative_to(place) for place in places):
        raise InvalidInputError(
            f"{parameter} = {value!r}: refused, files may only come from "
            f"{', '.join(str(place) for place in places)} (set {USER_CONFIG_ENV} for your own)"
        )
    if not path.is_file():
        raise InvalidInputError(f"{parameter} = {value!r}: no such file")
    return path


def load_file_parameter(
    parameter: str, value: str, load: Callable[[Path], LoadedT]
) -> LoadedT:
    """``load`` the confined file that parameter ``parameter`` names.

    Raises
    ------
    InvalidInputError
        Refused place (see :func:`confined_file`) or a file ``load`` refuses; the message names
        the parameter, the file and where in it the problem is, never a value from the file.
    """
    path = confined_file(parameter, value)
    try:
        return load(path)
    except CompliantDemoError as exc:
        raise InvalidInputError(
            f"{parameter} = {value!r}: {_where(exc, str(path))} {_problem(exc)}"
        ) from None


def _where(exc: Exception, path: str) -> str:
    """The field the loader names: its path after the file name, then the validation error's."""
    text = str(exc)
    field = ""
    if text.startswith(path):
        rest = text[len(path):]
        length = 0
        while length < len(rest) and (rest[length].isalnum() or rest[length] in "._[]"):
            length += 1
        field = rest[:length].strip(".")
    cause = _validation_error(exc)
    if cause is not None:
        first = cause.errors()[0]
        location = [str(part) for part in first["loc"]]
        if first["type"] == "extra_forbidden":
            location = location[:-1]  # the unknown key is the file's text
        field = ".".join(part for part in (field, *location) if part)
    return f"field {field!r}:" if field else "the file:"


def _problem(exc: Exception) -> str:
    """What is wrong, in words the loader's code wrote (no value from the file)."""
    import yaml

    cause = exc.__context__
    validation = _validation_error(exc)
    if validation is not None:
        first = validation.errors()[0]
        if first["type"] == "extra_forbidden":
            return "holds a field that is not allowed"
        if first["type"] in _VALUE_MESSAGES:
            return "fails a consistency check"
        return str(first["msg"])
    if isinstance(cause, yaml.MarkedYAMLError) and cause.problem_mark is not None:
        mark = cause.problem_mark
        return f"not a readable YAML document (line {mark.line + 1}, column {mark.column + 1})"
    if isinstance(cause, yaml.YAMLError | RecursionError):
        return "not a readable YAML document"
    if isinstance(cause, OSError):
        return f"cannot read the file ({cause.strerror})"
    if isinstance(cause, UnicodeDecodeError):
        return "not UTF-8 text"
    text = str(exc)
    if "expected a mapping" in text:
        return "expected a mapping"
    if "expected a list" in text:
        return "expected a list"
    return "is not valid (details withheld: they would show the file's contents)"


def _validation_error(exc: Exception):
    """The pydantic ValidationError the loader turned into ``exc``, if any."""
    from pydantic import ValidationError

    cause = exc.__context__
    return cause if isinstance(cause, ValidationError) else None
