"""What the learner node does, without ROS: select demonstrations, learn a skill, save it, report.

The learner node turns its parameters into a :class:`LearnRequest` and calls
:func:`learn_from_store`; the same call serves scripts. It refuses clearly (NotFoundError) when
fewer demonstrations than required match the query.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

from compliant_demo.exceptions import InvalidInputError, NotFoundError

__all__ = ["LearnRequest", "LearnOutcome", "matching_demonstrations", "learn_from_store"]


@dataclass(frozen=True)
class LearnRequest:
    """Which demonstrations to learn from and how.

    skill : skill name to select and to save under; tags : every one must be present;
    operator : exact match ("" = any); joints : joints to learn, in order; min_demonstrations : the
    least number of matching complete demonstrations; options : keyword arguments of
    :func:`compliant_demo.learning.learn_skill` (n_basis, alignment, stiffness_source, ...).
    """

    skill: str
    joints: tuple[str, ...]
    tags: tuple[str, ...] = ()
    operator: str = ""
    min_demonstrations: int = 2
    options: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if not self.skill:
            raise InvalidInputError("skill: must not be empty")
        if not self.joints:
            raise InvalidInputError("joints: need at least one joint name, got []")
        if self.min_demonstrations < 1:
            raise InvalidInputError(
                f"min_demonstrations: must be at least 1, got {self.min_demonstrations}"
            )


@dataclass(frozen=True)
class LearnOutcome:
    """A saved skill version with its fit report (one line per joint)."""

    skill_id: str
    name: str
    version: int
    demonstration_ids: tuple[str, ...]
    report: str


def matching_demonstrations(store: Any, request: LearnRequest) -> list[Any]:
    """Metadata of the complete demonstrations the request selects, oldest first."""
    return list(
        store.find_demonstrations(
            skill=request.skill,
            tag=list(request.tags) or None,
            operator=request.operator or None,
            status="complete",
        )
    )


def learn_from_store(store: Any, request: LearnRequest) -> LearnOutcome:
    """Learn ``request.skill`` from the matching demonstrations and save a new version.

    Raises
    ------
    NotFoundError
        Fewer than ``request.min_demonstrations`` complete demonstrations match.
    InvalidInputError
        The learner refuses the demonstrations or options (message from the learner).
    """
    from compliant_demo.learning import learn_skill, save_skill

    infos = matching_demonstrations(store, request)
    if len(infos) < request.min_demonstrations:
        query = _describe(request)
        raise NotFoundError(
            f"{len(infos)} complete demonstration(s) match {query}; "
            f"need at least {request.min_demonstrations}"
        )
    demos = [store.load_demonstration(info.id, joints=list(request.joints)) for info in infos]
    skill = learn_skill(demos, joints=list(request.joints), name=request.skill, **request.options)
    record = save_skill(store, skill)
    return LearnOutcome(
        skill_id=record.id,
        name=record.name,
        version=record.version,
        demonstration_ids=tuple(info.id for info in infos),
        report=_report(skill, record.version, len(infos)),
    )


def _describe(request: LearnRequest) -> str:
    parts = [f"skill={request.skill!r}"]
    if request.tags:
        parts.append(f"tags={list(request.tags)}")
    if request.operator:
        parts.append(f"operator={request.operator!r}")
    return ", ".join(parts)


def _report(skill: Any, version: int, n_demos: int) -> str:
    provenance = skill.provenance
    lines = [
        f"skill {skill.name!r} version {version} from {n_demos} demonstration(s), "
        f"{skill.n_basis} basis functions, stiffness {provenance.stiffness_source}"
    ]
    stiffness_rmse: Sequence[float | None] = provenance.stiffness_fit_rmse or [None] * len(
        skill.joints
    )
    for joint, rmse, k_rmse in zip(
        skill.joints, provenance.fit_rmse, stiffness_rmse, strict=True
    ):
        k_text = "-" if k_rmse is None else f"{k_rmse:.3g} N*m/rad"
        lines.append(f"  {joint}: position RMSE {rmse:.3g} rad, stiffness RMSE {k_text}")
    return "\n".join(lines)
