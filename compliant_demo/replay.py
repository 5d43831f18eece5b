"""The one replay engine: a skill rolled out on a plant, simulated, checked against limits, scored.

Everything that replays a skill goes through here: the replay node and ``compliant-demo replay``
step a :class:`ReplayRun` one control period at a time (live pushes, safety stop at the first
violation); campaigns simulate whole batches of scenarios with :meth:`ReplaySetup.simulate`. Both
use the same :class:`ReplaySetup`: one rollout builder, one rule for the damping command, one
settle time, one limit check (:func:`compliant_demo.evaluation.first_limit_violation`), one way to
find perturbation windows (:meth:`PerturbationSchedule.windows`) and one set of outcome metrics,
measured against the unperturbed replay of the same setup.

The equilibrium command carries the path's inverse dynamics on the target plant by default
(``feedforward``, see :mod:`compliant_demo.sim.feedforward`): ``q_eq = q_d + K^-1 * tau_ID``, so
gravity and the path's accelerations no longer make the joint sag behind its commanded path and
an unperturbed replay's goal error measures tracking, not sag. ``feedforward=False`` sends the
taught path itself as the equilibrium, to show the sag.

The damping rule: a mechanism without a damping input (antagonistic springs) is sent no damping
command at all. It could not realise one; sending it anyway only draws a warning from the
simulator, and a trace listing a damping the joint never had would mislead whoever reads it.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray

from compliant_demo.energy_tank import scenario_energy
from compliant_demo.evaluation import ACTUATOR_LOADS, first_limit_violation, outcome_metrics
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.generalisation import check_goal
from compliant_demo.models import JointParams, MechanismParams
from compliant_demo.perturbation import PerturbationSchedule
from compliant_demo.plant import ReplayPlant
from compliant_demo.primitives import MAX_ROLLOUT_SAMPLES, Rollout, Skill
from compliant_demo.sim import SimResult, Simulator, StepState
from compliant_demo.sim.feedforward import feedforward_equilibrium, inverse_dynamics
from compliant_demo.store.records import ReplayParameters

__all__ = [
    "DEFAULT_SETTLE_S",
    "MAX_REPLAY_STEPS",
    "STEP_CHANNELS",
    "UNPERTURBED",
    "ReplayCommands",
    "ReplaySetup",
    "ReplayRun",
    "check_horizon",
    "damping_command",
    "warm_up",
]

#: Time simulated after the movement to watch it settle, s: the same for every replay.
DEFAULT_SETTLE_S = 1.0

#: Most control periods of one replay (movement plus settling): the skill's own rollout limit
#: (its command and trace arrays are held in memory), checked up front with the replay's names.
MAX_REPLAY_STEPS = MAX_ROLLOUT_SAMPLES

#: Per-joint channels a stepped replay records, each (n_steps, n_joints).
STEP_CHANNELS: tuple[str, ...] = (
    "q", "dq", "tau_mechanism", "tau_external", "stiffness_realised", "damping_realised",
)

#: The schedule of the reference replay that deviations are measured against.
UNPERTURBED = PerturbationSchedule(name="unperturbed")


def damping_command(
    mechanism: MechanismParams, damping: NDArray[np.float64]
) -> NDArray[np.float64] | None:
    """The damping command a mechanism is sent: ``damping``, or None when it has no damping input
    (see the module docstring for why)."""
    return damping if mechanism.has_damping_input else None


@dataclass(frozen=True)
class ReplayCommands:
    """Commands of every control period, row k held over [k*dt, (k+1)*dt).

    equilibrium : (n_steps, n_joints) rad; stiffness : (n_steps, n_joints) N*m/rad;
    damping : (n_steps, n_joints) N*m*s/rad, or None for mechanisms without a damping input;
    stiffness_rate : (n_steps, n_joints) N*m/rad/s, |change| of the stiffness command into row k
    (0 for the first row).
    """

    equilibrium: NDArray[np.float64]
    stiffness: NDArray[np.float64]
    damping: NDArray[np.float64] | None
    stiffness_rate: NDArray[np.float64]


def check_horizon(duration_s: float | None, settle_s: float, dt: float,
                  movement_s: float) -> None:
    """Refuse a movement shorter than one control period and a replay longer than
    :data:`MAX_REPLAY_STEPS` periods, naming the value (InvalidInputError).

    Parameters
    ----------
    duration_s : the movement duration asked for, s, or None (the demonstrated one)
    settle_s : time simulated after the movement, s
    dt : control period, s
    movement_s : the movement duration the replay will have, s
    """
    if duration_s is not None and not (math.isfinite(duration_s) and duration_s >= dt):
        raise InvalidInputError(f"duration_s: must be at least one control period ({dt:g} s), "
                                f"got {duration_s!r}")
    horizon_s = movement_s + settle_s
    if horizon_s / dt > MAX_REPLAY_STEPS:
        raise InvalidInputError(
            f"duration_s + settle_s = {horizon_s:.6g} s: more than {MAX_REPLAY_STEPS:,} "
            f"control periods of {dt:g} s (at most {MAX_REPLAY_STEPS * dt:g} s)")


@dataclass(frozen=True)
class ReplaySetup:
    """One skill on one plant: everything of a replay but its perturbations and seed.

    Parameters
    ----------
    skill : the learned skill
    plant : target joints (matched to the skill's joints by name) and mechanism
    dt : control period and integration step, s
    duration_s : movement duration, s; None = the demonstrated one
    settle_s : time simulated after the movement, s
    goal : new goal per joint, rad, finite and inside the plant's joint ranges; None = the
        demonstrated one
    method : integrator of :class:`compliant_demo.sim.Simulator`
    max_stiffness_rate : a commanded stiffness changing faster is a violation, N*m/rad/s
    feedforward : add the path's inverse dynamics to the equilibrium command (module docstring)
    """

    skill: Skill
    plant: ReplayPlant
    dt: float = 1e-3
    duration_s: float | None = None
    settle_s: float = DEFAULT_SETTLE_S
    goal: tuple[float, ...] | None = None
    method: str = "rk4"
    max_stiffness_rate: float = math.inf
    feedforward: bool = True

    def __post_init__(self) -> None:
        if not (math.isfinite(self.dt) and self.dt > 0):
            raise InvalidInputError(f"dt: must be a positive step in s, got {self.dt}")
        if not (math.isfinite(self.settle_s) and self.settle_s >= 0):
            raise InvalidInputError(f"settle_s: must be non-negative, got {self.settle_s}")
        check_horizon(self.duration_s, self.settle_s, self.dt, self.movement_s)
        if not self.max_stiffness_rate > 0:
            raise InvalidInputError(
                f"max_stiffness_rate: must be positive, got {self.max_stiffness_rate}"
            )
        joints = self.plant.for_joints(self.skill.joints)
        if self.goal is not None:
            check_goal(self.goal, joints, "goal")

    @cached_property
    def joints(self) -> list[JointParams]:
        """The plant's joint records in the skill's joint order."""
        return self.plant.for_joints(self.skill.joints)

    @property
    def movement_s(self) -> float:
        """Movement duration, s."""
        return self.skill.duration_s if self.duration_s is None else float(self.duration_s)

    @cached_property
    def rollout(self) -> Rollout:
        """The commanded movement and impedance schedule, movement plus settling."""
        return self.skill.rollout(
            goal=None if self.goal is None else list(self.goal),
            duration_s=self.movement_s,
            dt=self.dt,
            target_inertia=[joint.inertia for joint in self.joints],
            horizon_s=self.movement_s + self.settle_s,
        )

    @property
    def n_steps(self) -> int:
        """Control periods of the replay."""
        return len(self.rollout.t) - 1

    @cached_property
    def commands(self) -> ReplayCommands:
        """The commands of every control period (see :class:`ReplayCommands`)."""
        rollout, n = self.rollout, self.n_steps
        stiffness = rollout.stiffness[:n]
        rate = np.zeros_like(stiffness)
        rate[1:] = np.abs(np.diff(stiffness, axis=0)) / self.dt
        damping = damping_command(self.plant.mechanism, rollout.damping[:n])
        equilibrium = rollout.position[:n]
        if self.feedforward:
            torque = inverse_dynamics(
                self.joints, equilibrium, rollout.velocity[:n], rollout.acceleration[:n],
                chain=self.plant.chain, damping=damping,
            )
            mechanisms = self.plant.mechanisms_for(self.skill.joints)
            lowest = np.array([m.stiffness_min for m in mechanisms])
            highest = np.array([m.stiffness_max for m in mechanisms])
            # divide by the stiffness the mechanism will realise, not a command it clamps
            equilibrium = feedforward_equilibrium(
                equilibrium, np.clip(stiffness, lowest, highest), torque)
        return ReplayCommands(
            equilibrium=equilibrium,
            stiffness=stiffness,
            damping=damping,
            stiffness_rate=rate,
        )

    def parameters(
        self,
        source: Literal["command", "node"],
        schedule: PerturbationSchedule | None,
        seed: int,
        *,
        skill_version: int | None = None,
        plant_file: str | None = None,
        schedule_file: str | None = None,
        real_time: bool | None = None,
    ) -> ReplayParameters:
        """The record a replay result stores about how it was run (one shape for every source:
        ``"command"`` or ``"node"``; campaign rows keep their settings in the campaign)."""
        return ReplayParameters(
            source=source,
            kind="none" if schedule is None else schedule.kind_label,
            schedule=None if schedule is None else schedule.model_dump(mode="json"),
            skill_version=skill_version,
            plant=self.plant.model_dump(mode="json"),
            plant_file=plant_file or None,
            schedule_file=schedule_file or None,
            dt=self.dt,
            duration_s=self.duration_s,
            settle_s=self.settle_s,
            goal=None if self.goal is None else list(self.goal),
            seed=int(seed),
            method=self.method,
            max_stiffness_rate=(self.max_stiffness_rate if math.isfinite(self.max_stiffness_rate)
                                else None),
            real_time=real_time,
        )

    def simulator(
        self, schedules: Sequence[PerturbationSchedule] | None, seed: int,
        plant: ReplayPlant | None = None,
    ) -> Simulator:
        """A simulator of this setup for one scenario per schedule (one unperturbed if None), on
        ``plant`` (default: this setup's; the commands always come from this setup's)."""
        target = self.plant if plant is None else plant
        return Simulator(
            self.joints if plant is None else target.for_joints(self.skill.joints),
            target.mechanisms_for(self.skill.joints),
            n_scenarios=1 if schedules is None else len(schedules),
            dt=self.dt,
            method=self.method,
            q0=self.rollout.position[0],
            schedules=None if schedules is None else list(schedules),
            seed=int(seed),
            horizon_steps=self.n_steps,
            chain=target.chain,
        )

    def simulate(
        self, schedules: Sequence[PerturbationSchedule], seed: int, *, decimation: int = 1,
        plant: ReplayPlant | None = None,
    ) -> SimResult:
        """Simulate one scenario per schedule under this setup's commands, in one batch.

        ``plant`` (same joints) replaces the simulated plant while the commands stay those
        computed on this setup's plant: a controller built on a nominal model driving a plant
        whose parameters differ (:mod:`compliant_demo.plant_variation`).
        """
        commands = self.commands
        return self.simulator(schedules, seed, plant).run(
            commands.equilibrium, commands.stiffness, commands.damping, decimation=decimation
        )

    def violation(
        self, t: NDArray[np.float64], q: NDArray[np.float64], torque: NDArray[np.float64],
        steps: NDArray[np.intp], loads: Mapping[str, NDArray[np.float64]] | None = None,
    ) -> str | None:
        """The first limit violation among samples at times ``t`` (s) reached after control
        periods ``steps`` (index of the command in force), or None; ``loads`` are the samples'
        spring tensions and motor torques (N*m), checked against the mechanism's limits."""
        rate = self.commands.stiffness_rate[np.clip(steps, 0, self.n_steps - 1)]
        return first_limit_violation(t, q, torque, self.joints, stiffness_rate=rate,
                                     max_stiffness_rate=self.max_stiffness_rate, loads=loads,
                                     mechanisms=self.plant.mechanisms_for(self.skill.joints))

    def metrics(
        self,
        t: NDArray[np.float64],
        q: NDArray[np.float64],
        nominal: NDArray[np.float64],
        tau_external: NDArray[np.float64],
        tau_mechanism: NDArray[np.float64],
        schedule: PerturbationSchedule | None,
        energy: Mapping[str, Any] | None,
        recovery_band: float = 0.02,
    ) -> dict[str, Any]:
        """Outcome metrics of one replay (see :func:`compliant_demo.evaluation.outcome_metrics`)
        plus one number per metric for distributions: the worst joint and the slowest recovery
        among the perturbations that acted (None when one of them was not recovered from, or
        none acted: no perturbation, or only walls the link never touched)."""
        onsets, ends = ([], []) if schedule is None else schedule.windows(float(t[-1]))
        metrics = outcome_metrics(
            t, q, nominal, tau_external, tau_mechanism, self.rollout.position[-1],
            perturbation_onsets=onsets, perturbation_ends=ends, energy=energy,
            joints=self.joints, recovery_band=recovery_band,
            perturbation_acted=None if schedule is None else schedule.acted(t, q),
        )
        recovery = [r for r, status in zip(metrics["recovery_time_s"],
                                           metrics["perturbation_status"], strict=True)
                    if status != "untouched"]
        metrics.update({
            "peak_deviation_max_rad": float(max(metrics["peak_deviation_rad"])),
            "peak_interaction_torque_max_Nm": float(max(metrics["peak_interaction_torque_Nm"])),
            "recovery_time_max_s": (
                None if not recovery or any(r is None for r in recovery) else float(max(recovery))
            ),
        })
        return metrics


def warm_up(plant: ReplayPlant, method: str = "rk4") -> None:
    """Compile, or load from numba's cache, the simulator kernels a replay on ``plant`` runs.

    A first compile takes tens of seconds and a cached load a fraction of one: a caller that
    steps in real time (the replay node) calls this before it takes requests, so neither its
    first step, nor a live push, nor the whole-run simulation at the end stalls it.

    Parameters
    ----------
    plant : the simulated target
    method : integrator of :class:`compliant_demo.sim.Simulator`
    """
    names = [joint.name for joint in plant.joints]
    zeros = np.zeros(len(names))
    simulator = Simulator(list(plant.joints), plant.mechanisms_for(names), n_scenarios=1,
                          method=method, horizon_steps=4, chain=plant.chain)
    simulator.step(zeros, zeros)
    simulator.step(zeros, zeros, external_torque=zeros)
    simulator.run(np.zeros((2, len(names))), np.zeros((2, len(names))))


class ReplayRun:
    """A replay stepped one control period at a time, with a safety stop.

    Parameters
    ----------
    setup : ReplaySetup
    schedule : scheduled perturbations, or None
    seed : seeds sensor noise and random perturbations without their own seed

    Notes
    -----
    Row k of the trace is the state after step k, at t = (k + 1) * dt, under command row k,
    exactly as row k + 1 of :meth:`ReplaySetup.simulate` on the same schedule and seed. The run
    stops safely (no further steps) at the first step whose state or command violates a limit
    (:meth:`ReplaySetup.violation`).
    """

    def __init__(
        self, setup: ReplaySetup, schedule: PerturbationSchedule | None = None, *, seed: int = 0
    ):
        self.setup = setup
        self.schedule = schedule
        self.seed = int(seed)
        self.n_steps = setup.n_steps
        self._simulator = setup.simulator(None if schedule is None else [schedule], self.seed)
        shape = (self.n_steps, len(setup.joints))
        self._trace = {name: np.full(shape, np.nan) for name in STEP_CHANNELS}
        self.steps_done = 0
        self.stop_reason: str | None = None
        self.live_pushes = False

    @property
    def skill(self) -> Skill:
        """The replayed skill."""
        return self.setup.skill

    @property
    def joints(self) -> list[JointParams]:
        """The plant's joint records in the skill's joint order."""
        return self.setup.joints

    @property
    def dt(self) -> float:
        """Control period, s."""
        return self.setup.dt

    @property
    def finished(self) -> bool:
        """True after the last step or a safety stop."""
        return self.stop_reason is not None or self.steps_done >= self.n_steps

    def commands(self, k: int) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        """Commanded equilibrium (rad), stiffness (N*m/rad) and damping (N*m*s/rad, None when the
        mechanism has no damping input) of step k."""
        commands = self.setup.commands
        damping = None if commands.damping is None else commands.damping[k]
        return commands.equilibrium[k], commands.stiffness[k], damping

    def step(self, live_torque: Sequence[float] | None = None) -> StepState:
        """Advance one control period; returns the simulator's StepState (one scenario).

        Parameters
        ----------
        live_torque : (n_joints,) array, N*m, optional
            Extra external torque over this step (live perturbations from a topic).
        """
        if self.finished:
            raise InvalidInputError("replay already finished: no further step")
        k = self.steps_done
        if live_torque is not None and any(live_torque):
            self.live_pushes = True
        state = self._simulator.step(*self.commands(k), external_torque=live_torque)
        for name in STEP_CHANNELS:
            self._trace[name][k] = getattr(state, name)[0]
        self.steps_done = k + 1
        self.stop_reason = self.setup.violation(
            np.array([state.t]), state.q, state.tau_mechanism, np.array([k]),
            {name: getattr(state, name) for name in ACTUATOR_LOADS},
        )
        return state

    def trace(self) -> dict[str, np.ndarray]:
        """The steps done so far: t (s) and per-joint channels (see Notes of the class)."""
        n = self.steps_done
        commands = self.setup.commands
        trace = {"t": (np.arange(n) + 1) * self.dt}
        trace.update({name: values[:n].copy() for name, values in self._trace.items()})
        trace["equilibrium_commanded"] = commands.equilibrium[:n].copy()
        trace["stiffness_commanded"] = commands.stiffness[:n].copy()
        if commands.damping is not None:
            trace["damping_commanded"] = commands.damping[:n].copy()
        return trace

    def outcome(self) -> tuple[str, str | None, dict[str, Any], dict[str, np.ndarray]]:
        """(status, reason, metrics, trace) for the store: status "ok", "stopped" (safety stop)
        or "aborted" (ended early without a violation). Metrics always hold ``steps`` and
        ``steps_planned``; the outcome metrics of :meth:`ReplaySetup.metrics` need at least two
        steps."""
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
        """Metrics of the steps done, against the unperturbed replay of the same setup.

        The stepped simulator keeps no energy bookkeeping, so the scheduled scenario and the
        unperturbed one go once more through :meth:`ReplaySetup.simulate` (which follows the
        same states: the trace equals its samples). Live pushes are not part of that rerun, so
        the energy terms are None after them.
        """
        n = self.steps_done
        schedule = self.schedule or UNPERTURBED
        rerun = self.setup.simulate([schedule, UNPERTURBED], self.seed)
        # rows 0..n: from the start of the run (row 0) to the state after the last step done
        energy = None if self.live_pushes else scenario_energy(rerun, 0, slice(0, n + 1))
        return self.setup.metrics(
            trace["t"], trace["q"], rerun.q[1 : n + 1, 1, :], trace["tau_external"],
            trace["tau_mechanism"], self.schedule, energy,
        )
