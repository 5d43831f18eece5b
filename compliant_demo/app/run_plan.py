"""What one run of the tour or of ``simulate-teaching`` uses, chosen before anything starts.

A run has a tag (its name in the store), a seed (drawn afresh unless one is given, so two runs
never record the same demonstrations unasked; the seed is reported so a run can be repeated), a
ROS domain of its own (held with :func:`compliant_demo.app.domains.lease_domain` while the run
lasts), and an output folder (by default a folder of its own under ``compliant_demo_runs/``) in
which its truth file and node log are named after the run, so nothing of an earlier run is ever
overwritten.
"""

from __future__ import annotations

import os
import random
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

from compliant_demo.app.domains import MAX_DOMAIN_ID, lease_domain
from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "RUNS_FOLDER",
    "DEFAULT_DOMAIN_ID",
    "RunPlan",
    "run_tag",
    "draw_seed",
    "preferred_domain",
    "unused_path",
    "planned_run",
]

#: Parent folder of every run's default output folder (relative to the working directory).
RUNS_FOLDER = Path("compliant_demo_runs")
#: First ROS domain tried when $ROS_DOMAIN_ID is not set.
DEFAULT_DOMAIN_ID = 17
_SEED_RANGE = 1_000_000  # drawn seeds are short enough to type back
_MAX_SUFFIX = 1000


@dataclass(frozen=True)
class RunPlan:
    """One run's tag, seed, ROS domain and files.

    Attributes
    ----------
    tag : tag of the run's demonstrations in the store
    seed : seed of the first demonstration (demonstration i uses seed + i) and of the campaign
    seed_drawn : the seed was drawn for this run (not given)
    domain_id : ROS_DOMAIN_ID of the run's node processes, held for the run
    out_dir : folder of the run's files
    truth_path : the teacher's ground-truth file of this run (new, never an earlier one)
    log_path : the node processes' log of this run
    """

    tag: str
    seed: int
    seed_drawn: bool
    domain_id: int
    out_dir: Path
    truth_path: Path
    log_path: Path

    def describe(self) -> str:
        """One line: tag, seed (and how to repeat it), ROS domain and output folder."""
        seed = f"seed {self.seed}" + (f" (drawn; --seed {self.seed} repeats it)"
                                      if self.seed_drawn else "")
        return (f"run {self.tag}: {seed}, ROS domain {self.domain_id}, files in "
                f"{self.out_dir.resolve()}")


def run_tag(prefix: str) -> str:
    """A tag naming one run: ``prefix``, its UTC start and the process id."""
    return f"{prefix}-{datetime.now(UTC):%Y%m%dT%H%M%SZ}-{os.getpid()}"


def draw_seed() -> int:
    """A fresh seed from the operating system's entropy, 0 to 999999."""
    return random.SystemRandom().randrange(_SEED_RANGE)


def preferred_domain() -> int:
    """$ROS_DOMAIN_ID when it is set to a valid id, else :data:`DEFAULT_DOMAIN_ID`."""
    text = os.environ.get("ROS_DOMAIN_ID", "")
    if text.isdigit() and int(text) <= MAX_DOMAIN_ID:
        return int(text)
    return DEFAULT_DOMAIN_ID


def unused_path(path: Path) -> Path:
    """``path`` if nothing exists there, else ``<stem>-2<suffix>``, ``-3`` ... (bounded)."""
    if not path.exists():
        return path
    for number in range(2, _MAX_SUFFIX):
        candidate = path.with_name(f"{path.stem}-{number}{path.suffix}")
        if not candidate.exists():
            return candidate
    raise InvalidInputError(f"{path.parent}: {_MAX_SUFFIX} files named {path.stem}-N exist; "
                            "choose another --out")


@contextmanager
def planned_run(
    tag: str, *, seed: int | None, domain_id: int | None, out_dir: Path | None
) -> Iterator[RunPlan]:
    """Choose the run's seed, ROS domain and files, and hold the domain for the block.

    Parameters
    ----------
    tag : the run's tag
    seed : the seed to use; None draws one
    domain_id : the ROS domain asked for (refused if another run holds it); None takes the first
        free one from :func:`preferred_domain` upward
    out_dir : the folder for the run's files; None is ``compliant_demo_runs/<tag>``
    """
    folder = out_dir if out_dir is not None else RUNS_FOLDER / tag
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InvalidInputError(f"--out {str(folder)!r}: cannot create ({exc.strerror})") from None
    chosen_seed = draw_seed() if seed is None else seed
    preferred = preferred_domain() if domain_id is None else domain_id
    with lease_domain(preferred, explicit=domain_id is not None) as held:
        yield RunPlan(
            tag=tag, seed=chosen_seed, seed_drawn=seed is None, domain_id=held, out_dir=folder,
            truth_path=unused_path(folder / f"teacher_truth_{tag}.npz"),
            log_path=unused_path(folder / f"nodes_{tag}.log"),
        )
