"""``compliant-demo campaign``: replay a skill under many seeded perturbations, in batches."""

from __future__ import annotations

import argparse
from pathlib import Path

from compliant_demo.campaign import ReplayCampaign, default_campaign_spec, run_campaign
from compliant_demo.cli._job_options import (
    add_backend_options,
    add_plant_option,
    add_progress_option,
    add_skill_options,
    non_negative_float,
    non_negative_int,
    positive_float,
    positive_int,
    read_plant,
    read_skill,
    show_progress,
)
from compliant_demo.cli.common import (
    add_json_option,
    add_store_option,
    emit_json,
    emit_table,
    store_path_of,
)
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.perturbation import load_campaign_yaml
from compliant_demo.primitives import Skill
from compliant_demo.store import DemoStore

__all__ = ["register"]


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``campaign`` subcommand."""
    parser = subparsers.add_parser(
        "campaign",
        help="replay a skill under hundreds of seeded perturbations (local cores or Dask)",
        description=(
            "Draw perturbed scenarios (impulse N*m*s, torque step/window/sinusoid/random N*m, "
            "virtual wall N*m/rad, hold) from a campaign spec, replay the skill in each on the "
            "simulated plant in vectorised batches, and store every scenario's metrics (goal "
            "error rad, peak deviation rad, recovery time s, peak interaction torque N*m, "
            "energy injected J, limit violations) and trace as soon as its batch finishes. "
            "Scenario i's draw depends only on --seed and i, so local and Dask runs agree; "
            "an interrupted campaign resumes with --resume ID."
        ),
    )
    add_store_option(parser)
    add_skill_options(parser)
    add_plant_option(parser)
    parser.add_argument("--spec", type=Path, default=None, metavar="FILE",
                        help="campaign spec YAML (kinds, onset_s, duration_s, magnitude, "
                             "fields); default: every kind, sized for the cork_seat arm")
    parser.add_argument("--scenarios", type=positive_int, default=350, metavar="N",
                        help="perturbed scenarios (default: 350)")
    parser.add_argument("--seed", type=non_negative_int, default=0,
                        help="campaign seed (default: 0)")
    parser.add_argument("--duration", type=positive_float, default=None, metavar="S",
                        help="movement duration, s (default: the demonstrated one)")
    parser.add_argument("--settle", type=non_negative_float, default=1.0, metavar="S",
                        help="time simulated after the movement, s (default: 1.0)")
    parser.add_argument("--batch-size", type=positive_int, default=None, metavar="N",
                        help="scenarios per vectorised batch (default: about three batches "
                             "per worker, 8 to 100 each)")
    parser.add_argument("--resume", default=None, metavar="CAMPAIGN_ID",
                        help="continue this campaign with its stored settings; scenarios "
                             "already in the store are skipped")
    add_backend_options(parser)
    add_progress_option(parser)
    add_json_option(parser)
    parser.set_defaults(handler=_run)


def _job(store: DemoStore, args: argparse.Namespace) -> tuple[str, ReplayCampaign]:
    if args.resume is not None:
        campaign = store.get_campaign(args.resume)
        record = store.get_skill(campaign.skill_id)
        return record.id, ReplayCampaign.from_config(
            Skill.model_validate(record.payload), campaign.config)
    record, skill = read_skill(store, args)
    if args.spec is not None and not args.spec.is_file():
        raise InvalidInputError(f"--spec {str(args.spec)!r}: no such file")
    plant = read_plant(args)
    movement_s = skill.duration_s if args.duration is None else args.duration
    spec = (default_campaign_spec(len(skill.joints), movement_s) if args.spec is None
            else load_campaign_yaml(args.spec))
    return record.id, ReplayCampaign(skill, plant, spec, args.scenarios, seed=args.seed,
                                     duration_s=args.duration, settle_s=args.settle)


def _run(args: argparse.Namespace) -> int:
    with DemoStore(store_path_of(args), create=False, durable=False) as store:
        skill_id, job = _job(store, args)
        summary = run_campaign(store, job, skill_id=skill_id, campaign_id=args.resume,
                               batch_size=args.batch_size, workers=args.workers,
                               scheduler=args.scheduler, progress=show_progress(args))
        results = list(store.find_replay_results(campaign_id=summary.campaign_id))
    by_kind: dict[str, list[int]] = {}
    for result in results:
        counts = by_kind.setdefault(result.parameters.kind, [0, 0])
        counts[0] += 1
        counts[1] += result.status != "ok"
    if args.json:
        emit_json({
            "campaign_id": summary.campaign_id,
            "skill_id": skill_id,
            "scenarios": summary.n_scenarios,
            "run": summary.n_run,
            "skipped": summary.n_skipped,
            "violations": sum(counts[1] for counts in by_kind.values()),
            "backend": summary.backend,
            "workers": summary.workers,
            "wall_s": summary.wall_s,
            "scenarios_per_s": summary.scenarios_per_s,
            "per_kind": {kind: {"scenarios": c[0], "violations": c[1]}
                         for kind, c in sorted(by_kind.items())},
        })
    else:
        print(f"campaign {summary.campaign_id}: {summary.n_run} scenarios run, "
              f"{summary.n_skipped} already stored, {summary.wall_s:.1f} s on "
              f"{summary.backend} ({summary.workers} workers)")
        emit_table([{"kind": kind, "scenarios": c[0], "violations": c[1]}
                    for kind, c in sorted(by_kind.items())], ("kind", "scenarios", "violations"))
    return 0
