"""``compliant-demo campaign``: replay a skill under many seeded perturbations, in batches."""

from __future__ import annotations

import argparse
import shlex
import sys
from pathlib import Path

from compliant_demo.app.progress import campaign_progress
from compliant_demo.campaign import ReplayCampaign, run_campaign
from compliant_demo.cli._job_options import (
    add_backend_options,
    add_plant_option,
    add_progress_option,
    add_skill_options,
    add_target_options,
    non_negative_int,
    positive_int,
    read_goal,
    read_plant,
    read_skill,
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
    iso_utc,
    store_path_of,
)
from compliant_demo.learning import load_skill_by_id
from compliant_demo.readiness import assess_replays, record_verdict
from compliant_demo.replay import ReplaySetup
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
    add_target_options(parser)
    parser.add_argument("--batch-size", type=positive_int, default=None, metavar="N",
                        help="scenarios per vectorised batch (default: about three batches "
                             "per worker, 8 to 100 each)")
    parser.add_argument("--resume", default=None, metavar="CAMPAIGN_ID",
                        help="continue this campaign (its id or a unique prefix; see "
                             "'compliant-demo campaigns') with its stored settings; scenarios "
                             "already in the store are skipped")
    add_criteria_option(parser)
    add_backend_options(parser)
    add_progress_option(parser)
    add_json_option(parser)
    parser.set_defaults(handler=_run)
    listing = subparsers.add_parser(
        "campaigns",
        help="list the stored campaigns with their progress",
        description=(
            "List every campaign: its id (any unique prefix names it in --resume and "
            "--campaign), skill name and version, scenarios stored of those planned, and when "
            "it was created (UTC)."
        ),
    )
    add_store_option(listing)
    add_json_option(listing)
    listing.set_defaults(handler=_list)


def _list(args: argparse.Namespace) -> int:
    with DemoStore(store_path_of(args), read_only=True, create=False) as store:
        campaigns = store.list_campaigns()
    if args.json:
        emit_json([campaign.to_dict() for campaign in campaigns])
        return 0
    emit_table(
        [{"id": c.id, "skill": c.skill_name, "version": c.skill_version,
          "stored": c.scenarios_stored,
          "planned": "?" if c.scenarios_planned is None else c.scenarios_planned,
          "created": iso_utc(c.created)}
         for c in campaigns],
        ("id", "skill", "version", "stored", "planned", "created"),
    )  # fmt: skip
    return 0


def _job(
    store: DemoStore, args: argparse.Namespace, resume: str | None
) -> tuple[str, ReplayCampaign]:
    if resume is not None:
        campaign = store.get_campaign(resume)
        stored = load_skill_by_id(store, campaign.skill_id)
        return stored.record.id, ReplayCampaign.from_config(stored.skill, campaign.config)
    stored = read_skill(store, args)
    skill = stored.skill
    plant = read_plant(args)
    setup = ReplaySetup(skill, plant, duration_s=args.duration, settle_s=args.settle,
                        goal=read_goal(args, plant, skill.joints))
    spec = read_spec(args, setup)
    return stored.record.id, ReplayCampaign(setup, spec, args.scenarios, seed=args.seed)


def _resume_hint(store: DemoStore, path: Path, campaign_id: str, planned: int) -> str:
    stored = len(store.completed_scenarios(campaign_id))
    return (
        f"campaign {campaign_id}: interrupted with {stored} of {planned} scenarios stored; "
        f"resume with: compliant-demo campaign --store {shlex.quote(str(path.absolute()))} "
        f"--resume {campaign_id}"
    )


def _run(args: argparse.Namespace) -> int:
    path = store_path_of(args)
    criteria = read_criteria(args)
    with DemoStore(path, create=False, durable=False) as store:
        resume = None if args.resume is None else store.resolve_id("campaign", args.resume)
        skill_id, job = _job(store, args, resume)
        started: list[str] = []

        def announce(campaign_id: str) -> None:
            # the id on stderr the moment the campaign exists: an interrupted run can resume
            started.append(campaign_id)
            word = "resuming" if resume is not None else "started"
            print(f"campaign {campaign_id}: {word}", file=sys.stderr)

        try:
            with campaign_progress(show_progress(args), announce) as progress:
                summary = run_campaign(store, job, skill_id=skill_id, campaign_id=resume,
                                       batch_size=args.batch_size, workers=args.workers,
                                       scheduler=args.scheduler, on_start=progress.on_start,
                                       on_batch=progress.on_batch)
        except KeyboardInterrupt:
            if started:
                print(_resume_hint(store, path, started[0], job.n_scenarios), file=sys.stderr)
            raise
        results = list(store.find_replay_results(campaign_id=summary.campaign_id))
        verdict = assess_replays(criteria, job.setup, results)
        verdict_id = record_verdict(store, verdict, skill_id=skill_id, plant=job.plant,
                                    criteria=criteria, campaign_id=summary.campaign_id)
    by_kind: dict[str, list[int]] = {}
    for result in results:
        counts = by_kind.setdefault(result.parameters.kind, [0, 0])
        counts[0] += 1
        counts[1] += result.status != "ok"
    # scenarios with a wall the link never touched: reported as such, not as recovered
    untouched = sum(result.metrics.get("n_untouched", 0) > 0 for result in results)
    if args.json:
        emit_json({
            "campaign_id": summary.campaign_id,
            "skill_id": skill_id,
            "plant": job.plant.describe(),
            "scenarios": summary.n_scenarios,
            "run": summary.n_run,
            "skipped": summary.n_skipped,
            "violations": sum(counts[1] for counts in by_kind.values()),
            "untouched_walls": untouched,
            # with plant_variation: drawn factors against failure, strongest first (screening)
            "failure_drivers": [driver.as_dict() for driver in summary.failure_drivers],
            "backend": summary.backend,
            "workers": summary.workers,
            "wall_s": summary.wall_s,
            "scenarios_per_s": summary.scenarios_per_s,
            "per_kind": {kind: {"scenarios": c[0], "violations": c[1]}
                         for kind, c in sorted(by_kind.items())},
            **verdict.to_dict(),
            "verdict_id": verdict_id,
            "criteria_digest": criteria.digest,
            "plant_digest": job.plant.digest,
        })
    else:
        print(f"campaign {summary.campaign_id} on the {job.plant.describe()}: "
              f"{summary.n_run} scenarios run, "
              f"{summary.n_skipped} already stored, {summary.wall_s:.1f} s on "
              f"{summary.backend} ({summary.workers} workers); {untouched} with a wall "
              "never touched")
        emit_table([{"kind": kind, "scenarios": c[0], "violations": c[1]}
                    for kind, c in sorted(by_kind.items())], ("kind", "scenarios", "violations"))
        if summary.failure_drivers:
            print(f"plant variation, strongest with failure (screening): "
                  f"{summary.failure_drivers[0].describe()}")
        print_verdict(verdict)
        emit_caution()
    return 0
