"""``compliant-demo launch FILE [name:=value ...]``: start the nodes an XML launch file declares.

For machines without the ROS 2 launch packages: each declared node runs as its own process with
the declared name, namespace and parameters. Ctrl-C (SIGINT) or SIGTERM is passed on to every
node, as is SIGINT when the node named by ``--until`` ends; the command returns once all have
ended, with the first non-zero exit status (a node ignoring the signal for 10 s is killed).
"""

from __future__ import annotations

import argparse
import signal
import subprocess
import sys
import time
from pathlib import Path

from compliant_demo.app.launch_file import (
    LaunchDescription,
    parse_launch_arguments,
    read_launch_file,
    start_nodes,
)
from compliant_demo.app.supervisor import describe_exit, reap, stop_children

__all__ = ["register"]

_GRACE_S = 10.0


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``launch`` subcommand."""
    parser = subparsers.add_parser(
        "launch",
        help="start the nodes an XML launch file declares",
        description=(
            "Start every <node> of one of our *.launch.xml files as a process with its declared "
            "parameters, for machines without the ROS 2 launch packages."
        ),
    )
    parser.add_argument("launch_file", type=Path, help="a *.launch.xml file")
    parser.add_argument(
        "arguments", nargs="*", metavar="NAME:=VALUE", help="values for the file's <arg> entries"
    )
    parser.add_argument(
        "--print",
        dest="print_only",
        action="store_true",
        help="print each node's command line and exit without starting anything",
    )
    parser.add_argument(
        "--until",
        metavar="NODE",
        default=None,
        help="when the node with this name ends, stop the others (SIGINT) and return",
    )
    parser.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    description = read_launch_file(args.launch_file, parse_launch_arguments(args.arguments))
    if args.print_only:
        for node in description.nodes:
            print(subprocess.list2cmdline(node.command_line()))
        return 0
    until = None
    if args.until is not None:
        until = description.nodes.index(description.node(args.until))
    return _supervise(description, until)


def _supervise(description: LaunchDescription, until: int | None) -> int:
    children = start_nodes(description)
    stopping: list[int] = []

    def forward(signum: int, _frame: object) -> None:
        stopping.append(signum)

    previous = {s: signal.signal(s, forward) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        while reap(children) and not stopping:
            time.sleep(0.1)
            if until is not None and not children[until].running():
                stopping.append(signal.SIGINT)
    finally:
        codes = stop_children(children)
        for signum, handler in previous.items():
            signal.signal(signum, handler)
    for name, code in codes.items():
        if code:
            print(f"node {name} {describe_exit(code)}", file=sys.stderr)
    return next((abs(code) for code in codes.values() if code), 0)
