"""``compliant-demo report``: the HTML report (figures embedded) of a skill and its campaign."""

from __future__ import annotations

import argparse
from pathlib import Path

from compliant_demo.app.progress import progress_bar
from compliant_demo.app.report_content import GroundTruth, collect_report_content
from compliant_demo.app.run_plan import RUNS_FOLDER, run_tag
from compliant_demo.cli._job_options import (
    add_plant_option,
    add_progress_option,
    add_skill_options,
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
from compliant_demo.display import printable
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.report import write_report
from compliant_demo.store import DemoStore

__all__ = ["register"]


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``report`` subcommand."""
    parser = subparsers.add_parser(
        "report",
        help="write the HTML report of a skill and its campaign",
        description=(
            "Write report.html (self-contained: figures embedded, no external resources) and "
            "one PNG per figure into --out: the demonstrations with their aligned mean and "
            "spread, the stiffness estimate (N*m/rad) against the teacher's ground truth (drawn "
            "earlier by the latency the recorder stored with it: 0.31 s with its defaults), the "
            "learned stiffness and damping ratio with flagged stretches, replays per "
            "perturbation kind against the unperturbed replay (rad), the campaign's metric "
            "distributions and a table of limit violations, with the safety cautions; it opens "
            "with the readiness verdict against --criteria, each reason linked to its stretch "
            "or scenario."
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
    add_plant_option(parser, default_text="the plant the campaign ran on; without a campaign, "
                                          "the cork_seat bench arm on the ideal "
                                          "variable-impedance mechanism")
    add_criteria_option(parser)
    parser.add_argument("--out", type=Path, default=None, metavar="DIR",
                        help=f"output directory (default: a folder of its own, "
                             f"{RUNS_FOLDER}/report-<UTC>-<pid>, printed)")
    add_progress_option(parser)
    add_json_option(parser)
    parser.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    if args.truth is not None and not args.truth.is_file():
        raise InvalidInputError(f"--truth {str(args.truth)!r}: no such file")
    truth = None if args.truth is None else GroundTruth.from_npz(args.truth)
    plant = None if args.plant is None else read_plant(args)
    with progress_bar("report", 2, "step", show_progress(args)) as bar:
        with DemoStore(store_path_of(args), read_only=True, create=False) as store:
            content = collect_report_content(
                store, args.skill, version=args.skill_version,
                campaign_id=(None if args.campaign is None
                             else store.resolve_id("campaign", args.campaign)),
                plant=plant, truth=truth, criteria=read_criteria(args))
        bar.update(1)
        files = write_report(content, args.out or RUNS_FOLDER / run_tag("report"))
        bar.update(1)
    if args.json:
        emit_json({"report": str(files.html), "figures": [str(p) for p in files.figures],
                   "summary": dict(content.summary),
                   **(content.verdict.to_dict() if content.verdict is not None else {})})
    else:
        for key, value in content.summary:
            print(f"{printable(key)}: {printable(value)}")
        print(f"report: {printable(files.html.resolve())}")
        if content.verdict is not None:
            print_verdict(content.verdict)
        emit_caution()
    return 0
