"""``compliant-demo report``: the HTML report (figures embedded) of a skill and its campaign."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from tqdm import tqdm

from compliant_demo.cli._job_options import (
    add_plant_option,
    add_progress_option,
    add_skill_options,
    positive_float,
    read_plant,
    show_progress,
)
from compliant_demo.cli.common import add_json_option, add_store_option, emit_json, store_path_of
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.report import GroundTruth, collect_report_content, write_report
from compliant_demo.store import DemoStore

__all__ = ["register", "DEFAULT_OUT"]

DEFAULT_OUT = Path("compliant_demo_report")


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``report`` subcommand."""
    parser = subparsers.add_parser(
        "report",
        help="write the HTML report of a skill and its campaign",
        description=(
            "Write report.html (self-contained: figures embedded, no external resources) and "
            "one PNG per figure into --out: the demonstrations with their aligned mean and "
            "spread, the stiffness estimate (N*m/rad) against the teacher's ground truth, the "
            "learned stiffness and damping ratio with flagged stretches, replays per "
            "perturbation kind against the unperturbed replay (rad), the campaign's metric "
            "distributions and a table of limit violations, with the safety cautions."
        ),
    )
    add_store_option(parser)
    add_skill_options(parser)
    parser.add_argument("--campaign", default=None, metavar="CAMPAIGN_ID",
                        help="campaign to show, its id or a unique prefix of it (default: the "
                             "skill version's latest)")
    parser.add_argument("--truth", type=Path, default=None, metavar="FILE",
                        help="the teacher's ground-truth .npz (t_<i>, stiffness_<i> N*m/rad "
                             "per demonstration, in recording order)")
    add_plant_option(parser)
    parser.add_argument("--min-damping-ratio", type=positive_float, default=0.5,
                        metavar="ZETA",
                        help="flag stretches whose damping ratio is below this (default: 0.5)")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, metavar="DIR",
                        help=f"output directory (default: ./{DEFAULT_OUT})")
    add_progress_option(parser)
    add_json_option(parser)
    parser.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    if args.truth is not None and not args.truth.is_file():
        raise InvalidInputError(f"--truth {str(args.truth)!r}: no such file")
    truth = None if args.truth is None else GroundTruth.from_npz(args.truth)
    plant = None if args.plant is None else read_plant(args)
    with tqdm(total=2, desc="report", unit="step", file=sys.stderr,
              disable=not show_progress(args), leave=False) as bar:
        with DemoStore(store_path_of(args), read_only=True, create=False) as store:
            content = collect_report_content(
                store, args.skill, version=args.skill_version,
                campaign_id=(None if args.campaign is None
                             else store.resolve_id("campaign", args.campaign)),
                plant=plant, truth=truth, min_damping_ratio=args.min_damping_ratio)
        bar.update(1)
        files = write_report(content, args.out)
        bar.update(1)
    if args.json:
        emit_json({"report": str(files.html), "figures": [str(p) for p in files.figures],
                   "summary": dict(content.summary)})
    else:
        for key, value in content.summary:
            print(f"{key}: {value}")
        print(f"report: {files.html}")
    return 0
