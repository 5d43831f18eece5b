"""``compliant-demo record``: record demonstrations with the simulated teacher into the store."""

from __future__ import annotations

import argparse
from pathlib import Path

from compliant_demo.cli._job_options import (
    add_progress_option,
    non_negative_int,
    positive_float,
    positive_int,
    show_progress,
)
from compliant_demo.cli.common import add_json_option, add_store_option, emit_json, store_path_of
from compliant_demo.cli.tour_cmds import default_domain
from compliant_demo.tour import TourSettings, record_demonstrations, run_tag

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
    parser.add_argument("--demos", type=positive_int, default=4, metavar="N",
                        help="demonstrations to record, 2 to 50 (default: 4)")
    parser.add_argument("--demo-duration", type=positive_float, default=None, metavar="S",
                        help="nominal duration of each demonstration, 1 to 60 s (default: the "
                             "scenario's 6 s)")
    parser.add_argument("--seed", type=non_negative_int, default=1,
                        help="seed of the first demonstration; demonstration i uses seed + i "
                             "(default: 1)")
    parser.add_argument("--operator", default="operator_a",
                        help="operator name stored with each demonstration (default: operator_a)")
    parser.add_argument("--tag", default=None,
                        help="tag of the recorded demonstrations (default: record-<UTC>-<pid>)")
    parser.add_argument("--domain-id", type=non_negative_int, default=None, metavar="ID",
                        help="ROS_DOMAIN_ID of the node processes, 0 to 101 (default: "
                             "$ROS_DOMAIN_ID or 17)")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, metavar="DIR",
                        help=f"truth file and node log (default: ./{DEFAULT_OUT})")
    add_progress_option(parser)
    add_json_option(parser)
    parser.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    store = store_path_of(args)
    store.parent.mkdir(parents=True, exist_ok=True)
    settings = TourSettings(
        store=store,
        out_dir=args.out,
        n_demonstrations=args.demos,
        demo_duration_s=args.demo_duration,
        seed=args.seed,
        operator=args.operator,
        domain_id=default_domain() if args.domain_id is None else args.domain_id,
    )
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
