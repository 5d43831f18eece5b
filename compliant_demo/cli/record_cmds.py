"""``compliant-demo record``: record demonstrations with the simulated teacher into the store."""

from __future__ import annotations

import argparse
from pathlib import Path

from compliant_demo.app.tour import record_demonstrations, run_tag
from compliant_demo.cli._job_options import (
    add_progress_option,
    non_negative_int,
    show_progress,
)
from compliant_demo.cli.common import add_json_option, add_store_option, emit_json
from compliant_demo.cli.tour_cmds import add_recording_options, recording_settings

__all__ = ["register"]

DEFAULT_OUT = Path("compliant_demo_record")


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``record`` subcommand."""
    parser = subparsers.add_parser(
        "record",
        help="record cork_seat demonstrations with the simulated teacher (ROS 2 processes)",
        description=(
            "Start the simulated teacher and the recorder as ROS 2 node processes from "
            "launch/record.launch.xml (DDS on loopback only, own ROS domain) and record "
            "cork_seat demonstrations (joint angle rad, velocity rad/s, interaction torque N*m, "
            "online stiffness estimate N*m/rad at 1 kHz) into the store, in real time. The "
            "teacher's ground-truth hand stiffness goes to --out/teacher_truth.npz. To record "
            "from a robot instead, run the recorder alone (see 'Connecting a robot' in the "
            "README)."
        ),
    )
    add_store_option(parser)
    add_recording_options(parser)
    parser.add_argument("--seed", type=non_negative_int, default=1,
                        help="seed of the first demonstration; demonstration i uses seed + i "
                             "(default: 1)")
    parser.add_argument("--operator", default="operator_a",
                        help="operator name stored with each demonstration (default: operator_a)")
    parser.add_argument("--tag", default=None,
                        help="tag of the recorded demonstrations (default: record-<UTC>-<pid>)")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, metavar="DIR",
                        help=f"truth file and node log (default: ./{DEFAULT_OUT})")
    add_progress_option(parser)
    add_json_option(parser)
    parser.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    settings = recording_settings(args, operator=args.operator)
    store = settings.store
    tag = args.tag or run_tag("record")
    demo_ids, truth = record_demonstrations(settings, tag, show_progress(args))
    if args.json:
        emit_json({"store": str(store), "tag": tag, "demonstration_ids": demo_ids,
                   "truth": str(truth), "log": str(args.out / "nodes.log")})
    else:
        print(f"recorded {len(demo_ids)} cork_seat demonstrations into {store}, tag {tag}")
        for demo_id in demo_ids:
            print(f"  {demo_id}")
        print(f"teacher's ground truth: {truth}")
    return 0
