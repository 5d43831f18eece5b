"""``compliant-demo replay``: run one skill once on the simulated joint, optionally perturbed."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from tqdm import tqdm

from compliant_demo.cli._job_options import (
    add_plant_option,
    add_progress_option,
    add_skill_options,
    add_target_options,
    non_negative_int,
    positive_float,
    read_goal,
    read_plant,
    read_skill,
    show_progress,
)
from compliant_demo.cli._verdict import add_criteria_option, print_verdict, read_criteria
from compliant_demo.cli.common import (
    add_json_option,
    add_store_option,
    emit_caution,
    emit_json,
    emit_table,
    existing_file,
    store_path_of,
)
from compliant_demo.perturbation import load_schedule_yaml
from compliant_demo.readiness import assess_replays
from compliant_demo.replay import ReplayRun, ReplaySetup
from compliant_demo.store import DemoStore

__all__ = ["register"]

_SHOWN = ("goal_error_max_rad", "peak_deviation_rad", "recovery_time_s",
          "peak_interaction_torque_Nm", "energy_injected_J", "energy_tank_deficit_J",
          "n_limit_violations")


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``replay`` subcommand."""
    parser = subparsers.add_parser(
        "replay",
        help="replay a skill once on the simulated joint and store the outcome",
        description=(
            "Roll the skill out (movement, stiffness N*m/rad and damping N*m*s/rad schedule), "
            "run it on the simulated plant step by step with the perturbations of --schedule, "
            "stop safely at the first torque (N*m), joint range (rad) or stiffness-rate "
            "(N*m/rad/s) violation, and store metrics and trace as a replay result. Exits 0 "
            "only when the replay ran to its end without a violation."
        ),
    )
    add_store_option(parser)
    add_skill_options(parser)
    add_plant_option(parser)
    parser.add_argument("--schedule", type=Path, default=None, metavar="FILE",
                        help="perturbation schedule YAML {name, perturbations: [{kind, joint, "
                             "onset_s, duration_s, magnitude, sign, ...}]} (default: none)")
    add_target_options(parser)
    parser.add_argument("--dt", type=positive_float, default=1e-3, metavar="S",
                        help="control period and integration step, s (default: 0.001)")
    parser.add_argument("--max-stiffness-rate", type=positive_float, default=float("inf"),
                        metavar="K_PER_S",
                        help="stop when the commanded stiffness changes faster, N*m/rad/s "
                             "(default: no limit beyond the mechanism's own)")
    parser.add_argument("--seed", type=non_negative_int, default=0,
                        help="seed of sensor noise and unseeded random torques (default: 0)")
    add_criteria_option(parser)
    add_progress_option(parser)
    add_json_option(parser)
    parser.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    plant = read_plant(args)
    criteria = read_criteria(args)
    schedule = (None if args.schedule is None
                else load_schedule_yaml(existing_file("--schedule", args.schedule)))
    with DemoStore(store_path_of(args), create=False) as store:
        stored = read_skill(store, args)
        record, skill = stored.record, stored.skill
        setup = ReplaySetup(skill, plant, dt=args.dt, duration_s=args.duration,
                            goal=read_goal(args, plant, skill.joints), settle_s=args.settle,
                            max_stiffness_rate=args.max_stiffness_rate)
        run = ReplayRun(setup, schedule, seed=args.seed)
        with tqdm(total=run.n_steps, desc="replay", unit="step", file=sys.stderr,
                  disable=not show_progress(args), leave=False, mininterval=0.5) as bar:
            while not run.finished:
                run.step()
                bar.update(1)
        status, reason, metrics, trace = run.outcome()
        parameters = setup.parameters("command", schedule, args.seed,
                                      skill_version=record.version)
        result_id = store.save_replay_result(skill_id=record.id, metrics=metrics,
                                             parameters=parameters, status=status,
                                             reason=reason, trace=trace)
        # the verdict of the skill on this one replay (a campaign judges it on many)
        verdict = assess_replays(criteria, setup, [store.load_replay_result(result_id).info])
    if args.json:
        emit_json({"result_id": result_id, "skill": skill.name, "version": record.version,
                   "plant": plant.describe(), "status": status, "reason": reason,
                   "goal": list(setup.goal or skill.goal), "duration_s": setup.movement_s,
                   "metrics": metrics, **verdict.to_dict()})
    else:
        print(f"replay of {skill.name} version {record.version} on the "
              f"{plant.describe()}: {status}"
              + (f" ({reason})" if reason else "") + f"; result {result_id}")
        # a replay stopped at its first step has no outcome metrics (they need two steps)
        emit_table([{"metric": key, "value": metrics[key]} for key in _SHOWN if key in metrics],
                   ("metric", "value"), joints=skill.joints)
        print_verdict(verdict)
        emit_caution()
    return 0 if status == "ok" else 1
