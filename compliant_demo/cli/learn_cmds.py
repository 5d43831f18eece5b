"""``compliant-demo learn``: fit a skill from the complete demonstrations a query selects."""

from __future__ import annotations

import argparse

from compliant_demo.cli._job_options import (
    DEFAULT_SKILL,
    add_plant_option,
    positive_float,
    positive_int,
    read_plant,
)
from compliant_demo.cli.common import (
    add_json_option,
    add_store_option,
    emit_json,
    store_path_of,
)
from compliant_demo.display import printable
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.generalisation import CLASSIC_MIN_NET_FRACTION, FORMULATION_CHOICES
from compliant_demo.learning import LearnRequest, learn_from_store
from compliant_demo.store import DemoStore

__all__ = ["register"]


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``learn`` subcommand."""
    parser = subparsers.add_parser(
        "learn",
        help="learn a skill (movement primitive + stiffness profile) from demonstrations",
        description=(
            "Align the complete demonstrations of a skill in time (DTW), fit one dynamic "
            "movement primitive per joint and a stiffness profile on the same phase basis, and "
            "save the result as a new version of the skill in the store. The stiffness is "
            "clamped to the target mechanism's range (N*m/rad) and the damping policy keeps a "
            "damping ratio of 0.7 on the target joint's inertia (kg*m^2) from --plant."
        ),
    )
    add_store_option(parser)
    parser.add_argument("--skill", default=DEFAULT_SKILL,
                        help=f"skill name to select and to save under (default: {DEFAULT_SKILL})")
    parser.add_argument("--operator", default="", help="only this operator's demonstrations")
    parser.add_argument("--tag", action="append", default=[],
                        help="only demonstrations with this tag (repeat for several)")
    parser.add_argument("--min-demos", type=positive_int, default=2, metavar="N",
                        help="refuse with fewer matching demonstrations (default: 2)")
    parser.add_argument("--n-basis", type=positive_int, default=30, metavar="N",
                        help="Gaussian basis functions per joint, >= 2 (default: 30)")
    parser.add_argument("--band", type=positive_float, default=0.1, metavar="FRACTION",
                        help="Sakoe-Chiba band of the time alignment, fraction of the length "
                             "(default: 0.1)")
    parser.add_argument("--stiffness-source", choices=("auto", "recorded", "variability"),
                        default="auto",
                        help="recorded stiffness channel, spread of the demonstrations, or "
                             "recorded when every demonstration has it (default: auto)")
    parser.add_argument(
        "--formulation", action="append", default=[], metavar="[JOINT=]FORM",
        help="DMP form: auto, classic or goal_robust, for every joint or, as JOINT=FORM, for "
             "one (repeat for several). auto picks classic where the demonstrated start-to-goal "
             f"distance is at least {CLASSIC_MIN_NET_FRACTION:g} of the joint's excursion "
             "(rad), else goal_robust, which keeps the shape under new goals (default: auto)")
    add_plant_option(parser)
    add_json_option(parser)
    parser.set_defaults(handler=_run)


def _formulation(values: list[str], joints: tuple[str, ...]) -> dict[str, str]:
    """Per-joint requests of ``--formulation`` (joints not named: auto)."""
    requested: dict[str, str] = {}
    for value in values:
        joint, _, form = value.rpartition("=")
        named = (joint,) if joint else joints
        if joint and joint not in joints:
            raise InvalidInputError(f"--formulation {printable(value)!r}: no joint "
                                    f"{printable(joint)!r} in the plant {list(joints)}")
        if form not in FORMULATION_CHOICES:
            raise InvalidInputError(f"--formulation {printable(value)!r}: expected "
                                    f"{', '.join(FORMULATION_CHOICES)} (or JOINT=one of them)")
        requested.update(dict.fromkeys(named, form))
    return requested


def _run(args: argparse.Namespace) -> int:
    plant = read_plant(args)
    joints = tuple(joint.name for joint in plant.joints)
    mechanism = plant.mechanism
    request = LearnRequest(
        skill=args.skill,
        joints=joints,
        tags=tuple(args.tag),
        operator=args.operator,
        min_demonstrations=args.min_demos,
        options={
            "n_basis": args.n_basis,
            "band": args.band,
            "stiffness_source": args.stiffness_source,
            "stiffness_range": (mechanism.stiffness_min, mechanism.stiffness_max),
            "target_inertia": [joint.inertia for joint in plant.joints],
            "formulation": _formulation(args.formulation, joints),
        },
    )
    with DemoStore(store_path_of(args), create=False) as store:
        outcome = learn_from_store(store, request)
    if args.json:
        emit_json({
            "skill": outcome.name,
            "version": outcome.version,
            "skill_id": outcome.skill_id,
            "demonstration_ids": list(outcome.demonstration_ids),
            "report": outcome.report,
        })
    else:
        print("\n".join(printable(line) for line in outcome.report.splitlines()))
        print(f"saved as {printable(outcome.name)} version {outcome.version} "
              f"({outcome.skill_id})")
    return 0
