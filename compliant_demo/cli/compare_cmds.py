"""``compliant-demo compare``: two skills (or two versions of one) on the same scenarios."""

from __future__ import annotations

import argparse
import re
import sys
from dataclasses import replace
from pathlib import Path

from compliant_demo.app.progress import campaign_progress
from compliant_demo.campaign import ReplayCampaign, run_campaign
from compliant_demo.cli._job_options import (
    add_backend_options,
    add_plant_option,
    add_progress_option,
    add_target_options,
    non_negative_int,
    positive_int,
    read_goal,
    read_plant,
    read_spec,
    show_progress,
)
from compliant_demo.cli._verdict import add_criteria_option, print_verdict, read_criteria
from compliant_demo.cli.common import (
    add_json_option,
    add_store_option,
    emit_caution,
    emit_json,
    emit_table,
    store_path_of,
)
from compliant_demo.comparison import (
    SideSummary,
    comparison_columns,
    comparison_rows,
    summarise_side,
)
from compliant_demo.display import printable
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.learning import StoredSkill, load_skill
from compliant_demo.readiness import Verdict, assess_replays, record_verdict
from compliant_demo.replay import ReplaySetup
from compliant_demo.store import DemoStore

__all__ = ["register"]

_SKILL = re.compile(r"^(?P<name>[^:]+?)(?::(?P<version>[1-9][0-9]{0,8}))?$")


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``compare`` subcommand."""
    parser = subparsers.add_parser(
        "compare",
        help="replay two skills or versions on the same perturbed scenarios and compare them",
        description=(
            "Run one campaign per skill with the same spec, seed, scenarios, plant, goal and "
            "duration (so scenario i is the same perturbation for both), store both, and print "
            "one table: per perturbation kind, scenarios passed and failed (a limit left), "
            "scenarios not recovered, and the median goal error (rad), peak deviation (rad), "
            "recovery time (s), peak interaction torque (N*m) and injected energy (J), and each "
            "skill's readiness verdict (stored) with its first reason."
        ),
    )
    parser.add_argument("skills", nargs=2, metavar="SKILL[:VERSION]",
                        help="skill name, optionally with a version (default: the latest)")
    add_store_option(parser)
    add_plant_option(parser)
    parser.add_argument("--spec", type=Path, default=None, metavar="FILE",
                        help="campaign spec YAML; default: every kind, sized for the cork_seat "
                             "arm and the first skill's movement duration")
    parser.add_argument("--scenarios", type=positive_int, default=70, metavar="N",
                        help="perturbed scenarios per skill (default: 70)")
    parser.add_argument("--seed", type=non_negative_int, default=0,
                        help="campaign seed, the same for both skills (default: 0)")
    add_target_options(parser)
    add_criteria_option(parser)
    add_backend_options(parser)
    add_progress_option(parser)
    add_json_option(parser)
    parser.set_defaults(handler=_run)


def _stored(store: DemoStore, text: str) -> tuple[str, StoredSkill]:
    """``NAME:VERSION`` label and the stored skill of one positional argument."""
    match = _SKILL.match(text)
    if match is None:
        raise InvalidInputError(f"SKILL[:VERSION] {printable(text)!r}: expected a skill name, "
                                "optionally followed by :VERSION (a positive integer)")
    version = match.group("version")
    stored = load_skill(store, match.group("name"), None if version is None else int(version))
    return f"{stored.record.name}:{stored.record.version}", stored


def _run(args: argparse.Namespace) -> int:
    plant = read_plant(args)
    criteria = read_criteria(args)
    sides: list[SideSummary] = []
    verdicts: list[Verdict] = []
    with DemoStore(store_path_of(args), create=False, durable=False) as store:
        chosen = [_stored(store, text) for text in args.skills]
        if chosen[0][1].record.id == chosen[1][1].record.id:
            raise InvalidInputError(f"SKILL[:VERSION]: both name {chosen[0][0]}; compare two "
                                    "different skills or versions")
        setups = [ReplaySetup(stored.skill, plant, duration_s=args.duration,
                              settle_s=args.settle,
                              goal=read_goal(args, plant, stored.skill.joints))
                  for _, stored in chosen]
        spec = read_spec(args, setups[0])
        for (label, stored), setup in zip(chosen, setups, strict=True):
            job = ReplayCampaign(setup, spec, args.scenarios, seed=args.seed)

            def announce(campaign_id: str, label: str = label) -> None:
                print(f"campaign {campaign_id}: started for {label}", file=sys.stderr)

            with campaign_progress(show_progress(args), announce) as progress:
                summary = run_campaign(store, job, skill_id=stored.record.id,
                                       workers=args.workers, scheduler=args.scheduler,
                                       on_start=progress.on_start, on_batch=progress.on_batch)
            results = list(store.find_replay_results(campaign_id=summary.campaign_id))
            verdict = assess_replays(criteria, setup, results)
            record_verdict(store, verdict, skill_id=stored.record.id, plant=setup.plant,
                           criteria=criteria, campaign_id=summary.campaign_id)
            verdicts.append(verdict)
            first = (f"{verdict.reasons[0].check} ({verdict.reasons[0].joint})"
                     if verdict.reasons else None)
            sides.append(replace(
                summarise_side(label, stored.record.id, summary.campaign_id, results),
                extra={"verdict": verdict.verdict, "first_reason": first}))
    if args.json:
        emit_json({"plant": plant.describe(), "seed": args.seed, "scenarios": args.scenarios,
                   "spec": spec.model_dump(mode="json"),
                   "criteria_digest": criteria.digest,
                   "skills": [{**side.to_dict(), "reasons": verdict.to_dict()["reasons"]}
                              for side, verdict in zip(sides, verdicts, strict=True)]})
        return 0
    print(f"{sides[0].label} against {sides[1].label} on the {plant.describe()}: "
          f"{args.scenarios} scenarios each, seed {args.seed}, campaigns "
          f"{sides[0].campaign_id} and {sides[1].campaign_id}")
    emit_table(comparison_rows(sides), comparison_columns(sides))
    for side, verdict in zip(sides, verdicts, strict=True):
        print(f"{side.label}:", end=" ")
        print_verdict(verdict)
    emit_caution()
    return 0
