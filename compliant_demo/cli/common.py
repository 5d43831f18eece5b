"""Options and output helpers shared by every subcommand: store path, integer options, JSON or
table output, and how stored text and numbers appear on a terminal."""

from __future__ import annotations

import argparse
import json
import re
import sys
from collections.abc import Callable, Iterable, Mapping, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from compliant_demo.cautions import SAFETY_CAUTION
from compliant_demo.display import format_value, printable
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.resources import package_file
from compliant_demo.store.location import STORE_ENV, default_store_path

__all__ = [
    "DASH_VALUE_OPTIONS",
    "INT64_MAX",
    "default_store_path",
    "add_store_option",
    "add_json_option",
    "store_path_of",
    "existing_file",
    "integer_in_range",
    "emit_json",
    "emit_table",
    "emit_caution",
    "iso_utc",
]

#: Largest value of an SQLite integer (signed 64 bit).
INT64_MAX = 2**63 - 1

#: Options whose value may itself start with "-" (``--order-by -duration_s``, ``--arg -0.5``);
#: the entry point joins them to their value before argparse would take it for an option.
DASH_VALUE_OPTIONS: frozenset[str] = frozenset({"--order-by", "--arg"})

_INTEGER = re.compile(r"[+-]?[0-9]+")

def add_store_option(parser: argparse.ArgumentParser) -> None:
    """``--store PATH``: the store file (default: the embedded default store)."""
    parser.add_argument(
        "--store",
        type=Path,
        default=None,
        help=f"store file (default: ${STORE_ENV} or {default_store_path()})",
    )


def add_json_option(parser: argparse.ArgumentParser) -> None:
    """``--json``: machine-readable output on stdout."""
    parser.add_argument("--json", action="store_true", help="print JSON instead of a table")


def store_path_of(args: argparse.Namespace) -> Path:
    """The store path the user chose, or the default one."""
    return args.store if args.store is not None else default_store_path()


def existing_file(option: str, path: Path) -> Path:
    """The file ``option`` names. A relative ``config/NAME`` or ``launch/NAME`` that is not in
    the working directory is the file of that name the package ships (the README's examples
    run from any folder); anything else missing is an error naming the option."""
    if path.is_file():
        return path
    if not path.is_absolute() and len(path.parts) == 2 and path.parts[0] in ("config", "launch"):
        try:
            return package_file(*path.parts)
        except InvalidInputError:
            pass
    what = "a directory, not a file" if path.is_dir() else "no such file"
    raise InvalidInputError(f"{option} {str(path)!r}: {what}")


def integer_in_range(low: int, high: int = INT64_MAX) -> Callable[[str], int]:
    """argparse type: an integer in ``[low, high]``; argparse names the option in the error.

    Every integer option of the command line is parsed by this one function, so a value out of
    range (``--limit 100000000000000000000``) or not an integer is refused in argument parsing
    with its range stated, before it reaches the store or the simulator.
    """
    stated = f"{low}..{high}"

    def parse(text: str) -> int:
        digits = text.strip()
        if not _INTEGER.fullmatch(digits):
            shown = printable(digits[:40]) + ("..." if len(digits) > 40 else "")
            raise argparse.ArgumentTypeError(f"'{shown}' is not an integer ({stated})")
        # a 5,000-digit value is out of range before Python would refuse to convert it
        value = int(digits) if len(digits) <= 40 else None
        if value is None or not low <= value <= high:
            shown = digits if value is not None else f"a {len(digits.lstrip('+-'))}-digit number"
            raise argparse.ArgumentTypeError(f"{shown} is out of range ({stated})")
        return value

    parse.__name__ = "integer"
    return parse


def emit_json(data: Any) -> None:
    """Print ``data`` as one JSON document."""
    json.dump(data, sys.stdout, indent=2, default=str)
    sys.stdout.write("\n")


def emit_table(
    rows: Iterable[Mapping[str, Any]],
    columns: Sequence[str],
    joints: Sequence[str] | None = None,
) -> None:
    """Print ``rows`` as a plain aligned table with the given column order.

    Cells go through :func:`format_value` (and so :func:`printable`): numbers to 4 significant
    digits, lists as long as ``joints`` labelled by joint name, control characters escaped.
    """
    cells = [[format_value(row.get(col), joints) for col in columns] for row in rows]
    widths = [max([len(col)] + [len(r[i]) for r in cells]) for i, col in enumerate(columns)]
    print("  ".join(col.ljust(w) for col, w in zip(columns, widths, strict=True)).rstrip())
    for r in cells:
        print("  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip())


def emit_caution() -> None:
    """Print the safety caution line that closes every summary of a replay, campaign or report."""
    print(SAFETY_CAUTION)


def iso_utc(unix_s: float) -> str:
    """ISO 8601 in UTC to the second, as every listing prints a time: ``2026-11-30T00:53:20Z``."""
    return datetime.fromtimestamp(unix_s, tz=UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
