"""Options and output helpers shared by every subcommand: store path, JSON or table output."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

from compliant_demo.store.location import STORE_ENV, default_store_path

__all__ = [
    "default_store_path",
    "add_store_option",
    "add_json_option",
    "store_path_of",
    "emit_json",
    "emit_table",
]


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


def emit_json(data: Any) -> None:
    """Print ``data`` as one JSON document."""
    json.dump(data, sys.stdout, indent=2, default=str)
    sys.stdout.write("\n")


def emit_table(rows: Iterable[Mapping[str, Any]], columns: Sequence[str]) -> None:
    """Print ``rows`` as a plain aligned table with the given column order."""
    cells = [[_cell(row.get(col)) for col in columns] for row in rows]
    widths = [max([len(col)] + [len(r[i]) for r in cells]) for i, col in enumerate(columns)]
    print("  ".join(col.ljust(w) for col, w in zip(columns, widths, strict=True)).rstrip())
    for r in cells:
        print("  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip())


def _cell(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.4g}"
    if isinstance(value, list | tuple):
        return ",".join(str(v) for v in value)
    return str(value)
