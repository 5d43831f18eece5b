"""The ``compliant-demo`` command line: one entry point, one subcommand per step of the job.

Each subcommand lives in a module of this package that defines ``register(subparsers)``; the
module is listed in ``_COMMAND_MODULES``. User errors (our named exceptions) print one line and
exit with status 2; success exits 0.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from compliant_demo import __version__
from compliant_demo.exceptions import CompliantDemoError

__all__ = ["main", "build_parser"]

_COMMAND_MODULES: tuple[str, ...] = (
    "compliant_demo.cli.launch_cmds",
    "compliant_demo.cli.store_cmds",
    "compliant_demo.cli.tour_cmds",
    "compliant_demo.cli.teaching_cmds",
    "compliant_demo.cli.learn_cmds",
    "compliant_demo.cli.replay_cmds",
    "compliant_demo.cli.campaign_cmds",
    "compliant_demo.cli.report_cmds",
)


def build_parser() -> argparse.ArgumentParser:
    """The full argument parser with every registered subcommand."""
    parser = argparse.ArgumentParser(
        prog="compliant-demo",
        description=(
            "Record kinesthetic demonstrations on compliant joints, learn skills with stiffness "
            "profiles and check them in perturbed simulation. SI units throughout "
            "(rad, rad/s, N*m, N*m/rad, s)."
        ),
    )
    parser.add_argument("--version", action="version", version=f"%(prog)s {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for module_name in _COMMAND_MODULES:
        importlib.import_module(module_name).register(subparsers)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the process exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        status = args.handler(args)
    except CompliantDemoError as exc:
        print(f"compliant-demo {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"compliant-demo {args.command}: interrupted", file=sys.stderr)
        return 130
    return int(status or 0)
