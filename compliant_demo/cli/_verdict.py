"""The readiness verdict on the command line: ``--criteria FILE`` and the verdict's lines that
close the summaries of tour, campaign, replay and report (before the safety caution)."""

from __future__ import annotations

import argparse
from pathlib import Path

from compliant_demo.display import format_value, printable
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.readiness import CRITERIA_FILE, Criteria, Reason, Verdict, load_criteria

__all__ = ["add_criteria_option", "read_criteria", "print_verdict", "SHOWN_REASONS"]

#: Reasons a summary prints; ``--json`` and the report list them all.
SHOWN_REASONS = 8


def add_criteria_option(parser: argparse.ArgumentParser) -> None:
    """``--criteria FILE``: the acceptance criteria of the readiness verdict."""
    parser.add_argument(
        "--criteria", type=Path, default=None, metavar="FILE",
        help="readiness acceptance criteria YAML (thresholds with value, unit and why; one "
             f"entry per schedule check); default: the shipped config/{CRITERIA_FILE}")


def read_criteria(args: argparse.Namespace) -> Criteria:
    """The criteria ``--criteria`` names, or the shipped ones."""
    if args.criteria is not None and not args.criteria.is_file():
        what = "a directory, not a file" if args.criteria.is_dir() else "no such file"
        raise InvalidInputError(f"--criteria {str(args.criteria)!r}: {what}")
    return load_criteria(args.criteria)


def _reason_line(number: int, reason: Reason) -> str:
    where = "" if reason.joint is None else f" on {reason.joint}"
    span = ("" if reason.from_s is None or reason.to_s is None
            else f", {reason.from_s:.3g} to {reason.to_s:.3g} s")
    return (f"  {number}. {reason.check}{where}{span}: {format_value(reason.value)} against "
            f"{format_value(reason.threshold)} {reason.unit}")


def print_verdict(verdict: Verdict) -> None:
    """The verdict and its most severe reasons, one line each, on stdout."""
    if verdict.ready:
        print("verdict: ready (every acceptance criterion met in simulation)")
        return
    print(f"verdict: NOT READY ({len(verdict.reasons)} reason(s), most severe first)")
    for number, reason in enumerate(verdict.reasons[:SHOWN_REASONS], start=1):
        print(printable(_reason_line(number, reason)))
    hidden = len(verdict.reasons) - SHOWN_REASONS
    if hidden > 0:
        print(f"  ... and {hidden} more (--json and the report list them all)")
