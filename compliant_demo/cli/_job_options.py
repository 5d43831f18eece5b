"""Options shared by the learn, replay, campaign, report and tour subcommands, and their readers.

Every subcommand names a skill the same way (``--skill NAME [--version N]``), the simulated target
the same way (``--plant FILE``), and chooses where campaigns run the same way (``--workers N`` or
``--scheduler ADDRESS``). Values are checked here so that a bad one is one clear line.
"""

from __future__ import annotations

import argparse
import math
import sys
from collections.abc import Sequence
from pathlib import Path

from compliant_demo.campaign import default_campaign_spec
from compliant_demo.cli.common import existing_file, integer_in_range
from compliant_demo.display import printable
from compliant_demo.generalisation import check_goal
from compliant_demo.learning import StoredSkill, load_skill
from compliant_demo.perturbation import CampaignSpec, load_campaign_yaml
from compliant_demo.plant import DEFAULT_PLANT_FILE, ReplayPlant, load_plant
from compliant_demo.replay import DEFAULT_SETTLE_S, ReplaySetup
from compliant_demo.store import DemoStore

__all__ = [
    "DEFAULT_SKILL",
    "add_skill_options",
    "add_plant_option",
    "add_backend_options",
    "add_progress_option",
    "positive_int",
    "non_negative_int",
    "positive_float",
    "finite_float",
    "non_negative_float",
    "add_target_options",
    "read_goal",
    "read_spec",
    "read_plant",
    "read_skill",
    "show_progress",
]

DEFAULT_SKILL = "cork_seat"


def _number(low: float, inclusive: bool, text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"'{printable(text)[:40]}' is not a number") from None
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"{text!r} is not finite")
    if value < low or (value == low and not inclusive):
        bound = ">=" if inclusive else ">"
        raise argparse.ArgumentTypeError(f"{text!r} must be {bound} {low:g}")
    return value


#: argparse type: an integer >= 1 (every integer option goes through :func:`integer_in_range`).
positive_int = integer_in_range(1)

#: argparse type: an integer >= 0.
non_negative_int = integer_in_range(0)


def positive_float(text: str) -> float:
    """argparse type: a finite number > 0."""
    return _number(0.0, False, text)


def finite_float(text: str) -> float:
    """argparse type: a finite number."""
    return _number(-math.inf, True, text)


def non_negative_float(text: str) -> float:
    """argparse type: a finite number >= 0."""
    return _number(0.0, True, text)


def add_skill_options(parser: argparse.ArgumentParser) -> None:
    """``--skill NAME`` and ``--version N`` (latest when omitted)."""
    parser.add_argument("--skill", default=DEFAULT_SKILL,
                        help=f"skill name (default: {DEFAULT_SKILL})")
    parser.add_argument("--version", dest="skill_version", type=positive_int, default=None,
                        metavar="N", help="skill version (default: the latest)")


def add_plant_option(
    parser: argparse.ArgumentParser,
    default_text: str = f"the cork_seat bench arm on antagonistic springs "
                        f"(config/{DEFAULT_PLANT_FILE})",
) -> None:
    """``--plant FILE``: the simulated target joints and mechanism."""
    parser.add_argument(
        "--plant", type=Path, default=None, metavar="FILE",
        help="YAML with 'joints' (inertia kg*m^2, damping N*m*s/rad, limits rad, torque limit "
             f"N*m) and 'mechanism' (kind ideal or antagonistic, stiffness range N*m/rad); "
             f"default: {default_text}")


def add_target_options(parser: argparse.ArgumentParser) -> None:
    """``--goal RAD [RAD ...]``, ``--duration S`` and ``--settle S``: a new goal and movement
    duration, and the time simulated after the movement."""
    parser.add_argument("--goal", type=finite_float, nargs="+", default=None, metavar="RAD",
                        help="new goal, one angle per joint of the skill in its order, rad, "
                             "inside each joint's range (default: the demonstrated goal)")
    parser.add_argument("--duration", type=positive_float, default=None, metavar="S",
                        help="movement duration, s (default: the demonstrated one)")
    parser.add_argument("--settle", type=non_negative_float, default=DEFAULT_SETTLE_S,
                        metavar="S", help="time simulated after the movement, s (default: "
                                          f"{DEFAULT_SETTLE_S:g})")


def read_spec(args: argparse.Namespace, setup: ReplaySetup) -> CampaignSpec:
    """The campaign spec of ``--spec``, or the default one sized for ``setup``'s movement."""
    if args.spec is None:
        return default_campaign_spec(len(setup.skill.joints), setup.movement_s)
    return load_campaign_yaml(existing_file("--spec", args.spec))


def read_goal(args: argparse.Namespace, plant: ReplayPlant,
              joints: Sequence[str]) -> tuple[float, ...] | None:
    """The goal of ``--goal`` for the skill's ``joints`` on ``plant``, checked, or None."""
    if args.goal is None:
        return None
    return check_goal(args.goal, plant.for_joints(joints), "--goal")


def add_backend_options(parser: argparse.ArgumentParser) -> None:
    """``--workers N`` or ``--scheduler ADDRESS`` (mutually exclusive)."""
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--workers", type=non_negative_int, default=None, metavar="N",
                       help="local worker processes (default: every core; 0 runs in this "
                            "process)")
    group.add_argument("--scheduler", default=None, metavar="ADDRESS",
                       help="run the batches on this Dask scheduler (tcp://host:port) instead "
                            "(needs the 'dask' extra)")


def add_progress_option(parser: argparse.ArgumentParser) -> None:
    """``--quiet``: no progress bars on stderr."""
    parser.add_argument("--quiet", action="store_true",
                        help="no progress bars (shown on stderr when it is a terminal)")


def show_progress(args: argparse.Namespace) -> bool:
    """Progress bars on a terminal, unless ``--quiet`` (logs and pipes stay clean)."""
    return not args.quiet and sys.stderr is not None and sys.stderr.isatty()


def read_plant(args: argparse.Namespace) -> ReplayPlant:
    """The plant ``--plant`` names, or the default one."""
    return load_plant(None if args.plant is None else existing_file("--plant", args.plant))


def read_skill(store: DemoStore, args: argparse.Namespace) -> StoredSkill:
    """The stored skill of ``--skill``/``--version``."""
    return load_skill(store, args.skill, args.skill_version)
