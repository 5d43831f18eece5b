"""``compliant-demo simulate-teaching``: the simulated teacher guides the joints while the
recorder records its demonstrations into the store."""

from __future__ import annotations

import argparse
import sys

from compliant_demo.app.run_plan import planned_run, run_tag
from compliant_demo.app.tour import plan_dict, record_demonstrations
from compliant_demo.cli._job_options import add_progress_option, show_progress
from compliant_demo.cli.common import add_json_option, add_store_option, emit_json
from compliant_demo.cli.tour_cmds import add_recording_options, announce_plan, recording_settings

__all__ = ["register"]

COMMAND = "simulate-teaching"


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``simulate-teaching`` subcommand."""
    parser = subparsers.add_parser(
        COMMAND,
        help="record cork_seat demonstrations that the simulated teacher gives (ROS 2 processes)",
        description=(
            "Start the simulated teacher and the recorder as ROS 2 node processes from "
            "launch/record.launch.xml (DDS on loopback only, a ROS domain of the run's own) and "
            "record the cork_seat demonstrations the simulated teacher gives (joint angle rad, "
            "velocity rad/s, interaction torque N*m, online stiffness estimate N*m/rad at 1 kHz) "
            "into the store, in real time. The teacher's ground-truth hand stiffness goes to "
            "teacher_truth_<run tag>.npz in the run's folder. Ctrl-C stops both nodes cleanly: "
            "the open demonstration is kept as 'incomplete' with the flag 'interrupted'. To "
            "record from a robot instead, run the recorder alone (see 'Connecting a robot' in "
            "the README)."
        ),
    )
    add_store_option(parser)
    add_recording_options(parser, "the truth file and the node log")
    parser.add_argument("--operator", default="operator_a",
                        help="operator name stored with each demonstration (default: operator_a)")
    parser.add_argument("--tag", default=None,
                        help="tag of the recorded demonstrations (default: "
                             "teaching-<UTC>-<pid>)")
    add_progress_option(parser)
    add_json_option(parser)
    parser.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    settings = recording_settings(args, operator=args.operator)
    store = settings.store
    with planned_run(args.tag or run_tag("teaching"), seed=settings.seed,
                     domain_id=settings.domain_id, out_dir=settings.out_dir) as plan:
        announce_plan(plan)
        try:
            demo_ids = record_demonstrations(settings, plan, show_progress(args))
        except KeyboardInterrupt:
            print(f"compliant-demo {COMMAND}: interrupted; both nodes stopped cleanly. The "
                  f"demonstrations so far are tagged {plan.tag} in {store} (the open one "
                  f"'incomplete', flagged 'interrupted'); the teacher's ground truth so far: "
                  f"{plan.truth_path}", file=sys.stderr)
            return 130
    if args.json:
        emit_json({"store": str(store), **plan_dict(plan), "demonstration_ids": demo_ids})
    else:
        print(f"recorded {len(demo_ids)} cork_seat demonstrations into {store}, tag {plan.tag}, "
              f"seed {plan.seed}")
        for demo_id in demo_ids:
            print(f"  {demo_id}")
        print(f"teacher's ground truth: {plan.truth_path}")
    return 0
