"""``compliant-demo launch FILE [name:=value ...]``: start the nodes an XML launch file declares.

For machines without the ROS 2 launch packages: each declared node runs as its own process with
the declared name, namespace and parameters, started and stopped by
:mod:`compliant_demo.app.supervisor`. The work is done when every node that ends by itself (the
teacher; the learner and the replay node when told to end after their fit or run) has ended, or
when the node named by ``--until`` has ended; the command then says so, stops the nodes that serve
until stopped (the recorder) and returns. A node that ends by itself with a failure stops the
others at once. Ctrl-C (SIGINT) or SIGTERM stops every node. Stopping is SIGINT, then SIGTERM,
then SIGKILL after grace periods; every node is reaped, and the command returns the first
non-zero exit status (a node ended by a signal counts as that signal's number).
"""

from __future__ import annotations

import argparse
import difflib
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
from compliant_demo.app.supervisor import Child, describe_exit, reap, stop_children
from compliant_demo.cli.common import existing_file
from compliant_demo.exceptions import LaunchFileError

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
        help="the work is done when the node with this name ends: stop the others and return "
             "(default: when every node that ends by itself has ended)",
    )
    parser.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    description = read_launch_file(existing_file("launch_file", args.launch_file),
                                   parse_launch_arguments(args.arguments))
    until = None if args.until is None else _until_index(description, args.until)
    if args.print_only:
        for node in description.nodes:
            print(subprocess.list2cmdline(node.command_line()))
        return 0
    return _supervise(description, until)


def _until_index(description: LaunchDescription, name: str) -> int:
    names = [node.name or node.executable for node in description.nodes]
    if name not in names:
        close = difflib.get_close_matches(name, names, n=1)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        raise LaunchFileError(f"--until {name!r}: {description.path} declares no node of that "
                              f"name (nodes: {', '.join(names)}){hint}")
    return names.index(name)


def _work_over(children: list[Child], finishing: list[int]) -> str | None:
    """What ended the work (``work done: ...`` or ``failed: ...``), or None while it goes on."""
    failed = [children[i] for i in finishing if children[i].returncode not in (None, 0)]
    if failed:
        return "failed: " + "; ".join(f"{c.name} {describe_exit(c.returncode)}" for c in failed)
    if finishing and all(not children[i].running() for i in finishing):
        return f"work done: {', '.join(children[i].name for i in finishing)} ended"
    return None


def _supervise(description: LaunchDescription, until: int | None) -> int:
    if until is not None:
        finishing = [until]
    else:
        finishing = [i for i, node in enumerate(description.nodes) if node.ends_by_itself()]
    children = start_nodes(description)
    for child in children:
        print(f"launch: started {child.name} (pid {child.pid})", file=sys.stderr)
    if not finishing:
        print("launch: no node ends by itself; Ctrl-C stops them", file=sys.stderr)
    stopping: list[int] = []

    def on_signal(signum: int, _frame: object) -> None:
        stopping.append(signum)

    previous = {s: signal.signal(s, on_signal) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        while reap(children) and not stopping:
            outcome = _work_over(children, finishing)
            if outcome is not None:
                running = ", ".join(c.name for c in children if c.running()) or "nothing"
                print(f"launch: {outcome}; stopping {running}", file=sys.stderr)
                break
            time.sleep(0.1)
        if stopping:
            print(f"launch: {signal.Signals(stopping[0]).name}: stopping every node",
                  file=sys.stderr)
    finally:
        codes = stop_children(children)
        for signum, handler in previous.items():
            signal.signal(signum, handler)
    for name, code in codes.items():
        print(f"launch: node {name} {describe_exit(code)}", file=sys.stderr)
    return next((abs(code) for code in codes.values() if code), 0)
