"""``compliant-demo teaching-watch``: say, for each demonstration the recorder finishes, whether
to keep it or take it again, and why.

Runs the teaching watch node (:mod:`compliant_demo.nodes.teaching_watch`) as a child process
(:mod:`compliant_demo.app.supervisor`), on this shell's ROS domain or ``--domain-id``; its lines
go straight to stdout. Exit status: 0 every watched demonstration can be kept, 1 at least one
should be taken again, 2 a setting was refused, 3 ``--timeout`` passed before ``--demos``
verdicts, 130 interrupted; any other is the watch's own failure (70 when it raised), never a
verdict, and gets a line on stderr.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import subprocess
import sys

from compliant_demo.app.supervisor import start_child, stop_children
from compliant_demo.cli.common import integer_in_range

__all__ = ["register"]

COMMAND = "teaching-watch"
# Beyond its own --timeout the node gets this long to end by itself before it is stopped, s.
_END_GRACE_S = 20.0
# Exit statuses of the watch node that are its answer: kept, take again, refused setting, timeout
_VERDICTS = (0, 1, 2, 3)


def _seconds(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = -1.0
    if not 0.0 < value <= 1e7:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number of seconds in (0, 1e7]")
    return value


# A ROS 2 topic name (relative, absolute or private): parts of letters, digits and _, none
# starting with a digit, joined by single slashes (common practice: the ROS 2 name rules).
_TOPIC = re.compile(r"(~/?|/)?[A-Za-z_][A-Za-z0-9_]*(/[A-Za-z_][A-Za-z0-9_]*)*")


def _topic(text: str) -> str:
    if not _TOPIC.fullmatch(text):
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a ROS topic name (parts of letters, digits and _, each starting "
            "with a letter or _, joined by /)")
    return text


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``teaching-watch`` subcommand."""
    parser = subparsers.add_parser(
        COMMAND,
        help="say when a demonstration should be taken again, and why (live, from the recorder)",
        description=(
            "Listen to the recorder's teaching_feedback topic and print, for every demonstration "
            "it finishes, 'keep it' or 'take it again' with the reasons: poorly excited (share "
            "of estimator windows with a stiffness estimate below the recorder's "
            "feedback_min_excited_fraction) or far from the others (RMS deviation in rad from "
            "the aligned mean of the earlier demonstrations of the skill and tags, by open-end "
            "DTW, above feedback_max_deviation_rad). Start it before the demonstrations. Exit "
            "status 0: all kept, 1: one or more to take again, 2: a setting refused, 3: "
            "--timeout before --demos; any other: the watch failed."
        ),
    )
    parser.add_argument("--demos", type=integer_in_range(1, 1000000), default=0, metavar="N",
                        help="end after N verdicts (default: run until Ctrl-C or --timeout)")
    parser.add_argument("--timeout", type=_seconds, default=0.0, metavar="S",
                        help="end after S seconds (default: no limit)")
    parser.add_argument("--live", action="store_true",
                        help="also print the figures while a demonstration is recorded")
    parser.add_argument("--topic", type=_topic, default="teaching_feedback",
                        help="the recorder's feedback topic (default: teaching_feedback)")
    parser.add_argument("--domain-id", type=integer_in_range(0, 232), default=None, metavar="ID",
                        help="ROS domain of the recorder (default: $ROS_DOMAIN_ID)")
    parser.add_argument("--json", action="store_true", help="one JSON object per verdict")
    parser.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    env = dict(os.environ)
    if args.domain_id is not None:
        env["ROS_DOMAIN_ID"] = str(args.domain_id)
    # the topic quoted: rcl reads a value as YAML, and a topic named true or on is a string
    parameters = {"topic": json.dumps(args.topic), "demonstrations": args.demos,
                  "timeout_s": args.timeout,
                  "live": str(args.live).lower(), "json": str(args.json).lower()}
    command = [sys.executable, "-m", "compliant_demo.nodes.teaching_watch", "--ros-args"]
    for name, value in parameters.items():
        command += ["-p", f"{name}:={value}"]
    sys.stdout.flush()
    child = start_child("teaching_watch", command, env=env)
    try:
        child.process.wait(args.timeout + _END_GRACE_S if args.timeout else None)
    except subprocess.TimeoutExpired:
        stop_children([child])
        print(f"compliant-demo {COMMAND}: --timeout {args.timeout} s passed and the watch did not "
              f"end within {_END_GRACE_S:g} s more; stopped", file=sys.stderr)
        return 3
    except KeyboardInterrupt:
        stop_children([child])
        print(f"compliant-demo {COMMAND}: interrupted", file=sys.stderr)
        return 130
    status = child.process.returncode
    if status not in _VERDICTS:
        print(f"compliant-demo {COMMAND}: the watch failed with exit status {status} (not a "
              "verdict; its log above says why)", file=sys.stderr)
    return status
