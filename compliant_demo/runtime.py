"""What the teacher, learner and replay nodes do, without ROS.

:class:`TeachingSession` hands out the samples of a series of simulated demonstrations as they
fall due in real time and keeps the teacher's own counts and ground truth. The learner node turns
its parameters into a :class:`LearnRequest` and calls :func:`learn_from_store`, which refuses
clearly (NotFoundError) when fewer demonstrations than required match the query. The replay
node steps a :class:`ReplayRun` (a skill's rollout on the simulated plant, one control period at a
time, with limit checks that stop it safely) and stores :meth:`ReplayRun.outcome`.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.models import (
    IdealImpedanceParams,
    JointParams,
    MechanismParams,
    load_yaml_model,
)

__all__ = [
    "ReplayPlant",
    "ReplayRun",
    "load_plant",
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
        arrays["joints"] = np.array(self.scenario.joint_names)
        np.savez(path, **arrays)  # type: ignore[arg-type]


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


class ReplayPlant(BaseModel):
    """The simulated target: one JointParams per joint and the shared mechanism."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    joints: tuple[JointParams, ...] = Field(..., min_length=1, description="Target joints.")
    mechanism: MechanismParams = Field(
        default_factory=lambda: IdealImpedanceParams.model_validate({}),
        description="Variable-stiffness mechanism.",
    )

    def for_joints(self, names: Sequence[str]) -> list[JointParams]:
        """The joint records for ``names``, in that order; InvalidInputError if one is missing."""
        by_name = {joint.name: joint for joint in self.joints}
        missing = [name for name in names if name not in by_name]
        if missing:
            raise InvalidInputError(
                f"plant joints {sorted(by_name)} lack {missing} that the skill moves"
            )
        return [by_name[name] for name in names]


def load_plant(path: str | Path | None) -> ReplayPlant:
    """The plant from a YAML file ``{joints: [...], mechanism: {kind: ...}}``; None or "" gives
    the teaching scenario's joints with the ideal variable-impedance mechanism."""
    if path:
        return load_yaml_model(ReplayPlant, path)
    from compliant_demo.teaching import cork_seat_scenario

    return ReplayPlant(joints=cork_seat_scenario().joints)


_TRACE_CHANNELS = (
    "q", "dq", "tau_mechanism", "tau_external", "stiffness_realised", "damping_realised",
)


class ReplayRun:
    """A skill replayed on the simulated plant one control period at a time.

    Parameters
    ----------
    skill : compliant_demo.primitives.Skill
    plant : ReplayPlant
    schedule : compliant_demo.perturbation.PerturbationSchedule or None
    dt : float, s
        Control period (one simulator step per period).
    duration_s : float, s, optional
        Movement duration; default the demonstrated one.
    settle_s : float, s
        Time simulated after the movement, to see it settle.
    goal : (n_joints,) array, rad, optional
        New goal; default the demonstrated one.
    method : str
        Integrator of :class:`compliant_demo.sim.Simulator`.
    seed : int
        Seeds sensor noise and unseeded random perturbations.
    max_stiffness_rate : float, N*m/rad/s
        Commanded stiffness may not change faster; a faster change stops the run.

    Notes
    -----
    Row k of the trace is the state after step k, at t = (k + 1) * dt, under command row k of
    the rollout, exactly as row k + 1 of :func:`compliant_demo.sim.simulate` run on the same
    commands (same seed). The run stops safely (no further steps) at the first step whose
    mechanism torque exceeds a joint's ``torque_limit``, whose angle leaves the joint's range, or
    whose commanded stiffness rate exceeds ``max_stiffness_rate``.
    """

    def __init__(
        self,
        skill: Any,
        plant: ReplayPlant,
        schedule: Any = None,
        *,
        dt: float = 1e-3,
        duration_s: float | None = None,
        settle_s: float = 0.5,
        goal: Sequence[float] | None = None,
        method: str = "rk4",
        seed: int = 0,
        max_stiffness_rate: float = float("inf"),
    ):
        from compliant_demo.sim import Simulator

        if not settle_s >= 0:
            raise InvalidInputError(f"settle_s: must be non-negative, got {settle_s}")
        if not max_stiffness_rate > 0:
            raise InvalidInputError(
                f"max_stiffness_rate: must be positive, got {max_stiffness_rate}"
            )
        self.skill = skill
        self.joints = plant.for_joints(skill.joints)
        self.mechanism = plant.mechanism
        self.schedule = schedule
        self.dt = float(dt)
        self.seed = int(seed)
        self.max_stiffness_rate = float(max_stiffness_rate)
        duration = skill.duration_s if duration_s is None else float(duration_s)
        self.rollout = skill.rollout(
            goal=goal,
            duration_s=duration,
            dt=self.dt,
            target_inertia=[joint.inertia for joint in self.joints],
            horizon_s=duration + settle_s,
        )
        self.n_steps = len(self.rollout.t) - 1
        self.simulator = Simulator(
            self.joints,
            self.mechanism,
            n_scenarios=1,
            dt=self.dt,
            method=method,
            q0=self.rollout.position[0],
            schedules=None if schedule is None else [schedule],
            seed=self.seed,
            horizon_steps=self.n_steps,
        )
        shape = (self.n_steps, len(self.joints))
        self._trace = {name: np.full(shape, np.nan) for name in _TRACE_CHANNELS}
        self.steps_done = 0
        self.stop_reason: str | None = None
        self.live_pushes = False
        self._method = method
        self._limits = (
            np.array([j.lower_limit for j in self.joints]),
            np.array([j.upper_limit for j in self.joints]),
            np.array([j.torque_limit for j in self.joints]),
        )

    @property
    def finished(self) -> bool:
        """True after the last step or a safety stop."""
        return self.stop_reason is not None or self.steps_done >= self.n_steps

    def commands(self, k: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Commanded equilibrium (rad), stiffness (N*m/rad) and damping (N*m*s/rad) of step k."""
        rollout = self.rollout
        return rollout.position[k], rollout.stiffness[k], rollout.damping[k]

    def step(self, live_torque: Sequence[float] | None = None) -> Any:
        """Advance one control period; returns the simulator's StepState (one scenario).

        Parameters
        ----------
        live_torque : (n_joints,) array, N*m, optional
            Extra external torque over this step (live perturbations from a topic).
        """
        if self.finished:
            raise InvalidInputError("replay already finished: no further step")
        k = self.steps_done
        equilibrium, stiffness, damping = self.commands(k)
        if live_torque is not None and any(live_torque):
            self.live_pushes = True
        state = self.simulator.step(equilibrium, stiffness, damping, external_torque=live_torque)
        for name in _TRACE_CHANNELS:
            self._trace[name][k] = getattr(state, name)[0]
        self.steps_done = k + 1
        self.stop_reason = self._violation(k, state)
        return state

    def _violation(self, k: int, state: Any) -> str | None:
        lower, upper, torque_limit = self._limits
        q, torque = state.q[0], state.tau_mechanism[0]
        t = (k + 1) * self.dt
        for j, joint in enumerate(self.joints):
            if abs(torque[j]) > torque_limit[j]:
                return (f"torque limit: {joint.name} mechanism torque {torque[j]:.3g} N*m "
                        f"beyond {torque_limit[j]:.3g} N*m at t = {t:.3f} s")
            if not lower[j] <= q[j] <= upper[j]:
                return (f"joint range: {joint.name} at {q[j]:.3g} rad outside "
                        f"[{lower[j]:.3g}, {upper[j]:.3g}] rad at t = {t:.3f} s")
        if k > 0:
            rate = np.abs(self.rollout.stiffness[k] - self.rollout.stiffness[k - 1]) / self.dt
            j = int(np.argmax(rate))
            if rate[j] > self.max_stiffness_rate:
                return (f"stiffness rate: {self.joints[j].name} commanded at {rate[j]:.3g} "
                        f"N*m/rad/s beyond {self.max_stiffness_rate:.3g} at t = {t:.3f} s")
        return None

    def _perturbation_windows(self) -> tuple[list[float], list[float]]:
        if self.schedule is None:
            return [], []
        end_of_run = self.n_steps * self.dt
        spans = sorted(
            (p.onset_s, min(p.onset_s + getattr(p, "duration_s", 0.0), end_of_run))
            for p in self.schedule.perturbations
            if p.onset_s <= end_of_run
        )
        return [a for a, _ in spans], [b for _, b in spans]

    def trace(self) -> dict[str, np.ndarray]:
        """The steps done so far: t (s) and per-joint channels (see Notes of the class)."""
        n = self.steps_done
        rollout = self.rollout
        trace = {"t": (np.arange(n) + 1) * self.dt}
        trace.update({name: values[:n].copy() for name, values in self._trace.items()})
        trace["equilibrium_commanded"] = rollout.position[:n].copy()
        trace["stiffness_commanded"] = rollout.stiffness[:n].copy()
        trace["damping_commanded"] = rollout.damping[:n].copy()
        return trace

    def outcome(self) -> tuple[str, str | None, dict[str, Any], dict[str, np.ndarray]]:
        """(status, reason, metrics, trace) for the store: status "ok", "stopped" (safety stop)
        or "aborted" (ended early without a violation). Metrics always hold ``steps`` and
        ``steps_planned``; the outcome metrics of :func:`compliant_demo.evaluation.outcome_metrics`
        need at least two steps."""
        trace = self.trace()
        n = self.steps_done
        if n == 0:
            raise InvalidInputError("replay has no step yet: nothing to evaluate")
        metrics: dict[str, Any] = {"steps": n, "steps_planned": self.n_steps}
        if n >= 2:  # outcome metrics need a time span
            metrics.update(self._metrics(trace))
        if self.stop_reason is not None:
            return "stopped", self.stop_reason, metrics, trace
        if n < self.n_steps:
            return "aborted", f"ended after {n} of {self.n_steps} steps", metrics, trace
        return "ok", None, metrics, trace

    def _metrics(self, trace: dict[str, np.ndarray]) -> dict[str, Any]:
        from compliant_demo.evaluation import outcome_metrics

        n = self.steps_done
        onsets, ends = self._perturbation_windows()
        return outcome_metrics(
            trace["t"],
            trace["q"],
            self.rollout.position[1 : n + 1],
            trace["tau_external"],
            trace["tau_mechanism"],
            self.rollout.position[-1],
            perturbation_onsets=onsets,
            perturbation_ends=ends,
            energy=self._energy(),
            joints=self.joints,
        )

    def _energy(self) -> dict[str, np.ndarray] | None:
        """Energy terms at the end of the steps done, J per joint; None after live pushes.

        The stepped simulator reports no energy bookkeeping, so the same commands and schedule
        go once more through :func:`compliant_demo.sim.simulate`, which follows the same states
        (the trace equals its samples). Live pushes are not part of that rerun, hence None.
        """
        from compliant_demo.sim import simulate

        if self.live_pushes:
            return None
        n = self.steps_done
        rollout = self.rollout
        result = simulate(
            self.joints, self.mechanism, rollout.position[:n], rollout.stiffness[:n],
            rollout.damping[:n], schedules=None if self.schedule is None else [self.schedule],
            q0=rollout.position[0], dt=self.dt, method=self._method, seed=self.seed,
            decimation=n,
        )
        return {name: values[0] for name, values in result.energy.final().items()}
