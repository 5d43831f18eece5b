"""What the teacher, learner and replay nodes do, without ROS.

:class:`TeachingSession` hands out the samples of a series of simulated demonstrations as they
fall due in real time and keeps the teacher's own counts and ground truth. The learner node turns
its parameters into a :class:`LearnRequest` and calls :func:`learn_from_store`, which refuses
clearly (NotFoundError) when fewer demonstrations than required match the query.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from compliant_demo.exceptions import InvalidInputError, NotFoundError

__all__ = [
    "TeachingSession",
    "LearnRequest",
    "LearnOutcome",
    "matching_demonstrations",
    "learn_from_store",
]


class TeachingSession:
    """A series of simulated demonstrations, handed out sample by sample as time passes.

    Parameters
    ----------
    scenario : compliant_demo.teaching.TeachingScenario
    n_demonstrations : int
    seed : int
        Demonstration i is ``simulate_teaching(scenario, seed + i)`` (as ``teaching_series``).
    """

    def __init__(self, scenario: Any, n_demonstrations: int, seed: int):
        if n_demonstrations < 1:
            raise InvalidInputError(
                f"n_demonstrations: must be at least 1, got {n_demonstrations}"
            )
        self.scenario = scenario
        self.n_demonstrations = int(n_demonstrations)
        self.seed = int(seed)
        self.published_counts: list[int] = []
        self._truth: list[tuple[np.ndarray, np.ndarray]] = []
        self._record: Any = None
        self._cursor = 0

    def next_demonstration(self) -> int:
        """Simulate the next demonstration and make it current; returns its index."""
        from compliant_demo.teaching import simulate_teaching

        index = len(self.published_counts)
        if index >= self.n_demonstrations:
            raise InvalidInputError(f"all {self.n_demonstrations} demonstrations were handed out")
        self._record = simulate_teaching(self.scenario, self.seed + index)
        self._cursor = 0
        self.published_counts.append(0)
        return index

    @property
    def current_samples(self) -> int:
        """Samples in the current demonstration."""
        return 0 if self._record is None else self._record.n_samples

    @property
    def current_published(self) -> int:
        """Samples of the current demonstration handed out so far."""
        return self._cursor

    @property
    def current_finished(self) -> bool:
        """True once every sample of the current demonstration was handed out."""
        return self._record is not None and self._cursor >= self._record.n_samples

    @property
    def all_finished(self) -> bool:
        """True once the last demonstration was handed out completely."""
        return len(self.published_counts) == self.n_demonstrations and self.current_finished

    def due(self, elapsed_s: float) -> Iterator[tuple[float, list, list, list, list]]:
        """Samples with ``t <= elapsed_s`` not handed out yet, in time order.

        Yields
        ------
        (t, position, velocity, torque, hand_stiffness_truth) : t in s, then per-joint lists
        in rad, rad/s, N*m and N*m/rad.
        """
        record = self._record
        start = self._cursor
        stop = int(np.searchsorted(record.t, elapsed_s, side="right"))
        if stop <= start:
            return
        self._cursor = stop
        self.published_counts[-1] = stop
        if stop == record.n_samples:
            self._truth.append((record.t, record.hand_stiffness_truth))
        yield from zip(
            record.t[start:stop].tolist(),
            record.position[start:stop].tolist(),
            record.velocity[start:stop].tolist(),
            record.torque[start:stop].tolist(),
            record.hand_stiffness_truth[start:stop].tolist(),
            strict=True,
        )

    def save_truth(self, path: Path) -> None:
        """Write per-demonstration ``count_<i>``, ``seed_<i>``, ``t_<i>`` (s) and
        ``stiffness_<i>`` ((n, n_joints) N*m/rad ground truth) to an .npz file."""
        arrays: dict[str, np.ndarray] = {}
        for index, count in enumerate(self.published_counts):
            arrays[f"count_{index}"] = np.array(count)
            arrays[f"seed_{index}"] = np.array(self.seed + index)
            if index < len(self._truth):
                arrays[f"t_{index}"], arrays[f"stiffness_{index}"] = self._truth[index]
        np.savez(path, joints=np.array(self.scenario.joint_names), **arrays)


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
