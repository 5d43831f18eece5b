"""``compliant-demo tour``: the whole job on the embedded default store, in one command."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from compliant_demo.app.run_plan import DEFAULT_DOMAIN_ID, RUNS_FOLDER, RunPlan
from compliant_demo.app.tour import TourSettings, run_tour
from compliant_demo.cli._job_options import (
    add_backend_options,
    add_plant_option,
    add_progress_option,
    add_target_options,
    non_negative_int,
    positive_float,
    positive_int,
    read_goal,
    read_plant,
    show_progress,
)
from compliant_demo.cli._verdict import add_criteria_option, print_verdict, read_criteria
from compliant_demo.cli.common import (
    add_json_option,
    add_store_option,
    emit_caution,
    emit_json,
    store_path_of,
)
from compliant_demo.exceptions import InvalidInputError

__all__ = ["register", "add_recording_options", "recording_settings", "announce_plan"]


def add_recording_options(parser: argparse.ArgumentParser, files: str,
                          with_campaign: bool = False) -> None:
    """``--demos``, ``--demo-duration``, ``--domain-id``, ``--seed`` and ``--out``: what the
    simulated teacher records (and, ``with_campaign``, what the campaign draws from ``--seed``)
    and where the run's ``files`` go."""
    parser.add_argument("--demos", type=positive_int, default=4, metavar="N",
                        help="demonstrations to record, 2 to 50 (default: 4)")
    parser.add_argument("--demo-duration", type=positive_float, default=None, metavar="S",
                        help="nominal duration of each demonstration, 1 to 60 s (default: the "
                             "scenario's 6 s)")
    parser.add_argument("--domain-id", type=non_negative_int, default=None, metavar="ID",
                        help="ROS_DOMAIN_ID of the node processes, 0 to 101, refused while "
                             "another run holds it (default: the first one no other run holds, "
                             f"from $ROS_DOMAIN_ID or {DEFAULT_DOMAIN_ID} upward; printed)")
    parser.add_argument("--seed", type=non_negative_int, default=None,
                        help="seed of the first demonstration (demonstration i uses seed + i)"
                             + (" and of the campaign" if with_campaign else "")
                             + " (default: drawn afresh for each run and printed, so a run can "
                               "be repeated)")
    parser.add_argument("--out", type=Path, default=None, metavar="DIR",
                        help=f"folder for {files} (default: a folder of the run's own, "
                             f"{RUNS_FOLDER}/<run tag>, printed)")


def announce_plan(plan: RunPlan) -> None:
    """Print the run's tag, seed, ROS domain and folder on stderr before it starts."""
    print(plan.describe(), file=sys.stderr, flush=True)


def recording_settings(args: argparse.Namespace, **extra: Any) -> TourSettings:
    """Tour settings from the store, ``--out``, ``--seed`` and the recording options.

    The store's folder is created; a store path that is a directory is refused. ``extra``
    holds the further :class:`TourSettings` fields a subcommand sets.
    """
    store = store_path_of(args)
    if store.exists() and store.is_dir():
        raise InvalidInputError(f"--store {str(store)!r} is a directory")
    store.parent.mkdir(parents=True, exist_ok=True)
    return TourSettings(
        store=store,
        out_dir=args.out,
        n_demonstrations=args.demos,
        demo_duration_s=args.demo_duration,
        seed=args.seed,
        domain_id=args.domain_id,
        **extra,
    )


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``tour`` subcommand."""
    parser = subparsers.add_parser(
        "tour",
        help="record, learn, run a perturbation campaign and write the report, in one go",
        description=(
            "Start the simulated teacher and the recorder as ROS 2 node processes (DDS on "
            "loopback only), record cork_seat demonstrations of the two-joint bench arm (soft "
            "approach, stiff press, soft retreat; about 6 s each, real time) into the store, "
            "learn the skill, replay it in a campaign of perturbed scenarios over every "
            "perturbation kind on the target arm (default: antagonistic spring pairs, whose "
            "damping does not follow the stiffness), and write the HTML report. Prints a short "
            "summary with the report's path and the readiness verdict (stored with the "
            "campaign). Takes one to two minutes on two cores."
        ),
    )
    add_store_option(parser)
    add_recording_options(parser, "the report, figures, truth file and node log",
                          with_campaign=True)
    parser.add_argument("--scenarios", type=positive_int, default=350, metavar="N",
                        help="perturbed scenarios in the campaign (default: 350, 50 per kind)")
    add_plant_option(parser, default_text="config/joint_cork_seat_antagonistic.yaml: the "
                                          "bench arm on antagonistic spring pairs")
    add_criteria_option(parser)
    add_target_options(parser)
    add_backend_options(parser)
    add_progress_option(parser)
    add_json_option(parser)
    parser.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    read_criteria(args)  # a bad criteria file is refused before anything is recorded
    plant = read_plant(args)
    goal = read_goal(args, plant, [joint.name for joint in plant.joints])
    settings = recording_settings(args, n_scenarios=args.scenarios, workers=args.workers,
                                  scheduler=args.scheduler, plant=args.plant,
                                  criteria=args.criteria, goal=goal,
                                  duration_s=args.duration, settle_s=args.settle)
    result = run_tour(settings, progress=show_progress(args), announce=announce_plan)
    if args.json:
        emit_json(result.as_dict())
        return 0
    timings = result.timings_s
    plan = result.plan
    print(f"recorded {len(result.demonstration_ids)} cork_seat demonstrations with the "
          f"simulated teacher ({timings['record']:.0f} s) into {result.store}, tag {plan.tag}, "
          f"seed {plan.seed}, ROS domain {plan.domain_id}")
    print(f"learned cork_seat version {result.skill_version} ({timings['learn']:.1f} s)")
    campaign = result.campaign
    print(f"campaign {campaign.campaign_id}: {campaign.n_scenarios} perturbed scenarios, "
          f"{campaign.n_violations} left the joint limits ({timings['campaign']:.0f} s, "
          f"{campaign.scenarios_per_s:.0f} scenarios/s on {campaign.workers} workers)")
    for key, value in result.summary:
        if key in ("recovered within the band", "median goal error", "median peak deviation",
                   "schedule checks"):
            print(f"  {key}: {value}")
    print(f"report: {result.report.resolve()}")
    print_verdict(result.verdict)
    emit_caution()
    return 0
